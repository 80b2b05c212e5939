"""GeoTIFF writer and reader, checked against GDAL (osgeo or rasterio) and gdalinfo."""

import json
import shutil
import subprocess

import numpy as np
import pyproj
import pytest
from rockhead.core.errors import GeoreferenceError, MissingDependencyError, OutputError
from rockhead.core.formats.geotiff import read_geotiff, read_raster, write_geotiff, write_geotiff_grid

GDALINFO = shutil.which("gdalinfo")
CUSTOM_TM = (
    "+proj=tmerc +lat_0=0 +lon_0=15.5 +k=0.9999 +x_0=50000 +y_0=-4000000 "
    "+ellps=GRS80 +towgs84=0,0,0,0,0,0,0 +units=m +no_defs +type=crs"
)
CUSTOM_LCC = (
    "+proj=lcc +lat_1=45 +lat_2=47 +lat_0=46 +lon_0=8 +x_0=600000 +y_0=200000 "
    "+ellps=bessel +units=m +type=crs"
)


def _have(module):
    try:
        __import__(module)
    except ImportError:
        return False
    return True


ENGINES = [e for e, m in (("gdal", "osgeo.gdal"), ("rasterio", "rasterio")) if _have(m)]


def _ref_read(path):
    """Read with GDAL (rasterio or osgeo): geotransform, raw band 1, nodata, CRS WKT, metadata."""
    if _have("rasterio"):
        import rasterio

        with rasterio.open(path) as ds:
            t = ds.transform
            return (t.c, t.a, t.b, t.f, t.d, t.e), ds.read(1), ds.nodata, ds.crs.to_wkt(), ds.tags()
    from osgeo import gdal

    ds = gdal.Open(str(path))
    band = ds.GetRasterBand(1)
    return (
        ds.GetGeoTransform(),
        band.ReadAsArray(),
        band.GetNoDataValue(),
        ds.GetProjection(),
        ds.GetMetadata(),
    )


def _ref_write(path, array, gt, crs, nodata=None, **options):
    """Write a GeoTIFF with GDAL (rasterio or osgeo); options are GDAL creation options."""
    dtype = array.dtype.name
    if _have("rasterio"):
        import rasterio
        from rasterio.transform import Affine

        profile = dict(
            driver="GTiff",
            width=array.shape[1],
            height=array.shape[0],
            count=1,
            dtype=dtype,
            crs=pyproj.CRS(crs).to_wkt(),
            transform=Affine(gt[1], gt[2], gt[0], gt[4], gt[5], gt[3]),
            nodata=nodata,
        )
        profile.update({k.lower(): v for k, v in options.items()})
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(array, 1)
        return
    from osgeo import gdal, gdal_array

    gdal.UseExceptions()
    drv = gdal.GetDriverByName("GTiff")
    ds = drv.Create(
        str(path),
        array.shape[1],
        array.shape[0],
        1,
        gdal_array.NumericTypeCodeToGDALTypeCode(array.dtype),
        [f"{k}={v}" for k, v in options.items() if k != "AREA_OR_POINT"],
    )
    if "AREA_OR_POINT" in options:
        ds.SetMetadataItem("AREA_OR_POINT", options["AREA_OR_POINT"])
    ds.SetGeoTransform(gt)
    ds.SetProjection(pyproj.CRS(crs).to_wkt("WKT1_GDAL"))
    band = ds.GetRasterBand(1)
    if nodata is not None:
        band.SetNoDataValue(nodata)
    band.WriteArray(array)
    ds = None


@pytest.fixture
def grid():
    rng = np.random.default_rng(7)
    z = rng.normal(250.0, 5.0, size=(37, 53)).astype(np.float32).astype(float)
    z[3, 4] = np.nan
    z[10:12, 20:30] = np.nan
    return z


