r"""The relief prior's sill checked by leaving out one survey line at a time (a predictive check on the picks).

Type-II maximum likelihood (:mod:`.evidence`) chooses each interface's
Matern prior as the one under which the picks are most probable. The picks
sample an interface densely along the lines and not at all between them, so
the sill it finds is told mostly by the relief along the lines, and the map's
sigma between the lines rests on the assumption that the relief there is a
typical draw of that prior. Whether it is can be checked with the data
themselves: leave one line's picks out, predict the interface under that
line from the others, and compare the prediction error with the variance the
posterior claims for it. This is the cross-validation check of a kriging
model, where the mean squared standardised error should be 1 and a sill is
rescaled when it is not [Chiles & Delfiner 2012, s. 2.6.4]; as an estimator
of a Gaussian process's variance it is more robust than maximum likelihood
when the covariance family is not the truth's [Bachoc 2013].

The problem is linearised at the current optimum (Jacobian J of the
weighted residuals r, prior precision P, normal matrix A = J^T J + P, plus
the boreholes, which are never left out). Leaving out the picks of line L
(:func:`held_out`) gives :math:`A_{-L} = A - J_L^T J_L` and
:math:`g_{-L} = g - J_L^T r_L`; with the rows W that read an interface at
points, the posterior means with and without the line differ by
:math:`e = W (A_{-L}^{-1} g_{-L} - A^{-1} g)`, which for a linear Gaussian
model has covariance :math:`V = W (A_{-L}^{-1} - A^{-1}) W^T` (the full
posterior mean is the conditional expectation, so its error is independent
of the difference). The points are the line's reflection points, one per
node cell they fall in (the mean of the points in the cell). The ratio
(:func:`pool`)

.. math::

    \hat c = \frac{1}{n} \sum_i \frac{e_i^2}{V_{ii}}

over every line's points is 1 in expectation when the prior is right; its
errors are correlated along a line, so it carries only about
:math:`\nu = n^2 / \sum_L \mathrm{tr}(R_L^2)` degrees of freedom (R the
correlation of a line's standardised errors) [Satterthwaite 1946], 10 to 30
on four lines. :func:`check_sills` changes the sill until the check gives the
variance factor's posterior mean, :math:`\nu \hat c / (\nu - 2)`
[Gelman et al. 2013, s. 3.2]: where the prior governs the prediction (between
the lines) the variance follows the sill's square, and the predictions
hardly move (a kriging predictor does not depend on the sill when the data
are precise); near the lines the picks keep the variance.

Measured on the issue's test sites (smooth truths: a knoll on a dipping
plane, a buried valley) the check finds the sill too large: ratios 0.64 and
0.62 for the bedrock and the water table of the eikonal layered site, 0.42 for
the buried valley, each with 14-18 degrees of freedom (0.59, 0.68 and 0.38-0.44
before the prior search ended with its polish, :func:`~.evidence.polish`); for relief drawn from
the prior class itself, 0.79, 0.58 and 1.30 (three draws, 21-26 degrees of
freedom).

References
----------
[Chiles & Delfiner 2012] Chiles, J.-P. & Delfiner, P. (2012). Geostatistics:
    Modeling Spatial Uncertainty, 2nd ed. Wiley, s. 2.6.4 (cross-validation).
[Bachoc 2013] Bachoc, F. (2013). Cross validation and maximum likelihood
    estimations of hyper-parameters of Gaussian processes with model
    misspecification. Computational Statistics & Data Analysis 66, 55-69.
[Satterthwaite 1946] Satterthwaite, F. E. (1946). An approximate distribution
    of estimates of variance components. Biometrics Bulletin 2(6), 110-114.
[Gelman et al. 2013] Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B.,
    Vehtari, A. & Rubin, D. B. (2013). Bayesian Data Analysis, 3rd ed. CRC
    Press, s. 3.2 (normal model with unknown variance).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..progress import check_cancel
from .factor import NormalFactor
from .nodes import node_weights
from .prior import matern_precision
from .system import borehole_matrix, jacobian, normal_matrix, parameters, prior_mean, small_prior_precision, trend_basis

__all__ = [
    "DENSE_GROUPS",
    "DENSE_MAX",
    "MAX_GROUPS",
    "MIN_DOF",
    "MIN_LINES",
    "POINT_CELLS",
    "LineCheck",
    "check_sills",
    "held_out",
    "pool",
    "usable",
]

MIN_DOF = 4.0  # fewer equivalent degrees of freedom: the ratio is too uncertain to rescale a sill (see check_sills)
POINT_CELLS = 2  # one compared point per square of 2 x 2 node cells (closer points add little: they correlate)
MAX_GROUPS = 8  # more lines are dealt into this many groups, each left out in turn (k-fold by lines)
MIN_LINES = 3  # lines with picks of an interface needed: with two, one left out leaves a single line's relief
DENSE_MAX = 6000  # unknowns up to which the check inverts A densely (p^2 numbers: 290 MB at most)
# groups of lines from which one dense inverse pays: the sparse LUs cost one per group and the full A,
# the dense inverse a fixed p^3 (measured on 2 cores at load 2-5: 8 groups of 16 lines, 3,710 unknowns,
# 15 s of sparse LUs against 8 s; 4 lines, 2,749 unknowns, 1.0 s against 1.8 s); between the two
DENSE_GROUPS = 6


@dataclass(frozen=True)
class LineCheck:
    """Leave-one-line-out check of one interface's prior.

    Attributes
    ----------
    ratio : float
        Mean squared standardised prediction error c (1 for a right sill; NaN when not checked).
    n_points : int
        Points compared (one per node cell under each left-out line).
    n_lines : int
        Lines left out in turn.
    dof : float
        Equivalent degrees of freedom of ``ratio`` (its variance is ``2 c^2 / dof``).
    """

    ratio: float
    n_points: int
    n_lines: int
    dof: float = 0.0


def _rows(layout, k, x, y):
    """Sparse rows reading interface ``k`` (relief and trend) at points."""
    idx, w = node_weights(layout.spec, x, y)
    m = x.size
    T = trend_basis(x, y, layout.centre_xy)
    rows = np.concatenate([np.repeat(np.arange(m), 16), np.repeat(np.arange(m), 3)])
    cols = np.concatenate([(k * layout.nn + idx).ravel(), np.tile(layout.n_nodes + 3 * k + np.arange(3), m)])
    return sp.csr_matrix((np.concatenate([w.ravel(), T.ravel()]), (rows, cols)), shape=(m, layout.n_params))


def _cell_means(spec, x, y, cells=POINT_CELLS):
    """One point per square of ``cells`` node cells the points fall in: the mean of the points in it."""
    size = cells * spec.cell_size_m
    col = np.floor((x - spec.x0) / size).astype(np.int64)
    row = np.floor((spec.y0 - y) / size).astype(np.int64)
    _, inv = np.unique(row * (spec.nx + 2) + col, return_inverse=True)
    inv = inv.ravel()
    n = np.bincount(inv)
    return np.bincount(inv, x) / n, np.bincount(inv, y) / n


def _factor(A):
    return spla.splu(A.tocsc(), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})


class _Lines:
    """The linearised problem's parts that do not depend on the interfaces' priors, for repeated checks.

    ``state`` is a fitted state (paths, residuals and robust weights set), ``line`` the
    survey line of each pick (any labels), ``sigma_scale`` the factor of the pick errors
    (as in the fit). :meth:`checks` gives one :class:`LineCheck` per interface; its
    ``ratio`` is NaN for an interface picked on fewer than :data:`MIN_LINES` lines, or
    when a system is singular.
    """

    def __init__(self, layout, data, state, line, sigma_scale):
        K = layout.n_interfaces
        J, use, sw = jacobian(layout, data, state, sigma_scale)
        J = sp.csr_matrix(J)
        r = state.residual_s[use] * sw
        self.layout = layout
        self.JtJ = normal_matrix(J, layout.n_nodes)
        self.Jtr = J.T @ r
        self.P0 = small_prior_precision(layout, data)
        self.dm = parameters(layout, state) - prior_mean(layout, data)
        B = borehole_matrix(layout, data)
        self.BtB, self.Bte = None, None
        if B is not None:
            wb = 1.0 / data.bh_sigma_m**2
            self.BtB = (B.T @ sp.diags(wb) @ B).tocsr()
            self.Bte = B.T @ (wb * (data.bh_elevation_m - B @ parameters(layout, state)))
        line_of = np.asarray(line)[use]
        iface = data.interface[use]
        refl = state.paths.reflection_xyz[use]
        self.counts = [len(np.unique(line_of[iface == k])) for k in range(K)]
        _, group = np.unique(line_of, return_inverse=True)
        labels = group.ravel() % MAX_GROUPS  # the lines themselves when there are at most MAX_GROUPS
        self.readers: dict = {}
        self.parts: dict = {}
        for name in np.unique(labels):
            for k in range(K):
                here = (labels == name) & (iface == k) & np.all(np.isfinite(refl[:, :2]), axis=1)
                if self.counts[k] >= MIN_LINES and here.any():
                    xy = _cell_means(layout.spec, refl[here, 0], refl[here, 1])
                    self.readers[name, k] = _rows(layout, k, *xy)
            if any(key[0] == name for key in self.readers):
                rows = np.flatnonzero(labels == name)
                self.parts[name] = (normal_matrix(J[rows], layout.n_nodes), J[rows].T @ r[rows])

    def _dense_pays(self, A) -> bool:
        """True when one dense inverse is cheaper than a sparse LU of A and of every A_-L (see DENSE_GROUPS)."""
        return A.shape[0] <= DENSE_MAX and len(self.parts) >= DENSE_GROUPS

    def checks(self, Q) -> tuple:
        """The check of every interface with the relief priors' precisions ``Q``."""
        P = sp.block_diag([*Q, self.P0], format="csr")
        A = (self.JtJ + P).tocsr()
        g = self.Jtr - P @ self.dm
        if self.BtB is not None:
            A = (A + self.BtB).tocsr()
            g = g + self.Bte
        try:
            held = {}
            fac = NormalFactor.of(A, self.layout) if self.readers and self._dense_pays(A) else None
            if fac is not None and fac.banded:  # one dense inverse, every group by Woodbury
                held = held_out(A, g, self.parts, self.readers, inverse=fac.dense_inverse())
            elif self.readers:  # too many unknowns for a dense inverse: a sparse factor of every A_-L
                held = held_out(A, g, self.parts, self.readers, factor=_factor)
        except (RuntimeError, np.linalg.LinAlgError):  # a singular system
            held = {}
        out = []
        for k, count in enumerate(self.counts):
            ratio, n_points, dof = pool([v for (_, kk), v in held.items() if kk == k])
            out.append(LineCheck(ratio, n_points, count, dof))
        return tuple(out)


