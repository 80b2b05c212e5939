r"""Batched robust Levenberg-Marquardt: many small nonlinear least-squares problems at once.

Each row of the padded ``(k, nmax)`` arrays is one independent problem (one
gather) with a few parameters. The iteration runs on all rows together with
numpy: every row keeps its own damping, a robust loss (:mod:`.robust`) is
minimised with reweighted Gauss-Newton steps, and rows that have converged
leave the working set, which is compacted so that the tail of slow rows costs
little. Rows are processed in cache-sized blocks of about
:data:`BLOCK_ELEMENTS` padded picks, in parallel threads (numpy releases the
GIL inside its loops) where several processors are available. No Python loop
runs per row on the numerical path.

The model is any object with the two methods of :class:`LmModel`: times and
Jacobian at given parameters, and the model restricted to some rows.

References
----------
[Triggs et al. 2000] Triggs, B., McLauchlan, P., Hartley, R. & Fitzgibbon, A.
    (2000). Bundle adjustment -- a modern synthesis. Vision Algorithms: Theory
    and Practice, LNCS 1883, 298-372 (robust cost functions in Gauss-Newton).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, fields
from typing import Any, Callable, Optional, Protocol, TypeVar, Union

import numpy as np

from ..errors import InversionError
from ..progress import check_cancel
from .batch import safe_solve
from .robust import loss_terms

__all__ = [
    "BLOCK_ELEMENTS",
    "MAX_ITERATIONS",
    "MAX_THREADS",
    "STEP_TOLERANCE",
    "LmModel",
    "LmSolution",
    "batched_least_squares",
    "block_slices",
    "map_blocks",
    "times_and_jacobian",
    "worker_count",
]

#: Levenberg-Marquardt iterations per fit.
MAX_ITERATIONS = 100
#: Convergence: largest accepted step of an internal parameter (relative for parameters
#: taken as logarithms).
STEP_TOLERANCE = 1.0e-6
#: Largest step of an internal parameter per iteration.
MAX_STEP = 2.0
#: Initial damping (relative to diag H): nearly Gauss-Newton.
INITIAL_DAMPING = 1.0e-9
#: Blocks run in up to this many threads (set it to 1 to run them one after the other).
MAX_THREADS = 4
#: Padded picks per block (cache-sized).
BLOCK_ELEMENTS = 49152

Rows = Union[slice, np.ndarray]
_T = TypeVar("_T")


class LmModel(Protocol):
    """What the engine needs of a model: times, Jacobian and a restriction to some rows."""

    def evaluate(
        self, theta: np.ndarray, natural: bool = False, jacobian: bool = True
    ) -> tuple[np.ndarray, Optional[np.ndarray]]:
        """Return the modelled times and their derivatives.

        Parameters
        ----------
        theta : (k, p) ndarray
            Parameters of each row (internal ones, or the reported ones with ``natural``).
        natural : bool
            ``theta`` holds the reported parameters.
        jacobian : bool
            Also compute the Jacobian.

        Returns
        -------
        time_s : (k, nmax) ndarray
            Modelled two-way times (s).
        jacobian : (k, p, nmax) ndarray or None
            Their derivatives with respect to ``theta`` (None without ``jacobian``).
        """
        ...

    def take(self, rows: Rows) -> LmModel:
        """Return the model restricted to some rows.

        Parameters
        ----------
        rows : slice, int ndarray or bool ndarray
            The rows (gathers) to keep.

        Returns
        -------
        LmModel
        """
        ...


@dataclass(frozen=True)
class LmSolution:
    """Result of :func:`batched_least_squares`, one row per problem.

    Attributes
    ----------
    theta : (k, p) ndarray
        Internal parameters at the end.
    iterations : (k,) int ndarray
        Iterations used.
    converged : (k,) bool ndarray
        Whether the row met the convergence test.
    time_s : (k, nmax) ndarray
        Modelled times at ``theta`` (s).
    jacobian : (k, p, nmax) ndarray
        Derivatives of the modelled times with respect to the internal
        parameters at ``theta`` (s per unit of parameter).
    """

    theta: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    time_s: np.ndarray
    jacobian: np.ndarray

    @classmethod
    def concatenate(cls, parts: list[LmSolution]) -> LmSolution:
        """Join the solutions of consecutive blocks of rows.

        Parameters
        ----------
        parts : list of LmSolution
            Solutions of consecutive row blocks.

        Returns
        -------
        LmSolution
            One solution over all rows.
        """
        return cls(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(cls)))


def times_and_jacobian(model: LmModel, theta: np.ndarray, natural: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Evaluate a model's times and Jacobian, which it must provide.

    Parameters
    ----------
    model : LmModel
        The model.
    theta : (k, p) ndarray
        Parameters (internal, or reported with ``natural``).
    natural : bool
        ``theta`` holds the reported parameters.

    Returns
    -------
    time_s : (k, nmax) ndarray
        Modelled times (s).
    jacobian : (k, p, nmax) ndarray
        Their derivatives with respect to ``theta``.

    Raises
    ------
    InversionError
        When the model returns no Jacobian (a programming error in the model).
    """
    t, J = model.evaluate(theta, natural=natural)
    if J is None:
        raise InversionError(f"{type(model).__name__}.evaluate gave no Jacobian; it must give one by default")
    return t, J