@pytest.mark.parametrize("compress", ["deflate", "none"], ids=["deflate", "raw"])
def test_reference_reader_round_trip(tmp_path, grid, compress):
    path = write_geotiff(tmp_path / "z.tif", grid, 512000.0, 5001370.0, 10.0, "EPSG:32633", compress=compress)
    gt, raw, nodata, wkt, tags = _ref_read(path)
    assert gt == (512000.0, 10.0, 0.0, 5001370.0, 0.0, -10.0)
    assert nodata == -9999.0
    assert tags.get("AREA_OR_POINT") == "Area"  # GTRasterTypeGeoKey = PixelIsArea
    assert pyproj.CRS(wkt).to_epsg() == 32633
    expected = np.where(np.isnan(grid), -9999.0, grid)
    # values were float32 already, so the float32 file holds them exactly
    np.testing.assert_array_equal(raw.astype(float), expected)


def test_pixel_centres_with_reference_reader(tmp_path, grid):
    path = write_geotiff(tmp_path / "z.tif", grid, 512000.0, 5001370.0, (10.0, 5.0), "EPSG:32633")
    if _have("rasterio"):
        import rasterio

        with rasterio.open(path) as ds:  # rasterio's xy() gives cell centres
            nw, se = ds.xy(0, 0), ds.xy(36, 52)
    else:  # GDAL's documented affine: X = GT0 + (col + 0.5) GT1, Y = GT3 + (row + 0.5) GT5
        gt = _ref_read(path)[0]
        nw = (gt[0] + 0.5 * gt[1], gt[3] + 0.5 * gt[5])
        se = (gt[0] + 52.5 * gt[1], gt[3] + 36.5 * gt[5])
    assert nw == (512005.0, 5001367.5)  # centre of the NW cell
    assert se == (512000.0 + 52.5 * 10.0, 5001370.0 - 36.5 * 5.0)
    ours = read_geotiff(path)
    assert (ours.x_centres[0], ours.y_centres[0]) == nw
    assert (ours.x_centres[-1], ours.y_centres[-1]) == se


def test_grid_from_centres_ascending_y(tmp_path):
    x = 1000.0 + 2.0 * np.arange(6)
    y = 2000.0 + 2.0 * np.arange(4)  # south to north
    z = x[None, :] * 10.0 + y[:, None]  # value encodes its own coordinates
    path = write_geotiff_grid(tmp_path / "g.tif", x, y, z, "EPSG:32633")
    gt, raw, *_ = _ref_read(path)
    assert gt == (999.0, 2.0, 0.0, 2007.0, 0.0, -2.0)
    # row 0 of the file is the north row
    for i in range(4):
        for j in range(6):
            xc = gt[0] + (j + 0.5) * gt[1]
            yc = gt[3] + (i + 0.5) * gt[5]
            assert raw[i, j] == pytest.approx(xc * 10.0 + yc, abs=1e-3)  # float32 of ~12000: 1e-3 spacing


@pytest.mark.parametrize("crs_text", [CUSTOM_TM, CUSTOM_LCC], ids=["tmerc", "lcc"])
def test_user_defined_crs_is_read_by_gdal(tmp_path, grid, crs_text):
    crs = pyproj.CRS(crs_text)
    path = write_geotiff(tmp_path / "z.tif", grid, 60000.0, 1000.0, 10.0, crs)
    _, _, _, wkt, _ = _ref_read(path)
    back = pyproj.CRS(wkt)
    assert back.is_projected
    # The ESRI WKT keeps projection and ellipsoid (not the datum name): compare the map projection
    # of a few geographic points through each CRS's own geodetic base; 1 micrometre = float noise.
    lon = np.array([15.0, 15.5, 16.2, 8.0])
    lat = np.array([45.5, 46.0, 46.7, 46.0])
    xa, ya = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True).transform(lon, lat)
    xb, yb = pyproj.Transformer.from_crs(back.geodetic_crs, back, always_xy=True).transform(lon, lat)
    np.testing.assert_allclose(xb, xa, atol=1e-6)
    np.testing.assert_allclose(yb, ya, atol=1e-6)
    ours = read_geotiff(path).crs
    xc, yc = pyproj.Transformer.from_crs(ours.geodetic_crs, ours, always_xy=True).transform(lon, lat)
    np.testing.assert_allclose(xc, xa, atol=1e-6)
    np.testing.assert_allclose(yc, ya, atol=1e-6)


