"""The whole-survey computation on small synthetic surveys made with the forward models.

Complements test_pipeline.py (the sample project through the command line):
here the truth is a stack of flat layers, so the Dix (1955) intervals under
every shot with two reflectors can be checked, and the mapped reflector is
chosen as the pipeline documents.
"""

import numpy as np
import pytest
from rockhead.core.seismic import forward
from rockhead.core.survey.config import load_survey
from rockhead.core.workflow import compute

pytestmark = pytest.mark.slow  # slow tier: whole computations of synthetic surveys (end to end)

THICKNESS_M = np.array([12.0, 18.0])
VINT_M_S = np.array([1500.0, 2400.0])
GROUND_M = 100.0


def _write_survey(folder, reflector_setting=None, boreholes=False, calibrate=False):
    """Two crossing lines (E-W and N-S) over two flat interfaces; exact ray-traced times."""
    stations, picks = [], []
    for line, az in (("EW", 90.0), ("NS", 0.0)):
        d = np.array([np.sin(np.radians(az)), np.cos(np.radians(az))])
        pos = (np.arange(61) - 30)[:, None] * 2.0 * d + np.array([500_000.0, 5_000_000.0])
        labels = [str(100 + i) for i in range(len(pos))]
        stations += [(line, lab, x, y, GROUND_M) for lab, (x, y) in zip(labels, pos)]
        for i_shot in range(0, 61, 10):
            rec = [j for j in range(max(0, i_shot - 24), min(61, i_shot + 25)) if j != i_shot]
            off = np.linalg.norm(pos[rec] - pos[i_shot], axis=1)
            for k, name in enumerate(("top", "rock")):
                t = forward.layered_reflection_traveltime(off, THICKNESS_M[: k + 1], VINT_M_S[: k + 1])
                picks += [(line, labels[i_shot], labels[j], f"{tt * 1e3:.6f}", name) for j, tt in zip(rec, t)]
    (folder / "stations.csv").write_text(
        "line,station,x,y,z\n" + "".join(f"{a},{b},{x:.4f},{y:.4f},{z}\n" for a, b, x, y, z in stations)
    )
    (folder / "picks.csv").write_text(
        "line,shot,receiver,time_ms,reflector\n" + "".join(",".join(p) + "\n" for p in picks)
    )
    files = 'stations = "stations.csv"\npicks = "picks.csv"\n'
    if boreholes:  # three boreholes reaching the deeper interface at its true depth
        rows = [(f"BH{i}", 500_000.0 + dx, 5_000_000.0 + dy) for i, (dx, dy) in enumerate([(-20, 0), (0, 20), (30, 0)])]
        (folder / "boreholes.csv").write_text(
            "borehole,x,y,z,depth_m\n" + "".join(f"{n},{x},{y},{GROUND_M},{THICKNESS_M.sum()}\n" for n, x, y in rows)
        )
        files += 'boreholes = "boreholes.csv"\n'
    processing = []
    if reflector_setting:
        processing.append(f'reflector = "{reflector_setting}"')
    if calibrate:
        processing.append("calibrate_velocity = true")
    extra = "[processing]\n" + "\n".join(processing) + "\n" if processing else ""
    (folder / "survey.toml").write_text('[survey]\nname = "two layers"\ncrs = "EPSG:32633"\n[files]\n' + files + extra)
    return folder / "survey.toml"


@pytest.fixture(scope="module")
def two_layer_result(tmp_path_factory):
    path = _write_survey(tmp_path_factory.mktemp("two_layers"))
    return compute(load_survey(path), method="kriging")


def test_deepest_reflector_is_mapped_by_default(two_layer_result):
    r = two_layer_result
    assert r.survey.settings.reflector == "rock"
    elev = r.surface.z[~r.surface.mask]
    # A single-layer fit to the deeper reflector returns the rms velocity (Dix 1955), so its
    # depth is V_rms t0 / 2 (30.80 m here), not the true 30 m: the documented bias of mapping a
    # deeper reflector without the Dix intervals. The hyperbola over spreads of +-48 m
    # (x/z up to 1.6) adds a few tenths of a metre more (non-hyperbolic moveout).
    t0, vrms = forward.layered_t0_vrms(THICKNESS_M, VINT_M_S)
    assert np.allclose(elev, GROUND_M - vrms[-1] * t0[-1] / 2, atol=0.6)


