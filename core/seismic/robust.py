r"""Robust loss functions of the gather fits: the loss, its weights, its variance inflation.

A pick's standardised residual is :math:`e = (t - \hat t)/\sigma` (observed
minus modelled two-way time over the pick error). A fit minimises
:math:`\sum_i C^2\rho(e_i^2/C^2)` with the scale ``C`` (``robust_scale``, in
pick sigmas) and :math:`\rho` of the squared scaled residual
:math:`z = e^2/C^2` one of

* ``linear``: :math:`\rho(z) = z` (least squares);
* ``huber``: :math:`z` for :math:`z \le 1`, else :math:`2\sqrt z - 1`;
* ``soft_l1``: :math:`2(\sqrt{1+z} - 1)`;
* ``cauchy``: :math:`\ln(1+z)`,

the same definitions as ``scipy.optimize.least_squares`` with ``f_scale = C``,
so both minimise the same function. The influence function is
:math:`\psi(e) = \rho'(z)\,e`; :math:`\rho'(z)` is the weight of a residual in
iteratively reweighted least squares.

References
----------
[Huber 1981] Huber, P. J. (1981). Robust Statistics. Wiley (M-estimators,
    asymptotic variance E[psi^2]/E[psi']^2).
[Triggs et al. 2000] Triggs, B., McLauchlan, P., Hartley, R. & Fitzgibbon, A.
    (2000). Bundle adjustment -- a modern synthesis. Vision Algorithms: Theory
    and Practice, LNCS 1883, 298-372 (robust cost functions in Gauss-Newton).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from ..errors import InversionError
from .batch import row_sum

__all__ = [
    "LOSSES",
    "check_loss",
    "loss_terms",
    "rho",
    "rho_prime",
    "rho_second",
    "variance_inflation",
]

#: Names of the robust losses.
LOSSES = ("linear", "huber", "soft_l1", "cauchy")


def check_loss(loss: str) -> str:
    """Return ``loss`` when it names a known robust loss.

    Parameters
    ----------
    loss : str
        One of :data:`LOSSES`.

    Returns
    -------
    str
        ``loss`` itself.

    Raises
    ------
    InversionError
        For any other name (quoted, with the valid names).
    """
    if loss not in LOSSES:
        raise InversionError(
            f"robust_loss = {loss!r} is not known; expected one of {', '.join(LOSSES)} "
            "(set it in the [processing] section of survey.toml)"
        )
    return loss


def loss_terms(e: np.ndarray, loss: str, f_scale: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Per-row robust cost and per-residual weights, in one pass.

    The Gauss-Newton iteration needs the three at every trial point. The
    curvature weight is floored so that it stays positive for the
    redescending losses [Triggs et al. 2000].

    Parameters
    ----------
    e : (k, n) ndarray
        Standardised residuals (dimensionless; 0 for padding).
    loss : str
        One of :data:`LOSSES`.
    f_scale : float
        Scale C of the loss, in units of e.

    Returns
    -------
    cost : (k,) ndarray
        :math:`\sum_i C^2\rho(e_i^2/C^2)` of each row.
    weight : (k, n) ndarray
        :math:`\rho'(z)` with :math:`z = e^2/C^2`.
    curvature_weight : (k, n) ndarray
        :math:`\max(\psi'(e),\ 10^{-3}\rho'(z))`.

    Examples
    --------
    Huber with C = 1: a residual of 3 costs :math:`2\cdot 3 - 1 = 5` and weighs 1/3:

    >>> cost, w, wc = loss_terms(np.array([[0.5, 3.0]]), "huber", 1.0)
    >>> float(cost[0]), [round(float(v), 6) for v in w[0]]
    (5.25, [1.0, 0.333333])
    """
    C2 = f_scale * f_scale
    z = e * e
    if loss == "linear":
        return row_sum(z), np.ones_like(z), np.ones_like(z)
    z *= 1.0 / C2
    if loss == "huber":
        a = np.sqrt(z)
        m = np.minimum(a, 1.0)
        r = 2.0 * a
        r -= m
        r *= m  # m (2a - m): z inside, 2 sqrt(z) - 1 outside
        np.maximum(a, 1.0, out=a)
        r1 = np.divide(1.0, a, out=a)  # 1 inside, 1 / sqrt(z) outside
        wc = np.floor(r1)  # 1 inside, 0 outside
        wc *= 0.999
        wc += 1e-3 * r1  # 1 inside, 1e-3 / sqrt(z) outside
    elif loss == "soft_l1":
        a = np.sqrt(1.0 + z)
        r = 2.0 * (a - 1.0)
        r1 = 1.0 / a
        wc = r1 / (1.0 + z)
    else:  # cauchy
        a = 1.0 + z
        r = np.log(a)
        r1 = 1.0 / a
        wc = np.maximum((1.0 - z) * r1 * r1, 1e-3 * r1)
    return C2 * row_sum(r), r1, wc


