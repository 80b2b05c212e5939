"""Rasters through GDAL: cloud-optimised GeoTIFFs, CRS round trips, other formats, both stacks.

Reference checks: GDAL's COG validator (``validate_cloud_optimized_geotiff``,
run by Debian's GDAL), a reference reader (rasterio on the PyPI stack, GDAL's
own bindings inside QGIS) for the file's structure, pyproj for the CRSs, and
the other Python stack for files written on this one.
"""

import json
import os

import numpy as np
import pyproj
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats import gdalio
from rockhead.core.grid import GridSpec

CUSTOM_TM_TOWGS84 = (
    "+proj=tmerc +lat_0=0 +lon_0=15.5 +k=0.9999 +x_0=50000 +y_0=-4000000 "
    "+ellps=GRS80 +towgs84=1.5,-2.25,3,0.1,0.2,0.3,1.5 +units=m +no_defs +type=crs"
)
CUSTOM_LCC = "+proj=lcc +lat_1=45 +lat_2=47 +lat_0=46 +lon_0=8 +x_0=600000 +y_0=200000 +ellps=bessel +units=m +type=crs"
# (CRS, a point inside its area of use in that CRS's x/y): ten and more, of every kind the tool meets
CRSS = [
    pytest.param("EPSG:32633", (512000.0, 5_001_000.0), id="utm33n"),
    pytest.param("EPSG:32618+5703", (585000.0, 4_510_000.0), id="utm18n+navd88-compound"),
    pytest.param("EPSG:7405", (530000.0, 180000.0), id="bng+odn-one-code-compound"),
    pytest.param("EPSG:2263", (985000.0, 200000.0), id="ny-long-island-us-survey-feet"),
    pytest.param("EPSG:2263+6360", (985000.0, 200000.0), id="us-feet-compound-navd88-ftus"),
    pytest.param(CUSTOM_TM_TOWGS84, (50000.0, 1_300_000.0), id="custom-tm-towgs84"),
    pytest.param(CUSTOM_LCC, (600000.0, 200000.0), id="custom-lcc-bessel"),
    pytest.param("EPSG:2056", (2_600_000.0, 1_200_000.0), id="swiss-lv95-oblique-mercator"),
    pytest.param("EPSG:28992", (155000.0, 463000.0), id="dutch-rd-stereographic-towgs84"),
    pytest.param("EPSG:3035", (4_321_000.0, 3_210_000.0), id="etrs-laea"),
    pytest.param("EPSG:31256", (0.0, 5_330_000.0), id="austria-gk-east"),
    pytest.param("EPSG:3995", (0.0, -2_000_000.0), id="arctic-polar-stereographic"),
    pytest.param("EPSG:4326", (15.0, 48.0), id="wgs84-geographic"),
]


def _grid(ny=37, nx=53, seed=7):
    rng = np.random.default_rng(seed)
    z = rng.normal(250.0, 5.0, size=(ny, nx)).astype(np.float32).astype(float)
    z[3, 4] = np.nan
    z[10:12, 20:30] = np.nan
    return z


def _reference(path):
    """Structure as GDAL sees it, without the project's reader: driver, geotransform, raw band,
    nodata, block size, overview count, dataset tags."""
    if gdalio.engine() == "pypi":
        import rasterio

        with rasterio.open(path) as ds:
            t = ds.transform
            return {
                "driver": ds.driver,
                "gt": (t.c, t.a, t.b, t.f, t.d, t.e),
                "band": ds.read(1),
                "nodata": ds.nodata,
                "block": ds.block_shapes[0],
                "overviews": len(ds.overviews(1)),
                "tags": ds.tags(),
                "wkt": ds.crs.to_wkt() if ds.crs else "",
            }
    from osgeo import gdal

    ds = gdal.Open(str(path))
    b = ds.GetRasterBand(1)
    out = {
        "driver": ds.GetDriver().ShortName,
        "gt": ds.GetGeoTransform(),
        "band": b.ReadAsArray(),
        "nodata": b.GetNoDataValue(),
        "block": tuple(b.GetBlockSize())[::-1],
        "overviews": b.GetOverviewCount(),
        "tags": ds.GetMetadata(),
        "wkt": ds.GetProjection(),
    }
    b = None
    ds = None
    return out


