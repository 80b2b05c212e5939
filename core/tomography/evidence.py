"""Prior hyperparameters of the interfaces from the picks themselves (type-II maximum likelihood).

The variogram of a few dozen gather-fit points (:func:`~.prior.fit_matern`)
starts each interface's prior, but it sees the relief only at coarse lags
between the lines; how rough an interface is at short distances, which
governs the uncertainty between the lines, is better told by the thousands
of picks whose reflection points sample it densely along the lines. At the
current optimum the problem is linearised (Jacobian J of the weighted
residuals r, parameters m, prior mean mu, prior precision P(h) for
hyperparameters h) and the marginal likelihood of the picks is the Laplace
approximation [MacKay 1992; Rasmussen & Williams 2006, s. 5.4]

.. math::

    \\log p(d \\mid h) = -\\tfrac12\\left(\\Phi_0(h) - g^T A^{-1} g\\right)
        + \\tfrac12 \\log\\det P(h) - \\tfrac12 \\log\\det A(h) + \\text{const},

    A = J^T J + P(h),\\quad g = J^T r - P(h)(m_0 - \\mu),\\quad
    \\Phi_0 = r^T r + (m_0 - \\mu)^T P(h) (m_0 - \\mu)

(boreholes enter A, g and :math:`\\Phi_0` like picks). :math:`\\log\\det A` comes
from a sparse LU factor; :math:`\\log\\det Q` of a lattice Matern prior is exact
from the eigenvalues of the zero-flux five-point Laplacian,
:math:`\\lambda_{ij} = (4 - 2\\cos(\\pi i/n_x) - 2\\cos(\\pi j/n_y))/h^2` (isotropic), or from a
sparse LU factor of :math:`\\kappa^2 - \\nabla\\cdot H\\nabla_h` (anisotropic). For each interface in
turn (:func:`tune_priors`) the sill and range of an isotropic prior are varied (Nelder-Mead in
their logarithms), then an anisotropic one (two more hyperparameters, kept only on strong
evidence [Kass & Raftery 1995]), then the other smoothness; the most probable are kept.
Nelder-Mead is stopped early (log-evidence differences below 1 are not worth more than a
bare mention), so where the evidence is flat along a ridge it stops at a point that depends on
its path, and its path on the scipy release and the rounding of the linear algebra (on the
buried valley of the tests two stacks ended 1 apart in log evidence, with the sill 5 % and the
major axis 0.8 deg apart, which the line check of :mod:`.crossval` turned into sills 35 % apart).
The search therefore ends with a deterministic polish (:func:`polish`): Newton steps on a
quadratic fitted about the point by finite differences two tolerances wide in (ln sigma, ln
range, ln ratio, azimuth of the major axis) [Nocedal & Wright 2006, s. 8.1], a coordinate near
its bound put on it, until the vertex is within :data:`POLISH_TOLERANCE` of the point; the optimum
is then found to those tolerances, whichever path led to it, and a ridge is crossed in one step
(coordinate-wise Brent searches [Brent 1973] did the same with about twice the evaluations and
stopped short along the water table's ridge on the layered site). Points met twice (a clipped
Nelder-Mead vertex, the polish's start) are evaluated once.

References
----------
[MacKay 1992] MacKay, D. J. C. (1992). Bayesian interpolation. Neural
    Computation 4(3), 415-447.
[Rasmussen & Williams 2006] Rasmussen, C. E. & Williams, C. K. I. (2006).
    Gaussian Processes for Machine Learning. MIT Press, s. 5.4.
[Kass & Raftery 1995] Kass, R. E. & Raftery, A. E. (1995). Bayes factors.
    Journal of the American Statistical Association 90(430), 773-795.
[Brent 1973] Brent, R. P. (1973). Algorithms for Minimization without
    Derivatives. Prentice-Hall, ch. 5.
[Nocedal & Wright 2006] Nocedal, J. & Wright, S. J. (2006). Numerical
    Optimization, 2nd ed. Springer, s. 8.1 (finite-difference derivatives).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.optimize import minimize

from ..progress import check_cancel
from .factor import BAND_FLOPS, NormalFactor, band_positions, node_band_order
from .prior import MaternPrior, anisotropic_lattice_variance, lattice_laplacian, lattice_variance, matern_precision
from .system import borehole_matrix, jacobian_blocks, normal_blocks, parameters, prior_mean, small_prior_precision

__all__ = ["POLISH_TOLERANCE", "log_det_matern", "polish", "tune_priors"]


def log_det_matern(spec, prior: MaternPrior) -> float:
    """Log-determinant of :func:`~.prior.matern_precision` on ``spec``.

    Isotropic: exact from the eigenvalues of the zero-flux five-point
    Laplacian. Anisotropic: :math:`Q = \\tau^2 h^2 K^\\alpha`, so
    :math:`\\log\\det Q = n \\log(\\tau^2 h^2) + \\alpha \\log\\det K`, the latter from a
    sparse LU factor of K (symmetric positive definite: the diagonal of U).
    """
    h = spec.cell_size_m
    ny, nx = spec.shape
    kappa = prior.kappa_per_m
    alpha = prior.nu + 1
    if prior.isotropic:
        lx = 2.0 - 2.0 * np.cos(np.pi * np.arange(nx) / nx)
        ly = 2.0 - 2.0 * np.cos(np.pi * np.arange(ny) / ny)
        lam = (lx[None, :] + ly[:, None]) / h**2
        tau2 = lattice_variance(kappa, h, alpha) / prior.sigma_m**2
        return float(nx * ny * math.log(tau2 * h * h) + alpha * np.sum(np.log(kappa**2 + lam)))
    H = prior.tensor()
    tau2 = anisotropic_lattice_variance(kappa, h, H, alpha) / prior.sigma_m**2
    K = (kappa**2 * sp.identity(nx * ny) + lattice_laplacian(spec, H) / h**2).tocsc()
    lu = spla.splu(K, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})
    return float(nx * ny * math.log(tau2 * h * h) + alpha * np.sum(np.log(np.abs(lu.U.diagonal()))))


class _Linearised:
    """The problem linearised at a state, for repeated evidence evaluations."""

    def __init__(self, layout, data, state, sigma_scale):
        Jn, Js, use, sw = jacobian_blocks(layout, data, state, sigma_scale)
        self.JtJ = normal_blocks(Jn, Js)
        r = state.residual_s[use] * sw
        self.Jtr = np.concatenate([Jn.T @ r, Js.T @ r])
        self.rr = float(r @ r)
        self.dm = parameters(layout, state) - prior_mean(layout, data)
        self.P0 = small_prior_precision(layout, data)
        B = borehole_matrix(layout, data)
        if B is not None:
            wb = 1.0 / data.bh_sigma_m**2
            self.BtB = (B.T @ sp.diags(wb) @ B).tocsr()
            e = data.bh_elevation_m - B @ parameters(layout, state)
            self.Bte = B.T @ (wb * e)
            self.ee = float(np.sum(wb * e * e))
        else:
            self.BtB = None
        self.layout = layout
        self._prior_cache: dict = {}

    def _prior(self, prior):
        """Precision and its log-determinant of one interface's prior (kept for the priors held fixed)."""
        got = self._prior_cache.get(prior)
        if got is None:
            got = (matern_precision(self.layout.spec, prior), log_det_matern(self.layout.spec, prior))
            if len(self._prior_cache) > 16:
                self._prior_cache.clear()
            self._prior_cache[prior] = got
        return got

    def _fixed(self):
        """The parts of A = J^T J (+ B^T W B) + P(h) that the interfaces' priors leave alone, once.

        The node block in band storage (:mod:`.factor`; None where the band
        would be too wide: a sparse matrix then), the node-other block and the
        other block with its own prior.
        """
        if getattr(self, "_fixed_parts", None) is None:
            F = sp.csr_matrix(self.JtJ if self.BtB is None else self.JtJ + self.BtB)
            F.sum_duplicates()
            n_small = self.P0.shape[0]
            n = F.shape[0] - n_small
            ny, nx = self.layout.spec.shape
            order = node_band_order(self.layout.spec, n // (nx * ny))
            inverse = np.empty(n, np.int64)
            inverse[order] = np.arange(n)
            Fn = F[:n, :n].tocoo()
            keep, d, c = band_positions(Fn.row, Fn.col, inverse)
            b = int(d.max()) if d.size else 0
            ab = None
            if n * (b + 1) ** 2 <= BAND_FLOPS:
                ab = np.zeros((b + 1, n))
                ab[d, c] = Fn.data[keep]
            A_us = F[:n, n:].toarray()
            A_ss = F[n:, n:].toarray() + self.P0.toarray()
            self._fixed_parts = (n, order, inverse, ab, F[:n, :n].tocsr(), A_us, A_ss)
        return self._fixed_parts

    def _factor(self, precisions, g) -> NormalFactor:
        """Factor of A with the interfaces' prior precisions ``precisions`` (one sparse matrix each), and g^T A^-1 g."""
        n, order, inverse, ab0, Fn, A_us, A_ss = self._fixed()
        nn = n // max(len(precisions), 1)
        if ab0 is None:
            return NormalFactor(("sparse", Fn + sp.block_diag(precisions, format="csr")), A_us, A_ss, g)
        rows, cols, vals = [], [], []
        for k, Q in enumerate(precisions):
            Qc = sp.coo_matrix(Q)
            rows.append(Qc.row + k * nn)
            cols.append(Qc.col + k * nn)
            vals.append(Qc.data)
        keep, d, c = band_positions(np.concatenate(rows), np.concatenate(cols), inverse)
        b = max(ab0.shape[0] - 1, int(d.max()) if d.size else 0)
        ab = np.zeros((b + 1, n), order="F")  # LAPACK order: factored in place
        ab[: ab0.shape[0]] = ab0
        np.add.at(ab, (d, c), np.concatenate(vals)[keep])  # a prior's entries: few, and may repeat
        return NormalFactor(("band", ab, order), A_us, A_ss, g)

    def log_evidence(self, priors) -> float:
        parts = [self._prior(p) for p in priors]
        P = sp.block_diag([q for q, _ in parts] + [self.P0], format="csr")
        Pdm = P @ self.dm
        g = self.Jtr - Pdm
        phi0 = self.rr + float(self.dm @ Pdm)
        if self.BtB is not None:
            g = g + self.Bte
            phi0 += self.ee
        try:
            fac = self._factor([q for q, _ in parts], g)
        except np.linalg.LinAlgError:  # not positive definite
            return -np.inf
        logdet_q = sum(ld for _, ld in parts)
        return -0.5 * (phi0 - fac.quadratic_) + 0.5 * logdet_q - 0.5 * fac.log_det


MAX_RATIO = 8.0  # strongest anisotropy tried (major over minor range)
STRONG = 3.0  # log evidence (2 ln B > 6: strong evidence, Kass & Raftery 1995) two more hyperparameters need


# polish tolerances of (ln sigma, ln range, ln ratio, azimuth in radians): 3 % of the sill, 5 % of the
# range and ratio, 0.1 deg of the major axis (the line check of :mod:`.crossval` moved the valley's
# sill by 35 % for 0.8 deg of a ratio-8 prior's axis, and by 6 % for 5 % of the evidence's sill); the
# finite differences are two tolerances wide, and a Newton step is at most the window, the same order
POLISH_TOLERANCE = (0.03, 0.05, 0.05, math.radians(0.1))
POLISH_WINDOW = (0.3, 0.3, 0.3, math.radians(5.0))
POLISH_STEPS = 8  # Newton steps at most


def polish(f, y, bounds, tolerance=POLISH_TOLERANCE, window=POLISH_WINDOW, steps=POLISH_STEPS):
    """Maximise ``f`` from ``y`` by Newton steps on a quadratic fitted about the point (see the module notes).

    Each step fits a quadratic to ``f`` at ``y``, two tolerances either side of it
    along every free coordinate and at one point of each pair's diagonal (central
    differences: gradient and Hessian [Nocedal & Wright 2006, s. 8.1]; one-sided on a
    bound), and moves to its vertex, the step shortened to ``window`` in every coordinate
    and kept within the bounds; where the fit is not concave, to the most probable point
    probed. A free coordinate (``bounds[i]`` a pair; None: held) within a tolerance of a
    bound is put on it when no less probable and held there when the probe inside it is no
    more probable. A change is kept only when it raises ``f``. Steps repeat until the vertex
    is less than a tolerance from the point in every coordinate (that vertex is then tried),
    at most ``steps`` times. A ridge along which ``f`` hardly changes is followed across the
    coordinates in one step, not crawled one coordinate at a time.
    ``bounds`` may be a callable ``bounds(y)`` (bounds that depend on the other coordinates).

    Returns ``(f_best, y_best)``.

    >>> polish(lambda y: -((y[0] - 0.3) ** 2) - (y[1] - 2.0) ** 2, [0.0, 1.9], [(-1.0, 1.0), (0.0, 2.0)])[1].round(2)
    array([0.3, 2. ])
    """
    y = np.array(y, float)
    best = float(f(y))
    tol = np.asarray(tolerance, float)[: y.size]
    win = np.asarray(window, float)[: y.size]
    held: set = set()  # coordinates on a bound whose probe inside it was no more probable
    for _ in range(steps):
        b = bounds(y) if callable(bounds) else bounds
        side = np.ones(y.size)  # the direction of each coordinate's second probe (inward on a bound)
        active = []
        for i, bi in enumerate(b):
            if bi is None or bi[1] - bi[0] <= 4.0 * tol[i] or i in held:
                continue
            edge = [e for e in bi if abs(y[i] - e) <= tol[i]]
            if edge:  # on a bound: onto it when no less probable, then one probe inside it
                if y[i] != edge[0]:
                    z = y.copy()
                    z[i] = edge[0]
                    on = float(f(z))
                    if on >= best:
                        y, best = z, on
                side[i] = 1.0 if edge[0] == bi[0] else -1.0
                z = y.copy()
                z[i] += 2.0 * side[i] * tol[i]
                if float(f(z)) <= best:
                    held.add(i)
                    continue
            active.append(i)
        if not active:
            break
        h = 2.0 * tol
        probes: dict = {}

        def probe(d, y=y, h=h, probes=probes):
            key = tuple(np.round(d, 6))
            if key not in probes:
                probes[key] = (float(f(y + d * h)), y + d * h)
            return probes[key][0]

        n = len(active)
        grad, hess = np.zeros(n), np.zeros((n, n))
        for a, i in enumerate(active):
            e = np.zeros(y.size)
            e[i] = 1.0
            if side[i] > 0 and y[i] - h[i] >= b[i][0]:  # central differences
                fp, fm = probe(e), probe(-e)
                grad[a], hess[a, a] = (fp - fm) / (2.0 * h[i]), (fp - 2.0 * best + fm) / h[i] ** 2
            else:  # one-sided (on or near a bound): y, y + s h, y + 2 s h
                s = side[i] if side[i] < 0 or y[i] + 2.0 * h[i] <= b[i][1] else -1.0
                f1, f2 = probe(s * e), probe(2.0 * s * e)
                grad[a] = s * (-3.0 * best + 4.0 * f1 - f2) / (2.0 * h[i])
                hess[a, a] = (best - 2.0 * f1 + f2) / h[i] ** 2
        for a, i in enumerate(active):
            for c in range(a):
                j = active[c]
                e = np.zeros(y.size)
                e[i], e[j] = side[i], side[j]
                ei, ej = e * (np.arange(y.size) == i), e * (np.arange(y.size) == j)
                if side[i] > 0 and side[j] > 0 and y[i] - h[i] >= b[i][0] and y[j] - h[j] >= b[j][0]:
                    # central: f(+,+) + f(-,-) - f(+,0) - f(-,0) - f(0,+) - f(0,-) + 2 f(0, 0), second order in h
                    cross = probe(e) + probe(-e) - probe(ei) - probe(-ei) - probe(ej) - probe(-ej) + 2.0 * best
                    hess[a, c] = hess[c, a] = cross / (2.0 * h[i] * h[j])
                else:
                    cross = probe(e) - probe(ei) - probe(ej) + best
                    hess[a, c] = hess[c, a] = side[i] * side[j] * cross / (h[i] * h[j])
        step = np.zeros(y.size)
        try:
            concave = bool(np.all(np.linalg.eigvalsh(hess) < 0.0))
        except np.linalg.LinAlgError:
            concave = False
        if concave:
            step[active] = -np.linalg.solve(hess, grad)
        else:  # far from the maximum: uphill (the gradient in units of the tolerances) as far as the window lets
            step[active] = tol[active] ** 2 * grad
            step *= 4.0 * float(np.min(win / np.maximum(np.abs(step), 1e-300)))  # cut to the window below
        small = concave and bool(np.all(np.abs(step) <= tol))
        shrink = min(1.0, float(np.min(win / np.maximum(np.abs(step), 1e-300))))
        step *= shrink
        for scale in (1.0, 0.5, 0.25):  # the step, halved while it is less probable than the point
            z = y + scale * step
            for i in active:  # within the bounds; near one, on it
                z[i] = min(max(z[i], b[i][0]), b[i][1])
                for e in b[i]:
                    if abs(z[i] - e) <= tol[i]:
                        z[i] = e
            if not np.any(np.abs(z - y) > 0.25 * tol):
                break
            probes[scale] = (float(f(z)), z)
            if probes[scale][0] > best or small:
                break
        val, z = max(probes.values(), key=lambda p: p[0])
        improved = val > best
        moved = improved and bool(np.any(np.abs(z - y) > tol))
        # a whole step the window cut short and that was more probable: the next may go twice as far (a
        # trust region [Nocedal & Wright 2006, s. 4.1], at most four windows), so that a far start is not crawled from
        if shrink < 1.0 and 1.0 in probes and probes[1.0][0] > best:
            win = np.minimum(2.0 * win, 4.0 * np.asarray(window, float)[: y.size])
        if improved:
            y, best = z, val
        if not improved or small or not moved:  # the end, unless a bound held is now to be left
            if not _leaves_bound(f, y, best, bounds, held, tol):
                break
            held.clear()
    return best, y


def _leaves_bound(f, y, best, bounds, held, tol) -> bool:
    """Whether a coordinate held on its bound by :func:`polish` is no longer there or more probable inside it."""
    b = bounds(y) if callable(bounds) else bounds
    for i in sorted(held):
        edge = [e for e in b[i] if abs(y[i] - e) <= tol[i]]
        if not edge:
            return True
        z = y.copy()
        z[i] = edge[0] + (2.0 if edge[0] == b[i][0] else -2.0) * tol[i]
        if float(f(z)) > best:
            return True
    return False


def _prior_of(x, base: MaternPrior, nu: int, lo, hi, min_minor_m: float) -> MaternPrior:
    """The prior at search coordinates ``x = (ln sigma, ln range, p, q)``.

    The anisotropy is the vector :math:`(p, q) = \\ln(\\text{ratio}) (\\cos 2\\phi, \\sin 2\\phi)`
    (phi the azimuth of the major axis): smooth through the isotropic prior
    (0, 0) and free of the azimuth's period.
    """
    ls, lr = np.clip(x[:2], lo, hi)
    lq = float(np.hypot(x[2], x[3]))
    # the minor range is kept at two node spacings or more (the lattice resolves no less)
    lq = min(lq, math.log(MAX_RATIO), max(0.0, 2.0 * (lr - math.log(min_minor_m))))
    ratio = math.exp(lq)
    az = (math.degrees(0.5 * math.atan2(x[3], x[2])) % 180.0) if lq > 1e-9 else 0.0
    return MaternPrior(float(np.exp(ls)), float(np.exp(lr)), base.nugget_m2, "", nu, ratio, az)


def _key(p: MaternPrior):
    """A prior's hyperparameters rounded far below any tolerance of the search (1e-9 in their logarithms, 1e-7 deg).

    Points of the searches that map onto the same prior (clipped to a bound, or the same point
    reached again by another search) are evaluated once.
    """
    az = round(p.azimuth_deg, 7) if not p.isotropic else 0.0
    return (p.nu, round(math.log(p.sigma_m), 9), round(math.log(p.range_m), 9), round(math.log(p.ratio), 9), az)


def _polished(value, x, nu, lo, hi, min_minor_m, val):
    """:func:`polish` of a prior's search coordinates ``x = (ln sigma, ln range, p, q)`` at smoothness ``nu``.

    The polish runs in (ln sigma, ln range, ln ratio, azimuth of the major axis); an
    isotropic prior stays isotropic (its ratio and azimuth are held). The ratio's bound
    is the one :func:`_prior_of` keeps (at most :data:`MAX_RATIO`, the minor range at least
    ``min_minor_m``). Returns ``(value, x)``, the start when the polish finds nothing better.
    """
    lq = float(np.hypot(x[2], x[3]))
    aniso = lq > 0.0
    az = 0.5 * math.atan2(x[3], x[2]) if aniso else 0.0
    ls, lr = np.clip(x[:2], lo, hi)

    def to_x(y):
        return np.r_[y[0], y[1], y[2] * math.cos(2.0 * y[3]), y[2] * math.sin(2.0 * y[3])]

    def bounds(y):
        cap = min(math.log(MAX_RATIO), max(0.0, 2.0 * (y[1] - math.log(min_minor_m))))
        return [
            (lo[0], hi[0]),
            (lo[1], hi[1]),
            (0.0, cap) if aniso else None,
            (az - 0.5 * math.pi, az + 0.5 * math.pi) if aniso else None,
        ]

    y0 = np.array([ls, lr, min(lq, bounds([ls, lr])[2][1]) if aniso else 0.0, az])
    best, y = polish(lambda y: value(to_x(y), nu), y0, bounds)
    if best > val:
        return best, to_x(y)
    return val, x


def tune_priors(layout, data, state, priors, sigma_scale=1.0, extent_m=None, progress=None, max_evaluations=20):
    """Most probable sill, range, anisotropy and smoothness of each interface's prior (see the module notes).

    For each interface in turn (the others held at their current priors) the
    log evidence is maximised by Nelder-Mead in stages: (1) an isotropic
    prior, over (ln sigma, ln range); (2) an anisotropic one, over (ln sigma,
    ln range, anisotropy vector), started from the best of four probes (the
    correlation stretched 3 times along one of four directions, the range
    across it kept), kept only when it raises the log evidence by more than
    :data:`STRONG` (two more hyperparameters need strong evidence); (3) the
    other smoothness, searched further when it is more probable there; (4) a
    deterministic polish of the result (:func:`polish`, Newton steps on a fitted quadratic),
    so that the optimum does not depend on the path the searches took; a prior met twice is
    evaluated once. ``max_evaluations`` bounds each Nelder-Mead search.

    Returns ``(priors, log_evidence_before, log_evidence_after)``; each new
    prior's ``source`` says what was done. Where the evidence of the start
    priors cannot be evaluated (a singular linearised problem) they are
    returned unchanged and both values are not finite.
    """
    lin = _Linearised(layout, data, state, sigma_scale)
    current = list(priors)
    h = layout.spec.cell_size_m
    extent = float(extent_m) if extent_m else 10 * h * max(layout.spec.shape)
    lo = np.log([1e-3, 2.0 * h])
    hi = np.log([50.0, extent])  # relief longer than the site is the trend's
    before = lin.log_evidence(current)
    if not np.isfinite(before):  # a singular linearised problem: the start priors are kept, not a failed run
        if progress is not None:
            progress.info("priors kept from the variogram: the evidence of the picks could not be evaluated")
        return current, before, before
    best_total = before
    for k in range(layout.n_interfaces):
        check_cancel(progress)
        cur = current[k]
        # the sill is kept at least the gather-fit points' own scatter (their variogram's nugget): the picks
        # tell the relief only along the lines, and a sill below what a gather resolves would claim the
        # unsampled ground between them smoother than the survey can show (a knoll between the lines of
        # a 360 m square, none of them over it, was 3 m off where sigma said 0.02 m)
        lo_k = np.array([max(lo[0], 0.5 * math.log(max(cur.nugget_m2, 1e-6))), lo[1]])

        seen: dict = {}

        def value(x, nu, k=k, cur=cur, lo_k=lo_k, seen=seen):
            p = _prior_of(x, cur, nu, lo_k, hi, 2.0 * h)
            key = _key(p)
            v = seen.get(key)
            if v is None:
                trial = list(current)
                trial[k] = p
                v = lin.log_evidence(trial)
                v = seen[key] = v if np.isfinite(v) else -1e300
            return v

        def search(x_start, nu, evaluations, free=4):
            tail = np.asarray(x_start[free:], float)

            def neg(z, tail=tail):
                return -value(np.r_[z, tail], nu)

            z0 = np.asarray(x_start[:free], float)
            # stop on the values alone (xatol never binds): log-evidence differences below 1 are "not
            # worth more than a bare mention" [Kass & Raftery 1995], and along the ridge where sill and
            # range trade off the map hardly changes
            res = minimize(
                neg,
                z0,
                method="Nelder-Mead",
                options={
                    "xatol": 1.0,
                    "fatol": 1.0,
                    "maxfev": int(evaluations),
                    "initial_simplex": z0 + np.vstack([np.zeros(free), 0.6 * np.eye(free)]),
                },
            )
            return -float(res.fun), np.r_[res.x, x_start[free:]]

        nu = cur.nu
        x0 = np.r_[np.clip(np.log([cur.sigma_m, cur.range_m]), lo_k, hi), 0.0, 0.0]
        # (1) isotropic
        val, x = search(x0, nu, max_evaluations, free=2)
        # (2) anisotropic, on strong evidence only: probes that stretch the correlation 3 times along one of
        # four directions, the range across it kept, then a search from the most probable
        step = math.log(3.0)
        starts = [
            x + np.r_[0.0, 0.5 * step, step * math.cos(ang), step * math.sin(ang)]
            for ang in np.radians([0, 90, 180, 270])
        ]
        vals = [value(s, nu) for s in starts]
        if max(vals) > val:
            aval, ax = search(starts[int(np.argmax(vals))], nu, max_evaluations)
            if aval > val + STRONG:
                val, x = aval, ax
        # (3) the other smoothness
        other = 3 - nu
        oval = value(x, other)
        if oval > val:
            free = 4 if np.hypot(x[2], x[3]) > 0 else 2
            oval, ox = search(x, other, max_evaluations, free=free)
            if oval > val:
                val, x, nu = oval, ox, other
        # (4) the deterministic polish: the optimum to POLISH_TOLERANCE, whichever path led near it
        val, x = _polished(value, x, nu, lo_k, hi, 2.0 * h, val)
        if val > best_total:
            p = _prior_of(x, cur, nu, lo_k, hi, 2.0 * h)
            shape = (
                f"ratio {p.ratio:.2f} with the major axis at {p.azimuth_deg:.0f} deg"
                if not p.isotropic
                else "isotropic"
            )
            current[k] = replace(
                p,
                source=f"most probable given the picks (type-II maximum likelihood, log evidence "
                f"{val - best_total:+.1f} over the previous prior): Matern nu = {p.nu}, sigma {p.sigma_m:.3g} m, "
                f"range {p.range_m:.1f} m, {shape}; started from {priors[k].source}",
            )
            best_total = val
        if progress is not None:
            progress.info(f"prior of interface {k + 1}: {current[k].source.split(';')[0]}")
    return current, before, best_total
