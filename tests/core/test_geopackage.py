"""GeoPackages through GDAL: read back with reference readers, GDAL's validator, both stacks.

Reference checks: GDAL's GeoPackage validator (``validate_gpkg``, Debian's
GDAL, extra checks on, warnings as errors), the standard's own tables read
with sqlite3 (OGC 12-128r18), a reference reader (pyogrio on the PyPI stack,
GDAL's OGR inside QGIS), ``ogrinfo``, pyproj for the CRSs, and the other
Python stack for files written on this one.
"""

import json
import math
import shutil
import sqlite3
import subprocess

import numpy as np
import pyproj
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats import gdalio
from rockhead.core.formats.layer import Layer
from shapely import wkb as shapely_wkb
from shapely.geometry import LineString, MultiLineString, Point, Polygon
from test_rasters import CRSS, same_crs

OGRINFO = shutil.which("ogrinfo")
STAMP = "2024-05-14T00:00:00.000Z"


def _read_layer(path, layer):
    """Read a layer with a reference reader: (list of shapely geoms or None, {field: list}, crs text)."""
    if gdalio.engine() == "pypi":
        import pyogrio

        meta, _, geoms, fields = pyogrio.raw.read(path, layer=layer)
        out = {n: list(f) for n, f in zip(meta["fields"], fields)}
        shapes = (
            None
            if meta["geometry_type"] is None
            else [None if g is None else shapely_wkb.loads(bytes(g)) for g in geoms]
        )
        return shapes, out, meta["crs"]
    from osgeo import ogr  # Debian's QGIS stack

    ds = ogr.Open(str(path))
    lyr = ds.GetLayerByName(layer)
    defn = lyr.GetLayerDefn()
    names = [defn.GetFieldDefn(i).GetName() for i in range(defn.GetFieldCount())]
    out = {n: [] for n in names}
    shapes = [] if defn.GetGeomFieldCount() else None
    for feat in lyr:
        for n in names:
            out[n].append(feat.GetField(n) if feat.IsFieldSetAndNotNull(n) else None)
        if shapes is not None:
            g = feat.GetGeometryRef()
            shapes.append(None if g is None else shapely_wkb.loads(bytes(g.ExportToIsoWkb())))
    srs = lyr.GetSpatialRef()
    return shapes, out, (srs.ExportToWkt() if srs is not None else None)


def _sample_layers():
    hole = Polygon([(0, 0), (10, 0), (10, 10), (0, 10)], [[(2, 2), (4, 2), (4, 4), (2, 4)]])
    return {
        "shots": Layer(
            [Point(512000.5, 5001000.25, 101.5), Point(512010.5, 5001002.0, 102.0), None],
            {
                "line": np.array(["L1", "Ligne ÉÈ", "線2"], dtype=object),
                "velocity_m_s": np.array([1650.0, np.nan, 1712.5]),
                "picks_used": np.array([24, 0, 23], dtype=np.int64),
                "accepted": np.array([True, False, True]),
                "status": np.array(["ok", None, "=SUM(A1)"], dtype=object),
            },
            description="per-gather fits",
        ),
        "contours": Layer(
            [LineString([(0, 0), (5, 5), (10, 5)]), MultiLineString([[(0, 1), (1, 1)], [(3, 3), (4, 4)]])],
            {"elevation_m": np.array([210.0, 215.0]), "index": np.array([True, False])},
        ),
        "areas": Layer([hole], {"name": np.array(["site"])}),
        "line_misties": Layer(None, {"line_a": np.array(["L1"]), "mistie_ms": np.array([1.25])}),
    }


def _write(path, layers=None, crs="EPSG:32633", **kwargs):
    kwargs.setdefault("timestamp", STAMP)
    return gdalio.write_layers(path, layers or _sample_layers(), crs, **kwargs)


@pytest.fixture
def gpkg(tmp_path):
    return _write(
        tmp_path / "survey.gpkg",
        dataset_metadata={"CAUTION": "an interpretation"},
        layer_metadata={"shots": {"SOFTWARE": "Rockhead test"}},
    )


def test_gdal_validator_accepts_it(gpkg, gdal_validate):
    gdal_validate(gpkg)