def same_crs(a, b) -> bool:
    """pyproj's equivalence, part by part for a compound CRS (its EPSG code is not stored)."""
    a, b = pyproj.CRS(a), pyproj.CRS(b)
    if a.is_compound or b.is_compound:
        return (
            a.is_compound
            and b.is_compound
            and all(x.equals(y, ignore_axis_order=True) for x, y in zip(a.sub_crs_list, b.sub_crs_list))
        )
    return a.equals(b, ignore_axis_order=True)


def test_large_grid_is_a_valid_cloud_optimised_geotiff(tmp_path, gdal_validate):
    # the case that failed before: 2,000 x 2,000 cells, strips only, no overviews
    spec = GridSpec(500_000.5, 5_001_999.5, 1.0, 2000, 2000)
    yy, xx = np.mgrid[0:2000, 0:2000]
    z = 200.0 + 0.01 * xx - 0.02 * yy
    z[:300, :300] = np.nan
    path = gdalio.write_raster(tmp_path / "big.tif", z, spec, "EPSG:32633")
    gdal_validate(path)  # GDAL's validator: tiled, overviews, layout
    ref = _reference(path)
    assert ref["block"] == (256, 256)  # COG_OPTIONS BLOCKSIZE
    # overviews halve until the image fits one 256-pixel tile: 1000, 500, 250 -> 3 levels (GDAL's COG rule)
    assert ref["overviews"] == 3
    assert ref["gt"] == spec.geotransform
    np.testing.assert_array_equal(ref["band"][:300, :300], -9999.0)


def test_values_nodata_and_grid_round_trip(tmp_path, gdal_validate):
    z = _grid()
    spec = GridSpec(512_005.0, 5_001_365.0, 10.0, 53, 37)
    path = gdalio.write_raster(tmp_path / "z.tif", z, spec, "EPSG:32633")
    gdal_validate(path)
    ref = _reference(path)
    assert ref["driver"] == "GTiff" and ref["nodata"] == -9999.0
    assert ref["gt"] == (512_000.0, 10.0, 0.0, 5_001_370.0, 0.0, -10.0)  # edges: centres -/+ half a cell
    assert ref["tags"].get("AREA_OR_POINT") == "Area"  # GeoTIFF PixelIsArea: value covers its cell
    # values were float32 already, so the float32 file holds them exactly
    np.testing.assert_array_equal(ref["band"].astype(float), np.where(np.isnan(z), -9999.0, z))
    back = gdalio.read_raster(path)
    assert back.spec == spec
    np.testing.assert_array_equal(back.values, z)  # NaN where nodata, the same cells


@pytest.mark.parametrize(("crs_text", "xy"), CRSS)
def test_crs_round_trips_exactly(tmp_path, crs_text, xy):
    crs = pyproj.CRS(crs_text)
    spec = GridSpec(xy[0] + 0.5, xy[1] - 0.5, 1.0, 4, 3)
    path = gdalio.write_raster(tmp_path / "c.tif", np.ones(spec.shape), spec, crs)
    back = gdalio.read_raster(path).crs
    assert same_crs(back, crs), back.to_wkt()
    assert same_crs(_reference(path)["wkt"], crs)  # and as a reference reader sees it
    # the datum shift (towgs84, bound CRS) is kept: the same point goes to the same WGS 84 position
    to_wgs84 = [
        pyproj.Transformer.from_crs(c, "EPSG:4979" if c.is_compound else "EPSG:4326", always_xy=True)
        for c in (crs, back)
    ]
    args = (*xy, 100.0) if crs.is_compound else xy
    a, b = (np.array(t.transform(*args)) for t in to_wgs84)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-9)  # degrees (and m): identical transformations


