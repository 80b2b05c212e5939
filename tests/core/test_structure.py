"""Tests of core.structure: dip/strike algebra, combining crossing lines, surface dips.

The synthetic surveys below are forward-modelled with the exact image-source
traveltime (Sheriff & Geldart 1995, ch. 4) over a known plane, fitted with the
project's inversion and combined; the recovered dip must be the plane's own.
"""

from dataclasses import dataclass, replace

import numpy as np
import pytest
from rockhead.core.errors import InversionError
from rockhead.core.seismic import forward, geometry, shot_fits, structure
from rockhead.core.survey.model import Picks, Settings, Stations, Survey

# ---------------------------------------------------------------------------
# synthetic surveys
# ---------------------------------------------------------------------------


def crossing_survey(
    dip_deg,
    dip_dir_deg,
    azimuths_deg,
    *,
    sites=((0.0, 0.0),),
    depth_m=60.0,
    half_length_m=80.0,
    station_step_m=5.0,
    shot_step_m=10.0,
    max_offset_m=60.0,
    velocity_m_s=1800.0,
    noise_s=0.0,
    rng=None,
):
    """Straight lines through each site centre (one per azimuth) over one plane per site.

    The plane passes ``depth_m`` below the (flat, z = 0) ground at each site
    centre. Stations every ``station_step_m``; a shot every ``shot_step_m``
    recorded by the stations within ``max_offset_m``. Returns (survey, planes).
    """
    st = {k: [] for k in ("line", "station", "x", "y", "z")}
    pk = {k: [] for k in ("line", "shot", "receiver", "t")}
    planes = []
    chain = np.arange(-half_length_m, half_length_m + 1e-9, station_step_m)
    shots = np.flatnonzero(np.isclose(np.mod(chain + half_length_m, shot_step_m), 0.0))
    for i, (cx, cy) in enumerate(sites):
        n, d = forward.plane_through_point([cx, cy, -depth_m], dip_deg, dip_dir_deg)
        planes.append((n, d))
        for k, az in enumerate(azimuths_deg):
            name = f"S{i}L{k}"
            x = cx + chain * np.sin(np.radians(az))
            y = cy + chain * np.cos(np.radians(az))
            xyz = np.column_stack([x, y, np.zeros_like(x)])
            labels = [str(100 + j) for j in range(len(chain))]
            st["line"] += [name] * len(chain)
            st["station"] += labels
            st["x"] += list(x)
            st["y"] += list(y)
            st["z"] += [0.0] * len(chain)
            for js in shots:
                rec = np.flatnonzero(np.abs(chain - chain[js]) <= max_offset_m)
                pk["line"] += [name] * len(rec)
                pk["shot"] += [labels[js]] * len(rec)
                pk["receiver"] += [labels[j] for j in rec]
                pk["t"] += list(forward.image_source_traveltime(xyz[js], xyz[rec], n, d, velocity_m_s))
    t = np.asarray(pk["t"])
    if noise_s:
        t = t + rng.normal(0.0, noise_s, len(t))
    stations = Stations(
        np.array(st["line"], object),
        np.array(st["station"], object),
        np.array(st["x"]),
        np.array(st["y"]),
        np.array(st["z"]),
        np.arange(len(st["x"])) + 2,
    )
    picks = Picks(
        np.array(pk["line"], object),
        np.array(pk["shot"], object),
        np.array(pk["receiver"], object),
        t,
        np.full(len(t), max(noise_s, 1e-4)),
        np.array(["1"] * len(t), object),
        np.arange(len(t)) + 2,
    )
    return Survey("synthetic", None, None, None, stations, picks, None, Settings(), {}), planes


@dataclass(frozen=True)
class TruthFits:
    """Exact per-gather parameters from the known plane (stands in for fitted values)."""

    velocity_m_s: np.ndarray
    normal_distance_m: np.ndarray
    s_along: np.ndarray
    covariance: np.ndarray
    cross_component: np.ndarray
    status: np.ndarray
    se_s_along: np.ndarray