def pool(pairs) -> tuple:
    r"""Mean squared standardised error over groups and its equivalent degrees of freedom.

    ``pairs`` are ``(e, V)`` of :func:`held_out`. The ratio is the mean of
    :math:`e_i^2 / V_{ii}`; for Gaussian errors the sum of one group's
    :math:`z_i^2` has variance :math:`2\,\mathrm{tr}(R^2)` (R the correlation
    of its z, by Isserlis' theorem), and the groups are taken as independent,
    so the ratio has the variance of :math:`\chi^2_\nu / \nu` with
    :math:`\nu = n^2 / \sum \mathrm{tr}(R^2)` [Satterthwaite 1946].

    Returns ``(ratio, n_points, dof)``; ratio NaN and dof 0 when there is no point.
    """
    z2, trr = [], 0.0
    for e, V in pairs:
        var = np.diag(V)
        ok = var > 0
        if not ok.any():
            continue
        z2.append(e[ok] ** 2 / var[ok])
        R = V[np.ix_(ok, ok)] / np.sqrt(np.outer(var[ok], var[ok]))
        trr += float(np.sum(R * R))
    if not z2:
        return float("nan"), 0, 0.0
    z = np.concatenate(z2)
    return float(np.mean(z)), int(z.size), float(z.size**2 / trr)