def test_towgs84_shift_is_in_the_file(tmp_path):
    spec = GridSpec(50_000.5, 1_300_000.5, 1.0, 4, 3)
    path = gdalio.write_raster(tmp_path / "t.tif", np.ones(spec.shape), spec, CUSTOM_TM_TOWGS84)
    back = gdalio.read_raster(path).crs
    # a datum shift is kept as a bound CRS whose transformation holds the seven parameters
    assert back.is_bound
    # PROJ 9.1 stores the scale as a ratio: 1.5 ppm comes back 1.5 - 1.2e-11 ppm (6e-11 mm at the
    # Earth's radius), hence 1e-9 on every parameter (m, arc-seconds, ppm)
    assert back.coordinate_operation.towgs84 == pytest.approx([1.5, -2.25, 3.0, 0.1, 0.2, 0.3, 1.5], abs=1e-9)


def test_metadata_caution_and_provenance(tmp_path):
    spec = GridSpec(0.5, 9.5, 1.0, 10, 10)
    md = {"CAUTION": "an interpretation", "SOFTWARE": "Rockhead 0.1.0", "SURVEY": "Site"}
    path = gdalio.write_raster(
        tmp_path / "m.tif",
        np.zeros(spec.shape),
        spec,
        "EPSG:32633",
        metadata=md,
        description="reflector depth",
        timestamp="2024-05-14T00:00:00.000Z",
        software="Rockhead 0.1.0",
        band_metadata={"QUANTITY": "depth"},
    )
    tags = _reference(path)["tags"]
    assert {k: tags[k] for k in md} == md
    # TIFF 6.0 DateTime "YYYY:MM:DD HH:MM:SS" and Software tags
    assert tags["TIFFTAG_DATETIME"] == "2024:05:14 00:00:00" and tags["TIFFTAG_SOFTWARE"] == "Rockhead 0.1.0"
    back = gdalio.read_raster(path)
    assert back.description == "reflector depth" and back.unit == "m" and back.band_metadata == {"QUANTITY": "depth"}


def test_repeat_write_is_byte_identical(tmp_path):
    spec = GridSpec(512_005.0, 5_001_365.0, 10.0, 53, 37)
    kw = dict(metadata={"CAUTION": "x"}, timestamp="2024-05-14T00:00:00.000Z", software="Rockhead 0.1.0")
    a = gdalio.write_raster(tmp_path / "a.tif", _grid(), spec, "EPSG:32633", **kw)
    b = gdalio.write_raster(tmp_path / "b.tif", _grid(), spec, "EPSG:32633", **kw)
    assert a.read_bytes() == b.read_bytes()


@pytest.mark.parametrize(
    ("name", "driver"),
    [("z.tif", "GTiff"), ("z.tiff", "GTiff"), ("z.asc", "AAIGrid"), ("z.img", "HFA")],
    ids=["tif", "tiff", "arc-ascii", "erdas-imagine"],
)
def test_driver_follows_the_extension(tmp_path, name, driver):
    spec = GridSpec(512_005.0, 5_001_365.0, 10.0, 53, 37)
    z = _grid()
    path = gdalio.write_raster(tmp_path / name, z, spec, "EPSG:32633", metadata={"CAUTION": "x"})
    ref = _reference(path)
    assert ref["driver"] == driver
    assert ref["gt"] == spec.geotransform
    # ASCII grid cells are printed as text (GDAL: shortest float32 text), the others binary float32
    np.testing.assert_allclose(ref["band"], np.where(np.isnan(z), -9999.0, z), rtol=1e-7, atol=0)
    assert pyproj.CRS(ref["wkt"]).equals("EPSG:32633", ignore_axis_order=True)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary file left


