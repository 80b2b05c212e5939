"""Tests of core.geometry: line frames, gathers, reflector points, ground model, misties.

Reflection-point checks are against the textbook geometry of a plane reflector
(image source, Snell's law of equal angles, the foot of the perpendicular;
Sheriff & Geldart 1995, ch. 4) computed here independently of the code under
test; CRS checks against pyproj.
"""

from dataclasses import dataclass, replace
from types import SimpleNamespace

import numpy as np
import pytest
from rockhead.core.errors import InputFileError, SurveyConfigError
from rockhead.core.seismic import forward, geometry, misties, shot_fits, structure
from rockhead.core.survey import config
from rockhead.core.survey.model import Picks, Settings, Stations, Survey

# ---------------------------------------------------------------------------
# synthetic surveys
# ---------------------------------------------------------------------------


def make_stations(lines):
    """lines: {name: (labels, x, y, z)} -> Stations (file order as given)."""
    cols = {k: [] for k in ("line", "station", "x", "y", "z")}
    for name, (labels, x, y, z) in lines.items():
        cols["line"] += [name] * len(labels)
        cols["station"] += list(labels)
        cols["x"] += list(x)
        cols["y"] += list(y)
        cols["z"] += list(z)
    n = len(cols["x"])
    return Stations(
        np.array(cols["line"], object),
        np.array(cols["station"], object),
        np.array(cols["x"], float),
        np.array(cols["y"], float),
        np.array(cols["z"], float),
        np.arange(n) + 2,
    )


def straight_line(azimuth_deg, half_length_m=80.0, step_m=5.0, centre=(0.0, 0.0), ground=None, first=100):
    chain = np.arange(-half_length_m, half_length_m + 1e-9, step_m)
    x = centre[0] + chain * np.sin(np.radians(azimuth_deg))
    y = centre[1] + chain * np.cos(np.radians(azimuth_deg))
    z = np.zeros_like(x) if ground is None else ground(x, y)
    return [str(first + j) for j in range(len(chain))], x, y, z


def survey_over_plane(
    stations,
    normal,
    offset_m,
    *,
    velocity_m_s=1800.0,
    shot_step=2,
    max_offset_m=60.0,
    true_xyz=None,
    noise_s=0.0,
    rng=None,
):
    """Picks from the image-source time over one plane; shots at every ``shot_step``-th station.

    ``true_xyz`` (optional) are the positions used for the times when they
    differ from the surveyed ones (an elevation static on a line).
    """
    xyz = stations.xyz if true_xyz is None else np.asarray(true_xyz, float)
    cols = {k: [] for k in ("line", "shot", "receiver", "t")}
    for name in dict.fromkeys(stations.line):
        idx = np.flatnonzero(stations.line == name)
        for js in idx[::shot_step]:
            d = np.hypot(*(stations.xyz[idx, :2] - stations.xyz[js, :2]).T)
            rec = idx[d <= max_offset_m]
            cols["line"] += [name] * len(rec)
            cols["shot"] += [stations.station[js]] * len(rec)
            cols["receiver"] += list(stations.station[rec])
            cols["t"] += list(forward.image_source_traveltime(xyz[js], xyz[rec], normal, offset_m, velocity_m_s))
    t = np.array(cols["t"])
    if noise_s:
        t = t + rng.normal(0.0, noise_s, len(t))
    picks = Picks(
        np.array(cols["line"], object),
        np.array(cols["shot"], object),
        np.array(cols["receiver"], object),
        t,
        np.full(len(t), max(noise_s, 1e-4)),
        np.array(["1"] * len(t), object),
        np.arange(len(t)) + 2,
    )
    return Survey("synthetic", None, None, None, stations, picks, None, Settings(), {})


@dataclass(frozen=True)
class TruthFits:
    """Exact per-gather parameters of a known plane, in the fits' field names."""

    velocity_m_s: np.ndarray
    normal_distance_m: np.ndarray
    s_along: np.ndarray
    covariance: np.ndarray
    cross_component: np.ndarray
    status: np.ndarray


def truth_fits(gathers, normal, offset_m, cov=None, with_q=True):
    g = gathers.n_gathers
    n = np.asarray(normal, float)
    h = forward.normal_distance(gathers.source_xyz_g, n, offset_m)
    s = -gathers.line_unit @ n[:2]
    q = -gathers.cross_unit @ n[:2] if with_q else np.zeros(g)
    c = np.zeros((g, 3, 3)) if cov is None else np.broadcast_to(cov, (g, 3, 3)).copy()
    return TruthFits(np.full(g, 1800.0), h, s, c, q, np.full(g, "ok", dtype=object))


