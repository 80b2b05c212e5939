"""Checks of the independent layered-survey generator and of the data it wrote.

``tests/generators/make_layered_site.py`` forward-models reflection times by
fast marching (scikit-fmm). The first tests run it on small models whose
reflection times are known in closed form and require agreement to 0.1 ms;
they need scikit-fmm and are skipped without it (it is not part of the QGIS
stack). The last tests check the committed folder ``tests/data/layered_site``
against ``truth.json`` and the generator's analytic model; they need only
numpy and scipy.
"""

from __future__ import annotations

import csv
import importlib.util
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

REPO = Path(__file__).resolve().parents[2]
GENERATOR = REPO / "tests" / "generators" / "make_layered_site.py"
DATA = REPO / "tests" / "data" / "layered_site"
TOL_MS = 0.1


def _load_generator():
    name = "make_layered_site"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses look their module up while the file runs
    spec.loader.exec_module(module)
    return module


gen = _load_generator()


def _line(n, spacing, azimuth_deg, z=0.0):
    az = math.radians(azimuth_deg)
    k = np.arange(n) * spacing
    return np.column_stack([k * math.sin(az), k * math.cos(az), np.full(n, z)])


def _offsets(stations, pairs):
    return np.array([np.linalg.norm(stations[s, :2] - stations[r, :2]) for s, r in pairs])


# --------------------------------------------------------------------------- generator against closed forms


def test_homogeneous_layer_over_flat_reflector():
    pytest.importorskip("skfmm")
    v, depth = 800.0, 6.0
    model = gen.LayeredModel(gen.LinearVelocity(v), [gen.PlaneSurface(-depth)], [])
    st = _line(6, 2.4, 33.0)
    pairs = [(0, i) for i in range(6)] + [(3, 1), (3, 5)]
    res = gen.reflection_times(model, 0, st, pairs, h=0.25, coarse_h=0.5)
    x = _offsets(st, pairs)
    # Green (1938): the reflection from a flat reflector under constant velocity is the hyperbola
    # t^2 = (x^2 + 4 h^2) / V^2
    exact = np.sqrt(x**2 + 4 * depth**2) / v
    err_ms = np.abs(res["time_s"] - exact) * 1e3
    assert err_ms.max() < TOL_MS, err_ms
    # and the reflection point of a flat reflector under constant velocity is the midpoint
    mid = 0.5 * (st[[s for s, _ in pairs], :2] + st[[r for _, r in pairs], :2])
    assert np.abs(res["point"][:, :2] - mid).max() < 0.3


def _snell_time(offset, thickness, vel):
    """Two-way time off the base of flat constant-velocity layers, by a 1-D root solve for the ray parameter.

    Snell's law (Fermat's principle): p = sin(theta_i) / v_i is the same in every layer, and
    x(p) = sum 2 h_i p v_i / sqrt(1 - p^2 v_i^2), t(p) = sum 2 h_i / (v_i sqrt(1 - p^2 v_i^2)).
    """
    h = np.asarray(thickness, float)
    v = np.asarray(vel, float)

    def x_of(p):
        return float(np.sum(2 * h * p * v / np.sqrt(1 - (p * v) ** 2))) - offset

    p = brentq(x_of, 0.0, (1 - 1e-15) / v.max(), xtol=1e-18, rtol=1e-15, maxiter=500)
    return float(np.sum(2 * h / (v * np.sqrt(1 - (p * v) ** 2))))


def test_two_flat_layers_against_snell():
    pytest.importorskip("skfmm")
    h1, v1, h2, v2 = 3.1, 500.0, 5.9, 1500.0
    model = gen.LayeredModel(
        gen.LinearVelocity(v1), [gen.PlaneSurface(-h1), gen.PlaneSurface(-h1 - h2)], [gen.ConstantVelocity(v2)]
    )
    st = _line(7, 2.5, 118.0)
    pairs = [(0, i) for i in range(1, 7)] + [(3, 1), (3, 5)]
    res = gen.reflection_times(model, 1, st, pairs, h=0.25, coarse_h=0.5)
    exact = np.array([_snell_time(x, [h1, h2], [v1, v2]) for x in _offsets(st, pairs)])
    err_ms = np.abs(res["time_s"] - exact) * 1e3
    assert err_ms.max() < TOL_MS, err_ms
    # the root solve itself: at zero offset it is the vertical two-way time
    assert _snell_time(0.0, [h1, h2], [v1, v2]) == pytest.approx(2 * h1 / v1 + 2 * h2 / v2)