def test_dix_intervals_under_every_shot(two_layer_result):
    d = two_layer_result.dix
    n_shots = 2 * 7
    assert len(d) == len(d.line) == 2 * n_shots  # two layers under each shot
    top = d.reflector_base == "top"
    base = d.reflector_base == "rock"
    # Dix 1955: interval velocity and thickness of a flat two-layer stack; the rms velocity
    # from a finite-spread hyperbola fit is biased high by non-hyperbolic moveout (x/z up to
    # 1.6 here), which Dix's differencing amplifies for the lower layer: 1 % and 5 %, 0.8 m
    assert np.allclose(d.interval_velocity_m_s[top].astype(float), VINT_M_S[0], rtol=0.01)
    assert np.allclose(d.interval_velocity_m_s[base].astype(float), VINT_M_S[1], rtol=0.05)
    assert np.allclose(d.thickness_m[top].astype(float), THICKNESS_M[0], atol=0.8)
    assert np.allclose(d.depth_base_m[base].astype(float), THICKNESS_M.sum(), atol=0.8)
    assert set(d.status) == {"ok"}


def test_site_velocity_is_the_mapped_reflectors_in_the_report(two_layer_result):
    """One overburden velocity, of the mapped reflector only, starts the joint inversion and is reported.

    The other reflector's gather fits measure another rms velocity (Dix 1955): mixing them in
    would put the report's value between the two layers' velocities.
    """
    import html

    from rockhead.core.products.outputs import result_layers
    from rockhead.core.report.content import build_report
    from scipy.stats import median_abs_deviation

    r = two_layer_result
    f, g = r.fit.fits, r.fit.gathers
    rock = (np.asarray(g.reflector) == "rock") & (f.status == "ok")
    v = f.velocity_m_s[rock]
    site = r.site_velocity
    assert site.reflector == "rock" and site.n_gathers == int(rock.sum()) == 14
    # reference: the median and scipy's normal-consistent MAD (1.4826 = 1/Phi^-1(3/4), Huber 1964);
    # the project uses the 4-digit constant: relative difference 1.5e-6
    assert site.velocity_m_s == pytest.approx(float(np.median(v)), rel=1e-12)
    assert site.spread_m_s == pytest.approx(float(median_abs_deviation(v, scale="normal")), rel=1e-5, abs=1e-9)
    # the deeper reflector's fit gives its rms velocity (Dix 1955), 1987 m/s here; the hyperbola
    # fit over spreads up to 1.6 times the depth reads 1.3 % high (non-hyperbolic moveout): 3 %
    _, vrms = forward.layered_t0_vrms(THICKNESS_M, VINT_M_S)
    assert site.velocity_m_s == pytest.approx(vrms[-1], rel=0.03)
    both = f.velocity_m_s[f.status == "ok"]
    assert abs(float(np.median(both)) - site.velocity_m_s) > 100  # the old all-reflector value differs
    text = build_report(r, result_layers(r), {})
    label = html.escape("overburden velocity, gather fits of reflector 'rock' (median ± 1.4826 MAD)")
    value = f"{site.velocity_m_s:.0f} ± {site.spread_m_s:.0f} m/s from 14 gathers"
    assert label in text and value in text
    # mapped by kriging here: the report does not call the kriging a comparison surface
    assert r.method_used == "kriging" and "it is not the map" not in text


def test_named_reflector_is_mapped(tmp_path):
    r = compute(load_survey(_write_survey(tmp_path, "top")), method="kriging")
    elev = r.surface.z[~r.surface.mask]
    assert np.allclose(elev, GROUND_M - THICKNESS_M[0], atol=0.3)


def test_unknown_reflector_is_refused(tmp_path):
    from rockhead.core.errors import InversionError

    with pytest.raises(InversionError, match="reflector = 'basalt' has no picks; the picks name rock, top"):
        compute(load_survey(_write_survey(tmp_path, "basalt")), method="kriging")


def test_velocity_calibration_to_boreholes(tmp_path):
    """Boreholes at the true 30 m: the ratio measures the V_rms/V_average bias and removes it."""
    r = compute(load_survey(_write_survey(tmp_path, boreholes=True, calibrate=True)), method="kriging")
    t0, vrms = forward.layered_t0_vrms(THICKNESS_M, VINT_M_S)
    seismic_depth = vrms[-1] * t0[-1] / 2  # what the uncalibrated fits see (Dix 1955), +fit bias
    assert r.depth_ratio is not None and r.depth_ratio.n == 3
    assert r.depth_ratio.factor == pytest.approx(THICKNESS_M.sum() / seismic_depth, rel=0.02)
    assert r.depth_ratio.sigma_factor < 0.01
    elev = r.surface.z[~r.surface.mask]
    assert np.allclose(elev, GROUND_M - THICKNESS_M.sum(), atol=0.15)
    assert any("calibration factor" in n for n in r.notes)


