"""Vertical datum and survey date: read from survey.toml, carried by every elevation product.

The sample survey (invented site, UTM 33N) is run with EVRF2007 height
(EPSG:5621, the European vertical reference frame, metres) stated two ways,
and without a datum. References: pyproj for the CRSs, GDAL (through the
project's reader and a reference reader in test_rasters) for the files, the
definition depth = ground - reflector elevation for the depth contours' z.
"""

import shutil
import sqlite3

import numpy as np
import pyproj
import pytest
from rockhead.core import job
from rockhead.core.errors import SurveyConfigError
from rockhead.core.formats import gdalio
from rockhead.core.survey.config import load_survey
from test_rasters import _reference, same_crs

SAMPLE_INPUTS = ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv")
EVRF = pyproj.CRS("EPSG:5621")


def _copy_sample(sample_dir, folder, old='crs = "EPSG:32633"', new='crs = "EPSG:32633"'):
    folder.mkdir(parents=True, exist_ok=True)
    for name in SAMPLE_INPUTS:
        shutil.copy2(sample_dir / name, folder / name)
    toml = folder / "survey.toml"
    toml.write_text(toml.read_text().replace(old, new))
    return toml


@pytest.mark.parametrize(
    "new",
    ['crs = "EPSG:32633+5621"', 'crs = "EPSG:32633"\nvertical_crs = "EPSG:5621"'],
    ids=["compound-crs", "vertical-crs-key"],
)
def test_vertical_crs_read_either_way(sample_dir, tmp_path, new):
    survey = load_survey(_copy_sample(sample_dir, tmp_path, new=new))
    assert survey.handoff.vertical_crs.equals(EVRF) and survey.handoff.vertical_datum == "EVRF2007 height"
    assert survey.crs.to_epsg() == 32633  # x, y are computed in the horizontal part


@pytest.mark.parametrize(
    ("new", "field"),
    [
        ('crs = "EPSG:32633"\nvertical_crs = "EPSG:6360"', "survey.vertical_crs"),
        ('crs = "EPSG:32633+6360"', "survey.crs"),
    ],
    ids=["feet-vertical-key", "feet-in-compound"],
)
def test_vertical_crs_in_feet_is_refused(sample_dir, tmp_path, new, field):
    # stations.csv and boreholes.csv hold metres; a datum in US survey feet would mislabel every height
    toml = _copy_sample(sample_dir, tmp_path, new=new)
    with pytest.raises(SurveyConfigError, match=rf"line \d+, field '{field}': .*US survey foot.*EPSG:5703"):
        load_survey(toml)


@pytest.fixture(scope="module")
def stated_run(sample_dir, tmp_path_factory):
    """The sample project with a vertical datum and a survey date (a whole run: slow tier)."""
    base = tmp_path_factory.mktemp("vertical")
    toml = _copy_sample(sample_dir, base / "in", new='crs = "EPSG:32633+5621"\ndate = 2025-06-14')
    out = base / "out"
    return job.run(toml, out, method="kriging"), out


@pytest.fixture(scope="module")
def unstated_run(sample_run):
    """The sample project as it is (no vertical datum, no date): the session's one run (tests/conftest.py)."""
    return sample_run.result, sample_run.out


@pytest.mark.slow  # a whole run of the sample project with a vertical datum
def test_elevation_raster_carries_the_vertical_datum(stated_run, gdal_validate):
    _result, out = stated_run
    elevation = gdalio.read_raster(out / "reflector_elevation.tif")
    assert elevation.crs.is_compound and same_crs(elevation.crs, "EPSG:32633+5621")
    assert same_crs(_reference(out / "reflector_elevation.tif")["wkt"], "EPSG:32633+5621")
    # depth below ground and its sigma are lengths, not heights: horizontal CRS only
    for name in ("reflector_depth.tif", "depth_sigma.tif"):
        assert gdalio.read_raster(out / name).crs.equals("EPSG:32633", ignore_axis_order=True), name
    assert elevation.metadata["VERTICAL_DATUM"] == "EPSG:5621 (EVRF2007 height)"
    gdal_validate(
        *(out / n for n in ("reflector_elevation.tif", "reflector_depth.tif", "depth_sigma.tif", "survey.gpkg"))
    )


