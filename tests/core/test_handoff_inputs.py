"""survey.toml's [design] and [sections] keys and the vertex and polygon files they name.

Coordinates are checked against pyproj directly (the reference library for
CRS transforms); located errors against the project's message contract
(file, line, field). The bad-input corpus (tests/bad_inputs/) holds the
one-fault cases; these tests cover what a corpus case cannot show.
"""

import shutil
from pathlib import Path

import numpy as np
import pytest
from pyproj import Transformer
from rockhead.core.errors import InputFileError, SurveyConfigError
from rockhead.core.survey.config import load_survey

CORPUS = Path(__file__).resolve().parents[1] / "bad_inputs"


@pytest.fixture
def base(tmp_path):
    folder = tmp_path / "site"
    shutil.copytree(CORPUS / "good_base", folder)
    (folder / "expected.txt").unlink(missing_ok=True)
    return folder


def _append(folder, text):
    toml = folder / "survey.toml"
    toml.write_text(toml.read_text() + "\n" + text)
    return toml


def test_defaults_without_tables(base):
    h = load_survey(base / "survey.toml").handoff
    assert h.design_elevation_m is None and h.design_area is None and h.alignments == ()
    assert h.corridor_m == 25.0 and h.simulations == 500 and h.section_format == "pdf"
    assert h.vertical_datum is None and h.survey_date is None


def test_design_and_sections_read(base):
    (base / "axis.csv").write_text("x,y\n499970,5499990\n500000,5500000\n500030,5500010\n")
    (base / "area.csv").write_text("x,y\n499980,5499980\n500020,5499980\n500020,5500020\n499980,5500020\n")
    _append(
        base,
        '[design]\nelevation_m = 292.5\narea = "area.csv"\nsimulations = 300\nseed = 7\n'
        '[sections]\nalignment = ["axis.csv"]\ncorridor_m = 40\nformat = "svg"\n',
    )
    s = load_survey(base / "survey.toml")
    h = s.handoff
    assert h.design_elevation_m == 292.5 and h.simulations == 300 and h.seed == 7
    assert h.design_area.area == pytest.approx(1600.0)  # 40 m x 40 m square
    assert h.corridor_m == 40.0 and h.section_format == "svg"
    (a,) = h.alignments
    assert a.name == "axis"
    np.testing.assert_allclose(a.x_m, [499970, 500000, 500030])
    assert s.files["alignment_axis"] == (base / "axis.csv").resolve()  # protected from being overwritten
    assert s.files["design_area"] == (base / "area.csv").resolve()