def test_header_and_srs_rows(gpkg):
    # OGC 12-128r18 Req 2: application_id 'GPKG', user_version 10300 for 1.3
    con = sqlite3.connect(str(gpkg))
    try:
        assert con.execute("PRAGMA application_id").fetchone()[0] == 0x47504B47
        assert con.execute("PRAGMA user_version").fetchone()[0] == 10300
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = con.execute("SELECT srs_id, organization FROM gpkg_spatial_ref_sys ORDER BY srs_id").fetchall()
        # mandatory rows -1, 0, 4326 (Req 11) plus the survey CRS
        assert rows == [(-1, "NONE"), (0, "NONE"), (4326, "EPSG"), (32633, "EPSG")]
    finally:
        con.close()


def test_layer_order(gpkg):
    assert gdalio.list_layers(gpkg) == ["shots", "contours", "areas", "line_misties"]


def test_values_round_trip(gpkg):
    geoms, fields, _ = _read_layer(gpkg, "shots")
    assert list(fields["line"]) == ["L1", "Ligne ÉÈ", "線2"]
    v = fields["velocity_m_s"]
    assert v[0] == 1650.0 and v[2] == 1712.5
    assert v[1] is None or math.isnan(v[1])  # NaN was stored as NULL
    assert list(fields["picks_used"]) == [24, 0, 23]
    assert [bool(b) for b in fields["accepted"]] == [True, False, True]
    assert fields["status"][0] == "ok" and fields["status"][1] is None and fields["status"][2] == "=SUM(A1)"
    assert geoms[0].equals(Point(512000.5, 5001000.25)) and geoms[0].z == 101.5 and geoms[2] is None


def test_sql_types_and_null(gpkg):
    con = sqlite3.connect(str(gpkg))
    try:
        assert con.execute("SELECT velocity_m_s IS NULL FROM shots WHERE fid = 2").fetchone()[0] == 1
        assert con.execute("SELECT typeof(picks_used), typeof(accepted) FROM shots WHERE fid = 1").fetchone() == (
            "integer",
            "integer",
        )
        # 12-128r18 Table 6 column types, and z = 1 (mandatory) for the 3D point layer
        decl = {r[1]: r[2] for r in con.execute("PRAGMA table_info(shots)")}
        assert decl == {
            "fid": "INTEGER",
            "geom": "POINT",
            "line": "TEXT",
            "velocity_m_s": "REAL",
            "picks_used": "INTEGER",
            "accepted": "BOOLEAN",
            "status": "TEXT",
        }
        cols = dict(con.execute("SELECT table_name, z FROM gpkg_geometry_columns").fetchall())
        assert cols == {"shots": 1, "contours": 0, "areas": 0}
    finally:
        con.close()


def test_geometries_round_trip(gpkg):
    geoms, fields, _ = _read_layer(gpkg, "contours")
    # a layer mixing single and multi lines is declared MULTILINESTRING and singles promoted
    assert geoms[0].geom_type == "MultiLineString"
    assert geoms[0].equals(LineString([(0, 0), (5, 5), (10, 5)]))
    assert geoms[1].equals(MultiLineString([[(0, 1), (1, 1)], [(3, 3), (4, 4)]]))
    assert [bool(b) for b in fields["index"]] == [True, False]
    polys, _, _ = _read_layer(gpkg, "areas")
    assert len(polys[0].interiors) == 1 and polys[0].area == pytest.approx(96.0)


def test_3d_lines_keep_every_z(tmp_path, gdal_validate):
    line = LineString([(0, 0, 210.0), (5, 5, 209.5), (10, 5, 208.25)])
    path = _write(tmp_path / "z.gpkg", {"contours": Layer([line], {"elevation_m": np.array([210.0])})})
    gdal_validate(path)
    geoms, _, _ = _read_layer(path, "contours")
    assert geoms[0].has_z and list(geoms[0].coords) == list(line.coords)


def test_attribute_table_has_no_geometry(gpkg):
    geoms, fields, _ = _read_layer(gpkg, "line_misties")
    assert geoms is None
    assert list(fields["mistie_ms"]) == [1.25]


@pytest.mark.parametrize(("crs_text", "xy"), CRSS)
def test_crs_round_trips_exactly(tmp_path, crs_text, xy):
    crs = pyproj.CRS.from_user_input(crs_text)
    path = _write(tmp_path / "c.gpkg", {"p": Layer([Point(*xy, 10.0)], {})}, crs)
    _, _, wkt = _read_layer(path, "p")
    assert same_crs(wkt, crs)
    layer, back = gdalio.read_layer(path, "p")
    assert same_crs(back, crs)
    assert layer.geometries[0].coords[0] == (*xy, 10.0)