def test_cmp_velocity_analysis(tmp_path):
    """gather = "cmp": bins fitted with t^2 = t0^2 + x^2/Vnmo^2 (Levin 1971) over flat layers."""
    path = _write_survey(tmp_path, "top")
    # shots every 20 m, 48 channels every 2 m: one-midpoint bins (the default) hold 2-3 picks, too few
    # to fit (fold = channels x receiver spacing / (2 x shot spacing) = 2.4, common practice); over flat
    # layers a bin as long as the shot spacing mixes midpoints of equal t0, so it is unbiased here
    path.write_text(path.read_text() + 'gather = "cmp"\ncmp_bin_m = 20.0\n')
    r = compute(load_survey(path), method="kriging")
    c = r.cmp
    assert c is not None
    ok = (c.status == "ok") & (c.reflector == "top")
    assert ok.sum() >= 10
    # flat first interface: Vnmo = V1 = 1500 m/s, t0 = 2 z1 / V1 = 16 ms (exact hyperbola)
    assert np.allclose(c.nmo_velocity_m_s[ok].astype(float), VINT_M_S[0], rtol=1e-3)
    assert np.allclose(c.t0_ms[ok].astype(float), 2e3 * THICKNESS_M[0] / VINT_M_S[0], rtol=1e-3)
    assert np.allclose(c.depth_m[ok].astype(float), THICKNESS_M[0], rtol=1e-3)


def test_dem_gives_the_ground(tmp_path):
    """A DEM named in [files] is the ground of the depth grid (not the station elevations)."""
    from rockhead.core.formats.gdalio import write_raster
    from rockhead.core.grid import GridSpec

    path = _write_survey(tmp_path, "top")
    # DEM 1.5 m above the stations' 100 m everywhere, covering the survey with a margin
    dem = np.full((60, 60), GROUND_M + 1.5)
    write_raster(tmp_path / "dem.tif", dem, GridSpec(499_852.5, 5_000_147.5, 5.0, 60, 60), "EPSG:32633")
    path.write_text(path.read_text().replace('picks = "picks.csv"\n', 'picks = "picks.csv"\ndem = "dem.tif"\n'))
    r = compute(load_survey(path), method="kriging")
    ok = ~r.surface.mask
    np.testing.assert_allclose(r.depth_m[ok], GROUND_M + 1.5 - r.surface.z[ok], atol=1e-9)
    assert "dem.tif" in r.ground.description_


def test_degenerate_gather_is_flagged_reported_and_the_run_goes_on(tmp_path):
    """A shot left with 3 picks: status too_few_picks with a reason, listed in the report."""
    from rockhead.core.job import write_outputs
    from rockhead.core.products.outputs import result_layers

    path = _write_survey(tmp_path, "top")
    picks = (tmp_path / "picks.csv").read_text().splitlines()
    head, rows = picks[0], picks[1:]
    victim = [r for r in rows if r.startswith("EW,120,")]
    keep = [r for r in rows if not r.startswith("EW,120,")] + victim[:3]
    (tmp_path / "picks.csv").write_text("\n".join([head, *keep]) + "\n")
    r = compute(load_survey(path), method="kriging")
    shots = result_layers(r)["shots"].fields
    bad = (shots["line"] == "EW") & (shots["shot"] == "120") & (shots["reflector"] == "top")
    assert shots["status"][bad].tolist() == ["too_few_picks"]
    assert "3" in shots["reason"][bad][0]
    assert np.all(shots["reason"][shots["status"] != "ok"] != "")  # every flagged gather says why
    write_outputs(r, tmp_path / "out")
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    flagged = html[html.index("Flagged gathers") :]
    assert "too_few_picks" in flagged[:3000] and "120" in flagged[:3000]


def test_single_line_survey_runs_and_gives_no_invented_dip(tmp_path):
    """One line: a line sees only the along-line normal component, so no true dip is given."""
    path = _write_survey(tmp_path, "top")
    for name in ("stations.csv", "picks.csv"):
        rows = (tmp_path / name).read_text().splitlines()
        (tmp_path / name).write_text("\n".join([rows[0]] + [r for r in rows[1:] if not r.startswith("NS,")]) + "\n")
    from rockhead.core.errors import RockheadWarning

    with pytest.warns(RockheadWarning, match="cross-line dip is unknown"):  # and says so
        r = compute(load_survey(path), method="kriging")
    assert len(r.dips) >= 1 and not np.any(r.dips.status == "ok")
    assert np.all(np.isnan(r.dips.dip_deg))
    assert set(r.dips.status) == {"single_direction"}
    assert np.any(~r.surface.mask)  # the map is still made along the line