def test_geographic_vertex_file_goes_to_the_working_crs(tmp_path):
    folder = tmp_path / "geo"
    shutil.copytree(CORPUS / "good_geographic", folder)
    to_lonlat = Transformer.from_crs("EPSG:32651", "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform([400010.0, 400040.0], [3400005.0, 3400020.0])
    (folder / "axis.csv").write_text("x,y\n" + "".join(f"{a:.9f},{b:.9f}\n" for a, b in zip(lon, lat)))
    _append(folder, '[sections]\nalignment = "axis.csv"\n')
    s = load_survey(folder / "survey.toml")
    (a,) = s.handoff.alignments
    back = Transformer.from_crs("EPSG:4326", s.crs, always_xy=True).transform(lon, lat)
    # pyproj is the reference; 1e-6 m is far below any survey's precision
    np.testing.assert_allclose(a.x_m, back[0], atol=1e-6)
    np.testing.assert_allclose(a.y_m, back[1], atol=1e-6)


def test_geojson_without_crs_member_is_lon_lat(base):
    """RFC 7946: GeoJSON coordinates are WGS 84 longitude, latitude unless a crs member says otherwise."""
    to_lonlat = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    xs = np.array([499980.0, 500020.0, 500020.0, 499980.0, 499980.0])
    ys = np.array([5499980.0, 5499980.0, 5500020.0, 5500020.0, 5499980.0])
    lon, lat = to_lonlat.transform(xs, ys)
    ring = ", ".join(f"[{a:.10f}, {b:.10f}]" for a, b in zip(lon, lat))
    (base / "area.geojson").write_text('{"type": "Polygon", "coordinates": [[' + ring + "]]}")
    _append(base, '[design]\nelevation_m = 292.5\narea = "area.geojson"\n')
    area = load_survey(base / "survey.toml").handoff.design_area
    # the square comes back to 40 m x 40 m in UTM within the round trip of 1e-10 degree (~1e-5 m)
    assert area.area == pytest.approx(1600.0, abs=0.01)
    np.testing.assert_allclose(area.bounds, (499980.0, 5499980.0, 500020.0, 5500020.0), atol=1e-4)


def test_area_from_a_geopackage_through_ogr(base):
    """Any OGR-readable polygon file: a GeoPackage written by the project's writer, read back through GDAL."""
    if not _has_pyogrio():  # the PyPI stack has pyogrio, the QGIS stack GDAL's own bindings
        pytest.importorskip("osgeo.ogr")
    from rockhead.core.crs import parse_crs
    from rockhead.core.formats.gdalio import write_layers
    from rockhead.core.formats.layer import Layer
    from shapely.geometry import Polygon

    poly = Polygon([(499980, 5499980), (500030, 5499980), (500030, 5500010), (499980, 5500010)])
    layer = Layer([poly], {"name": np.array(["cut"], dtype=object)}, "POLYGON", "design area")
    write_layers(base / "area.gpkg", {"area": layer}, parse_crs("EPSG:32633"))
    _append(base, '[design]\nelevation_m = 292.5\narea = "area.gpkg"\n')
    area = load_survey(base / "survey.toml").handoff.design_area
    assert area.area == pytest.approx(50.0 * 30.0)


def _has_pyogrio():
    try:
        import pyogrio  # noqa: F401
    except ImportError:
        return False
    return True


def test_compound_crs_names_the_vertical_datum(base):
    toml = base / "survey.toml"
    toml.write_text(toml.read_text().replace('crs = "EPSG:32633"', 'crs = "EPSG:32633+5703"'))
    assert load_survey(toml).handoff.vertical_datum == "NAVD88 height"


@pytest.mark.parametrize(
    "text, match",
    [
        ('vertical_crs = "EPSG:4326"', r"line 4, field 'survey\.vertical_crs': EPSG:4326 .*is not a vertical CRS"),
        ("date = 14.06", r"line 4, field 'survey\.date': value 14\.06 is not a date"),
    ],
    ids=["vertical-not-vertical", "date-not-date"],
)
def test_survey_extra_keys_checked(base, text, match):
    toml = base / "survey.toml"
    toml.write_text(toml.read_text().replace('crs = "EPSG:32633"\n', 'crs = "EPSG:32633"\n' + text + "\n"))
    with pytest.raises(SurveyConfigError, match=match):
        load_survey(toml)


def test_survey_date_and_vertical_crs_read(base):
    toml = base / "survey.toml"
    toml.write_text(
        toml.read_text().replace(
            'crs = "EPSG:32633"\n', 'crs = "EPSG:32633"\ndate = 2025-06-14\nvertical_crs = "EPSG:5703"\n'
        )
    )
    h = load_survey(toml).handoff
    assert h.survey_date == "2025-06-14" and h.vertical_datum == "NAVD88 height"


def test_alignment_error_names_file_line_field(base):
    (base / "axis.csv").write_text("x,y\n499970,5499990\n500030,abc\n")
    _append(base, '[sections]\nalignment = "axis.csv"\n')
    with pytest.raises(InputFileError, match=r"^axis\.csv, line 3, field 'y': value 'abc' is not a finite number") as e:
        load_survey(base / "survey.toml")
    assert (e.value.line, e.value.field) == (3, "y")
