"""Design-level answers: P(rock above a level) per cell and the rock volume above it.

Probabilities against scipy's normal distribution function (the reference library); volumes on
a synthetic plane whose volume above the level is a closed-form prism, simulated as in
Deutsch & Journel 1998 (GSLIB s. V.2.4).
"""

import numpy as np
import pytest
from rockhead.core.errors import SurfaceError
from rockhead.core.grid import GridSpec
from rockhead.core.handoff.design import cells_inside, probability_above, rock_volume
from rockhead.core.surface.kriging import OrdinaryKriging
from rockhead.core.surface.simulation import kriging_weights
from rockhead.core.surface.trend import PlaneTrend
from rockhead.core.surface.variogram import VariogramModel
from scipy.stats import norm
from shapely.geometry import box


def test_probability_is_the_gaussian_cdf_cell_by_cell(rng):
    z = rng.normal(100, 3, (20, 30))
    s = rng.uniform(0.1, 2.0, (20, 30))
    z[0, :5] = np.nan  # unmapped cells stay empty
    s[1, 0] = 0.0  # exact cell
    z[1, 0] = 101.0
    p = probability_above(z, s, 99.5)
    with np.errstate(divide="ignore", invalid="ignore"):
        ref = norm.cdf((z - 99.5) / s)
    ok = np.isfinite(z) & (s > 0)
    np.testing.assert_allclose(p[ok], ref[ok], rtol=0, atol=1e-14)  # the same formula to round-off
    assert np.all(np.isnan(p[0, :5]))
    assert p[1, 0] == 1.0


SLOPE = 0.1  # m per m, rising east
X0 = 1000.0


def _plane(x):
    return 100.0 + SLOPE * (x - X0)


@pytest.fixture(scope="module")
def plane_map():
    """Noisy points of a plane, trend removed and residuals kriged as the pipeline does."""
    rng = np.random.default_rng(42)
    gx, gy = np.meshgrid(np.arange(1000.0, 1201.0, 10.0), np.arange(0.0, 101.0, 10.0))
    x, y = gx.ravel(), gy.ravel()
    sigma = np.full(x.size, 0.05)
    z = _plane(x) + rng.normal(0, 0.05, x.size)
    trend = PlaneTrend.fit(x, y, z, sigma)
    vario = VariogramModel("spherical", nugget=0.0, sill=0.01, range_m=60.0)
    spec = GridSpec(x0=1002.5, y0=97.5, cell_size_m=5.0, nx=40, ny=20)
    ok = OrdinaryKriging(vario, neighbours=16).fit(x, y, z - trend(x, y), sigma**2)
    surf = ok.grid(spec)
    cx, cy = spec.coords()
    zmap = surf.z + trend(cx, cy)
    return spec, zmap, surf.std, vario, (x, y), sigma**2


def test_volume_of_a_plane_matches_the_prism(plane_map):
    spec, zmap, _, vario, xy, e = plane_map
    design = 110.0  # the plane crosses it at x = 1100 m, a cell edge
    area = box(1020.0, 20.0, 1180.0, 80.0)  # edges on cell edges: the midpoint rule is exact on each linear part
    res = rock_volume(spec, zmap, design, vario, xy, e, area=area, neighbours=16, n_simulations=400, seed=3)
    # prism: width 60 m x integral of 0.1 (x - 1100) from 1100 to 1180 = 60 * 0.05 * 80^2
    exact = 60.0 * SLOPE / 2 * 80.0**2
    assert exact == 19200.0
    assert res.area_m2 == pytest.approx(160 * 60) and res.mapped_fraction == pytest.approx(1.0)
    se_median = 1.2533 * res.sd_m3 / np.sqrt(res.n_simulations)  # large-sample standard error of a median
    # the truth lies within the posterior spread (3 sd) ...
    assert abs(res.p50_m3 - exact) <= 3 * res.sd_m3 + 4 * se_median
    # ... and the spread is small here (dense, precise data): within 0.5 % of the volume
    assert res.sd_m3 < 0.005 * exact
    assert res.p10_m3 <= res.p50_m3 <= res.p90_m3
    # the kriged map's own volume is within the sampling error of the simulations' median
    assert abs(res.p50_m3 - res.map_volume_m3) <= 4 * se_median + 1e-6 * exact


def test_volume_spread_is_that_of_the_spatial_covariance(plane_map):
    """The simulated sd of the volume equals the exact sd from the kriging error covariance.

    With every cell above the level, V = A sum(Z_i - z_d), so Var(V) = A^2 1' K 1 with K the
    covariance of the kriging errors e = Y_t - W Z_d:
    K = C_tt - W C_dt - C_td W' + W (C_dd + E) W' (Journel & Huijbregts 1978, ch. V).
    Treating cells as independent (diag K only) understates it.
    """
    spec, zmap, std, vario, xy, e = plane_map
    k = 16
    res = rock_volume(spec, zmap, 90.0, vario, xy, e, neighbours=k, n_simulations=1000, seed=4)
    mapped = np.isfinite(zmap)
    cx, cy = spec.coords()
    tx, ty = cx[mapped], cy[mapped]
    x, y = xy
    idx, lam, _ = kriging_weights(vario, x, y, e, tx, ty, k)
    w = np.zeros((tx.size, x.size))
    np.put_along_axis(w, idx, lam, axis=1)

    def cov(ax, ay, bx, by):
        return vario.covariance(np.hypot(ax[:, None] - bx[None, :], ay[:, None] - by[None, :]))

    c_tt, c_td, c_dd = cov(tx, ty, tx, ty), cov(tx, ty, x, y), cov(x, y, x, y) + np.diag(e)
    kerr = c_tt - w @ c_td.T - c_td @ w.T + w @ c_dd @ w.T
    a = spec.cell_size_m**2
    exact_sd = a * np.sqrt(kerr.sum())
    independent_sd = a * np.sqrt(np.sum(std[mapped] ** 2))
    # sampling error of a sample sd from n draws: sd / sqrt(2 (n - 1)) = 2.2 %; allow 4 of them
    assert res.sd_m3 == pytest.approx(exact_sd, rel=4 / np.sqrt(2 * 999))
    assert exact_sd > 2 * independent_sd  # independent cells would understate the spread here
    assert res.probability_any_rock == 1.0


def test_area_outside_the_map_is_an_error(plane_map):
    spec, zmap, _, vario, xy, e = plane_map
    with pytest.raises(SurfaceError, match="no mapped cell lies inside the design area"):
        rock_volume(spec, zmap, 110.0, vario, xy, e, area=box(0, 0, 10, 10), n_simulations=200)


def test_cells_inside_a_polygon():
    spec = GridSpec(x0=0.5, y0=9.5, cell_size_m=1.0, nx=10, ny=10)
    inside = cells_inside(spec, box(2.0, 3.0, 5.0, 9.0))
    assert inside.sum() == 3 * 6  # centres 2.5..4.5 by 3.5..8.5
