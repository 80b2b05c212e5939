"""Hand-off products of a whole run, checked from the files (as an engineer receives them).

A small survey made by the forward models (two crossing lines over flat layers, three
boreholes), with a design level and an alignment, is run once through ``job.run``. The
map sheet is rendered with poppler (pdftoppm/pdftotext) and inspected; section tables are
compared with the GeoTIFF rasters sampled independently here; the LandXML is parsed with the
standard library and compared with the elevation raster (structural checks: the LandXML 1.2
schema is not available from a package registry); probabilities are compared with scipy's
normal distribution function cell by cell.
"""

import re
import shutil
import sqlite3
import subprocess
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rockhead.core import job
from rockhead.core.formats.gdalio import read_raster
from scipy.interpolate import RegularGridInterpolator
from scipy.stats import norm
from test_pipeline_layers import _write_survey

pytestmark = pytest.mark.slow  # slow tier: a whole job with the hand-off products (end to end)

DESIGN_M = 69.0  # the mapped reflector lies near 69.2 m: the level cuts through its uncertainty
AXIS = np.array([[499_960.0, 4_999_960.0], [500_040.0, 5_000_040.0]])  # a straight diagonal alignment
NS = "{http://www.landxml.org/schema/LandXML-1.2}"
POPPLER = shutil.which("pdftoppm") and shutil.which("pdftotext")


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("handoff")
    toml = _write_survey(folder, boreholes=True)
    (folder / "axis.csv").write_text("x,y\n" + "".join(f"{x},{y}\n" for x, y in AXIS))
    toml.write_text(
        toml.read_text() + f'[processing]\nsurface_method = "kriging"\n[design]\nelevation_m = {DESIGN_M}\n'
        'simulations = 200\n[sections]\nalignment = "axis.csv"\ncorridor_m = 30\n'
    )
    out = folder / "out"
    result = job.run(toml, out)
    return result, out


def _grid(out, name):
    r = read_raster(out / name)
    return r, r.values


def _sampler(raster, values):
    """Bilinear interpolation of a raster at cell centres (scipy, independent of the project's code)."""
    x, y = raster.x_centres, raster.y_centres
    order = np.argsort(y)
    return RegularGridInterpolator((y[order], x), values[order], bounds_error=False, fill_value=np.nan)


def test_every_handoff_file_is_written(run):
    _, out = run
    for name in (
        "map_sheet.pdf",
        "reflector_surface.xml",
        "probability_above_design.tif",
        "section_line_EW.pdf",
        "section_line_EW.csv",
        "section_line_NS.pdf",
        "section_line_NS.csv",
        "section_axis.pdf",
        "section_axis.csv",
    ):
        assert (out / name).is_file(), name
    assert all("section" in p.name for p in out.glob("section*"))


@pytest.mark.skipif(not POPPLER, reason="poppler-utils (pdftoppm, pdftotext) not installed")
def test_map_sheet_has_its_parts(run, tmp_path):
    result, out = run
    pdf = out / "map_sheet.pdf"
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    for part in (
        result.survey.name,
        "vertical datum not stated",
        "Rockhead",
        "EPSG:32633",
        "Legend",
        "grid north",
        "scale 1:",
        "kriging",
        "5 m" if result.spec.cell_size_m == 5 else f"{result.spec.cell_size_m:g} m",
        "interpretation with stated",
        "check it against borings",
        "licensed professionals",
        "Depth to the reflector",
        "Standard deviation",
        f"above {DESIGN_M:g} m",
        "depth below ground (m)",
    ):
        assert part in text, part
    info = subprocess.run(["pdfinfo", str(pdf)], capture_output=True, text=True, check=True).stdout
    assert re.search(r"^Pages:\s+3$", info, re.M)  # depth, sigma, probability
    assert "1190.55 x 841.89 pts" in info  # A3 landscape, 420 x 297 mm
    # the map frame (24..304 mm x 20..272 mm of 420 x 297 mm) holds a coloured map, not an empty frame
    subprocess.run(["pdftoppm", "-r", "30", "-f", "1", "-l", "1", "-png", str(pdf), str(tmp_path / "p")], check=True)
    from matplotlib.image import imread

    img = imread(str(next(tmp_path.glob("p*.png"))))[..., :3]
    h, w, _ = img.shape
    frame = img[int(h * (1 - 272 / 297)) : int(h * (1 - 20 / 297)), int(w * 24 / 420) : int(w * 304 / 420)]
    coloured = np.ptp(frame, axis=2) > 0.15  # saturated pixels: the depth ramp (grey lines and white are not)
    # the two crossing lines map a cross-shaped area: about a tenth of the frame at this scale
    assert coloured.mean() > 0.05
    assert len(np.unique((frame[coloured] * 20).round(), axis=0)) > 10  # a ramp of colours, not one fill


