"""The whole-survey computation on small synthetic surveys made with the forward models.

Complements test_pipeline.py (the sample project through the command line):
here the truth is a stack of flat layers, so the Dix (1955) intervals under
every shot with two reflectors can be checked, and the mapped reflector is
chosen as the pipeline documents.
"""

import numpy as np
import pytest
from reflector_mapper.core import forward
from reflector_mapper.core.inputs import load_survey
from reflector_mapper.core.pipeline import compute

THICKNESS_M = np.array([12.0, 18.0])
VINT_M_S = np.array([1500.0, 2400.0])
GROUND_M = 100.0


def _write_survey(folder, reflector_setting=None):
    """Two crossing lines (E-W and N-S) over two flat interfaces; exact ray-traced times."""
    stations, picks = [], []
    for line, az in (("EW", 90.0), ("NS", 0.0)):
        d = np.array([np.sin(np.radians(az)), np.cos(np.radians(az))])
        pos = (np.arange(61) - 30)[:, None] * 2.0 * d + 500_000.0 + np.array([0.0, 5_000_000.0])
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
    extra = f'\n[processing]\nreflector = "{reflector_setting}"\n' if reflector_setting else ""
    (folder / "survey.toml").write_text(
        '[survey]\nname = "two layers"\ncrs = "EPSG:32633"\n[files]\nstations = "stations.csv"\n'
        'picks = "picks.csv"\n' + extra
    )
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
    assert len(d["line"]) == 2 * n_shots  # two layers under each shot
    top = d["reflector_base"] == "top"
    base = d["reflector_base"] == "rock"
    # Dix 1955: interval velocity and thickness of a flat two-layer stack; the rms velocity
    # from a finite-spread hyperbola fit is biased high by non-hyperbolic moveout (x/z up to
    # 1.6 here), which Dix's differencing amplifies for the lower layer: 1 % and 5 %, 0.8 m
    assert np.allclose(d["interval_velocity_m_s"][top].astype(float), VINT_M_S[0], rtol=0.01)
    assert np.allclose(d["interval_velocity_m_s"][base].astype(float), VINT_M_S[1], rtol=0.05)
    assert np.allclose(d["thickness_m"][top].astype(float), THICKNESS_M[0], atol=0.8)
    assert np.allclose(d["depth_base_m"][base].astype(float), THICKNESS_M.sum(), atol=0.8)
    assert set(d["status"]) == {"ok"}


def test_named_reflector_is_mapped(tmp_path):
    r = compute(load_survey(_write_survey(tmp_path, "top")), method="kriging")
    elev = r.surface.z[~r.surface.mask]
    assert np.allclose(elev, GROUND_M - THICKNESS_M[0], atol=0.3)


def test_unknown_reflector_is_refused(tmp_path):
    from reflector_mapper.core.errors import InversionError

    with pytest.raises(InversionError, match="reflector = 'basalt' has no picks; the picks name rock, top"):
        compute(load_survey(_write_survey(tmp_path, "basalt")), method="kriging")