def test_dipping_plane_against_image_source():
    pytest.importorskip("skfmm")
    v = 1200.0
    # plane 7 m below the first station, dipping 12 degrees towards azimuth 150, the line runs at 70 degrees
    plane = gen.PlaneSurface.dipping(-7.0, 12.0, 150.0)
    model = gen.LayeredModel(gen.LinearVelocity(v), [plane], [])
    st = _line(6, 2.4, 70.0)
    pairs = [(0, i) for i in range(1, 6)] + [(5, 1), (5, 3)]
    res = gen.reflection_times(model, 0, st, pairs, h=0.25, coarse_h=0.5)
    # image source (e.g. Levin 1971, dipping-interface reflections): t = |R - S'| / V, with S' the
    # mirror image of S in the reflector plane
    normal = np.array([-plane.sx, -plane.sy, 1.0]) / math.sqrt(1 + plane.sx**2 + plane.sy**2)
    on_plane = np.array([plane.x0, plane.y0, plane.z0])
    exact = []
    for s, r in pairs:
        image = st[s] - 2 * np.dot(st[s] - on_plane, normal) * normal
        exact.append(np.linalg.norm(st[r] - image) / v)
    err_ms = np.abs(res["time_s"] - np.array(exact)) * 1e3
    assert err_ms.max() < TOL_MS, err_ms
    # the reflection points leave the line's vertical plane (3-D, not 2.5-D): updip, off the line
    across = np.array([-math.cos(math.radians(70.0)), math.sin(math.radians(70.0))])
    assert np.abs(res["point"][:, :2] @ across).min() > 0.5


def _snell_time_gradient(offset, v0, g, depth):
    """Two-way time off a flat reflector under v(z) = v0 + g z (z depth), from Snell's law for v(z).

    The ray parameter p = sin(theta) / v is constant along the ray, so x(p) = 2 int p v / sqrt(1 - p^2 v^2) dz
    and t(p) = 2 int dz / (v sqrt(1 - p^2 v^2)) over 0..depth; p from a 1-D root solve.
    """

    def vel(z):
        return v0 + g * z

    def x_of(p):
        return 2 * quad(lambda z: p * vel(z) / math.sqrt(1 - (p * vel(z)) ** 2), 0, depth, epsabs=1e-13)[0] - offset

    p = brentq(x_of, 0.0, (1 - 1e-12) / vel(depth), xtol=1e-18, rtol=1e-15, maxiter=500)
    return 2 * quad(lambda z: 1 / (vel(z) * math.sqrt(1 - (p * vel(z)) ** 2)), 0, depth, epsabs=1e-15)[0]


def test_velocity_gradient_layer_against_snell():
    """The site's top layer has a linear velocity law; the generator starts its march from that law's closed form."""
    pytest.importorskip("skfmm")
    v0, g, depth = 560.0, 22.0, 4.5
    model = gen.LayeredModel(gen.LinearVelocity(v0, grad=(0.0, 0.0, -g)), [gen.PlaneSurface(-depth)], [])
    st = _line(7, 2.0, 205.0)
    pairs = [(0, i) for i in range(1, 7)] + [(3, 1), (3, 5)]
    res = gen.reflection_times(model, 0, st, pairs, h=0.25, coarse_h=0.5)
    exact = np.array([_snell_time_gradient(x, v0, g, depth) for x in _offsets(st, pairs)])
    err_ms = np.abs(res["time_s"] - exact) * 1e3
    assert err_ms.max() < TOL_MS, err_ms
    # rays reach the reflector going down, at the angles Snell's law gives (incidence < 90 degrees)
    assert np.all(res["cos_shot"] > 0.15) and np.all(res["cos_receiver"] > 0.15)


# --------------------------------------------------------------------------- the committed data