@pytest.mark.slow  # a whole run of the sample project with a vertical datum
def test_geopackage_is_3d_in_the_compound_crs(stated_run):
    _result, out = stated_run
    pts, crs = gdalio.read_layer(out / "survey.gpkg", "reflector_points")
    assert same_crs(crs, "EPSG:32633+5621")
    z = np.array([g.z for g in pts.geometries if g is not None])
    elev = pts.fields["elevation_m"][[g is not None for g in pts.geometries]]
    np.testing.assert_array_equal(z, elev)  # the z of each point is its reflector elevation, exactly
    stations, _ = gdalio.read_layer(out / "survey.gpkg", "stations")
    np.testing.assert_array_equal([g.z for g in stations.geometries], stations.fields["z_m"])
    con = sqlite3.connect(str(out / "survey.gpkg"))
    try:
        flags = dict(con.execute("SELECT table_name, z FROM gpkg_geometry_columns").fetchall())
    finally:
        con.close()
    # 12-128r18 Table 7: z = 1, every geometry has z
    assert all(flags[t] == 1 for t in ("stations", "shots", "reflector_points", "boreholes", "contours"))
    assert "EVRF2007 height" in gdalio.vector_metadata(out / "survey.gpkg", "reflector_points")["Z"]


@pytest.mark.slow  # a whole run of the sample project with a vertical datum
def test_contours_carry_elevations(stated_run):
    result, out = stated_run
    lines, _ = gdalio.read_layer(out / "survey.gpkg", "contours")
    kinds = lines.fields["kind"]
    checked = {"elevation": 0, "depth": 0}
    for g, kind, e, d in zip(lines.geometries, kinds, lines.fields["elevation_m"], lines.fields["depth_m"]):
        parts = list(g.geoms) if hasattr(g, "geoms") else [g]
        xyz = np.vstack([np.asarray(p.coords) for p in parts])
        if kind == "elevation":
            assert np.all(xyz[:, 2] == e)  # an elevation contour lies at its level
        else:
            # the reflector under a depth contour: ground - depth (depth = ground - reflector elevation)
            np.testing.assert_allclose(xyz[:, 2], result.ground(xyz[:, 0], xyz[:, 1]) - d, rtol=0, atol=1e-9)
        checked[kind] += len(xyz)
    assert checked["elevation"] > 50 and checked["depth"] > 50


@pytest.mark.slow  # a whole run of the sample project with a vertical datum
def test_report_and_run_info_name_the_datum_and_date(stated_run, unstated_run):
    _r, out = stated_run
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "EVRF2007 height" in html
    info, _ = gdalio.read_layer(out / "survey.gpkg", "run_info")
    table = dict(zip(info.fields["key"], info.fields["value"]))
    assert table["vertical_datum"] == "EVRF2007 height"
    md = gdalio.vector_metadata(out / "survey.gpkg")
    assert md["SURVEY_DATE"] == "2025-06-14" and md["VERTICAL_DATUM"] == "EPSG:5621 (EVRF2007 height)"
    _r, out = unstated_run
    assert "vertical datum not stated" in (out / "report.html").read_text(encoding="utf-8")
    assert gdalio.read_raster(out / "reflector_elevation.tif").metadata["VERTICAL_DATUM"] == "vertical datum not stated"
    assert gdalio.vector_metadata(out / "survey.gpkg")["SURVEY_DATE"] == "not stated"


@pytest.mark.slow  # a whole run of the sample project with a vertical datum
def test_file_dates_come_from_the_survey_date(stated_run, unstated_run):
    _r, out = stated_run
    # the TIFF DateTime tag and the GeoPackage's last_change are the survey's day, never the clock
    assert _reference(out / "reflector_depth.tif")["tags"]["TIFFTAG_DATETIME"] == "2025:06:14 00:00:00"
    con = sqlite3.connect(str(out / "survey.gpkg"))
    try:
        assert con.execute("SELECT DISTINCT last_change FROM gpkg_contents").fetchall() == [
            ("2025-06-14T00:00:00.000Z",)
        ]
    finally:
        con.close()
    _r, out = unstated_run
    # without a date: the fixed placeholder 1970-01-01 (reproducible-builds convention)
    assert _reference(out / "reflector_depth.tif")["tags"]["TIFFTAG_DATETIME"] == "1970:01:01 00:00:00"


def test_source_date_epoch_wins(monkeypatch):
    from rockhead.core.products.provenance import product_timestamp

    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764633600")  # 2025-12-02T00:00:00Z
    assert product_timestamp("2025-06-14").isoformat() == "2025-12-02T00:00:00+00:00"
    monkeypatch.delenv("SOURCE_DATE_EPOCH")
    assert product_timestamp("2025-06-14").isoformat() == "2025-06-14T00:00:00+00:00"
    assert product_timestamp(None).isoformat() == "1970-01-01T00:00:00+00:00"


@pytest.mark.slow
def test_dxf_header_names_the_datum_and_the_caution(stated_run):
    _r, out = stated_run
    head = (out / "contours_depth.dxf").read_bytes().decode("ascii").split("\r\n")[:40]
    comments = " ".join(head[i + 1] for i in range(0, len(head) - 1, 2) if head[i].strip() == "999")
    assert "z = depth of the reflector below ground" in comments
    assert "EPSG:5621 (EVRF2007 height)" in comments and "survey date: 2025-06-14" in comments
    assert "does not replace borings" in comments and "licensed professionals" in comments