def rho(z: np.ndarray, loss: str) -> np.ndarray:
    r"""Loss :math:`\rho(z)` of the squared scaled residual z (scipy's definitions).

    Parameters
    ----------
    z : ndarray
        :math:`e^2/C^2` (dimensionless, >= 0).
    loss : str
        One of :data:`LOSSES`.

    Returns
    -------
    ndarray
        :math:`\rho(z)`, same shape as z.

    Examples
    --------
    >>> rho(np.array([0.25, 4.0]), "huber").tolist()
    [0.25, 3.0]
    """
    if loss == "linear":
        return z
    if loss == "huber":
        return np.where(z <= 1.0, z, 2.0 * np.sqrt(z) - 1.0)
    if loss == "soft_l1":
        return 2.0 * (np.sqrt(1.0 + z) - 1.0)
    return np.log1p(z)  # cauchy


def rho_prime(z: np.ndarray, loss: str) -> np.ndarray:
    r"""Compute :math:`\rho'(z)`, the iteratively-reweighted-least-squares weight of a residual.

    Parameters
    ----------
    z : ndarray
        :math:`e^2/C^2` (dimensionless, >= 0).
    loss : str
        One of :data:`LOSSES`.

    Returns
    -------
    ndarray
        :math:`\rho'(z)`, same shape as z, in (0, 1].

    Examples
    --------
    >>> rho_prime(np.array([0.25, 4.0]), "huber").tolist()
    [1.0, 0.5]
    """
    if loss == "linear":
        return np.ones_like(z)
    if loss == "huber":
        return np.where(z <= 1.0, 1.0, 1.0 / np.sqrt(np.maximum(z, 1.0)))
    if loss == "soft_l1":
        return 1.0 / np.sqrt(1.0 + z)
    return 1.0 / (1.0 + z)  # cauchy


def rho_second(z: np.ndarray, loss: str) -> np.ndarray:
    r"""Second derivative :math:`\rho''(z)`.

    Parameters
    ----------
    z : ndarray
        :math:`e^2/C^2` (dimensionless, >= 0).
    loss : str
        One of :data:`LOSSES`.

    Returns
    -------
    ndarray
        :math:`\rho''(z)`, same shape as z (<= 0).

    Examples
    --------
    >>> rho_second(np.array([0.25, 4.0]), "huber").tolist()
    [0.0, -0.0625]
    """
    if loss == "linear":
        return np.zeros_like(z)
    if loss == "huber":
        return np.where(z <= 1.0, 0.0, -0.5 * np.maximum(z, 1.0) ** -1.5)
    if loss == "soft_l1":
        return -0.5 * (1.0 + z) ** -1.5
    return -1.0 / (1.0 + z) ** 2


@lru_cache(maxsize=32)
def variance_inflation(loss: str, f_scale: float) -> float:
    r"""Asymptotic variance inflation of the robust loss for Gaussian errors [Huber 1981].

    .. math::

        \kappa = \frac{E[\psi(e)^2]}{E[\psi'(e)]^2}, \qquad e \sim N(0, 1),
        \quad \psi'(e) = \rho'(z) + 2z\rho''(z)

    It multiplies the least-squares covariance of the M-estimator. Computed by
    quadrature over :math:`|e| \le 12` (48,001 points).

    Parameters
    ----------
    loss : str
        One of :data:`LOSSES`.
    f_scale : float
        Scale C of the loss, in standard deviations of e.

    Returns
    -------
    float
        :math:`\kappa` (dimensionless, >= 1; exactly 1 for ``linear``).

    Examples
    --------
    >>> variance_inflation("linear", 1.0)
    1.0
    >>> round(variance_inflation("huber", 1.5), 3)
    1.037
    """
    if loss == "linear":
        return 1.0
    e = np.linspace(-12.0, 12.0, 48001)
    pdf = np.exp(-0.5 * e * e) / np.sqrt(2.0 * np.pi)
    z = (e / f_scale) ** 2
    psi = rho_prime(z, loss) * e
    dpsi = rho_prime(z, loss) + 2.0 * z * rho_second(z, loss)
    de = e[1] - e[0]
    return float(np.sum(psi**2 * pdf) * de / (np.sum(dpsi * pdf) * de) ** 2)