def test_extent_and_spatial_index(gpkg):
    con = sqlite3.connect(str(gpkg))
    try:
        ext = con.execute("SELECT min_x, min_y, max_x, max_y FROM gpkg_contents WHERE table_name='shots'").fetchone()
        assert ext == (512000.5, 5001000.25, 512010.5, 5001002.0)
        tree = con.execute("SELECT id, minx, maxx, miny, maxy FROM rtree_contours_geom ORDER BY id").fetchall()
        assert tree == [(1, 0.0, 10.0, 0.0, 5.0), (2, 0.0, 4.0, 1.0, 4.0)]
    finally:
        con.close()


def test_timestamps_are_the_given_one(gpkg):
    # never the clock: gpkg_contents.last_change and the metadata references carry the given time
    con = sqlite3.connect(str(gpkg))
    try:
        assert con.execute("SELECT DISTINCT last_change FROM gpkg_contents").fetchall() == [(STAMP,)]
        assert con.execute("SELECT DISTINCT timestamp FROM gpkg_metadata_reference").fetchall() == [(STAMP,)]
    finally:
        con.close()


def test_metadata_in_the_standard_tables(gpkg):
    assert gdalio.vector_metadata(gpkg)["CAUTION"] == "an interpretation"
    assert gdalio.vector_metadata(gpkg, "shots")["SOFTWARE"] == "Rockhead test"
    con = sqlite3.connect(str(gpkg))
    try:
        # 12-128r18 F.8: a dataset record referenced by the whole file and one by the table 'shots'
        refs = con.execute(
            "SELECT reference_scope, table_name, m.metadata FROM gpkg_metadata_reference r "
            "JOIN gpkg_metadata m ON m.id = r.md_file_id ORDER BY r.md_file_id"
        ).fetchall()
    finally:
        con.close()
    assert ("geopackage", None) == refs[0][:2] and "an interpretation" in refs[0][2]
    assert ("table", "shots") == refs[1][:2] and "Rockhead test" in refs[1][2]


def test_repeat_write_is_byte_identical(tmp_path):
    a = _write(tmp_path / "a.gpkg", dataset_metadata={"CAUTION": "x"})
    b = _write(tmp_path / "b.gpkg", dataset_metadata={"CAUTION": "x"})
    assert a.read_bytes() == b.read_bytes()


def test_failed_write_keeps_earlier_file(tmp_path):
    path = _write(tmp_path / "s.gpkg")
    before = path.read_bytes()
    bad = dict(_sample_layers())
    bad["zz"] = Layer([Point(0, 0)], {"v": np.array([1.0, 2.0])})  # wrong length, last layer
    with pytest.raises(OutputError, match=r"field 'v' of layer 'zz' has shape \(2,\), expected \(1,\)"):
        _write(path, bad)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.gpkg"]


@pytest.mark.parametrize(
    ("layers", "message"),
    [
        ({"bad name": Layer([Point(0, 0)], {})}, "layer name 'bad name' is not usable"),
        ({"gpkg_x": Layer([Point(0, 0)], {})}, "reserves"),
        ({"a": Layer([Point(0, 0)], {"fid": np.array([1])})}, "repeated or reserved"),
        ({"a": Layer([Point(0, 0)], {"c": np.array([1 + 2j])})}, "numpy dtype complex128"),
        ({"a": Layer([Point(0, 0)], {}, geometry_type="LINESTRING")}, "declared LINESTRING but holds a Point"),
        ({"a": Layer([Point(0, 0), Point(1, 1, 1)], {})}, "mixes 2D and 3D"),
        ({}, "no layers"),
    ],
    ids=["space", "reserved-prefix", "fid-field", "complex", "wrong-type", "mixed-dimensions", "empty"],
)
def test_bad_layers_are_refused(tmp_path, layers, message):
    with pytest.raises(OutputError, match=message):
        gdalio.write_layers(tmp_path / "x.gpkg", layers, "EPSG:32633")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.skipif(OGRINFO is None, reason="ogrinfo (GDAL command line) not installed")