def truth_fits(gathers, normal, offset_m, velocity_m_s=1800.0, se_s=1e-3):
    g = gathers.n_gathers
    n = np.broadcast_to(np.asarray(normal, float), (g, 3))
    h = forward.normal_distance(gathers.source_xyz_g, n, offset_m)
    s = -np.sum(gathers.line_unit * n[:, :2], axis=1)
    q = -np.sum(gathers.cross_unit * n[:, :2], axis=1)
    se = np.broadcast_to(np.asarray(se_s, float), (g,)).copy()
    cov = np.zeros((g, 3, 3))
    cov[:, 0, 0] = 10.0**2
    cov[:, 1, 1] = 0.1**2
    cov[:, 2, 2] = se**2
    return TruthFits(np.full(g, velocity_m_s), h, s, cov, q, np.full(g, "ok", dtype=object), se)


def angle_diff_deg(a, b):
    return (np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0


# ---------------------------------------------------------------------------
# angle algebra
# ---------------------------------------------------------------------------


# right-hand rule: dip direction = strike + 90 (DEVELOPERS.md; common practice in
# structural geology, e.g. Ragan 2009 -- from memory)
@pytest.mark.parametrize(
    "dip_direction, strike",
    [(90.0, 0.0), (180.0, 90.0), (0.0, 270.0), (45.0, 315.0), (359.0, 269.0), (270.0, 180.0)],
    ids=["east", "south", "north", "northeast", "just-west-of-north", "west"],
)
def test_strike_right_hand_rule(dip_direction, strike):
    assert float(structure.strike_from_dip_direction(dip_direction)) == pytest.approx(strike, abs=1e-12)
    assert float(structure.dip_direction_from_strike(strike)) == pytest.approx(dip_direction % 360, abs=1e-12)


# tan(alpha) = tan(dip) cos(beta) (Ragan 2009, ch. 2; Rowland et al. 2007 -- relation
# from memory; values worked by hand from it to 3 decimals, so the tolerance is 5e-4)
APPARENT_TABLE = [
    (30.0, 60.0, 16.102),
    (45.0, 30.0, 40.893),
    (45.0, 60.0, 26.565),
    (60.0, 45.0, 50.768),
    (20.0, 80.0, 3.616),
    (70.0, 20.0, 68.827),
    (10.0, 0.0, 10.0),
    (50.0, 90.0, 0.0),
]


@pytest.mark.parametrize("dip, beta, alpha", APPARENT_TABLE, ids=[f"d{d:g}-b{b:g}" for d, b, _ in APPARENT_TABLE])
def test_apparent_dip_table(dip, beta, alpha):
    assert float(structure.apparent_dip_deg(dip, beta)) == pytest.approx(alpha, abs=5e-4)


@pytest.mark.parametrize(
    "dip, dip_dir, beta",
    [(30.0, 20.0, 60.0), (55.0, 250.0, 35.0), (12.0, 100.0, 80.0)],
    ids=["30-60", "55-35", "12-80"],
)
def test_apparent_dip_is_the_slope_of_the_section(dip, dip_dir, beta):
    # independent route: walk 100 m along azimuth dip_dir + beta on the plane itself
    # (forward.plane_elevation) and measure the drop; exact for a plane (1e-9 deg)
    n, d = forward.plane_through_point([0.0, 0.0, 0.0], dip, dip_dir)
    az = np.radians(dip_dir + beta)
    z1 = forward.plane_elevation(100.0 * np.sin(az), 100.0 * np.cos(az), n, d)
    section_slope_deg = np.degrees(np.arctan(-z1 / 100.0))
    assert float(structure.apparent_dip_deg(dip, beta)) == pytest.approx(float(section_slope_deg), abs=1e-9)


def test_traveltime_dip_is_not_the_apparent_dip():
    # 30 deg true dip, line 60 deg off dip -> 14.5 (traveltime, Sheriff & Geldart 1995) vs 16.1 (section, Ragan 2009)
    assert float(structure.traveltime_dip_deg(30.0, 60.0)) == pytest.approx(14.4775, abs=1e-4)
    assert float(structure.apparent_dip_deg(30.0, 60.0)) == pytest.approx(16.1021, abs=1e-4)
    # independent route: exact image-source times along the line, the t^2 quadratic of
    # a line over a dipping plane (np.polyfit), s = b / (2 sqrt(a c)) -> asin(s) is the traveltime dip
    n, d = forward.plane_through_point([0.0, 0.0, -50.0], 30.0, 0.0)
    u = np.array([np.sin(np.radians(60.0)), np.cos(np.radians(60.0)), 0.0])  # 60 deg off dip
    x = np.linspace(-60.0, 60.0, 25)
    t = forward.image_source_traveltime([0.0, 0.0, 0.0], x[:, None] * u, n, d, 2000.0)
    a, b, c = np.polyfit(x, t**2, 2)
    s = b / (2.0 * np.sqrt(a * c))
    assert np.degrees(np.arcsin(s)) == pytest.approx(float(structure.traveltime_dip_deg(30.0, 60.0)), abs=1e-6)
    # along dip both equal the true dip
    assert float(structure.traveltime_dip_deg(30.0, 0.0)) == pytest.approx(30.0, abs=1e-12)
    assert float(structure.apparent_dip_deg(30.0, 0.0)) == pytest.approx(30.0, abs=1e-12)


# ---------------------------------------------------------------------------
# combining lines
# ---------------------------------------------------------------------------

CASES = [
    # dip, dip direction, azimuth of line A, angle between the lines
    (20.0, 130.0, 20.0, 60.0),
    (10.0, 300.0, 0.0, 90.0),
    (25.0, 45.0, 170.0, 35.0),
    (5.0, 200.0, 95.0, 75.0),
    (28.0, 0.0, 45.0, 45.0),
    (15.0, 260.0, 300.0, 50.0),
]


@pytest.mark.parametrize(
    "dip, dip_dir, az, angle", CASES, ids=[f"dip{c[0]:g}-dd{c[1]:g}-az{c[2]:g}-{c[3]:g}deg" for c in CASES]
)
def test_combine_recovers_true_dip_noise_free(dip, dip_dir, az, angle):
    survey, planes = crossing_survey(dip, dip_dir, [az, az + angle])
    gathers = geometry.build_gathers(survey)
    fits = shot_fits.fit_shot_gathers(gathers, survey.settings)
    dips = structure.combine_lines(gathers, fits)
    ok = dips.ok
    # round trip through the real inversion: it converges to ~1e-10 in s, so 0.01 deg is
    # a loose bound for a noise-free fit. Every accepted measurement is exact; the first
    # (best-constrained) one sits at the crossing; where the lines stay within the radius
    # of each other for a while (small angles) a few more measurements are accepted.
    assert ok[0] and ok.sum() >= 1
    np.testing.assert_allclose(dips.dip_deg[ok], dip, atol=0.01)
    np.testing.assert_allclose(angle_diff_deg(dips.dip_direction_deg[ok], dip_dir), 0.0, atol=0.01)
    np.testing.assert_allclose(angle_diff_deg(dips.strike_deg[ok], dip_dir - 90.0), 0.0, atol=0.01)
    assert dips.lines[0] == "S0L0,S0L1" and dips.n_lines[0] == 2
    assert np.hypot(dips.x_m[0], dips.y_m[0]) < 0.5 * np.median(gathers.spread_length_m)
    # the resolved cross-line component of each member is the truth's -w.n
    q = structure.cross_components(gathers, dips)
    member = np.isin(dips.gather_measurement, np.flatnonzero(ok))
    q_true = -gathers.cross_unit @ planes[0][0][:2]
    np.testing.assert_allclose(q[member], q_true[member], atol=1e-6)
    assert np.all(np.isnan(q[~member]))
    # flagged rows carry no dip
    assert np.all(np.isnan(dips.dip_deg[~ok]))


def test_cross_components_can_borrow_the_nearest_measurement():
    survey, planes = crossing_survey(20.0, 130.0, [20.0, 80.0])
    gathers = geometry.build_gathers(survey)
    fits = shot_fits.fit_shot_gathers(gathers, survey.settings)
    dips = structure.combine_lines(gathers, fits)
    q = structure.cross_components(gathers, dips, max_distance_m=1000.0)
    q_true = -gathers.cross_unit @ planes[0][0][:2]
    np.testing.assert_allclose(q, q_true, atol=1e-6)  # the plane is one plane: borrowing is exact
    q_near = structure.cross_components(gathers, dips, max_distance_m=1.0)
    assert np.isnan(q_near).sum() == (~np.isin(dips.gather_measurement, np.flatnonzero(dips.ok))).sum() > 0


@pytest.mark.slow  # Monte Carlo coverage of the stated errors
def test_combine_errors_cover_the_truth_at_the_nominal_rate(rng):
    # 300 independent crossings (sites 3 km apart) with 0.25 ms Gaussian pick noise.
    # For a calibrated Gaussian estimator P(|err| <= 2 sigma) = 0.9545 and P(<= 1 sigma)
    # = 0.6827. Binomial standard error with n = 300: 0.012 and 0.027; we accept 3 of them
    # below, and above allow 3 of them plus the inversion's documented conservative
    # inflation of its errors (its F = max(1, chi2/dof) and the robust-loss factor
    # make the sigmas ~5 % wide, which raises the 1-sigma rate by ~0.04).
    n_sites = 300
    sites = [(3000.0 * (i % 20), 3000.0 * (i // 20)) for i in range(n_sites)]
    survey, _ = crossing_survey(20.0, 130.0, [20.0, 80.0], sites=sites, noise_s=2.5e-4, rng=rng)
    gathers = geometry.build_gathers(survey)
    fits = shot_fits.fit_shot_gathers(gathers, survey.settings)
    dips = structure.combine_lines(gathers, fits)
    ok = dips.ok
    assert ok.sum() == n_sites
    e_dip = (dips.dip_deg[ok] - 20.0) / dips.sigma_dip_deg[ok]
    e_dd = angle_diff_deg(dips.dip_direction_deg[ok], 130.0) / dips.sigma_dip_direction_deg[ok]
    for e in (e_dip, e_dd):
        in2 = np.mean(np.abs(e) <= 2.0)
        in1 = np.mean(np.abs(e) <= 1.0)
        assert 0.9545 - 3 * 0.012 <= in2 <= min(1.0, 0.9545 + 3 * 0.012), in2
        assert 0.6827 - 3 * 0.027 <= in1 <= 0.6827 + 3 * 0.027 + 0.04, in1
        assert abs(np.mean(e)) < 3.0 / np.sqrt(n_sites)  # no bias beyond 3 standard errors of the mean


@pytest.mark.parametrize("angle", [0.0, 10.0, 25.0], ids=["same-direction", "10deg", "25deg"])
def test_nearly_parallel_lines_are_flagged_without_a_dip(angle):
    survey, _ = crossing_survey(20.0, 130.0, [20.0, 20.0 + angle], max_offset_m=40.0)
    gathers = geometry.build_gathers(survey)
    fits = shot_fits.fit_shot_gathers(gathers, survey.settings)
    dips = structure.combine_lines(gathers, fits, min_angle_deg=30.0)
    assert len(dips) > 0
    assert not dips.ok.any()
    assert set(dips.status) <= {"nearly_parallel", "single_direction"}
    assert "nearly_parallel" in set(dips.status)
    assert np.all(np.isnan(dips.dip_deg)) and np.all(np.isnan(dips.sigma_dip_deg))
    assert np.all(np.isnan(structure.cross_components(gathers, dips)))
    k = int(np.flatnonzero(dips.status == "nearly_parallel")[0])
    assert "too nearly parallel" in dips.reason[k]


def test_single_line_is_flagged_without_a_dip():
    survey, _ = crossing_survey(20.0, 130.0, [20.0])
    gathers = geometry.build_gathers(survey)
    fits = shot_fits.fit_shot_gathers(gathers, survey.settings)
    dips = structure.combine_lines(gathers, fits)
    assert len(dips) > 0 and set(dips.status) == {"single_direction"}
    assert np.all(np.isnan(dips.dip_deg))
    assert all("single line direction" in r for r in dips.reason)
    assert np.all(dips.gather_measurement >= 0)  # every gather belongs to one (flagged) cluster


def test_unevenly_weighted_directions_are_ill_conditioned():
    # two lines 40 deg apart (above min_angle) but one line's s is 100x less certain:
    # the weighted design's condition number sqrt(lmax/lmin) exceeds 2 cot(15 deg)
    survey, planes = crossing_survey(20.0, 130.0, [20.0, 60.0])
    gathers = geometry.build_gathers(survey)
    se = np.where(gathers.line == "S0L0", 1e-4, 1e-2)
    fits = truth_fits(gathers, *planes[0], se_s=se)
    dips = structure.combine_lines(gathers, fits)
    assert "ill_conditioned" in set(dips.status) and not dips.ok.any()
    k = int(np.flatnonzero(dips.status == "ill_conditioned")[0])
    assert dips.condition_number[k] > 2.0 / np.tan(np.radians(15.0))
    # with equal weights the same geometry is accepted and exact (truth in, truth out)
    dips_eq = structure.combine_lines(gathers, truth_fits(gathers, *planes[0]))
    assert dips_eq.ok[0]
    np.testing.assert_allclose(dips_eq.dip_deg[dips_eq.ok], 20.0, atol=1e-9)


def test_inconsistent_or_unconstrained_dips_are_flagged():
    # two perpendicular lines whose s both say 0.9: |n_h| = 0.9 sqrt(2) > 1, no plane
    # can do that (sin of the dip above 1) -> nonphysical, no dip
    survey, planes = crossing_survey(20.0, 130.0, [0.0, 90.0])
    gathers = geometry.build_gathers(survey)
    f = truth_fits(gathers, *planes[0])
    bad = replace(f, s_along=np.full(gathers.n_gathers, 0.9))
    dips = structure.combine_lines(gathers, bad)
    assert dips.status[0] == "nonphysical" and np.isnan(dips.dip_deg[0])
    assert "|n_h| = 1.27" in dips.reason[0]
    # the true s but errors so large that the dip's 2-sigma range reaches vertical
    vague = replace(f, se_s_along=np.full(gathers.n_gathers, 2.0))
    dips = structure.combine_lines(gathers, vague)
    assert dips.status[0] == "poorly_constrained" and np.isnan(dips.dip_deg[0])
    # failed fits are left out of every cluster
    failed = replace(f, status=np.where(np.arange(gathers.n_gathers) % 2 == 0, "too_few_picks", "ok").astype(object))
    dips = structure.combine_lines(gathers, failed)
    assert np.all(dips.gather_measurement[::2] == -1) and np.all(dips.gather_measurement[1::2] >= 0)
    assert dips.ok[0] and dips.dip_deg[0] == pytest.approx(20.0, abs=1e-9)


def test_combine_rejects_a_bad_angle():
    survey, planes = crossing_survey(20.0, 130.0, [20.0, 80.0])
    gathers = geometry.build_gathers(survey)
    with pytest.raises(InversionError, match=r"min_angle_deg = 120"):
        structure.combine_lines(gathers, truth_fits(gathers, *planes[0]), min_angle_deg=120.0)


def test_combine_keeps_reflectors_apart():
    # a second reflector label with a different plane under the same lines
    survey, planes = crossing_survey(20.0, 130.0, [20.0, 80.0])
    gathers = geometry.build_gathers(survey)
    g = gathers.n_gathers
    both = geometry.GatherSet(
        gather=np.concatenate([gathers.gather, gathers.gather + g]),
        source_xyz=np.concatenate([gathers.source_xyz] * 2),
        receiver_xyz=np.concatenate([gathers.receiver_xyz] * 2),
        time_s=np.concatenate([gathers.time_s] * 2),
        sigma_s=np.concatenate([gathers.sigma_s] * 2),
        pick_index=np.arange(2 * len(gathers.time_s)),
        line=np.concatenate([gathers.line] * 2),
        shot=np.concatenate([gathers.shot] * 2),
        reflector=np.array(["1"] * g + ["2"] * g, dtype=object),
        line_unit=np.concatenate([gathers.line_unit] * 2),
        cross_unit=np.concatenate([gathers.cross_unit] * 2),
        source_xyz_g=np.concatenate([gathers.source_xyz_g] * 2),
        spread_length_m=np.concatenate([gathers.spread_length_m] * 2),
    )
    n2, d2 = forward.plane_through_point([0.0, 0.0, -20.0], 8.0, 300.0)
    f1 = truth_fits(gathers, *planes[0])
    f2 = truth_fits(gathers, n2, d2)
    fits = TruthFits(*[np.concatenate([getattr(f1, k), getattr(f2, k)]) for k in TruthFits.__dataclass_fields__])
    dips = structure.combine_lines(both, fits)
    got = {r: (d, dd) for r, d, dd, ok in zip(dips.reflector, dips.dip_deg, dips.dip_direction_deg, dips.ok) if ok}
    assert got["1"] == pytest.approx((20.0, 130.0), abs=1e-9)
    assert got["2"] == pytest.approx((8.0, 300.0), abs=1e-9)


# ---------------------------------------------------------------------------
# surface dips
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "dip, dip_dir, north_up",
    [(10.0, 0.0, False), (35.0, 123.0, False), (60.0, 271.0, True), (0.5, 45.0, True)],
    ids=["10-north", "35-123", "60-271-north-up", "gentle-45-north-up"],
)
def test_surface_dips_of_a_planar_grid_are_exact(dip, dip_dir, north_up):
    # a plane sampled on a grid: central differences are exact for a linear function,
    # so dip and direction come back to rounding (1e-9 deg)
    x = 500000.0 + np.arange(40) * 5.0
    y = 6000000.0 + np.arange(30) * 5.0
    if north_up:
        y = y[::-1]  # rows from north to south, as in a GeoTIFF
    n, d = forward.plane_through_point([x[0], y[0], 100.0], dip, dip_dir)
    z = forward.plane_elevation(x[None, :], y[:, None], n, d)
    out = structure.surface_dips(x, y, z, 25.0)
    assert len(out) == 6 * 8  # every 5th cell along both axes
    np.testing.assert_allclose(out.dip_deg, dip, atol=1e-9)
    np.testing.assert_allclose(angle_diff_deg(out.dip_direction_deg, dip_dir), 0.0, atol=1e-6)
    np.testing.assert_allclose(angle_diff_deg(out.strike_deg, dip_dir - 90.0), 0.0, atol=1e-6)
    np.testing.assert_allclose(out.elevation_m, forward.plane_elevation(out.x_m, out.y_m, n, d), atol=1e-6)


def test_surface_dips_skip_nodata_and_masked_cells():
    x = np.arange(20) * 2.0
    y = np.arange(10) * 2.0
    z = -0.1 * x[None, :] + 0.0 * y[:, None]
    z[:, 10] = np.nan  # a nodata column: cells 9..11 get NaN gradients
    full = structure.surface_dips(x, y, z, 2.0)
    assert len(full) == 10 * (20 - 3)
    assert not np.any(np.isin(full.x_m, x[9:12]))
    mask = np.zeros(z.shape, bool)
    mask[:, :5] = True
    part = structure.surface_dips(x, y, z, 2.0, mask=mask)
    assert len(part) == 10 * 5 and np.all(part.x_m < 10.0)
    np.testing.assert_allclose(part.dip_deg, np.degrees(np.arctan(0.1)), atol=1e-12)
    with pytest.raises(InversionError, match=r"shape \(10, 20\) but the axes give"):
        structure.surface_dips(x[:5], y, z, 2.0)