def cross_survey(ground=None, **kw):
    """Two lines crossing at 70 degrees over a 14-degree plane dipping to 110."""
    stations = make_stations(
        {"A": straight_line(30.0, ground=ground), "B": straight_line(100.0, ground=ground, first=200)}
    )
    normal, offset = forward.plane_through_point([0.0, 0.0, -45.0], 14.0, 110.0)
    return survey_over_plane(stations, normal, offset, **kw), normal, offset


def hilly(x, y):
    return 3.0 * np.sin(x / 25.0) + 0.02 * y


# ---------------------------------------------------------------------------
# line frames
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("azimuth", [0.0, 45.0, 135.0, 200.0, 315.0], ids=["N", "NE", "SE", "SSW", "NW"])
def test_line_frame_axis_points_toward_increasing_station_order(azimuth):
    labels, x, y, z = straight_line(azimuth)
    order = np.random.default_rng(5).permutation(len(labels))  # file order scrambled
    st = make_stations({"L": ([labels[i] for i in order], x[order], y[order], z[order])})
    f = geometry.line_frames(st)["L"]
    # convention (DEVELOPERS.md): azimuth clockwise from north; w = u turned 90 deg clockwise
    assert f.azimuth_deg == pytest.approx(azimuth, abs=1e-9)
    w_azimuth = np.degrees(np.arctan2(f.cross_unit[0], f.cross_unit[1])) % 360.0
    assert (w_azimuth - azimuth - 90.0 + 180.0) % 360.0 - 180.0 == pytest.approx(0.0, abs=1e-9)
    assert list(f.station) == labels  # numeric order restored
    assert f.length_m == pytest.approx(160.0, abs=1e-9)
    np.testing.assert_allclose(f.chainage_m, np.arange(len(labels)) * 5.0, atol=1e-9)


def test_numeric_labels_sort_numerically_and_text_labels_keep_file_order():
    num = make_stations({"L": (["9", "10", "11"], [0.0, 10.0, 20.0], [0.0, 0.0, 0.0], [0.0] * 3)})
    assert list(geometry.line_frames(num)["L"].station) == ["9", "10", "11"]  # not "10" < "11" < "9"
    assert geometry.line_frames(num)["L"].azimuth_deg == pytest.approx(90.0)
    txt = make_stations({"L": (["C3", "A1", "B2"], [20.0, 10.0, 0.0], [0.0] * 3, [0.0] * 3)})
    f = geometry.line_frames(txt)["L"]
    assert list(f.station) == ["C3", "A1", "B2"] and f.azimuth_deg == pytest.approx(270.0)


def test_crooked_line_polyline_and_projection():
    x = np.array([0.0, 30.0, 60.0, 60.0, 60.0])
    y = np.array([0.0, 0.0, 0.0, 40.0, 80.0])
    st = make_stations({"K": ([str(i) for i in range(5)], x, y, np.zeros(5))})
    f = geometry.line_frames(st)["K"]
    assert f.length_m == pytest.approx(140.0) and f.polyline.length == pytest.approx(140.0)
    # shapely's own projection agrees with the vectorised one (reference library)
    from shapely.geometry import Point

    px, py = np.array([10.0, 65.0, 58.0]), np.array([-3.0, 50.0, 2.0])
    chain, off = f.locate(px, py)
    np.testing.assert_allclose(chain, [f.polyline.project(Point(a, b)) for a, b in zip(px, py)], atol=1e-9)
    np.testing.assert_allclose(np.abs(off), [f.polyline.distance(Point(a, b)) for a, b in zip(px, py)], atol=1e-9)
    assert off[0] > 0 and off[1] > 0  # right of the direction of travel


def test_line_frame_errors_name_the_station():
    dup = make_stations({"L": (["1", "2", "2"], [0.0, 1.0, 2.0], [0.0] * 3, [0.0] * 3)})
    with pytest.raises(InputFileError, match=r"stations.csv, line 4, field 'station': station '2' appears more"):
        geometry.line_frames(dup, path="stations.csv")
    one = make_stations({"L": (["1", "2"], [5.0, 5.0], [7.0, 7.0], [0.0, 0.0])})
    with pytest.raises(InputFileError, match=r"line 'L' has 2 station\(s\) at a single position"):
        geometry.line_frames(one)