def _rows(name):
    with open(DATA / name, newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        header = next(reader)
        return header, [r for r in reader if r]


@pytest.fixture(scope="module")
def truth():
    return json.loads((DATA / "truth.json").read_text(encoding="utf-8"))


def test_committed_files_are_small_and_complete():
    names = {
        "survey.toml",
        "stations.csv",
        "picks.csv",
        "boreholes.csv",
        "truth.json",
        "truth_grids.npz",
        "picks_truth.csv",
    }
    assert names <= {p.name for p in DATA.iterdir()}
    assert sum(p.stat().st_size for p in DATA.iterdir()) < 1_000_000
    if sys.version_info >= (3, 11):
        import tomllib
    else:
        import tomli as tomllib
    cfg = tomllib.loads((DATA / "survey.toml").read_text(encoding="utf-8"))
    assert cfg["survey"]["crs"] == "EPSG:32633"
    assert cfg["files"] == {"stations": "stations.csv", "picks": "picks.csv", "boreholes": "boreholes.csv"}
    assert cfg["processing"]["reflector"] == "rock"


def test_truth_json_formulas_match_the_generator(truth):
    """The parameters in truth.json, put into the formulas it states, give the generator's surfaces."""
    m = truth["model"]
    x0, y0 = truth["origin_xy_m"]
    rng = np.random.default_rng(7)
    x = x0 + rng.uniform(-150, 150, 200)
    y = y0 + rng.uniform(-150, 150, 200)
    u, v = x - x0, y - y0
    gr = m["ground"]
    ground = gr["z0_m"] + gr["se"] * u + gr["sn"] * v
    w = m["water_table"]
    wt = ground - (w["d0_m"] + w["a_m"] * np.sin(u / w["le_m"] + w["phase_rad"]) * np.cos(v / w["ln_m"]) + w["te"] * u)
    r = m["rock"]
    az = math.radians(r["dip_azimuth_deg"])
    uk, vk = r["knoll_centre_uv_m"]
    rock = (
        r["z0_m"]
        - math.tan(math.radians(r["dip_deg"])) * (u * math.sin(az) + v * math.cos(az))
        + r["knoll_height_m"] * np.exp(-((u - uk) ** 2 + (v - vk) ** 2) / r["knoll_radius_m"] ** 2)
    )
    np.testing.assert_allclose(gen.ground_elevation(x, y), ground, atol=1e-9)
    np.testing.assert_allclose(gen.water_table_elevation(x, y), wt, atol=1e-9)
    np.testing.assert_allclose(gen.rock_elevation(x, y), rock, atol=1e-9)
    l1, l2 = m["velocity"]["layer1"], m["velocity"]["layer2"]
    z = wt + 0.5 * (ground - wt)
    np.testing.assert_allclose(gen.velocity(x, y, z), l1["v_top_m_s"] + l1["g_per_s"] * (ground - z), rtol=1e-12)
    z = rock + 0.5 * (wt - rock)
    np.testing.assert_allclose(
        gen.velocity(x, y, z), l2["v0_m_s"] + l2["ge_per_s"] * u + l2["gn_per_s"] * v, rtol=1e-12
    )
    assert np.isnan(gen.velocity(x, y, ground + 0.1)).all() and np.isnan(gen.velocity(x, y, rock - 0.1)).all()


def test_truth_grids(truth):
    spec = truth["truth_grid"]
    grids = np.load(DATA / spec["file"])
    c = spec["cell_m"]
    xc = spec["x_west_m"] + (np.arange(spec["ncols"]) + 0.5) * c
    yc = spec["y_north_m"] - (np.arange(spec["nrows"]) + 0.5) * c
    X, Y = np.meshgrid(xc, yc)
    for key, fn in (
        ("ground_mm", gen.ground_elevation),
        ("water_table_mm", gen.water_table_elevation),
        ("rock_mm", gen.rock_elevation),
    ):
        assert grids[key].shape == (spec["nrows"], spec["ncols"])
        assert np.abs(grids[key] / 1000.0 - fn(X, Y)).max() <= 0.0005 + 1e-9
    # north-up: the ground rises to the north at this site, so row 0 is higher than the last row
    assert np.all(grids["ground_mm"][0] > grids["ground_mm"][-1])
    _, rows = _rows("stations.csv")
    xy = np.array([[float(r[2]), float(r[3])] for r in rows])
    assert xy[:, 0].min() - 30 >= spec["x_west_m"] and xy[:, 0].max() + 30 <= spec["x_west_m"] + spec["ncols"] * c
    assert xy[:, 1].max() + 30 <= spec["y_north_m"] and xy[:, 1].min() - 30 >= spec["y_north_m"] - spec["nrows"] * c


def test_boreholes_match_the_truth(truth):
    header, rows = _rows("boreholes.csv")
    assert header == ["borehole", "x", "y", "z", "depth_m", "depth_wt_m"]
    assert len(rows) == 3
    by_name = {b["borehole"]: b for b in truth["boreholes"]}
    for name, x, y, z, depth, depth_wt in rows:
        x, y, z, depth, depth_wt = map(float, (x, y, z, depth, depth_wt))
        ground = float(gen.ground_elevation(x, y))
        assert z == pytest.approx(ground, abs=0.006)
        assert depth == pytest.approx(ground - float(gen.rock_elevation(x, y)), abs=0.006)
        assert depth_wt == pytest.approx(ground - float(gen.water_table_elevation(x, y)), abs=0.006)
        assert 25.0 <= depth <= 40.0 and 4.0 <= depth_wt <= 6.0
        # vertical-average velocity = depth / one-way vertical time, integrated numerically here
        t_wt = quad(lambda zz, x=x, y=y: 1.0 / gen.velocity(x, y, zz), ground - depth_wt, ground, epsabs=1e-12)[0]
        t_rock = (
            t_wt
            + quad(lambda zz, x=x, y=y: 1.0 / gen.velocity(x, y, zz), ground - depth, ground - depth_wt, epsabs=1e-12)[
                0
            ]
        )
        b = by_name[name]
        assert b["vertical_average_velocity_to_wt_m_s"] == pytest.approx(depth_wt / t_wt, abs=0.2)
        assert b["vertical_average_velocity_to_rock_m_s"] == pytest.approx(depth / t_rock, abs=0.2)


def test_stations_and_picks_are_consistent(truth):
    header, rows = _rows("stations.csv")
    assert header == ["line", "station", "x", "y", "z"]
    stations = {}
    for line, lab, x, y, z in rows:
        assert (line, lab) not in stations, "station labels must be unique per line"
        stations[line, lab] = np.array([float(x), float(y), float(z)])
    xyz = np.array(list(stations.values()))
    np.testing.assert_allclose(xyz[:, 2], gen.ground_elevation(xyz[:, 0], xyz[:, 1]), atol=0.0006)
    assert len({line for line, _ in stations}) == 4

    header, picks = _rows("picks.csv")
    assert header == ["line", "shot", "receiver", "time_ms", "sigma_ms", "reflector"]
    _, exact = _rows("picks_truth.csv")
    assert len(exact) == len(picks)
    n = {"wt": 0, "rock": 0}
    resid = {"wt": [], "rock": []}
    mispicks = 0
    for p, e in zip(picks, exact):
        line, shot, rec, t_ms, sigma, refl = p
        assert (line, shot) in stations and (line, rec) in stations
        assert e[:4] == [line, shot, rec, refl]
        assert float(sigma) == truth["picks"]["sigma_ms"][refl]
        n[refl] += 1
        d = float(t_ms) - float(e[4])
        if e[5] == "1":
            mispicks += 1
            assert 3.0 - 5 * float(sigma) <= abs(d) <= 8.0 + 5 * float(sigma)
        else:
            resid[refl].append(d)
    assert n == truth["picks"]["counts"]
    assert 1000 <= sum(n.values()) <= 5000
    assert 0.005 <= mispicks / len(picks) <= 0.04
    for refl, sigma in truth["picks"]["sigma_ms"].items():
        r = np.array(resid[refl])
        assert np.abs(r).max() < 5 * sigma
        assert 0.85 * sigma < r.std() < 1.15 * sigma and abs(r.mean()) < 4 * sigma / math.sqrt(len(r))


def _straight_time(a, b, samples=400):
    """Time along the straight segment a-b through the model (midpoint rule)."""
    f = (np.arange(samples) + 0.5) / samples
    pts = a[None, :] + f[:, None] * (b - a)[None, :]
    v = gen.velocity(pts[:, 0], pts[:, 1], pts[:, 2])
    return float(np.sum(1.0 / v) * np.linalg.norm(b - a) / samples)


def test_noise_free_times_within_physical_bounds():
    """Every noise-free time lies between the fastest-layer bound and the straight-path time (Fermat)."""
    _, stations = _rows("stations.csv")
    pos = {(r[0], r[1]): np.array([float(r[2]), float(r[3]), float(r[4])]) for r in stations}
    _, exact = _rows("picks_truth.csv")
    v_max = {"wt": gen.V1_TOP_M_S + gen.V1_GRAD_PER_S * 6.0, "rock": 1700.0}
    surfaces = {"wt": gen.water_table_elevation, "rock": gen.rock_elevation}
    checked = 0
    for k, (line, shot, rec, refl, t_ms, _, px, py, pz) in enumerate(exact):
        s, r = pos[line, shot], pos[line, rec]
        p = np.array([float(px), float(py), float(pz)])
        assert p[2] == pytest.approx(float(surfaces[refl](p[0], p[1])), abs=0.006)
        t = float(t_ms) / 1e3
        length = np.linalg.norm(p - s) + np.linalg.norm(p - r)
        assert t >= length / v_max[refl] - 1e-6
        assert t >= np.linalg.norm(s - r) / v_max[refl]
        if k % 7 == 0:
            # Fermat: no path through P is faster than the rays, so the straight one is slower (allowing the
            # generator's 0.1 ms), though by less than 10 % at these offsets. The ends are moved 1 mm into
            # the layers (the stations' z is rounded to the mm).
            up, down = np.array([0.0, 0.0, 0.001]), np.array([0.0, 0.0, -0.001])
            straight = _straight_time(s + down, p + up) + _straight_time(p + up, r + down)
            assert t <= straight + TOL_MS / 1e3
            assert t >= 0.9 * straight
            checked += 1
    assert checked > 100