def test_ogrinfo_reads_it(gpkg):
    out = subprocess.run([OGRINFO, "-ro", "-so", "-al", str(gpkg)], capture_output=True, text=True, check=True)
    assert "Layer name: shots" in out.stdout and "Feature Count: 3" in out.stdout
    assert "Geometry: 3D Point" in out.stdout and "Geometry: Multi Line String" in out.stdout
    assert 'ID["EPSG",32633]' in out.stdout
    assert "ERROR" not in out.stderr and "Warning" not in out.stderr


def test_mixed_layer_is_generic_geometry(tmp_path):
    layer = Layer([Point(1, 2), LineString([(0, 0), (3, 4)]), None], {"v": np.array([1, 2, 3])})
    path = _write(tmp_path / "m.gpkg", {"mixed": layer})
    con = sqlite3.connect(str(path))
    gtype = con.execute("SELECT geometry_type_name FROM gpkg_geometry_columns").fetchone()[0]
    con.close()
    assert gtype == "GEOMETRY"
    geoms, fields, _ = _read_layer(path, "mixed")
    assert geoms[0].equals(Point(1, 2)) and geoms[1].equals(LineString([(0, 0), (3, 4)])) and geoms[2] is None
    assert list(fields["v"]) == [1, 2, 3]


def test_geometries_need_a_crs(tmp_path):
    with pytest.raises(OutputError, match=r"no CRS for the geometries of 'n\.gpkg'"):
        _write(tmp_path / "n.gpkg", {"p": Layer([Point(1, 2)], {})}, None)
    path = _write(tmp_path / "a.gpkg", {"t": Layer(None, {"k": np.array(["v"])})}, None)  # a table needs none
    assert list(gdalio.read_layer(path, "t")[0].fields["k"]) == ["v"]


def test_random_doubles_and_ints_round_trip_exactly(tmp_path, rng):
    n = 300
    values = rng.normal(0.0, 1.0, n) * 10.0 ** rng.integers(-300, 300, n)  # the whole double range
    ints = rng.integers(-(2**62), 2**62, n)
    xyz = rng.uniform(-1e6, 1e7, (n, 3))
    layer = Layer([Point(*p) for p in xyz], {"v": values, "k": ints})
    path = _write(tmp_path / "r.gpkg", {"r": layer})
    geoms, fields, _ = _read_layer(path, "r")
    np.testing.assert_array_equal(np.asarray(fields["v"], dtype=float), values)  # REAL is an IEEE double
    np.testing.assert_array_equal(np.asarray(fields["k"], dtype=np.int64), ints)  # INTEGER is 64-bit
    np.testing.assert_array_equal(np.array([g.coords[0] for g in geoms]), xyz)  # WKB doubles, no rounding


def test_date_time_column(tmp_path, gdal_validate):
    t = np.array(["2024-05-14T08:30:00", "NaT"], dtype="datetime64[ms]")
    path = _write(tmp_path / "t.gpkg", {"log": Layer(None, {"when": t, "n": np.array([1, 2])})})
    gdal_validate(path)  # DATETIME text with the 'Z' of UTC (12-128r18 Table 6)
    layer, _ = gdalio.read_layer(path, "log")
    np.testing.assert_array_equal(layer.fields["when"], t)


_WRITE_ON_OTHER = """
import sys, numpy as np
from shapely.geometry import Point, LineString
from rockhead.core.formats import gdalio
from rockhead.core.formats.layer import Layer
layers = {
    "pts": Layer([Point(585000.25, 4510000.5, 12.75), None],
                 {"v": np.array([1.5, np.nan]), "s": np.array(["é", None], dtype=object),
                  "b": np.array([True, False])}),
    "lines": Layer([LineString([(585000, 4510000, 10.0), (585010, 4510005, 11.5)])], {"k": np.array(["x"])}),
    "info": Layer(None, {"key": np.array(["caution"]), "value": np.array(["an interpretation"])}),
}
gdalio.write_layers(sys.argv[1], layers, sys.argv[2], dataset_metadata={"CAUTION": "other stack"},
                    timestamp="2024-05-14T00:00:00.000Z")
print(gdalio.engine())
"""