def test_unknown_extension_is_refused(tmp_path):
    spec = GridSpec(0.5, 9.5, 1.0, 10, 10)
    with pytest.raises(OutputError, match=r"no GDAL raster driver writes '\.xyz9' files.*\.tif"):
        gdalio.write_raster(tmp_path / "z.xyz9", np.zeros(spec.shape), spec, "EPSG:32633")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    ("values", "kwargs", "message"),
    [
        (np.zeros((3, 3)), {}, r"shape \(3, 3\); the grid is \(10, 10\)"),
        (np.zeros((10, 10)), {"nodata": 0.1}, "not exactly representable as float32"),
    ],
    ids=["wrong-shape", "nodata-not-float32"],
)
def test_bad_input_is_refused_and_old_file_kept(tmp_path, values, kwargs, message):
    spec = GridSpec(0.5, 9.5, 1.0, 10, 10)
    path = gdalio.write_raster(tmp_path / "keep.tif", np.ones(spec.shape), spec, "EPSG:32633")
    before = path.read_bytes()
    with pytest.raises(OutputError, match=message):
        gdalio.write_raster(path, values, spec, "EPSG:32633", **kwargs)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["keep.tif"]


def test_reader_gives_the_grid_spec_of_a_north_up_raster(tmp_path):
    spec = GridSpec(100.25, 200.75, 0.5, 7, 5)
    path = gdalio.write_raster(tmp_path / "s.tif", np.arange(35.0).reshape(5, 7), spec, None)
    back = gdalio.read_raster(path)
    assert back.spec == spec and back.crs is None
    np.testing.assert_array_equal(back.values, np.arange(35.0).reshape(5, 7))
    got_spec, values, crs = gdalio.read_grid(path)
    assert got_spec == spec and crs is None and values[0, 0] == 0.0  # row 0 is the north row


def test_grid_reader_refuses_non_square_cells(tmp_path):
    from rockhead.core.errors import GeoreferenceError

    path = tmp_path / "rect.tif"
    if gdalio.engine() == "pypi":
        import rasterio
        from rasterio.transform import Affine

        with rasterio.open(
            path,
            "w",
            driver="GTiff",
            width=4,
            height=3,
            count=1,
            dtype="float32",
            transform=Affine(2.0, 0, 0, 0, -1.0, 3.0),
        ) as ds:
            ds.write(np.zeros((3, 4), "float32"), 1)
    else:
        from osgeo import gdal

        ds = gdal.GetDriverByName("GTiff").Create(str(path), 4, 3, 1, gdal.GDT_Float32)
        ds.SetGeoTransform((0.0, 2.0, 0.0, 3.0, 0.0, -1.0))
        ds = None
    assert gdalio.read_raster(path).dx == 2.0  # read as it is ...
    with pytest.raises(GeoreferenceError, match="north-up square cells"):
        gdalio.read_grid(path)  # ... but not taken for a GridSpec


_WRITE_ON_OTHER = """
import sys, numpy as np
from rockhead.core.formats import gdalio
from rockhead.core.grid import GridSpec
rng = np.random.default_rng(11)
z = rng.normal(250.0, 5.0, (37, 53)).astype(np.float32).astype(float)
z[5:9, 2:7] = np.nan
gdalio.write_raster(sys.argv[1], z, GridSpec(512005.0, 5001365.0, 10.0, 53, 37), sys.argv[2],
                    metadata={"CAUTION": "written on the other stack"})
print(gdalio.engine())
"""

_READ_ON_OTHER = """
import sys, json, numpy as np
from rockhead.core.formats import gdalio
r = gdalio.read_raster(sys.argv[1])
v = r.values
print(json.dumps({"engine": gdalio.engine(), "spec": [r.spec.x0, r.spec.y0, r.spec.cell_size_m, r.spec.nx, r.spec.ny],
                  "nan": np.flatnonzero(np.isnan(v).ravel()).tolist(), "sum": float(np.nansum(v)),
                  "crs": r.crs.to_wkt(), "caution": r.metadata.get("CAUTION")}))
"""