def held_out(A, g, parts, readers, factor=None, inverse=None) -> dict:
    """Posterior mean differences and their covariance when each group of data is left out.

    For the linear Gaussian problem with normal matrix ``A`` (:math:`J^T J` plus the
    prior precision) and gradient ``g`` (:math:`J^T r` minus the prior's pull), leaving
    out the rows of group L gives :math:`A_{-L} = A - J_L^T J_L`,
    :math:`g_{-L} = g - J_L^T r_L`, and at the points read by ``W = readers[L, k]``

    .. math::

        e = W (A_{-L}^{-1} g_{-L} - A^{-1} g),\\qquad V = W (A_{-L}^{-1} - A^{-1}) W^T .

    By default both come from :math:`\\Sigma = A^{-1}` alone (:func:`_downdated`):
    :math:`J_L^T J_L` touches only the unknowns of the group's nodes and the few
    shared ones (E, with :math:`M = E^T J_L^T J_L E`), so by the Woodbury identity
    [Golub & Van Loan 2013, s. 2.1.4]
    :math:`A_{-L}^{-1} = \\Sigma + \\Sigma E K E^T \\Sigma`,
    :math:`K = (I - M C)^{-1} M`, :math:`C = E^T \\Sigma E`: one dense inverse for
    every group, then systems of the group's size. With ``factor`` every
    :math:`A_{-L}` is factored and solved instead.

    Parameters
    ----------
    A : sparse (p, p)
    g : (p,) or (p, s) array
        One column per data set (the same rows, other values), or one vector.
    parts : dict
        ``{label: (J_L^T J_L, J_L^T r_L)}``, sparse (p, p) and like ``g``.
    readers : dict
        ``{(label, key): W}``, W sparse (m, p).
    factor : callable, optional
        ``factor(M)``: an object whose ``solve(b)`` is :math:`M^{-1} b`.
    inverse : tuple, optional
        ``(Sigma, position)``: :math:`A^{-1}` dense with unknown ``i`` at row and
        column ``position[i]`` (:meth:`~.factor.NormalFactor.dense_inverse`);
        default from a dense Cholesky factor of ``A``. Not used with ``factor``.

    Returns
    -------
    dict
        ``{(label, key): (e, V)}``; e (m,) or (m, s), V (m, m).

    Raises
    ------
    RuntimeError or numpy.linalg.LinAlgError
        When a system is singular (not positive definite).
    """
    if factor is None:
        if inverse is None:
            dense = np.asarray(sp.csr_matrix(A).toarray(), float)
            inverse = (sla.cho_solve(sla.cho_factor(dense, lower=True), np.eye(dense.shape[0])), None)
        return _downdated(inverse, g, parts, readers)
    keys = list(readers)
    W_all = sp.vstack([readers[key] for key in keys]).tocsr()
    full = factor(A)
    step = full.solve(g)
    base = full.solve(W_all.T.toarray())  # A^-1 W^T of every group's points at once
    start = np.cumsum([0] + [readers[key].shape[0] for key in keys])
    out = {}
    for name in dict.fromkeys(label for label, _ in keys):
        JtJ, Jtr = parts[name]
        part = factor((A - JtJ).tocsr())
        mine = [i for i, key in enumerate(keys) if key[0] == name]
        Wt = sp.vstack([readers[keys[i]] for i in mine]).T.toarray()
        cols = np.concatenate([np.arange(start[i], start[i + 1]) for i in mine])
        diff = part.solve(Wt) - base[:, cols]
        shift = part.solve(g - Jtr) - step
        at = 0
        for i in mine:
            W = readers[keys[i]]
            m = W.shape[0]
            out[keys[i]] = (W @ shift, W @ diff[:, at : at + m])
            at += m
    return out