def worker_count() -> int:
    """Threads for the blocks: the processors this process may use, at most :data:`MAX_THREADS`.

    Returns
    -------
    int
        At least 1.
    """
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return max(1, min(n, MAX_THREADS))


def block_slices(n_rows: int, nmax: int) -> list[slice]:
    """Consecutive row blocks of about :data:`BLOCK_ELEMENTS` padded cells (at least 16 rows each).

    Parameters
    ----------
    n_rows : int
        Number of rows k.
    nmax : int
        Columns of the padded layout (picks of the largest gather).

    Returns
    -------
    list of slice
        Blocks covering ``0 .. n_rows``; one empty slice when there are no rows.

    Examples
    --------
    >>> block_slices(5, 48)
    [slice(0, 5, None)]
    >>> len(block_slices(3000, 48)), block_slices(3000, 48)[-1]
    (3, slice(2048, 3000, None))
    """
    block = max(16, BLOCK_ELEMENTS // max(nmax, 1))
    return [slice(lo, min(lo + block, n_rows)) for lo in range(0, n_rows, block)] or [slice(0, 0)]


def map_blocks(
    run: Callable[[slice], _T], slices: list[slice], done: Optional[Callable[[int], Any]] = None
) -> list[_T]:
    """Run ``run`` on every block, in threads when several processors are usable.

    Parameters
    ----------
    run : callable
        ``run(block)`` computes one block of rows.
    slices : list of slice
        The blocks, e.g. from :func:`block_slices`.
    done : callable, optional
        Called with the number of finished blocks after each one (in block order).

    Returns
    -------
    list
        The results of ``run``, in block order.
    """
    workers = min(worker_count(), len(slices))
    parts: list[_T] = []
    if workers > 1:  # numpy releases the GIL inside its loops: blocks run in parallel
        with ThreadPoolExecutor(max_workers=workers) as pool:
            for part in pool.map(run, slices):
                parts.append(part)
                if done is not None:
                    done(len(parts))
    else:
        for sl in slices:
            parts.append(run(sl))
            if done is not None:
                done(len(parts))
    return parts


def batched_least_squares(
    model: LmModel,
    theta0: np.ndarray,
    time_s: np.ndarray,
    sigma_s: np.ndarray,
    usable: np.ndarray,
    loss: str,
    f_scale: float,
    xtol: Optional[float] = None,
    max_iter: Optional[int] = None,
    progress: Any = None,
) -> LmSolution:
    r"""Robust Levenberg-Marquardt fit of many small problems at once.

    Minimises, separately for every row k,

    .. math::

        F_k(\theta) = \sum_{i \in k} C^2 \rho\!\left(\frac{e_i^2}{C^2}\right), \qquad
        e_i = \frac{t_i - \hat t_i(\theta)}{\sigma_i}

    The gradient is :math:`-\sum_i \psi(e_i)\,\mathbf j_i/\sigma_i` with
    :math:`\psi(e) = \rho'(e^2/C^2)\,e` and :math:`\mathbf j_i = \partial\hat t_i/\partial\theta`;
    the Gauss-Newton curvature uses :math:`\psi'(e_i)` (floored at
    :math:`10^{-3}\rho'` so that it stays positive for the redescending
    losses), as in [Triggs et al. 2000]. The step solves
    :math:`(H + \lambda_k\,\mathrm{diag}\,H)\,\delta = -\nabla F/2`, starting
    from :math:`\lambda_k = 10^{-9}` (nearly Gauss-Newton, which converges in
    three or four steps from a linear start); a step is kept when F does not
    increase (then :math:`\lambda_k/10`), else it is refused and
    :math:`\lambda_k` grows tenfold (from at least :math:`10^{-6}`). Steps are
    capped at :data:`MAX_STEP` per internal parameter. A row has converged when
    a step below ``xtol`` is kept (or refused while hardly damped: the cost
    then rose at the rounding level only), or when the next undamped step
    would be below ``xtol / 10``: that step is then taken without the usual
    check and only the model times are evaluated there. Near the solution the
    iteration contracts fast, so the error left is well below ``xtol``. The
    fixed point is a stationary point of F, the same function scipy's
    ``least_squares`` minimises with this loss and ``f_scale = C``.

    The rows are processed in blocks of about :data:`BLOCK_ELEMENTS` padded
    picks so that the working arrays stay in the processor cache; this is
    about twice as fast as one pass over all rows.

    Parameters
    ----------
    model : LmModel
        The model of the k rows.
    theta0 : (k, p) ndarray
        Internal start parameters, one row per problem.
    time_s : (k, nmax) ndarray
        Padded observed times (s; any finite value in padding).
    sigma_s : (k, nmax) ndarray
        Padded pick errors (s; > 0 everywhere, padding included).
    usable : (k, nmax) bool ndarray
        Picks taking part.
    loss : str
        Robust loss, one of :data:`.robust.LOSSES`.
    f_scale : float
        Scale C of the loss, in pick sigmas.
    xtol : float, optional
        Step tolerance (default :data:`STEP_TOLERANCE`).
    max_iter : int, optional
        Iteration limit (default :data:`MAX_ITERATIONS`).
    progress : object with ``is_canceled``, optional
        Checked once per iteration; cancelling raises :class:`~core.errors.CancelledError`.

    Returns
    -------
    LmSolution
        Parameters, iterations, convergence flags, and the model times and
        Jacobian at the returned parameters.
    """
    xtol = STEP_TOLERANCE if xtol is None else xtol
    max_iter = MAX_ITERATIONS if max_iter is None else max_iter
    k = theta0.shape[0]
    if k == 0:
        n, p = time_s.shape[1], theta0.shape[1]
        return LmSolution(
            theta0.astype(float).copy(),
            np.zeros(0, dtype=int),
            np.zeros(0, dtype=bool),
            np.zeros((0, n)),
            np.zeros((0, p, n)),
        )
    slices = block_slices(k, time_s.shape[1])
    if len(slices) == 1:
        return _lm_block(model, theta0, time_s, sigma_s, usable, loss, f_scale, xtol, max_iter, progress)

    def run(sl: slice) -> LmSolution:
        return _lm_block(
            model.take(sl),
            theta0[sl],
            time_s[sl],
            sigma_s[sl],
            usable[sl],
            loss,
            f_scale,
            xtol,
            max_iter,
            progress,
        )

    return LmSolution.concatenate(map_blocks(run, slices))


def _lm_block(
    model: LmModel,
    theta0: np.ndarray,
    time: np.ndarray,
    sigma: np.ndarray,
    usable: np.ndarray,
    loss: str,
    f_scale: float,
    xtol: float,
    max_iter: int,
    progress: Any,
) -> LmSolution:
    """:func:`batched_least_squares` on one block of rows (all rows at once)."""
    k, p = theta0.shape
    theta_out = theta0.astype(float).copy()
    iters_out = np.zeros(k, dtype=int)
    conv_out = np.zeros(k, dtype=bool)
    pred_out = np.empty(time.shape)
    J_out = np.empty((k, p, time.shape[1]))
    rows = np.arange(k)
    theta = theta_out.copy()
    t_obs = time
    inv_s = np.where(usable, 1.0 / sigma, 0.0)
    pred, J = times_and_jacobian(model, theta)
    e = (t_obs - pred) * inv_s
    cost, r1, wc = loss_terms(e, loss, f_scale)
    lam = np.full(k, INITIAL_DAMPING)
    iters = np.zeros(k, dtype=int)
    eye = np.eye(p)
    for _ in range(max_iter):
        if rows.size == 0:
            break
        check_cancel(progress)
        ws = wc * inv_s
        ws *= inv_s  # curvature weights psi'(e) / sigma^2
        gs = r1 * e
        gs *= inv_s  # psi(e) / sigma
        H = np.matmul(J * ws[:, None, :], J.transpose(0, 2, 1))
        g = np.einsum("kpn,kn->kp", J, gs)
        dg = H.diagonal(axis1=1, axis2=2)
        A = H + (lam[:, None] * np.maximum(dg, 1e-300))[:, :, None] * eye
        delta = safe_solve(A, g)
        big = np.max(np.abs(delta), axis=1)
        delta *= np.minimum(1.0, MAX_STEP / np.maximum(big, 1e-300))[:, None]
        # converged without trying the step: where the undamped step is below xtol / 10 it is
        # taken without the usual check (the cost cannot change by more than rounding), with the
        # model times at the new point but the Jacobian of the point before (a difference far
        # below anything that matters for the covariance), saving most of an evaluation
        pre = (big < 0.1 * xtol) & (lam < 1e-2) & ~conv_out[rows]
        if np.any(pre):
            fin = rows[pre]
            th_fin = theta[pre] + delta[pre]
            theta_out[fin] = th_fin
            iters_out[fin] = iters[pre] + 1
            conv_out[fin] = True
            pred_out[fin] = model.take(pre).evaluate(th_fin, jacobian=False)[0]
            J_out[fin] = J[pre]
            finished = conv_out[rows]
            if finished.all():
                rows = rows[:0]
                break
            if finished.sum() * 8 >= rows.size:  # compact the working set
                keep = ~finished
                rows, theta, pred, e, J, cost, lam, iters, delta = (
                    rows[keep],
                    theta[keep],
                    pred[keep],
                    e[keep],
                    J[keep],
                    cost[keep],
                    lam[keep],
                    iters[keep],
                    delta[keep],
                )
                r1, wc = r1[keep], wc[keep]
                t_obs, inv_s = t_obs[keep], inv_s[keep]
                model = model.take(keep)
        th_new = theta + delta
        pred_new, J_new = times_and_jacobian(model, th_new)
        e_new = t_obs - pred_new
        e_new *= inv_s
        cost_new, r1_new, wc_new = loss_terms(e_new, loss, f_scale)
        accept = np.isfinite(cost_new) & (cost_new <= cost)
        iters += 1
        if np.all(accept):
            theta, pred, e, J, cost, r1, wc = th_new, pred_new, e_new, J_new, cost_new, r1_new, wc_new
        else:  # refused rows keep their previous state
            ref = ~accept
            th_new[ref], pred_new[ref], e_new[ref], J_new[ref] = theta[ref], pred[ref], e[ref], J[ref]
            cost_new[ref], r1_new[ref], wc_new[ref] = cost[ref], r1[ref], wc[ref]
            theta, pred, e, J, cost, r1, wc = th_new, pred_new, e_new, J_new, cost_new, r1_new, wc_new
        # converged: a step below xtol that was accepted or, if refused, was hardly damped (the
        # cost then rose at the rounding level only)
        big = np.max(np.abs(delta), axis=1)
        done = (big < xtol) & (accept | (lam < 1e-2)) & ~conv_out[rows]
        lam = np.where(accept, np.maximum(lam / 10.0, 1e-15), np.minimum(np.maximum(lam, 1e-6) * 10.0, 1e16))
        if np.any(done):
            fin = rows[done]
            theta_out[fin] = theta[done]
            iters_out[fin] = iters[done]
            conv_out[fin] = True
            pred_out[fin] = pred[done]
            J_out[fin] = J[done]
            finished = conv_out[rows]
            if finished.sum() * 8 >= rows.size:  # compact the working set
                keep = ~finished
                rows, theta, pred, e, J, cost, lam, iters = (
                    rows[keep],
                    theta[keep],
                    pred[keep],
                    e[keep],
                    J[keep],
                    cost[keep],
                    lam[keep],
                    iters[keep],
                )
                r1, wc = r1[keep], wc[keep]
                t_obs, inv_s = t_obs[keep], inv_s[keep]
                model = model.take(keep)
    # rows still in the working set that did not converge (or converged after the last compaction)
    live = ~conv_out[rows]
    theta_out[rows[live]] = theta[live]
    iters_out[rows[live]] = iters[live]
    pred_out[rows[live]] = pred[live]
    J_out[rows[live]] = J[live]
    return LmSolution(theta_out, iters_out, conv_out, pred_out, J_out)