# ---------------------------------------------------------------------------
# gathers
# ---------------------------------------------------------------------------


def test_build_gathers_joins_picks_to_stations():
    survey, _, _ = cross_survey(ground=hilly)
    g = geometry.build_gathers(survey)
    st = survey.stations
    pk = survey.picks
    key = {(a, b): i for i, (a, b) in enumerate(zip(st.line, st.station))}
    # independent join (dict per pick) of the original rows, through pick_index
    src = np.array([key[(pk.line[i], pk.shot[i])] for i in g.pick_index])
    rec = np.array([key[(pk.line[i], pk.receiver[i])] for i in g.pick_index])
    np.testing.assert_array_equal(g.source_xyz, st.xyz[src])
    np.testing.assert_array_equal(g.receiver_xyz, st.xyz[rec])
    np.testing.assert_array_equal(g.time_s, pk.time_s[g.pick_index])
    assert sorted(g.pick_index) == list(range(len(pk.time_s)))  # every pick once
    # one gather per (line, shot); picks grouped by gather
    assert g.n_gathers == len(set(zip(pk.line, pk.shot)))
    assert np.all(np.diff(g.gather) >= 0)
    np.testing.assert_array_equal(g.source_xyz_g[g.gather], g.source_xyz)
    # per-gather axis of a straight line = the line's azimuth, toward increasing stations
    frames = geometry.line_frames(st)
    for name in ("A", "B"):
        m = g.line == name
        np.testing.assert_allclose(g.line_unit[m], np.broadcast_to(frames[name].unit, (m.sum(), 2)), atol=1e-9)
    np.testing.assert_allclose(g.cross_unit, np.column_stack([g.line_unit[:, 1], -g.line_unit[:, 0]]))
    # spread length: a full split spread reaches 60 m each way; end-on ones 60 m
    assert g.spread_length_m.max() == pytest.approx(120.0, abs=1e-9)
    assert g.spread_length_m.min() == pytest.approx(60.0, abs=1e-9)


def test_gather_axis_follows_its_own_spread_on_a_crooked_line():
    # two straight legs (east, then north-east); a gather wholly on one leg takes its azimuth
    leg1 = np.arange(0.0, 100.0 + 1e-9, 5.0)
    leg2 = np.arange(5.0, 100.0 + 1e-9, 5.0)
    x = np.concatenate([leg1, 100.0 + leg2 * np.sin(np.radians(45.0))])
    y = np.concatenate([0.0 * leg1, leg2 * np.cos(np.radians(45.0))])
    labels = [str(i + 1) for i in range(len(x))]
    st = make_stations({"K": (labels, x, y, np.zeros(len(x)))})
    normal, offset = forward.plane_through_point([0.0, 0.0, -40.0], 0.0, 0.0)
    g = geometry.build_gathers(survey_over_plane(st, normal, offset, shot_step=4, max_offset_m=25.0))
    az = np.degrees(np.arctan2(g.line_unit[:, 0], g.line_unit[:, 1])) % 360
    sx = g.source_xyz_g[:, 0]
    assert np.allclose(az[sx <= 70.0], 90.0)  # spread within the first leg
    assert np.allclose(az[sx >= 140.0], 45.0)  # spread within the second leg


def test_degenerate_spread_falls_back_to_the_line_axis():
    # a gather whose only pick is at the source (zero offset) has no spread direction;
    # it takes the line frame's axis (and a spread length of 0)
    survey, _, _ = cross_survey()
    pk = survey.picks
    keep = ~((pk.line == "A") & (pk.shot == "116")) | (pk.receiver == "116")
    survey = replace(survey, picks=Picks(*[getattr(pk, k)[keep] for k in Picks.__dataclass_fields__]))
    g = geometry.build_gathers(survey)
    k = int(np.flatnonzero((g.line == "A") & (g.shot == "116"))[0])
    assert g.spread_length_m[k] == 0.0
    np.testing.assert_allclose(g.line_unit[k], geometry.line_frames(survey.stations)["A"].unit, atol=1e-12)