def test_own_reader_round_trip(tmp_path, grid):
    path = write_geotiff(tmp_path / "z.tif", grid, 512000.0, 5001370.0, 10.0, "EPSG:32633")
    r = read_geotiff(path)
    assert r.geotransform == (512000.0, 10.0, 0.0, 5001370.0, 0.0, -10.0)
    assert r.nodata == -9999.0 and r.crs == pyproj.CRS("EPSG:32633")
    np.testing.assert_array_equal(
        r.values, grid
    )  # NaN in the same places (assert_array_equal treats NaN == NaN)


@pytest.mark.skipif(not ENGINES, reason="neither GDAL's python bindings nor rasterio installed")
@pytest.mark.parametrize(
    ("dtype", "options"),
    [
        (
            "int16",
            {"TILED": "YES", "BLOCKXSIZE": 16, "BLOCKYSIZE": 16, "COMPRESS": "DEFLATE", "PREDICTOR": 2},
        ),
        ("float32", {"COMPRESS": "DEFLATE"}),
        ("float64", {}),
        ("uint8", {"TILED": "YES", "BLOCKXSIZE": 32, "BLOCKYSIZE": 16}),
    ],
    ids=["int16-tiled-deflate-pred2", "float32-deflate", "float64-raw", "uint8-tiled"],
)
def test_own_reader_on_gdal_files(tmp_path, dtype, options):
    rng = np.random.default_rng(3)
    arr = rng.integers(0, 120, size=(37, 41)).astype(dtype)
    gt = (300000.0, 2.0, 0.0, 6000074.0, 0.0, -2.0)
    path = tmp_path / "dem.tif"
    _ref_write(path, arr, gt, "EPSG:25832", nodata=0, **options)
    r = read_geotiff(path)
    assert r.geotransform == gt
    assert r.crs.to_epsg() == 25832
    np.testing.assert_array_equal(r.values, np.where(arr == 0, np.nan, arr.astype(float)))


@pytest.mark.skipif(not ENGINES, reason="neither GDAL's python bindings nor rasterio installed")
def test_own_reader_pixel_is_point(tmp_path):
    arr = np.arange(12, dtype=np.float32).reshape(3, 4)
    gt = (1000.0, 5.0, 0.0, 2000.0, 0.0, -5.0)
    path = tmp_path / "p.tif"
    _ref_write(path, arr, gt, "EPSG:32633", AREA_OR_POINT="Point")
    ref_gt = _ref_read(path)[0]
    assert read_geotiff(path).geotransform == pytest.approx(ref_gt)  # GDAL's reading of PixelIsPoint


@pytest.mark.skipif(not ENGINES, reason="neither GDAL's python bindings nor rasterio installed")
def test_own_reader_refuses_lzw(tmp_path):
    path = tmp_path / "lzw.tif"
    _ref_write(
        path, np.ones((4, 4), dtype=np.float32), (0.0, 1.0, 0.0, 4.0, 0.0, -1.0), "EPSG:32633", COMPRESS="LZW"
    )
    with pytest.raises(MissingDependencyError, match=r"compression 5.*GDAL \(osgeo\) or rasterio"):
        read_geotiff(path)


@pytest.mark.parametrize("engine", ["builtin", *ENGINES])
def test_read_raster_engines_agree(tmp_path, grid, engine):
    path = write_geotiff(tmp_path / "z.tif", grid, 512000.0, 5001370.0, 10.0, "EPSG:32633")
    r = read_raster(path, engine=engine)
    assert r.geotransform == (512000.0, 10.0, 0.0, 5001370.0, 0.0, -10.0)
    assert r.crs.to_epsg() == 32633 and r.nodata == -9999.0
    np.testing.assert_array_equal(r.values, grid)


