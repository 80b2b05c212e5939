"""Depth only where the ground is known (review defect: depth extrapolated beyond the stations).

Without a DEM the ground comes from the stations; beyond their outline it was
extended flat, so on ground sloping 12 % east and 8 % north the depth was off
by metres where depth_sigma said centimetres. Now the ground beyond the
stations carries a standard deviation (distance x the steepest slope between
the stations) up to a buffer, and has no value beyond it.

Checked against: shapely's polygon distance (reference library) for the
distance beyond the stations' hull; an exact plane site (image-source times,
Sheriff & Geldart 1995, ch. 4) with a known ground for the depths.
"""

import numpy as np
import pytest
from plane_site import E0, N0, PlaneSite, write_site
from rockhead.core.survey.config import load_survey
from rockhead.core.survey.ground import GroundModel
from rockhead.core.workflow import compute

SLOPE = (0.12, 0.08)


def test_distance_beyond_the_hull_is_shapelys():
    from shapely.geometry import MultiPoint, Point

    rng = np.random.default_rng(3)
    xy = rng.uniform(0.0, 100.0, (40, 2))
    g = GroundModel.from_stations(xy[:, 0], xy[:, 1], np.zeros(40))
    hull = MultiPoint([tuple(p) for p in xy]).convex_hull
    q = rng.uniform(-50.0, 150.0, (300, 2))
    expected = [hull.distance(Point(*p)) for p in q]  # 0 inside, as ours
    # 1e-9 m: both are exact segment distances in double precision
    np.testing.assert_allclose(g.outside_distance_m(q[:, 0], q[:, 1]), expected, atol=1e-9)


@pytest.mark.parametrize("collinear", [False, True], ids=["area", "one-line"])
def test_ground_sigma_on_a_planar_slope(collinear):
    # planar ground z = 0.12 x + 0.08 y: the fitted slope is exact (|grad| = 0.144 over an area; along a
    # line at 30 deg from east, the slope along it, 0.12 cos 30 + 0.08 sin 30 = 0.144)
    if collinear:
        t = np.arange(0.0, 100.0, 2.0)
        x, y = t * np.cos(np.radians(30.0)), t * np.sin(np.radians(30.0))
        slope = 0.12 * np.cos(np.radians(30.0)) + 0.08 * np.sin(np.radians(30.0))
    else:
        x, y = (a.ravel() for a in np.meshgrid(np.arange(0.0, 60.0, 6.0), np.arange(0.0, 60.0, 6.0)))
        slope = np.hypot(*SLOPE)
    g = GroundModel.from_stations(x, y, SLOPE[0] * x + SLOPE[1] * y)
    assert g.slope_bound_ == pytest.approx(slope, rel=1e-9)
    px = np.array([30.0, -10.0, -30.0]) if not collinear else np.array([50.0, -10.0, -30.0])
    py = np.zeros(3)
    d = g.outside_distance_m(px, py)
    s = g.sigma_m(px, py, buffer_m=15.0)
    ok = d <= 15.0
    np.testing.assert_allclose(s[ok], d[ok] * slope, rtol=1e-9)
    assert np.all(np.isnan(s[~ok]))
    # the flat extension's error is within that sigma: |true - model| <= d x slope
    err = np.abs(g(px, py) - (SLOPE[0] * px + SLOPE[1] * py))
    assert np.all(err[ok] <= s[ok] + 1e-9)


@pytest.fixture(scope="module")
def sloping(tmp_path_factory):
    site = PlaneSite(ground_slope=SLOPE, dip_deg=6.0, lines=[("A", (0.0, 0.0), 90.0, 61), ("B", (0.0, 0.0), 0.0, 61)])
    r = compute(load_survey(write_site(tmp_path_factory.mktemp("sloping"), site)), method="kriging")
    return site, r


@pytest.mark.slow  # a whole computation (end to end)
def test_depth_is_given_only_where_the_ground_is_known(sloping):
    _, r = sloping
    X, Y = np.meshgrid(r.spec.x_centres, r.spec.y_centres)
    d = r.ground.outside_distance_m(X, Y)
    mapped = ~r.surface.mask
    assert np.any(mapped & (d > r.ground_buffer_m))  # the surface reaches beyond the buffer...
    assert np.all(np.isnan(r.depth_m[d > r.ground_buffer_m]))  # ...its depth does not
    # default buffer: half the median depth of the points (30 m under the crossing, 6 deg of dip)
    assert r.ground_buffer_m == pytest.approx(15.0, abs=2.0)
    assert np.all(np.isfinite(r.depth_m[mapped & (d <= r.ground_buffer_m)]))


@pytest.mark.slow  # a whole computation (end to end)
def test_depth_error_within_its_sigma_on_sloping_ground(sloping):
    site, r = sloping
    X, Y = np.meshgrid(r.spec.x_centres, r.spec.y_centres)
    true_depth = site.ground(X - E0, Y - N0) - site.reflector(X - E0, Y - N0)
    ok = np.isfinite(r.depth_m)
    err = r.depth_m[ok] - true_depth[ok]
    # exact picks: the error is the flat ground extension's (bounded by the ground sigma) plus the
    # surface's interpolation error (within its kriging sigma); 2 sigma leaves room for the latter
    assert np.all(np.abs(err) <= 2.0 * r.depth_sigma_m[ok]), np.max(np.abs(err) / r.depth_sigma_m[ok])
    # before the fix the flat extension gave depth wherever the surface was mapped with the surface's
    # sigma only: measured when written, up to several metres off where that sigma was a few decimetres
    mapped = ~r.surface.mask
    old = r.ground_grid_m[mapped] - r.surface.z[mapped]
    old_err = np.abs(old - true_depth[mapped])
    assert np.max(old_err / r.surface.std[mapped]) > 5.0
    # inside the stations' outline the ground is data: the depth sigma is the surface's
    inside = ok & (r.ground.outside_distance_m(X, Y) == 0)
    np.testing.assert_allclose(r.depth_sigma_m[inside], r.surface.std[inside], rtol=1e-12)