def _downdated(inverse, g, parts, readers) -> dict:
    r""":func:`held_out` from :math:`\Sigma = A^{-1}` by the Woodbury identity (see there).

    With E the unknowns group L touches, :math:`M = E^T J_L^T J_L E`,
    :math:`b = E^T J_L^T r_L`, :math:`C = E^T \Sigma E`, :math:`x = \Sigma g` and
    :math:`K = (I - M C)^{-1} M`:

    .. math::

        A_{-L}^{-1} - \Sigma = \Sigma E K E^T \Sigma,\qquad
        A_{-L}^{-1} g_{-L} - \Sigma g = \Sigma E \left(K (E^T x - C b) - b\right),

    so with :math:`G = W \Sigma E`: :math:`V = G K G^T` and
    :math:`e = G (K (E^T x - C b) - b)`. The differences come out directly, not
    as the difference of two solves.
    """
    Sigma, position = inverse
    p = Sigma.shape[0]
    pos = np.arange(p) if position is None else np.asarray(position)
    g = np.asarray(g, float)
    x = (Sigma @ g[np.argsort(pos)])[pos]  # A^-1 g in the original ordering
    out = {}
    for name in dict.fromkeys(label for label, _ in readers):
        JtJ, Jtr = parts[name]
        JtJ = sp.csr_matrix(JtJ)
        Jtr = np.asarray(Jtr.toarray() if sp.issparse(Jtr) else Jtr, float)
        touched = np.flatnonzero(np.diff(JtJ.indptr) > 0)
        M = JtJ[touched][:, touched].toarray()
        b = Jtr[touched]
        ps = pos[touched]
        C = Sigma[np.ix_(ps, ps)]
        K = np.linalg.solve(np.eye(touched.size) - M @ C, M)
        core = K @ (x[touched] - C @ b) - b
        for (label, key), W in readers.items():
            if label != name:
                continue
            W = sp.csr_matrix(W)
            cols = np.unique(W.indices)
            G = W[:, cols] @ Sigma[np.ix_(pos[cols], ps)]
            out[label, key] = (G @ core, G @ K @ G.T)
    return out


