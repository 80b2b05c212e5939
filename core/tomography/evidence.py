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
:math:`\\lambda_{ij} = (4 - 2\\cos(\\pi i/n_x) - 2\\cos(\\pi j/n_y))/h^2`. For each
interface in turn the sill and range are varied (Nelder-Mead in their
logarithms) for smoothness nu = 1 and 2, and the most probable are kept.

References
----------
[MacKay 1992] MacKay, D. J. C. (1992). Bayesian interpolation. Neural
    Computation 4(3), 415-447.
[Rasmussen & Williams 2006] Rasmussen, C. E. & Williams, C. K. I. (2006).
    Gaussian Processes for Machine Learning. MIT Press, s. 5.4.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.optimize import minimize

from ..errors import InversionError
from .prior import MaternPrior, matern_precision
from .system import borehole_matrix, jacobian, parameters, prior_mean, small_prior_precision

__all__ = ["log_det_matern", "tune_priors"]


def log_det_matern(spec, prior: MaternPrior) -> float:
    """Log-determinant of :func:`~.prior.matern_precision` on ``spec`` (exact, from the Laplacian's eigenvalues)."""
    from .prior import lattice_variance

    h = spec.cell_size_m
    ny, nx = spec.shape
    lx = 2.0 - 2.0 * np.cos(np.pi * np.arange(nx) / nx)
    ly = 2.0 - 2.0 * np.cos(np.pi * np.arange(ny) / ny)
    lam = (lx[None, :] + ly[:, None]) / h**2
    kappa = prior.kappa_per_m
    alpha = prior.nu + 1
    tau2 = lattice_variance(kappa, h, alpha) / prior.sigma_m**2
    return float(nx * ny * math.log(tau2 * h * h) + alpha * np.sum(np.log(kappa**2 + lam)))


class _Linearised:
    """The problem linearised at a state, for repeated evidence evaluations."""

    def __init__(self, layout, data, state, sigma_scale):
        J, use, sw = jacobian(layout, data, state, sigma_scale)
        self.JtJ = (J.T @ J).tocsr()
        r = state.residual_s[use] * sw
        self.Jtr = J.T @ r
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

    def log_evidence(self, priors) -> float:
        lay = self.layout
        Qs = [matern_precision(lay.spec, p) for p in priors]
        P = sp.block_diag([*Qs, self.P0], format="csr")
        A = (self.JtJ + P).tocsc()
        Pdm = P @ self.dm
        g = self.Jtr - Pdm
        phi0 = self.rr + float(self.dm @ Pdm)
        if self.BtB is not None:
            A = (A + self.BtB).tocsc()
            g = g + self.Bte
            phi0 += self.ee
        try:
            lu = spla.splu(A, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})
        except RuntimeError:
            return -np.inf
        d = lu.U.diagonal()
        if np.any(d <= 0):
            return -np.inf
        logdet_a = float(np.sum(np.log(d)))
        quad = float(g @ lu.solve(g))
        logdet_q = sum(log_det_matern(lay.spec, p) for p in priors)
        return -0.5 * (phi0 - quad) + 0.5 * logdet_q - 0.5 * logdet_a


def tune_priors(layout, data, state, priors, sigma_scale=1.0, extent_m=None, progress=None):
    """Most probable sill, range and smoothness of each interface's prior (see the module notes).

    Returns ``(priors, log_evidence_before, log_evidence_after)``; each new
    prior's ``source`` says what was done.
    """
    lin = _Linearised(layout, data, state, sigma_scale)
    current = list(priors)
    h = layout.spec.cell_size_m
    extent = float(extent_m) if extent_m else 10 * h * max(layout.spec.shape)
    lo = np.log([1e-3, 2.0 * h])
    hi = np.log([50.0, 4.0 * extent])
    before = lin.log_evidence(current)
    if not np.isfinite(before):
        raise InversionError("the evidence of the start priors is not finite; the linearised problem is singular")
    best_total = before
    for k in range(layout.n_interfaces):
        best = (best_total, current[k])
        for nu in (1, 2):

            def neg(x, k=k, nu=nu):
                x = np.clip(x, lo, hi)
                trial = list(current)
                trial[k] = MaternPrior(float(np.exp(x[0])), float(np.exp(x[1])), current[k].nugget_m2, "", nu)
                v = lin.log_evidence(trial)
                return -v if np.isfinite(v) else 1e300

            x0 = np.clip(np.log([current[k].sigma_m, current[k].range_m]), lo, hi)
            res = minimize(
                neg,
                x0,
                method="Nelder-Mead",
                options={
                    "xatol": 0.02,
                    "fatol": 0.05,
                    "maxfev": 80,
                    "initial_simplex": x0 + np.array([[0.0, 0.0], [0.7, 0.0], [0.0, 0.7]]),
                },
            )
            val = -float(res.fun)
            if val > best[0]:
                x = np.clip(res.x, lo, hi)
                best = (val, MaternPrior(float(np.exp(x[0])), float(np.exp(x[1])), current[k].nugget_m2, "", nu))
        if best[1] is not current[k]:
            p = best[1]
            current[k] = replace(
                p,
                source=f"most probable given the picks (type-II maximum likelihood, log evidence "
                f"{best[0] - best_total:+.1f} over the previous prior): Matern nu = {p.nu}, sigma {p.sigma_m:.3g} m, "
                f"range {p.range_m:.1f} m; started from {priors[k].source}",
            )
            best_total = best[0]
        if progress is not None:
            progress.info(f"prior of interface {k + 1}: {current[k].source.split(';')[0]}")
    return current, before, best_total