_READ_ON_OTHER = """
import sys, json
from rockhead.core.formats import gdalio
out = {"engine": gdalio.engine(), "layers": gdalio.list_layers(sys.argv[1]),
       "caution": gdalio.vector_metadata(sys.argv[1]).get("CAUTION")}
for name in out["layers"]:
    layer, crs = gdalio.read_layer(sys.argv[1], name)
    out[name] = {"wkt": None if layer.geometries is None else [None if g is None else g.wkt for g in layer.geometries],
                 "fields": {k: [None if v != v else v for v in (x.tolist() if hasattr(x, "tolist") else x)]
                            for k, x in layer.fields.items()},
                 "crs": None if crs is None else crs.to_wkt()}
print(json.dumps(out))
"""


@pytest.mark.slow
def test_written_on_the_other_stack_read_here(tmp_path, run_on_other_stack, gdal_validate):
    path = tmp_path / "other.gpkg"
    assert run_on_other_stack(_WRITE_ON_OTHER, path, "EPSG:32618+5703").strip() == run_on_other_stack.engine
    gdal_validate(path)
    assert gdalio.list_layers(path) == ["pts", "lines", "info"]
    assert gdalio.vector_metadata(path)["CAUTION"] == "other stack"
    pts, crs = gdalio.read_layer(path, "pts")
    assert same_crs(crs, "EPSG:32618+5703")
    assert pts.geometries[0].coords[0] == (585000.25, 4510000.5, 12.75) and pts.geometries[1] is None
    assert pts.fields["v"][0] == 1.5 and np.isnan(pts.fields["v"][1])
    assert list(pts.fields["s"]) == ["é", None] and list(pts.fields["b"]) == [True, False]
    lines, _ = gdalio.read_layer(path, "lines")
    assert list(lines.geometries[0].coords) == [(585000, 4510000, 10.0), (585010, 4510005, 11.5)]
    info, _ = gdalio.read_layer(path, "info")
    assert info.geometries is None and list(info.fields["value"]) == ["an interpretation"]


@pytest.mark.slow
def test_written_here_read_on_the_other_stack(gpkg, run_on_other_stack):
    seen = json.loads(run_on_other_stack(_READ_ON_OTHER, gpkg))
    assert seen["engine"] == run_on_other_stack.engine != gdalio.engine()
    assert seen["layers"] == ["shots", "contours", "areas", "line_misties"]
    assert seen["caution"] == "an interpretation"
    shots = seen["shots"]
    assert shots["wkt"][0] == "POINT Z (512000.5 5001000.25 101.5)" and shots["wkt"][2] is None
    assert shots["fields"]["line"] == ["L1", "Ligne ÉÈ", "線2"] and shots["fields"]["velocity_m_s"][1] is None
    assert same_crs(shots["crs"], "EPSG:32633")
    assert seen["line_misties"]["wkt"] is None and seen["line_misties"]["fields"]["mistie_ms"] == [1.25]


@pytest.mark.slow  # 1-2 s: in the full tier, not the quick one
def test_a_writing_process_imports_pyogrio_without_dataframes(tmp_path):
    """The command line's writing worker hides pandas and geopandas from pyogrio: the same GeoPackage, byte for byte."""
    import os
    import sys
    from pathlib import Path

    import rockhead

    if gdalio.engine() != "pypi":
        pytest.skip("GDAL's own bindings here: pyogrio is not what writes")
    script = (
        "import sys\n"
        "sys.path.insert(0, sys.argv[2])\n"
        "from rockhead.core.formats import gdal_pypi\n"
        "gdal_pypi.import_for_writing()\n"
        "hidden = [m for m in ('pandas', 'geopandas') if m in sys.modules]\n"
        "assert 'pyogrio' in sys.modules and 'rasterio' in sys.modules and not hidden, hidden\n"
        "from test_geopackage import _write\n"
        "_write(sys.argv[1])\n"
        "import pandas\n"  # importable again once pyogrio is in
    )
    env = dict(os.environ, PYTHONPATH=str(Path(rockhead.__path__[0]).parent))
    here = Path(__file__).resolve().parent
    lean = tmp_path / "lean.gpkg"
    proc = subprocess.run([sys.executable, "-c", script, str(lean), str(here)], capture_output=True, text=True, env=env)
    assert proc.returncode == 0, proc.stderr
    assert lean.read_bytes() == _write(tmp_path / "full.gpkg").read_bytes()