def test_section_values_equal_the_rasters(run):
    _, out = run
    elev_r, elev = _grid(out, "reflector_elevation.tif")
    _, sigma = _grid(out, "elevation_sigma.tif")  # sections give the elevation's sigma
    _, depth = _grid(out, "reflector_depth.tif")
    table = np.genfromtxt(out / "section_axis.csv", delimiter=",", names=True)
    pts = np.column_stack([table["y_m"], table["x_m"]])
    ok = np.isfinite(table["elevation_m"])
    assert ok.sum() >= 10
    # the GeoTIFF is float32: agreement to its precision (1e-4 m at 70 m)
    np.testing.assert_allclose(table["elevation_m"][ok], _sampler(elev_r, elev)(pts[ok]), atol=1e-4)
    np.testing.assert_allclose(table["sigma_m"][ok], _sampler(elev_r, sigma)(pts[ok]), atol=1e-4)
    np.testing.assert_allclose(table["depth_m"][ok], _sampler(elev_r, depth)(pts[ok]), atol=1e-4)
    np.testing.assert_allclose(table["ground_m"], 100.0, atol=1e-9)  # flat ground of the synthetic survey
    # chainage runs along the straight alignment from its first vertex
    ch = np.hypot(table["x_m"] - AXIS[0, 0], table["y_m"] - AXIS[0, 1])
    np.testing.assert_allclose(table["chainage_m"], ch, atol=1e-9)
    assert table["chainage_m"][-1] == pytest.approx(np.hypot(*(AXIS[1] - AXIS[0])))


def test_boreholes_sit_at_their_chainage(run):
    from rockhead.core.handoff.steps import section_along

    result, _ = run
    sec = section_along(result, "axis", AXIS, 30.0)
    bh = result.survey.boreholes
    u = (AXIS[1] - AXIS[0]) / np.hypot(*(AXIS[1] - AXIS[0]))
    rel = np.column_stack([bh.x_m, bh.y_m]) - AXIS[0]
    along = rel @ u
    right = rel @ np.array([u[1], -u[0]])  # u turned clockwise: the right-hand side looking along u
    inside = np.abs(right) <= 15.0
    assert inside.sum() == len(sec.boreholes) >= 2
    order = np.argsort(along[inside])
    np.testing.assert_allclose(sec.boreholes.chainage_m, along[inside][order], atol=1e-9)
    np.testing.assert_allclose(sec.boreholes.offset_m, right[inside][order], atol=1e-9)
    np.testing.assert_allclose(sec.boreholes.elevation_m, bh.elevation_m[inside][order])


