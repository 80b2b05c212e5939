"""GeoPackage writer, read back with reference readers (pyogrio or GDAL's OGR, ogrinfo, GDAL's validator)."""

import math
import os
import shutil
import sqlite3
import subprocess
from pathlib import Path

import numpy as np
import pyproj
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats.gpkg import Layer, write_geopackage
from shapely import wkb as shapely_wkb
from shapely.geometry import LineString, MultiLineString, Point, Polygon

OGRINFO = shutil.which("ogrinfo")
# GDAL's own GeoPackage conformance checker (shipped with python3-gdal on Debian)
VALIDATOR = Path("/usr/lib/python3/dist-packages/osgeo_utils/samples/validate_gpkg.py")

CUSTOM_TM = (
    "+proj=tmerc +lat_0=0 +lon_0=15.5 +k=0.9999 +x_0=50000 +y_0=-4000000 "
    "+ellps=GRS80 +towgs84=0,0,0,0,0,0,0 +units=m +no_defs +type=crs"
)


def _read_layer(path, layer):
    """Read a layer with a reference reader: (list of shapely geoms or None, {field: list}, crs wkt)."""
    try:
        import pyogrio
    except ImportError:
        pyogrio = None
    if pyogrio is not None:
        meta, _, geoms, fields = pyogrio.raw.read(path, layer=layer)
        names = list(meta["fields"])
        out = {n: list(f) for n, f in zip(names, fields)}
        shapes = (
            None if geoms is None else [None if g is None else shapely_wkb.loads(bytes(g)) for g in geoms]
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
            shapes.append(None if g is None else shapely_wkb.loads(bytes(g.ExportToWkb())))
    srs = lyr.GetSpatialRef()
    return shapes, out, (srs.ExportToWkt() if srs is not None else None)


def _list_layers(path):
    try:
        import pyogrio
    except ImportError:
        from osgeo import ogr

        ds = ogr.Open(str(path))
        return [ds.GetLayer(i).GetName() for i in range(ds.GetLayerCount())]
    return [str(n) for n in pyogrio.list_layers(path)[:, 0]]


def _sample_layers():
    hole = Polygon([(0, 0), (10, 0), (10, 10), (0, 10)], [[(2, 2), (4, 2), (4, 4), (2, 4)]])
    return {
        "shots": Layer(
            [Point(512000.5, 5001000.25), Point(512010.5, 5001002.0), None],
            {
                "line": np.array(["L1", "Ligne ÉÈ", "線2"], dtype=object),
                "velocity_m_s": np.array([1650.0, np.nan, 1712.5]),
                "picks_used": np.array([24, 0, 23], dtype=np.int64),
                "accepted": np.array([True, False, True]),
                "status": np.array(["ok", None, "=SUM(A1)"], dtype=object),
            },
        ),
        "contours": Layer(
            [LineString([(0, 0), (5, 5), (10, 5)]), MultiLineString([[(0, 1), (1, 1)], [(3, 3), (4, 4)]])],
            {"elevation_m": np.array([210.0, 215.0]), "index": np.array([True, False])},
        ),
        "areas": Layer([hole], {"name": np.array(["site"])}),
        "line_misties": Layer(None, {"line_a": np.array(["L1"]), "mistie_ms": np.array([1.25])}),
    }


@pytest.fixture
def gpkg(tmp_path):
    return write_geopackage(tmp_path / "survey.gpkg", _sample_layers(), "EPSG:32633")


def test_header_pragmas(gpkg):
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


def test_layer_order_and_kinds(gpkg):
    assert _list_layers(gpkg) == ["shots", "contours", "areas", "line_misties"]


def test_values_round_trip(gpkg):
    geoms, fields, _ = _read_layer(gpkg, "shots")
    assert fields["line"] == ["L1", "Ligne ÉÈ", "線2"]
    v = fields["velocity_m_s"]
    assert v[0] == 1650.0 and v[2] == 1712.5
    assert v[1] is None or math.isnan(v[1])  # NaN was stored as NULL
    assert list(fields["picks_used"]) == [24, 0, 23]
    assert [bool(b) for b in fields["accepted"]] == [True, False, True]
    assert fields["status"][0] == "ok" and fields["status"][1] is None and fields["status"][2] == "=SUM(A1)"
    assert geoms[0].equals(Point(512000.5, 5001000.25)) and geoms[2] is None


def test_nan_is_sql_null(gpkg):
    con = sqlite3.connect(str(gpkg))
    try:
        assert con.execute("SELECT velocity_m_s IS NULL FROM shots WHERE fid = 2").fetchone()[0] == 1
        assert con.execute(
            "SELECT typeof(picks_used), typeof(accepted) FROM shots WHERE fid = 1"
        ).fetchone() == (
            "integer",
            "integer",
        )
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


def test_attribute_table_has_no_geometry(gpkg):
    geoms, fields, _ = _read_layer(gpkg, "line_misties")
    assert geoms is None
    assert fields["mistie_ms"] == [1.25]


@pytest.mark.parametrize(
    "crs_text",
    ["EPSG:32633", "EPSG:2056", "EPSG:4326", CUSTOM_TM],
    ids=["utm33", "ch1903plus", "wgs84", "custom-tm"],
)
def test_crs_round_trip(tmp_path, crs_text):
    crs = pyproj.CRS.from_user_input(crs_text)
    path = write_geopackage(tmp_path / "c.gpkg", {"p": Layer([Point(1.0, 2.0)], {})}, crs)
    _, _, wkt = _read_layer(path, "p")
    back = pyproj.CRS.from_user_input(wkt)
    assert back.equals(crs, ignore_axis_order=True)
    assert back.to_epsg() == crs.to_epsg()
    if crs.to_epsg() is None:
        con = sqlite3.connect(str(path))
        org = con.execute("SELECT organization FROM gpkg_spatial_ref_sys WHERE srs_id = 100000").fetchone()
        con.close()
        assert org == ("ROCKHEAD",)


def test_extent_and_spatial_index(gpkg):
    con = sqlite3.connect(str(gpkg))
    try:
        ext = con.execute(
            "SELECT min_x, min_y, max_x, max_y FROM gpkg_contents WHERE table_name='shots'"
        ).fetchone()
        assert ext == (512000.5, 5001000.25, 512010.5, 5001002.0)
        tree = con.execute(
            "SELECT id, minx, maxx, miny, maxy FROM rtree_contours_geom ORDER BY id"
        ).fetchall()
        assert tree == [(1, 0.0, 10.0, 0.0, 5.0), (2, 0.0, 4.0, 1.0, 4.0)]
    finally:
        con.close()


def test_spatial_filter_with_reference_reader(gpkg):
    bbox = (5.5, 4.5, 11.0, 6.0)  # touches the first contour's envelope only
    try:
        import pyogrio
    except ImportError:
        from osgeo import ogr

        ds = ogr.Open(str(gpkg))  # keep the dataset alive while its layer is used
        lyr = ds.GetLayerByName("contours")
        lyr.SetSpatialFilterRect(*bbox)
        assert [f.GetField("elevation_m") for f in lyr] == [210.0]
    else:
        df = pyogrio.read_dataframe(gpkg, layer="contours", bbox=bbox)
        assert list(df["elevation_m"]) == [210.0]


def test_repeat_write_is_byte_identical(tmp_path, monkeypatch):
    monkeypatch.delenv("SOURCE_DATE_EPOCH", raising=False)
    a = write_geopackage(tmp_path / "a.gpkg", _sample_layers(), "EPSG:32633")
    b = write_geopackage(tmp_path / "b.gpkg", _sample_layers(), "EPSG:32633")
    assert a.read_bytes() == b.read_bytes()
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764633600")  # 2025-12-02T00:00:00Z
    c = write_geopackage(tmp_path / "c.gpkg", _sample_layers(), "EPSG:32633")
    con = sqlite3.connect(str(c))
    stamp = con.execute("SELECT DISTINCT last_change FROM gpkg_contents").fetchall()
    con.close()
    assert stamp == [("2025-12-02T00:00:00.000Z",)]


def test_failed_write_keeps_earlier_file(tmp_path):
    path = write_geopackage(tmp_path / "s.gpkg", _sample_layers(), "EPSG:32633")
    before = path.read_bytes()
    bad = dict(_sample_layers())
    bad["zz"] = Layer([Point(0, 0)], {"v": np.array([1.0, 2.0])})  # wrong length, last layer
    with pytest.raises(OutputError, match=r"field 'v' of layer 'zz' has shape \(2,\), expected \(1,\)"):
        write_geopackage(path, bad, "EPSG:32633")
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.gpkg"]


@pytest.mark.parametrize(
    ("layers", "message"),
    [
        ({"bad name": Layer([Point(0, 0)], {})}, "layer name 'bad name' is not usable"),
        ({"gpkg_x": Layer([Point(0, 0)], {})}, "reserves"),
        ({"a": Layer([Point(0, 0)], {"fid": np.array([1])})}, "repeated or reserved"),
        ({"a": Layer([Point(0, 0)], {"c": np.array([1 + 2j])})}, "numpy dtype complex128"),
        (
            {"a": Layer([Point(0, 0)], {}, geometry_type="LINESTRING")},
            "declared LINESTRING but holds a Point",
        ),
        ({}, "no layers"),
    ],
    ids=["space", "reserved-prefix", "fid-field", "complex", "wrong-type", "empty"],
)
def test_bad_layers_are_refused(tmp_path, layers, message):
    with pytest.raises(OutputError, match=message):
        write_geopackage(tmp_path / "x.gpkg", layers, "EPSG:32633")
    assert not (tmp_path / "x.gpkg").exists()


@pytest.mark.skipif(OGRINFO is None, reason="ogrinfo (GDAL command line) not installed")
def test_ogrinfo_reads_it(gpkg):
    out = subprocess.run(
        [OGRINFO, "-ro", "-so", "-al", str(gpkg)], capture_output=True, text=True, check=True
    )
    assert "Layer name: shots" in out.stdout and "Feature Count: 3" in out.stdout
    assert "Geometry: Multi Line String" in out.stdout
    assert 'ID["EPSG",32633]' in out.stdout
    assert "ERROR" not in out.stderr and "Warning" not in out.stderr


@pytest.mark.skipif(
    not (VALIDATOR.exists() and Path("/usr/bin/python3").exists()), reason="GDAL validator absent"
)
def test_gdal_validator_accepts_it(tmp_path):
    layers = _sample_layers()
    path = write_geopackage(tmp_path / "v.gpkg", layers, CUSTOM_TM)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    for target in [path, tmp_path / "e.gpkg"]:
        if target.name == "e.gpkg":
            write_geopackage(target, {"shots": layers["shots"]}, "EPSG:32633", spatial_index=False)
        res = subprocess.run(
            ["/usr/bin/python3", str(VALIDATOR), "-k", "--extra", "--warning-as-error", str(target)],
            capture_output=True,
            text=True,
            env=env,
        )
        if "No module named 'osgeo'" in res.stderr:
            pytest.skip("GDAL's python bindings are not importable by /usr/bin/python3")
        assert res.returncode == 0, res.stdout + res.stderr
        assert res.stdout.strip() == "" and res.stderr.strip() == "", res.stdout + res.stderr


def test_mixed_layer_is_generic_geometry(tmp_path):
    layer = Layer([Point(1, 2), LineString([(0, 0), (3, 4)]), None], {"v": np.array([1, 2, 3])})
    path = write_geopackage(tmp_path / "m.gpkg", {"mixed": layer}, "EPSG:32633")
    con = sqlite3.connect(str(path))
    gtype = con.execute("SELECT geometry_type_name FROM gpkg_geometry_columns").fetchone()[0]
    con.close()
    assert gtype == "GEOMETRY"
    geoms, fields, _ = _read_layer(path, "mixed")
    assert geoms[0].equals(Point(1, 2)) and geoms[1].equals(LineString([(0, 0), (3, 4)])) and geoms[2] is None
    assert list(fields["v"]) == [1, 2, 3]


def test_no_crs_is_undefined_cartesian(tmp_path):
    path = write_geopackage(tmp_path / "n.gpkg", {"p": Layer([Point(1, 2)], {})}, None)
    con = sqlite3.connect(str(path))
    srs = con.execute("SELECT srs_id FROM gpkg_geometry_columns").fetchone()[0]
    con.close()
    assert srs == -1  # 12-128r18 Req 11: undefined Cartesian
    geoms, _, wkt = _read_layer(path, "p")
    assert geoms[0].equals(Point(1, 2))
    assert not wkt or wkt.startswith("LOCAL_CS")  # GDAL names srs_id -1 a local (engineering) CRS


def test_random_doubles_and_ints_round_trip_exactly(tmp_path, rng):
    n = 300
    values = rng.normal(0.0, 1.0, n) * 10.0 ** rng.integers(-300, 300, n)  # the whole double range
    ints = rng.integers(-(2**62), 2**62, n)
    xy = rng.uniform(-1e6, 1e7, (n, 2))
    layer = Layer([Point(x, y) for x, y in xy], {"v": values, "k": ints})
    path = write_geopackage(tmp_path / "r.gpkg", {"r": layer}, "EPSG:32633")
    geoms, fields, _ = _read_layer(path, "r")
    np.testing.assert_array_equal(np.asarray(fields["v"], dtype=float), values)  # REAL is an IEEE double
    np.testing.assert_array_equal(np.asarray(fields["k"], dtype=np.int64), ints)  # INTEGER is 64-bit
    np.testing.assert_array_equal(np.array([(g.x, g.y) for g in geoms]), xy)  # WKB doubles, no rounding
