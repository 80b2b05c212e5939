"""Conditional simulation by kriging (Journel & Huijbregts 1978, ch. VII; Deutsch & Journel 1998,
GSLIB s. V.2.4): the realisations' mean is the kriged value and their variance the kriging
variance, up to sampling error; the weights are those of the project's kriging, which is itself
checked against PyKrige in test_surface.py."""

import numpy as np
import pytest
from rockhead.core.surface.kriging import OrdinaryKriging
from rockhead.core.surface.simulation import kriging_weights, simulate_conditional
from rockhead.core.surface.variogram import VariogramModel


@pytest.fixture(scope="module")
def case():
    rng = np.random.default_rng(5)
    x = rng.uniform(0, 200, 40)
    y = rng.uniform(0, 150, 40)
    z = 100 + 0.02 * x + np.sin(x / 40) + rng.normal(0, 0.2, 40)
    e = np.full(40, 0.05**2)
    e[:3] = 1e-6  # three near-exact data (boreholes)
    vario = VariogramModel("spherical", nugget=0.01, sill=0.8, range_m=90.0)
    tx, ty = np.meshgrid(np.linspace(5, 195, 12), np.linspace(5, 145, 9))
    tx = np.concatenate([tx.ravel(), x[:3]])  # also at the near-exact data
    ty = np.concatenate([ty.ravel(), y[:3]])
    return x, y, z, e, vario, tx, ty


@pytest.mark.parametrize("neighbours", [8, None], ids=["local-8", "global"])
def test_weights_reproduce_the_kriging(case, neighbours):
    x, y, z, e, vario, tx, ty = case
    ok = OrdinaryKriging(vario, neighbours=neighbours).fit(x, y, z, e)
    est, std = ok.predict(tx, ty)
    idx, lam, var = kriging_weights(vario, x, y, e, tx, ty, neighbours)
    np.testing.assert_allclose(lam.sum(axis=1), 1.0, atol=1e-10)  # ordinary kriging: unbiased
    # the same linear systems: agreement to round-off (1e-8 m on 100 m values)
    np.testing.assert_allclose(np.einsum("ik,ik->i", lam, z[idx]), est, atol=1e-8)
    np.testing.assert_allclose(np.sqrt(var), std, atol=1e-8)


def test_realisations_reproduce_kriging_mean_and_variance(case):
    x, y, z, e, vario, tx, ty = case
    k = 12
    est, std = OrdinaryKriging(vario, neighbours=k).fit(x, y, z, e).predict(tx, ty)
    n_sims = 4000
    sim = simulate_conditional(vario, x, y, e, tx, ty, est, n_sims, seed=11, neighbours=k)
    mean = sim.values.mean(axis=1)
    var = sim.values.var(axis=1, ddof=1)
    # sampling error of a mean of n draws: sigma / sqrt(n); 4.5 of them bound each of the 111
    # nodes with a false-alarm chance below 1e-3 in all (the seed is fixed, so the test is repeatable)
    assert np.all(np.abs(mean - est) <= 4.5 * std / np.sqrt(n_sims) + 1e-9)
    # sample variance / true variance ~ chi2(n-1)/(n-1): sd sqrt(2/(n-1)) = 0.022; 4.5 sd as above
    big = std > 1e-3
    ratio = var[big] / std[big] ** 2
    assert np.all(np.abs(ratio - 1) <= 4.5 * np.sqrt(2 / (n_sims - 1)))
    # at a near-exact datum the realisations stay at the datum (sd = that of the datum, 1e-3 m)
    np.testing.assert_allclose(sim.values[-3:].std(axis=1), std[-3:], atol=2e-3)


def test_spatial_covariance_is_honoured(case):
    """Unconditioned far from data, two nodes a lag h apart covary as C(h) of the model."""
    x, y, _z, e, vario, _tx, _ty = case
    far_x = np.array([2000.0, 2030.0, 2200.0])
    far_y = np.array([2000.0, 2000.0, 2000.0])
    mean = np.full(3, 100.0)
    sim = simulate_conditional(vario, x, y, e, far_x, far_y, mean, 20000, seed=3, neighbours=8)
    c = np.cov(sim.values)
    # far beyond the range every kriging weight's data covariance is 0, so the conditional covariance is
    # C(h) plus the variance of the kriged residual: compare the correlation 30 m apart with the model's
    # after removing that common part (var of a mean of 8 correlated data, estimated from the sample)
    common = c[0, 2]  # 200 m > range: only the shared kriged part remains
    rho_model = vario.covariance(30.0) / vario.total_sill
    rho_sim = (c[0, 1] - common) / (c[0, 0] - common)
    # standard error of a correlation of n = 20000 draws ~ (1 - rho^2)/sqrt(n) < 0.01; allow 0.03
    assert rho_sim == pytest.approx(rho_model, abs=0.03)