def test_landxml_surface_is_the_grid(run):
    _, out = run
    r, z = _grid(out, "reflector_elevation.tif")
    root = ET.parse(out / "reflector_surface.xml").getroot()
    assert root.tag == NS + "LandXML" and root.get("version") == "1.2" and root.get("date") and root.get("time")
    metric = root.find(f"{NS}Units/{NS}Metric")
    assert metric.get("linearUnit") == "meter" and metric.get("areaUnit") == "squareMeter"
    cs = root.find(f"{NS}CoordinateSystem")
    assert cs.get("epsgCode") == "32633" and cs.get("ogcWktCode").startswith("PROJCS[")
    (surface,) = root.findall(f"{NS}Surfaces/{NS}Surface")
    definition = surface.find(f"{NS}Definition")
    assert definition.get("surfType") == "TIN"
    pts = {int(p.get("id")): [float(v) for v in p.text.split()] for p in definition.find(f"{NS}Pnts")}
    faces = np.array([[int(v) for v in f.text.split()] for f in definition.find(f"{NS}Faces")])
    # points are "northing easting elevation" and sit on cell centres with the raster's values
    neh = np.array([pts[i] for i in sorted(pts)])
    col = np.rint((neh[:, 1] - r.x_centres[0]) / (r.x_centres[1] - r.x_centres[0])).astype(int)
    row = np.rint((neh[:, 0] - r.y_centres[0]) / (r.y_centres[1] - r.y_centres[0])).astype(int)
    np.testing.assert_allclose(neh[:, 1], r.x_centres[col], atol=1e-3)  # written to the millimetre
    np.testing.assert_allclose(neh[:, 0], r.y_centres[row], atol=1e-3)
    np.testing.assert_allclose(neh[:, 2], z[row, col], atol=1e-3)
    # two faces per quad of four mapped cells, counted here by brute force
    ok = np.isfinite(z)
    quads = sum(
        ok[i, j] and ok[i, j + 1] and ok[i + 1, j] and ok[i + 1, j + 1]
        for i in range(z.shape[0] - 1)
        for j in range(z.shape[1] - 1)
    )
    assert len(faces) == 2 * quads > 0
    assert faces.min() == 1 and faces.max() == len(pts)
    # counter-clockwise seen from above: positive signed area in (easting, northing)
    e, n = neh[faces - 1, 1], neh[faces - 1, 0]
    area2 = (e[:, 1] - e[:, 0]) * (n[:, 2] - n[:, 0]) - (e[:, 2] - e[:, 0]) * (n[:, 1] - n[:, 0])
    cell = abs(r.x_centres[1] - r.x_centres[0])
    np.testing.assert_allclose(area2, cell**2, rtol=1e-9)  # half a cell each, all up


def test_probability_raster_is_the_gaussian_formula(run):
    _, out = run
    _, z = _grid(out, "reflector_elevation.tif")
    _, s = _grid(out, "elevation_sigma.tif")  # the elevation's sigma (depth_sigma.tif adds the ground's)
    _, p = _grid(out, "probability_above_design.tif")
    ok = np.isfinite(z)
    assert np.array_equal(ok, np.isfinite(p))
    # float32 rasters: the inputs carry ~4e-6 m of rounding, far below sigma (> 0.01 m) here
    np.testing.assert_allclose(p[ok], norm.cdf((z[ok] - DESIGN_M) / s[ok]), atol=1e-4)


def test_design_volumes_in_the_geopackage_and_report(run):
    result, out = run
    with sqlite3.connect(out / "survey.gpkg") as con:
        row = con.execute(
            "SELECT design_elevation_m, volume_p10_m3, volume_p50_m3, volume_p90_m3, simulations, "
            "map_volume_m3 FROM design_volumes"
        ).fetchone()
        tables = {r[0] for r in con.execute("SELECT table_name FROM gpkg_contents")}
    assert "sections" in tables
    zd, p10, p50, p90, n, _ = row
    assert zd == DESIGN_M and n == 200
    assert 0 <= p10 <= p50 <= p90
    v = result.design.volume
    assert (p10, p50, p90) == pytest.approx((v.p10_m3, v.p50_m3, v.p90_m3))
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Design level" in html and f"{p50:,.0f}" in html