def test_read_raster_builtin_needs_gdal_for_other_formats(tmp_path):
    asc = tmp_path / "dem.asc"
    asc.write_text("ncols 2\nnrows 2\nxllcorner 0\nyllcorner 0\ncellsize 1\n1 2\n3 4\n")
    with pytest.raises(MissingDependencyError, match=r"GDAL \(osgeo\) or rasterio"):
        read_raster(asc, engine="builtin")


def test_repeat_write_is_byte_identical(tmp_path, grid):
    a = write_geotiff(tmp_path / "a.tif", grid, 0.0, 370.0, 10.0, "EPSG:32633")
    b = write_geotiff(tmp_path / "b.tif", grid, 0.0, 370.0, 10.0, "EPSG:32633")
    assert a.read_bytes() == b.read_bytes()


@pytest.mark.skipif(GDALINFO is None, reason="gdalinfo (GDAL command line) not installed")
def test_gdalinfo_reads_it(tmp_path, grid):
    path = write_geotiff(tmp_path / "z.tif", grid, 512000.0, 5001370.0, 10.0, "EPSG:32633")
    res = subprocess.run([GDALINFO, "-json", "-stats", str(path)], capture_output=True, text=True, check=True)
    info = json.loads(res.stdout)
    assert info["geoTransform"] == [512000.0, 10.0, 0.0, 5001370.0, 0.0, -10.0]
    assert info["size"] == [53, 37]
    band = info["bands"][0]
    assert band["type"] == "Float32" and band["noDataValue"] == -9999.0
    assert band["minimum"] == pytest.approx(np.nanmin(grid)) and band["maximum"] == pytest.approx(
        np.nanmax(grid)
    )
    assert 'ID["EPSG",32633]' in info["coordinateSystem"]["wkt"]
    assert "Warning" not in res.stderr and "ERROR" not in res.stderr


@pytest.mark.parametrize(
    ("args", "exc", "message"),
    [
        ((np.zeros(5), 0.0, 0.0, 1.0, "EPSG:32633"), OutputError, "2-D array"),
        ((np.zeros((2, 2)), 0.0, 0.0, 0.0, "EPSG:32633"), OutputError, "cell size must be positive"),
        ((np.zeros((2, 2)), 0.0, 0.0, 1.0, "EPSG:999999"), GeoreferenceError, "unknown CRS .EPSG:999999."),
        ((np.zeros((2, 2)), np.nan, 0.0, 1.0, "EPSG:32633"), OutputError, "not finite"),
    ],
    ids=["1d", "zero-cell", "bad-crs", "nan-origin"],
)
def test_bad_input_is_refused_and_old_file_kept(tmp_path, args, exc, message):
    target = tmp_path / "z.tif"
    target.write_bytes(b"earlier output")
    with pytest.raises(exc, match=message):
        write_geotiff(target, *args)
    assert target.read_bytes() == b"earlier output"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["z.tif"]


def test_nodata_must_fit_float32(tmp_path):
    with pytest.raises(OutputError, match="not exactly representable as float32"):
        write_geotiff(tmp_path / "z.tif", np.zeros((2, 2)), 0.0, 2.0, 1.0, "EPSG:32633", nodata=0.1)


def test_no_crs(tmp_path, grid):
    path = write_geotiff(tmp_path / "n.tif", grid, 0.0, 370.0, 10.0, None)
    gt, _, _, wkt, tags = _ref_read(path)
    assert gt == (0.0, 10.0, 0.0, 370.0, 0.0, -10.0) and tags.get("AREA_OR_POINT") == "Area"
    # GDAL turns a key directory without a model type into an unnamed local CRS
    assert not wkt or wkt.startswith("LOCAL_CS")
    assert read_geotiff(path).crs is None
