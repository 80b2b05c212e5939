"""Robust losses of the gather fits (core/seismic/robust.py) against scipy and Huber's closed forms."""

import numpy as np
import pytest
from rockhead.core.errors import InversionError
from rockhead.core.seismic import robust
from scipy.optimize import least_squares
from scipy.stats import norm

NONLINEAR = ("huber", "soft_l1", "cauchy")


def _scipy_cost(e, loss, f_scale):
    """scipy's 0.5 * C^2 * sum(rho(e^2 / C^2)) at the start, from a residual that x cannot change."""
    res = least_squares(
        lambda x: e + 0.0 * x[0], x0=[0.0], jac=lambda x: np.zeros((len(e), 1)), loss=loss, f_scale=f_scale
    )
    return res.cost


@pytest.mark.parametrize("loss", robust.LOSSES, ids=robust.LOSSES)
def test_cost_is_scipys(loss, rng):
    # scipy.optimize.least_squares documents the same rho(z) and reports cost = 0.5 * C^2 sum rho(f^2/C^2);
    # a zero Jacobian ends it at the start, so its cost is the loss of the given residuals
    e = rng.normal(0.0, 3.0, 40)
    cost, _, _ = robust.loss_terms(e[None, :].copy(), loss, 1.5)
    # both sum the same 40 terms in double precision: 1e-12 relative is rounding
    assert cost[0] == pytest.approx(2.0 * _scipy_cost(e, loss, 1.5), rel=1e-12)
    assert cost[0] == pytest.approx(1.5**2 * np.sum(robust.rho(e**2 / 1.5**2, loss)), rel=1e-12)


@pytest.mark.parametrize("loss", robust.LOSSES, ids=robust.LOSSES)
def test_derivatives_match_finite_differences(loss):
    # away from Huber's kink at z = 1; central differences with step 1e-6 are good to ~1e-9
    z = np.array([0.01, 0.3, 0.8, 1.7, 4.0, 25.0])
    h = 1e-6
    d1 = (robust.rho(z + h, loss) - robust.rho(z - h, loss)) / (2 * h)
    d2 = (robust.rho_prime(z + h, loss) - robust.rho_prime(z - h, loss)) / (2 * h)
    np.testing.assert_allclose(robust.rho_prime(z, loss), d1, atol=1e-8)
    np.testing.assert_allclose(robust.rho_second(z, loss), d2, atol=1e-7)


@pytest.mark.parametrize("loss", robust.LOSSES, ids=robust.LOSSES)
def test_loss_terms_weights(loss, rng):
    e = rng.normal(0.0, 4.0, (3, 30))
    C = 1.5
    z = e**2 / C**2
    _, w, wc = robust.loss_terms(e.copy(), loss, C)
    np.testing.assert_allclose(w, robust.rho_prime(z, loss), rtol=1e-14)
    psi_prime = robust.rho_prime(z, loss) + 2.0 * z * robust.rho_second(z, loss)
    # the curvature weight is psi'(e), floored at 1e-3 rho' where psi' would go negative
    # (Huber outside its corner, Cauchy beyond z = 1); soft_l1's psi' is positive already
    expected = psi_prime if loss in ("linear", "soft_l1") else np.maximum(psi_prime, 1e-3 * robust.rho_prime(z, loss))
    np.testing.assert_allclose(wc, expected, rtol=1e-12, atol=1e-15)
    assert np.all(wc > 0)


@pytest.mark.parametrize("k", [1.0, 1.345, 1.5, 2.0], ids=["k1", "k1.345", "k1.5", "k2"])
def test_huber_variance_inflation_closed_form(k):
    # Huber (1981): for psi(e) = max(-k, min(k, e)) and e ~ N(0, 1),
    # E[psi^2] = 2 Phi(k) - 1 - 2 k phi(k) + 2 k^2 (1 - Phi(k)) and E[psi'] = 2 Phi(k) - 1
    inside = 2.0 * norm.cdf(k) - 1.0
    e_psi2 = inside - 2.0 * k * norm.pdf(k) + 2.0 * k * k * norm.sf(k)
    # the module sums on a 5e-4 grid over |e| <= 12; psi' jumps at |e| = k, so the sum of E[psi'] is
    # off by up to one step times phi(k), ~1.2e-4 of ~0.7, and its square twice that: 1e-3 relative
    assert robust.variance_inflation("huber", k) == pytest.approx(e_psi2 / inside**2, rel=1e-3)


@pytest.mark.slow  # Monte Carlo of the variance inflation
@pytest.mark.parametrize("loss", NONLINEAR, ids=NONLINEAR)
def test_variance_inflation_monte_carlo(loss):
    # the asymptotic variance of the M-estimate of a location: simulate it (common practice).
    # 4000 samples of size 400 from N(0, 1), estimate by IRLS; SE of a variance estimate with
    # 4000 draws is ~2.2 % of it, so +-8 % is over three of them
    rng = np.random.default_rng(5)
    x = rng.normal(size=(4000, 400))
    C = 1.5
    m = np.median(x, axis=1)
    for _ in range(50):
        w = robust.rho_prime(((x - m[:, None]) / C) ** 2, loss)
        m = np.sum(w * x, axis=1) / np.sum(w, axis=1)
    ratio = np.var(m) * 400  # the variance of the mean is 1 / 400
    assert ratio == pytest.approx(robust.variance_inflation(loss, C), rel=0.08)


def test_unknown_loss_is_refused():
    with pytest.raises(InversionError, match=r"robust_loss = 'l1' is not known; expected one of linear, huber"):
        robust.check_loss("l1")
    assert robust.check_loss("cauchy") == "cauchy"
