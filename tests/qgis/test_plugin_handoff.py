"""The hand-off algorithms in a real QGIS: map sheet (print layout to PDF), section along an
alignment layer, rock above a design level. References: the core called directly on the same
sample survey (the algorithms are thin adapters), poppler's pdftotext/pdftoppm for the PDF."""

import re
import shutil
import subprocess

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsFeature, QgsGeometry, QgsPointXY, QgsVectorLayer
from rockhead.core.formats.gdalio import read_raster
from rockhead.core.handoff.steps import design_answers, section_along

POPPLER = shutil.which("pdftoppm") and shutil.which("pdftotext")
AXIS = [(512300.0, 5455600.0), (512420.0, 5455620.0), (512480.0, 5455700.0)]  # crosses the sample site


def run(alg, params):
    import processing

    return processing.run(f"rockhead:{alg}", params)


@pytest.fixture(scope="module")
def core_auto(sample_run):
    """The core on the sample survey with the survey's own settings (what the algorithms run).

    ``(survey.toml, RunResult)`` of the session's one sample run (tests/conftest.py).
    """
    return sample_run.survey_toml, sample_run.result


@pytest.mark.skipif(not POPPLER, reason="poppler-utils not installed")
def test_map_sheet_print_layout(provider, core_results, tmp_path):
    out, result = core_results
    pdf = tmp_path / "sheet.pdf"
    res = run("mapsheet", {"RESULTS": str(out), "OUTPUT": str(pdf)})
    assert res["OUTPUT"] == str(pdf) and pdf.is_file()
    info = subprocess.run(["pdfinfo", str(pdf)], capture_output=True, text=True, check=True).stdout
    assert re.search(r"^Pages:\s+2$", info, re.M)  # depth, then standard deviation
    assert "(A3)" in info
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    flat = " ".join(text.split())
    for part in (
        result.survey.name,
        "vertical datum not stated",
        "Rockhead",
        "EPSG:32633",
        "kriging",
        "Legend",
        "grid north",
        "interpretation with stated uncertainty",
        "licensed professionals",
        "Standard deviation of the depth",
    ):
        assert part in flat, part
    subprocess.run(["pdftoppm", "-r", "25", "-f", "1", "-l", "1", "-png", str(pdf), str(tmp_path / "p")], check=True)
    from matplotlib.image import imread

    img = imread(str(next(tmp_path.glob("p*.png"))))[..., :3]
    h, w, _ = img.shape
    frame = img[int(h * 14 / 297) : int(h * 284 / 297), int(w * 12 / 420) : int(w * 302 / 420)]
    coloured = np.ptp(frame, axis=2) > 0.15  # the depth ramp (greys and white are not saturated)
    assert coloured.mean() > 0.2  # the sample site fills most of the frame at the chosen scale


@pytest.mark.skipif(not POPPLER, reason="poppler-utils not installed")
def test_map_sheet_has_the_probability_page_with_a_design_level(provider, core_auto, tmp_path):
    from rockhead.core import job

    toml, _ = core_auto
    folder = tmp_path / "design"
    shutil.copytree(toml.parent, folder)
    (folder / "survey.toml").write_text(
        (folder / "survey.toml").read_text() + "\n[design]\nelevation_m = 222.0\nsimulations = 200\n"
    )
    job.run(folder / "survey.toml", folder / "results")
    pdf = tmp_path / "sheet.pdf"
    run("mapsheet", {"RESULTS": str(folder / "results"), "OUTPUT": str(pdf)})
    info = subprocess.run(["pdfinfo", str(pdf)], capture_output=True, text=True, check=True).stdout
    assert re.search(r"^Pages:\s+3$", info, re.M)
    text = " ".join(subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True).stdout.split())
    text = text.replace("\ufb02", "fl").replace("\ufb01", "fi")  # Qt's text shaping writes the fl/fi ligatures
    assert "Probability that the reflector is above 222.0 m" in text


def _alignment_layer():
    layer = QgsVectorLayer("LineString?crs=EPSG:32633&field=name:string", "axis", "memory")
    f = QgsFeature(layer.fields())
    f.setGeometry(QgsGeometry.fromPolylineXY([QgsPointXY(x, y) for x, y in AXIS]))
    f["name"] = "axis"
    layer.dataProvider().addFeatures([f])
    return layer


def test_section_along_alignment_equals_the_core(provider, core_auto, tmp_path):
    toml, result = core_auto
    out = tmp_path / "sections"
    res = run(
        "sectionalongalignment",
        {
            "SURVEY": str(toml),
            "ALIGNMENT": _alignment_layer(),
            "NAME_FIELD": "name",
            "CORRIDOR": 30.0,
            "FORMAT": 0,
            "OUTPUT": str(out),
        },
    )
    assert sorted(p.name for p in out.iterdir()) == ["section_axis.csv", "section_axis.pdf"]
    assert len(res["FILES"]) == 2
    table = np.genfromtxt(out / "section_axis.csv", delimiter=",", names=True)
    ref = section_along(result, "axis", np.array(AXIS), 30.0).table()
    for name, values in ref.items():
        # the same computation; CSV cells keep every digit of a double (round trip exact)
        np.testing.assert_allclose(table[name], values, rtol=0, atol=1e-9, equal_nan=True, err_msg=name)


def test_design_level_equals_the_core(provider, core_auto, tmp_path):
    toml, result = core_auto
    prob = tmp_path / "p.tif"
    res = run(
        "designlevel",
        {
            "SURVEY": str(toml),
            "DESIGN_ELEVATION": 222.0,
            "SIMULATIONS": 200,
            "SEED": 3,
            "PROBABILITY": str(prob),
            "OUTPUT": "memory:volumes",
        },
    )
    ref = design_answers(result, 222.0, n_simulations=200, seed=3)
    got = read_raster(prob).values
    # float32 GeoTIFF of probabilities in [0, 1]: 1e-6
    np.testing.assert_allclose(got, ref.probability, atol=1e-6, equal_nan=True)
    layer = res["OUTPUT"]
    if isinstance(layer, str):
        from qgis.core import QgsProcessingUtils, QgsProject

        layer = QgsProcessingUtils.mapLayerFromString(layer, None) or QgsProject.instance().mapLayer(layer)
    (feat,) = list(layer.getFeatures())
    v = ref.volume
    # same seed, same data: the same realisations (to the last bits of threaded sums)
    assert feat["volume_p50_m3"] == pytest.approx(v.p50_m3, rel=1e-9)
    assert feat["volume_p10_m3"] == pytest.approx(v.p10_m3, rel=1e-9)
    assert feat["volume_p90_m3"] == pytest.approx(v.p90_m3, rel=1e-9)
    assert feat["simulations"] == 200