def test_build_gathers_reports_unknown_stations_and_reflectors():
    survey, _, _ = cross_survey()
    pk = survey.picks
    bad_rec = pk.receiver.copy()
    bad_rec[7] = "999"
    bad = replace(survey, picks=replace(pk, receiver=bad_rec), files={"picks": "picks.csv"})
    with pytest.raises(InputFileError, match=r"picks.csv, line 9, field 'receiver': receiver '999' of line 'A'"):
        geometry.build_gathers(bad)
    with pytest.raises(SurveyConfigError, match=r"no picks for reflector \['base'\]"):
        geometry.build_gathers(survey, reflector="base")
    # the reflector filter keeps only that reflector's picks
    refl = np.where(np.arange(len(pk.time_s)) % 2 == 0, "top", "base").astype(object)
    two = replace(survey, picks=replace(pk, reflector=refl))
    g = geometry.build_gathers(two, reflector="top")
    assert set(g.reflector) == {"top"} and len(g.time_s) == (refl == "top").sum()
    g_all = geometry.build_gathers(two)
    assert g_all.n_gathers == 2 * g.n_gathers


# ---------------------------------------------------------------------------
# reflector points
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("origin", [(0.0, 0.0), (512400.0, 5455600.0)], ids=["local", "utm-sized"])
def test_receiver_points_lie_on_the_plane_and_obey_snell(origin):
    survey, normal, offset = cross_survey(ground=hilly)
    st = survey.stations
    shifted = replace(st, x_m=st.x_m + origin[0], y_m=st.y_m + origin[1])
    offset = offset + normal[0] * origin[0] + normal[1] * origin[1]  # same plane, moved with the stations
    survey = replace(survey, stations=shifted)
    g = geometry.build_gathers(survey)
    pts = geometry.reflector_points(g, truth_fits(g, normal, offset))
    rec = pts.kind == "receiver"
    p = pts.xyz[rec]
    s_xyz = g.source_xyz
    r_xyz = g.receiver_xyz
    # on the plane: n.P = d (1e-9 m locally; 1e-7 m with 6-7 digit coordinates, float64 rounding)
    tol = 1e-9 if origin == (0.0, 0.0) else 1e-7
    np.testing.assert_allclose(p @ normal - offset, 0.0, atol=tol)
    # Snell / specular reflection: equal angles with the (upward) plane normal, and S, P, R
    # and the normal coplanar (Sheriff & Geldart 1995, ch. 4)
    up = -normal
    a_in = (s_xyz - p) @ up / np.linalg.norm(s_xyz - p, axis=1)
    a_out = (r_xyz - p) @ up / np.linalg.norm(r_xyz - p, axis=1)
    np.testing.assert_allclose(a_in, a_out, atol=1e-9)
    vol = np.einsum("ij,ij->i", np.cross(s_xyz - p, r_xyz - p), np.broadcast_to(normal, p.shape))
    np.testing.assert_allclose(
        vol / np.linalg.norm(s_xyz - p, axis=1) / np.linalg.norm(r_xyz - p, axis=1), 0, atol=1e-9
    )
    # Fermat: path length through P = V t of the picks (times made by the image source)
    path = np.linalg.norm(s_xyz - p, axis=1) + np.linalg.norm(r_xyz - p, axis=1)
    np.testing.assert_allclose(path, 1800.0 * g.time_s, atol=1e-6)