def usable(check: LineCheck) -> bool:
    """A check that can rescale a sill: a finite positive ratio with more than :data:`MIN_DOF` degrees of freedom."""
    return bool(np.isfinite(check.ratio) and check.ratio > 0 and check.dof > MIN_DOF)


def check_sills(
    layout, data, state, priors, line, sigma_scale=1.0, tolerance=0.1, evaluations=6, progress=None
) -> tuple:
    r"""Each interface's sill rescaled by the leave-one-line-out check (see the module notes).

    The ratio c at the current sill estimates the factor of the predicted variance
    from about ``dof`` independent errors, so it is uncertain; with the scale-free
    prior :math:`p(c) \propto 1/c`, :math:`\nu \hat c / c \sim \chi^2_\nu` gives
    the posterior mean :math:`\nu \hat c / (\nu - 2)` [Gelman et al. 2013, s. 3.2],
    the factor the variance is given here: the sill is changed until the ratio is
    :math:`(\nu - 2)/\nu`. The ratio is not exactly inversely proportional to the
    sill's square (near the lines the picks' errors, not the prior, set the
    variance), so the factor is found by the secant method in the logarithms, for
    every interface at once, until within ``tolerance`` (in the logarithm) or after
    ``evaluations`` checks. The sill is kept at least the gather-fit points' own
    scatter (the prior's nugget), as the evidence keeps it: the picks tell the
    relief only along the lines, and a feature under none of them is not seen by
    this check either. An interface without a usable check (:func:`usable`) keeps
    its prior.

    Returns ``(priors, data, checks)``: the new priors (``source`` says what was done),
    the data with their precisions, and the first check of each interface (at the
    priors given).
    """
    K = layout.n_interfaces
    floor = np.log([max(float(np.sqrt(max(p.nugget_m2, 0.0))), 1e-6) / p.sigma_m for p in priors])
    lines = _Lines(layout, data, state, line, sigma_scale)
    first = lines.checks(data.Q)
    use = np.array([usable(c) for c in first])
    if not use.any():
        return list(priors), data, first
    t = np.zeros(K)  # log factor of each sill
    done = ~use
    last: tuple = (None, None)
    current = list(priors)
    checks = first
    for _ in range(evaluations - 1):
        check_cancel(progress)
        f = np.array([np.log(c.ratio * c.dof / (c.dof - 2)) if usable(c) else 0.0 for c in checks])
        done |= (np.abs(f) < tolerance) | ((t <= floor) & (f < 0))
        if done.all():
            break
        t_prev, f_prev = last
        step = 0.5 * f  # first: the sill's square scaled by c (exact where the prior alone sets the variance)
        if t_prev is not None:
            slope = (f - f_prev) / np.where(t != t_prev, t - t_prev, 1.0)
            secant = -f / np.where(slope < -1e-3, slope, -2.0)  # the ratio falls as the sill grows
            step = np.where(t != t_prev, secant, step)
        last = (t.copy(), f)
        t = np.where(done, t, np.maximum(t + step, floor))
        current = [replace(p, sigma_m=p.sigma_m * float(np.exp(t[k]))) for k, p in enumerate(priors)]
        data = replace(data, Q=tuple(matern_precision(layout.spec, p) for p in current))
        checks = lines.checks(data.Q)
    out = []
    for k, p in enumerate(priors):
        c0 = first[k]
        if not use[k]:
            out.append(p)
            continue
        left = f"each of its {c0.n_lines} lines" if c0.n_lines <= MAX_GROUPS else f"{MAX_GROUPS} groups of its lines"
        note = (
            f"; sill x {np.exp(t[k]):.2f} to {current[k].sigma_m:.3g} m by leaving out {left} in turn (mean squared "
            f"standardised error {c0.ratio:.2f} at {c0.n_points} points, {c0.dof:.0f} degrees of freedom)"
        )
        out.append(replace(current[k], source=p.source + note))
        if progress is not None:
            progress.info(f"prior of interface {k + 1}: {note[2:]}")
    return out, data, first