@pytest.mark.parametrize("crs_text", ["EPSG:32618+5703", CUSTOM_TM_TOWGS84], ids=["compound", "towgs84"])
@pytest.mark.slow
def test_written_on_the_other_stack_read_here(tmp_path, run_on_other_stack, gdal_validate, crs_text):
    path = tmp_path / "other.tif"
    assert run_on_other_stack(_WRITE_ON_OTHER, path, crs_text).strip() == run_on_other_stack.engine
    gdal_validate(path)
    back = gdalio.read_raster(path)
    rng = np.random.default_rng(11)
    z = rng.normal(250.0, 5.0, (37, 53)).astype(np.float32).astype(float)
    z[5:9, 2:7] = np.nan
    assert back.spec == GridSpec(512005.0, 5001365.0, 10.0, 53, 37)
    np.testing.assert_array_equal(back.values, z)
    assert same_crs(back.crs, crs_text) and back.metadata["CAUTION"] == "written on the other stack"


@pytest.mark.parametrize("crs_text", ["EPSG:32618+5703", CUSTOM_TM_TOWGS84], ids=["compound", "towgs84"])
@pytest.mark.slow
def test_written_here_read_on_the_other_stack(tmp_path, run_on_other_stack, crs_text):
    z = _grid()
    spec = GridSpec(512_005.0, 5_001_365.0, 10.0, 53, 37)
    path = gdalio.write_raster(tmp_path / "here.tif", z, spec, crs_text, metadata={"CAUTION": "written here"})
    seen = json.loads(run_on_other_stack(_READ_ON_OTHER, path))
    assert seen["engine"] == run_on_other_stack.engine != gdalio.engine()
    assert seen["spec"] == [spec.x0, spec.y0, spec.cell_size_m, spec.nx, spec.ny]
    assert seen["nan"] == np.flatnonzero(np.isnan(z).ravel()).tolist()
    assert seen["sum"] == pytest.approx(float(np.nansum(z)), rel=1e-12)  # same float32 values, summed in float64
    assert same_crs(seen["crs"], crs_text) and seen["caution"] == "written here"


def test_engine_names_what_is_missing(monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_gdal(name, *args, **kwargs):
        if name.split(".")[0] in ("osgeo", "rasterio", "pyogrio"):
            raise ImportError(f"No module named '{name}'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_gdal)
    monkeypatch.setattr("importlib.import_module", lambda name, package=None: no_gdal(name))
    from rockhead.core.errors import MissingDependencyError

    wanted = r"needs the Python package 'GDAL \(osgeo\) or rasterio and pyogrio'"
    with pytest.raises(MissingDependencyError, match=wanted):
        gdalio.engine()


def test_environment_is_not_left_changed(tmp_path):
    spec = GridSpec(0.5, 9.5, 1.0, 10, 10)
    before = dict(os.environ)
    gdalio.write_raster(tmp_path / "e.tif", np.zeros(spec.shape), spec, "EPSG:32633")
    assert dict(os.environ) == before


def test_check_engine_names_what_is_missing(monkeypatch):
    """The run's early check looks the packages up (find_spec, not an import) and says what engine() would say."""
    import importlib.util
    import sys

    from rockhead.core.errors import MissingDependencyError

    gdalio.check_engine()  # this machine has one (the other tests write through it)
    real_find_spec = importlib.util.find_spec
    monkeypatch.setattr(
        importlib.util,
        "find_spec",
        lambda name, *a: None if name.split(".")[0] in ("osgeo", "rasterio", "pyogrio") else real_find_spec(name, *a),
    )
    imported = []
    real_import = importlib.import_module

    def no_gdal(name, package=None):
        imported.append(name)
        if name.split(".")[0] in ("osgeo", "rasterio", "pyogrio") and name not in sys.modules:
            raise ImportError(f"No module named '{name}'")
        return real_import(name, package)

    monkeypatch.setattr("importlib.import_module", no_gdal)
    for name in [m for m in sys.modules if m.split(".")[0] in ("osgeo", "rasterio", "pyogrio")]:
        monkeypatch.delitem(sys.modules, name)
    wanted = r"needs the Python package 'GDAL \(osgeo\) or rasterio and pyogrio'"
    with pytest.raises(MissingDependencyError, match=wanted):
        gdalio.check_engine()