def test_zero_offset_point_is_the_foot_of_the_perpendicular():
    survey, normal, offset = cross_survey(ground=hilly)
    g = geometry.build_gathers(survey)
    fits = truth_fits(g, normal, offset)
    pts = geometry.reflector_points(g, fits)
    zo = pts.kind == "zero_offset"
    p0 = pts.xyz[zo]
    s = g.source_xyz_g
    np.testing.assert_allclose(p0 @ normal - offset, 0.0, atol=1e-9)
    # |P0 - S| = h and no other point of the plane is closer: sample the plane around P0
    np.testing.assert_allclose(np.linalg.norm(p0 - s, axis=1), fits.normal_distance_m, atol=1e-9)
    e1 = np.cross(normal, [0.0, 0.0, 1.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(normal, e1)
    rng = np.random.default_rng(3)
    for k in range(0, g.n_gathers, 7):
        others = p0[k] + rng.uniform(-30, 30, (200, 1)) * e1 + rng.uniform(-30, 30, (200, 1)) * e2
        assert np.all(np.linalg.norm(others - s[k], axis=1) >= np.linalg.norm(p0[k] - s[k]) - 1e-9)
    # displaced up-dip: horizontal shift toward dip direction + 180 (Sheriff & Geldart 1995, ch. 4)
    shift_az = np.degrees(np.arctan2(p0[:, 0] - s[:, 0], p0[:, 1] - s[:, 1])) % 360
    np.testing.assert_allclose(shift_az, 290.0, atol=1e-6)
    # vertical depth h / cos(dip): the point straight below the source is on the plane
    zv = geometry.vertical_depth_below_source(fits.normal_distance_m, 14.0)
    below = s - zv[:, None] * np.array([0.0, 0.0, 1.0])
    np.testing.assert_allclose(below @ normal - offset, 0.0, atol=1e-9)
    # depth = ground at (x, y) - elevation, ground interpolated from the stations
    ground = geometry.station_ground_model(survey.stations)
    np.testing.assert_allclose(pts.depth_m, ground(pts.x_m, pts.y_m) - pts.elevation_m, atol=1e-12)


def test_elevation_sigma_propagates_the_fit_covariance():
    survey, normal, offset = cross_survey(ground=hilly)
    g = geometry.build_gathers(survey)
    cov = np.array([[25.0, 0.5, 0.001], [0.5, 0.04, 2e-4], [0.001, 2e-4, 1e-4]])  # (V, h, s)
    fits = truth_fits(g, normal, offset, cov=cov, with_q=False)
    pts = geometry.reflector_points(g, fits)
    zo = np.flatnonzero(pts.kind == "zero_offset")
    # analytic for P0 with q = 0: z = z_S - h c, c = sqrt(1 - s^2): dz/dh = -c, dz/ds = h s / c
    h, s = fits.normal_distance_m, fits.s_along
    c = np.sqrt(1 - s * s)
    jh, js = -c, h * s / c
    var = jh**2 * cov[1, 1] + js**2 * cov[2, 2] + 2 * jh * js * cov[1, 2]
    np.testing.assert_allclose(pts.sigma_m[zo], np.sqrt(var), rtol=1e-6)
    # Monte Carlo for the receiver points of one gather: draw (h, s), recompute by the
    # image source (forward.reflection_point). 20000 draws: the sample std is within
    # ~0.5 % of the true one (1 SE), we allow 3 %.
    k = 5
    picks = np.flatnonzero(g.gather == k)
    rng = np.random.default_rng(11)
    draws = rng.multivariate_normal([h[k], s[k]], cov[1:, 1:], 20000)
    u3 = np.append(g.line_unit[k], 0.0)
    n_d = -draws[:, 1:2] * u3 - np.sqrt(1 - draws[:, 1:2] ** 2) * np.array([0.0, 0.0, 1.0])
    src = g.source_xyz_g[k]
    z_mc = []
    for j in picks[::5]:
        d_off = n_d @ src + draws[:, 0]
        z_mc.append(forward.reflection_point(src, g.receiver_xyz[j], n_d, d_off)[:, 2].std())
    rows = g.n_gathers + picks[::5]
    np.testing.assert_allclose(pts.sigma_m[rows], z_mc, rtol=0.03)
    assert np.all(pts.sigma_xy_m[zo] > 0)


def test_station_ground_model():
    # stations on a plane z = 100 + 0.1 x - 0.05 y: linear interpolation is exact inside
    # the hull (scipy LinearNDInterpolator); outside, the nearest station's elevation
    rng = np.random.default_rng(2)
    xy = rng.uniform(0, 100, (40, 2))
    z = 100 + 0.1 * xy[:, 0] - 0.05 * xy[:, 1]
    ground = geometry.station_ground_model(np.column_stack([xy, z]))
    q = rng.uniform(30, 70, (50, 2))
    np.testing.assert_allclose(ground(q[:, 0], q[:, 1]), 100 + 0.1 * q[:, 0] - 0.05 * q[:, 1], atol=1e-9)
    far = np.array([500.0, 500.0])
    nearest = np.argmin(np.hypot(*(xy - far).T))
    assert float(ground(far[0], far[1])) == pytest.approx(z[nearest])
    # a single straight line (collinear stations): interpolated along it, held beyond its ends
    labels, x, y, zl = straight_line(30.0, ground=lambda x, y: 10 + 0.2 * x)
    g1 = geometry.station_ground_model(make_stations({"L": (labels, x, y, zl)}))
    assert float(g1(0.0, 0.0)) == pytest.approx(10.0)
    assert float(g1(x[-1] + 5.0, y[-1] + 20.0)) == pytest.approx(zl[-1], abs=1e-9)


@pytest.mark.slow  # about 10 s: many random station sets against scipy
def test_ground_interpolant_matches_scipy_on_line_shaped_station_sets():
    # reference library: scipy's LinearNDInterpolator on the same Delaunay triangulation
    # (grid-like station sets have cocircular points, so the triangulation must be shared);
    # equal to rounding (1e-9 m), NaN outside the hull in both
    from scipy.interpolate import LinearNDInterpolator

    rng = np.random.default_rng(4)
    c = np.arange(0.0, 300.0, 2.5)
    xy = np.concatenate(
        [np.column_stack([c, np.full_like(c, 60.0 * k)]) for k in range(5)]
        + [np.column_stack([np.full_like(c, 60.0 * k + 30.0), c + 0.7 * k]) for k in range(5)]
    )
    xy = np.unique(xy, axis=0)
    z = 200.0 + 0.02 * xy[:, 0] + rng.normal(0.0, 0.5, len(xy))
    from rockhead.core.survey.ground import _LinearTin

    tin = _LinearTin(xy, z)
    q = rng.uniform(-20.0, 320.0, (20000, 2))
    got = tin(q)
    ref = LinearNDInterpolator(tin.tri, z)(q)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
    assert np.isnan(ref).sum() > 100  # some queries are outside the hull
    np.testing.assert_allclose(got[~np.isnan(ref)], ref[~np.isnan(ref)], atol=1e-9)


def test_refit_with_resolved_cross_dip_puts_points_on_the_plane():
    # real inversion, combine_lines, cross_components, refit: the points of every gather
    # in a good measurement lie on the true plane (noise-free round trip, 1e-6 m:
    # the inversion converges to ~1e-10 in its parameters)
    survey, normal, offset = cross_survey(ground=hilly)
    g = geometry.build_gathers(survey)
    # on hilly ground the q = 0 fits' s are slightly biased (0.018 deg of dip here),
    # so combine and refit alternate until q settles (structure.resolve_cross_dips)
    refit, dips, q, rounds = structure.resolve_cross_dips(
        g, lambda q: shot_fits.fit_shot_gathers(g, survey.settings, cross_component=q)
    )
    assert 1 <= rounds < 8
    np.testing.assert_allclose(dips.dip_deg[dips.ok], 14.0, atol=1e-6)
    pts = geometry.reflector_points(g, refit)
    resolved = np.isfinite(q)[pts.gather]
    assert resolved.sum() > 0.3 * len(pts)
    np.testing.assert_allclose(pts.xyz[resolved] @ normal - offset, 0.0, atol=1e-6)
    # the unresolved ones (q assumed 0) are off the plane: side-swipe is real
    assert np.max(np.abs(pts.xyz[~resolved] @ normal - offset)) > 0.1


# ---------------------------------------------------------------------------
# misties
# ---------------------------------------------------------------------------


def test_two_lines_over_a_plane_have_no_mistie():
    survey, normal, offset = cross_survey(ground=hilly)
    frames = geometry.line_frames(survey.stations)
    g = geometry.build_gathers(survey, frames=frames)
    pts = geometry.reflector_points(g, truth_fits(g, normal, offset))
    m = misties.line_misties(frames, pts)
    assert len(m) == 1 and m.status[0] == "ok"
    assert (m.line_a[0], m.line_b[0]) == ("A", "B")
    assert np.hypot(m.x_m[0], m.y_m[0]) == pytest.approx(0.0, abs=1e-9)  # the lines cross at the origin
    # both sides equal the plane's own elevation at the crossing (exact: 1e-9 m)
    z_plane = float(forward.plane_elevation(0.0, 0.0, normal, offset))
    assert m.elevation_a_m[0] == pytest.approx(z_plane, abs=1e-9)
    assert m.elevation_b_m[0] == pytest.approx(z_plane, abs=1e-9)
    assert abs(m.mistie_m[0]) < 1e-9


def test_an_elevation_static_on_one_line_shows_as_the_mistie():
    # line B's stations surveyed 0.30 m too high (times made with the true positions):
    # everything it sees moves up by 0.30 m, so mistie A - B = -0.30 m. Real inversion,
    # resolved cross dip; noise-free, so 1 mm covers the fits' convergence.
    truth, normal, offset = cross_survey(ground=hilly)
    st = truth.stations
    bumped = replace(st, z_m=st.z_m + np.where(st.line == "B", 0.30, 0.0))
    survey = survey_over_plane(bumped, normal, offset, true_xyz=st.xyz)
    frames = geometry.line_frames(survey.stations)
    g = geometry.build_gathers(survey, frames=frames)
    refit, _, _, _ = structure.resolve_cross_dips(
        g, lambda q: shot_fits.fit_shot_gathers(g, survey.settings, cross_component=q), max_distance_m=500.0
    )
    m = misties.line_misties(frames, geometry.reflector_points(g, refit))
    assert m.status[0] == "ok"
    assert m.mistie_m[0] == pytest.approx(-0.30, abs=1e-3)
    z_plane = float(forward.plane_elevation(0.0, 0.0, normal, offset))
    assert m.elevation_a_m[0] == pytest.approx(z_plane, abs=1e-3)


def test_mistie_needs_coverage_on_both_lines():
    # line B stops 40 m short of line A: the crossing (of the polylines) does not exist;
    # extend B's polyline past A but give it picks only on its far part: no value on B
    stations = make_stations({"A": straight_line(0.0), "B": straight_line(90.0, first=200)})
    normal, offset = forward.plane_through_point([0.0, 0.0, -45.0], 0.0, 0.0)
    survey = survey_over_plane(stations, normal, offset)
    keep = ~((survey.picks.line == "B") & (survey.picks.shot.astype(int) < 220))  # B's shots from +20 m
    survey = replace(survey, picks=Picks(*[getattr(survey.picks, k)[keep] for k in Picks.__dataclass_fields__]))
    frames = geometry.line_frames(survey.stations)
    g = geometry.build_gathers(survey, frames=frames)
    pts = geometry.reflector_points(g, truth_fits(g, normal, offset))
    m = misties.line_misties(frames, pts)
    assert len(m) == 1
    assert m.elevation_a_m[0] == pytest.approx(-45.0, abs=1e-9)
    assert np.isnan(m.elevation_b_m[0]) and np.isnan(m.mistie_m[0])
    assert "line B: beyond coverage" in m.status[0]
    # a gap wider than max_gap_m also gives no value
    m2 = misties.line_misties(frames, pts, max_gap_m=1.0)
    assert "gap of" in m2.status[0] or "beyond" in m2.status[0]


# ---------------------------------------------------------------------------
# the same survey in lon/lat and in UTM
# ---------------------------------------------------------------------------


def _run(survey):
    frames = geometry.line_frames(survey.stations)
    g = geometry.build_gathers(survey, frames=frames)
    fits, dips, _, _ = structure.resolve_cross_dips(
        g, lambda q: shot_fits.fit_shot_gathers(g, survey.settings, cross_component=q)
    )
    return g, dips, geometry.reflector_points(g, fits)


def _write_survey(folder, stations, x, y, picks, crs_text):
    folder.mkdir()
    rows = ["line,station,x,y,z"] + [
        f"{a},{b},{float(u)!r},{float(v)!r},{float(w)!r}"
        for a, b, u, v, w in zip(stations.line, stations.station, x, y, stations.z_m)
    ]
    (folder / "stations.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    rows = ["line,shot,receiver,time_ms,sigma_ms"] + [
        f"{a},{b},{c},{float(1e3 * t)!r},{float(1e3 * e)!r}"
        for a, b, c, t, e in zip(picks.line, picks.shot, picks.receiver, picks.time_s, picks.sigma_s)
    ]
    (folder / "picks.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    toml = f'[survey]\nname = "t"\ncrs = "{crs_text}"\n\n[files]\nstations = "stations.csv"\n'
    (folder / "survey.toml").write_text(toml + 'picks = "picks.csv"\n', encoding="utf-8")
    return folder / "survey.toml"


def test_same_survey_in_lonlat_and_utm_gives_the_same_results(tmp_path):
    # one survey written twice, in UTM 33N and in lon/lat (EPSG:4326, converted with
    # pyproj directly), read by config.load_survey (which picks the working CRS from the
    # extent). Same dips within 0.01 deg and points within 1 cm; pyproj's round trip is
    # ~1e-9 m and the CSV keeps 17 digits, so the fits see the same geometry.
    from pyproj import Transformer

    ground = lambda x, y: 250.0 + hilly(x - 512400.0, y - 5455600.0)  # noqa: E731
    stations = make_stations(
        {
            "A": straight_line(30.0, centre=(512400.0, 5455600.0), ground=ground),
            "B": straight_line(100.0, centre=(512400.0, 5455600.0), ground=ground, first=200),
        }
    )
    normal, offset = forward.plane_through_point([512400.0, 5455600.0, 205.0], 14.0, 110.0)
    truth = survey_over_plane(stations, normal, offset)
    lon, lat = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True).transform(stations.x_m, stations.y_m)
    utm = config.load_survey(
        _write_survey(tmp_path / "utm", stations, stations.x_m, stations.y_m, truth.picks, "EPSG:32633")
    )
    geo = config.load_survey(_write_survey(tmp_path / "geo", stations, lon, lat, truth.picks, "EPSG:4326"))
    assert geo.crs.to_epsg() == 32633  # the UTM zone of the site, chosen by core.crs
    np.testing.assert_allclose(geo.stations.x_m, stations.x_m, atol=1e-6)
    np.testing.assert_allclose(geo.stations.y_m, stations.y_m, atol=1e-6)
    g1, d1, p1 = _run(utm)
    g2, d2, p2 = _run(geo)
    np.testing.assert_allclose(g2.line_unit, g1.line_unit, atol=1e-9)  # same grid azimuths
    assert d1.ok.sum() >= 1 and list(d1.status) == list(d2.status)
    np.testing.assert_allclose(d2.dip_deg[d2.ok], d1.dip_deg[d1.ok], atol=0.01)
    np.testing.assert_allclose(d2.dip_direction_deg[d2.ok], d1.dip_direction_deg[d1.ok], atol=0.01)
    np.testing.assert_allclose(d1.dip_deg[d1.ok], 14.0, atol=0.01)  # and both are the truth
    np.testing.assert_allclose(d1.dip_direction_deg[d1.ok], 110.0, atol=0.01)
    np.testing.assert_allclose(p2.xyz, p1.xyz, atol=0.01)


@pytest.mark.parametrize(
    ("east", "north", "azimuth"),
    [
        (0.0, 1.0, 0.0),
        (1.0, 1.0, 45.0),
        (1.0, 0.0, 90.0),
        (0.0, -1.0, 180.0),
        (-1.0, 0.0, 270.0),
        (-1e-12, 1.0, 360.0 - np.degrees(1e-12)),
        (-1.0, -np.sqrt(3.0), 210.0),
    ],
    ids=["N", "NE", "E", "S", "W", "just-W-of-N", "SSW"],
)
def test_vector_azimuth_is_clockwise_from_north(east, north, azimuth):
    # compass convention (common practice): clockwise from grid north, in [0, 360)
    got = float(geometry.vector_azimuth_deg(east, north))
    assert 0.0 <= got < 360.0
    assert got == pytest.approx(azimuth, abs=1e-9)  # arctan2 in double precision


def test_gather_normals_one_formula_for_fits_and_overrides(rng):
    # the normal of a plane dipping `dip` toward azimuth `ddir` is -(sin dip d, cos dip) with d the
    # horizontal unit vector of the dip direction (plane geometry, e.g. Sheriff & Geldart 1995 ch. 4);
    # s = -u.n and q = -w.n come from it, and gather_normals must rebuild n from (s, q, u, w)
    g = 50
    dip, ddir = np.radians(rng.uniform(0, 60, g)), np.radians(rng.uniform(0, 360, g))
    n_true = np.column_stack([-np.sin(dip) * np.sin(ddir), -np.sin(dip) * np.cos(ddir), -np.cos(dip)])
    az = np.radians(rng.uniform(0, 360, g))
    u = np.column_stack([np.sin(az), np.cos(az)])
    w = np.column_stack([u[:, 1], -u[:, 0]])
    s = -np.sum(u * n_true[:, :2], axis=1)
    q = -np.sum(w * n_true[:, :2], axis=1)
    gs = SimpleNamespace(n_gathers=g, line_unit=u, cross_unit=w)
    np.testing.assert_allclose(
        geometry.gather_normals(gs, SimpleNamespace(s_along=s, cross_component=q)), n_true, atol=1e-12
    )
    np.testing.assert_allclose(
        geometry.gather_normals(gs, SimpleNamespace(s_along=s), cross_component=q), n_true, atol=1e-12
    )
    # no cross component known: level across the line (q = 0), still a unit vector
    level = geometry.gather_normals(gs, SimpleNamespace(s_along=s, cross_component=np.full(g, np.nan)))
    np.testing.assert_allclose(np.linalg.norm(level, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(-np.sum(level[:, :2] * w, axis=1), 0.0, atol=1e-12)
    # impossible components (s^2 + q^2 > 1) and failed fits give no normal at all
    bad = geometry.gather_normals(
        gs, SimpleNamespace(s_along=np.r_[0.9, np.nan, s[2:]]), cross_component=np.r_[0.9, 0.0, q[2:]]
    )
    assert np.all(np.isnan(bad[:2])) and np.all(np.isfinite(bad[2:]))
