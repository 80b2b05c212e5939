"""Conditional Gaussian simulation of a kriged surface (conditioning by kriging).

Each realisation honours the data and the fitted variogram, so a quantity that
adds up cells (a volume) gets the spread that the spatial covariance implies;
treating cells as independent would understate it. The method is the classic
one of [Journel & Huijbregts 1978, ch. VII] and [Deutsch & Journel 1998,
s. V.2.4 (GSLIB)]:

1. draw an unconditional realisation :math:`Y_s` of the signal, with the
   covariance :math:`C(h) = c_0 \\delta(h) + c\\,(1 - g(h/a))` of the fitted
   variogram, jointly at the target nodes and at the data (Cholesky factor
   of the covariance matrix, [Davis 1987]);
2. add a draw of each datum's measurement error, :math:`Z_s = Y_s + \\varepsilon`;
3. krige :math:`Z_s` with the *same* kriging (variogram, measurement-error
   variances, neighbourhood) that made the map, :math:`\\hat Y_s`;
4. the conditional realisation is :math:`\\hat Y + (Y_s - \\hat Y_s)`,
   :math:`\\hat Y` the kriged map.

Because step 3 uses the map's own weights, the realisations' mean at a node is
the kriged value and their variance its kriging variance (up to sampling
error): for any set of ordinary kriging weights :math:`\\lambda`,
:math:`E[(Y_0 - \\sum \\lambda_i Z_i)^2] = \\sum_i \\lambda_i \\gamma_{i0} + \\mu`
is the kriging variance of the map.

References
----------
[Journel & Huijbregts 1978] Mining Geostatistics. Academic Press, ch. VII.
[Deutsch & Journel 1998] GSLIB: Geostatistical Software Library and User's
    Guide, 2nd ed. Oxford University Press, s. V.2.4.
[Davis 1987] Davis, M. W. (1987). Production of conditional simulations via
    the LU triangular decomposition of the covariance matrix. Mathematical
    Geology 19(2), 91-98.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..errors import SurfaceError
from ..progress import NullProgress, check_cancel

__all__ = ["MAX_SIMULATION_POINTS", "ConditionalSimulation", "kriging_weights", "simulate_conditional"]

#: Most target nodes plus data in one joint Cholesky factor (a 4000^2 matrix is 128 MB).
MAX_SIMULATION_POINTS = 4000


@dataclass(frozen=True)
class ConditionalSimulation:
    """Conditional realisations at target nodes.

    Attributes
    ----------
    values : ndarray (m, n_sims)
        Simulated elevations (m) at the m targets.
    jitter : float
        Variance (m^2) added to the diagonal of the covariance so that its
        Cholesky factor exists (0 when none was needed).
    """

    values: np.ndarray
    jitter: float


def kriging_weights(variogram, x, y, error_variance, tx, ty, neighbours=32):
    """Ordinary kriging weights with measurement error, one row per target.

    The system is that of :class:`~.kriging.OrdinaryKriging` (variogram
    form, :math:`-e_i` on the diagonal, a Lagrange row), solved for the
    ``neighbours`` nearest data of each target; the weights are returned so
    that many data vectors can be kriged at once.

    Returns
    -------
    idx : ndarray (m, k) of int
        Data index of each target's neighbours.
    weights : ndarray (m, k)
        Their weights (each row sums to 1).
    variance : ndarray (m,)
        Kriging variance (m^2) of each target.
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    e = np.broadcast_to(np.asarray(error_variance, float), x.shape)
    tx, ty = np.asarray(tx, float).ravel(), np.asarray(ty, float).ravel()
    n = x.size
    k = n if neighbours is None else min(int(neighbours), n)
    ox, oy = float(np.mean(x)), float(np.mean(y))
    xc, yc = x - ox, y - oy
    tree = cKDTree(np.column_stack([xc, yc]))
    _, idx = tree.query(np.column_stack([tx - ox, ty - oy]), k=k)
    idx = np.asarray(idx).reshape(len(tx), k)
    s = variogram.total_sill
    weights = np.empty((len(tx), k))
    variance = np.empty(len(tx))
    chunk = max(16, int(4e6 // ((k + 1) ** 2)))
    for a in range(0, len(tx), chunk):
        sl = slice(a, a + chunk)
        ii = idx[sl]
        xs, ys = xc[ii], yc[ii]
        c = len(ii)
        m = np.empty((c, k + 1, k + 1))
        m[:, :k, :k] = variogram(np.hypot(xs[:, :, None] - xs[:, None, :], ys[:, :, None] - ys[:, None, :])) / s
        r = np.arange(k)
        m[:, r, r] = -e[ii] / s
        m[:, k, :k] = 1.0
        m[:, :k, k] = 1.0
        m[:, k, k] = 0.0
        b = np.empty((c, k + 1))
        b[:, :k] = variogram(np.hypot(xs - (tx[sl] - ox)[:, None], ys - (ty[sl] - oy)[:, None])) / s
        b[:, k] = 1.0
        try:
            sol = np.linalg.solve(m, b[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError as exc:
            raise SurfaceError(
                f"a kriging system of the simulation is singular ({exc}): data at one place without error variance"
            ) from exc
        weights[sl] = sol[:, :k]
        variance[sl] = (np.einsum("ij,ij->i", sol[:, :k], b[:, :k]) + sol[:, k]) * s
    return idx, weights, np.maximum(variance, 0.0)


def _covariance(variogram, xy):
    d = np.hypot(xy[:, 0][:, None] - xy[:, 0][None, :], xy[:, 1][:, None] - xy[:, 1][None, :])
    return variogram.covariance(d)


def _cholesky(cov, sill):
    from scipy.linalg import LinAlgError, cholesky

    jitter = 0.0
    for rel in (0.0, 1e-10, 1e-8, 1e-6, 1e-4):
        jitter = rel * sill
        try:
            a = cov + jitter * np.eye(len(cov)) if jitter else cov
            return cholesky(a, lower=True, check_finite=False), jitter
        except LinAlgError:
            continue
    raise SurfaceError(
        "the covariance matrix of the simulation is not positive definite even with a jitter of "
        f"{1e-4 * sill:.3g} m2 on its diagonal"
    )


def simulate_conditional(
    variogram,
    data_x,
    data_y,
    error_variance,
    target_x,
    target_y,
    kriged_mean,
    n_simulations: int = 500,
    seed: int = 1,
    neighbours=32,
    progress=None,
) -> ConditionalSimulation:
    """Conditional realisations of the surface at target nodes (see the module docstring).

    Parameters
    ----------
    variogram : VariogramModel
        The model the map was kriged with (of the residuals from the trend).
    data_x, data_y : array_like (n,)
        Data positions (m).
    error_variance : array_like (n,) or float
        Measurement-error variance of each datum (m^2), as in the map.
    target_x, target_y : array_like (m,)
        Nodes to simulate (m).
    kriged_mean : array_like (m,)
        The map at the nodes (m): trend plus kriged residual.
    n_simulations : int
    seed : int
        Seed of :func:`numpy.random.default_rng` (same seed, same realisations).
    neighbours : int or None
        The map's kriging neighbourhood.
    progress : optional
        Checked for cancellation.

    Returns
    -------
    ConditionalSimulation
    """
    progress = progress or NullProgress()
    dx, dy = np.asarray(data_x, float), np.asarray(data_y, float)
    tx, ty = np.asarray(target_x, float).ravel(), np.asarray(target_y, float).ravel()
    e = np.broadcast_to(np.asarray(error_variance, float), dx.shape).astype(float)
    mean = np.asarray(kriged_mean, float).ravel()
    m, n = tx.size, dx.size
    if mean.shape != (m,):
        raise ValueError(f"kriged_mean has {mean.size} values for {m} targets")
    idx, lam, _ = kriging_weights(variogram, dx, dy, e, tx, ty, neighbours)
    used = np.unique(idx)  # only data that enter some target's neighbourhood need a value
    if m + used.size > MAX_SIMULATION_POINTS:
        raise SurfaceError(
            f"a joint simulation of {m} nodes and {used.size} data exceeds {MAX_SIMULATION_POINTS} points: "
            "simulate on a coarser set of nodes or a smaller area"
        )
    check_cancel(progress)
    xy = np.concatenate([np.column_stack([tx, ty]), np.column_stack([dx[used], dy[used]])])
    xy = xy - xy.mean(axis=0)
    low, jitter = _cholesky(_covariance(variogram, xy), variogram.total_sill)
    check_cancel(progress)
    rng = np.random.default_rng(seed)
    y_s = low @ rng.standard_normal((m + used.size, int(n_simulations)))
    z_data = np.zeros((n, int(n_simulations)))
    z_data[used] = y_s[m:] + np.sqrt(e[used])[:, None] * rng.standard_normal((used.size, int(n_simulations)))
    kriged_s = np.empty((m, int(n_simulations)))
    step = max(1, int(4e6 // (idx.shape[1] * int(n_simulations))))  # ~32 MB of gathered data per chunk
    for a in range(0, m, step):
        kriged_s[a : a + step] = np.einsum("ik,iks->is", lam[a : a + step], z_data[idx[a : a + step]])
    return ConditionalSimulation(values=mean[:, None] + y_s[:m] - kriged_s, jitter=float(jitter))
