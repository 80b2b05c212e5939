"""Tests for core.crs against EPSG definitions, pyproj's own database and pyproj.Geod."""

import math

import numpy as np
import pyproj
import pytest
from pyproj.aoi import AreaOfInterest
from pyproj.database import query_utm_crs_info
from rockhead.core import crs as C  # noqa: N812
from rockhead.core.errors import GeoreferenceError

GEOD = pyproj.Geod(ellps="WGS84")


# ----------------------------------------------------------------- parse_crs


def _utm33_point(crs):
    return pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(15.3, 48.2)


@pytest.mark.parametrize(
    "value",
    [
        "EPSG:32633",
        " epsg:32633 ",
        32633,
        pyproj.CRS.from_epsg(32633).to_wkt(),
        "+proj=utm +zone=33 +datum=WGS84 +units=m +no_defs +type=crs",
        pyproj.CRS.from_epsg(32633),
    ],
    ids=["auth_string", "lower_spaces", "int", "wkt", "proj_string", "crs_object"],
)
def test_parse_crs_forms_are_the_same_crs(value):
    crs = C.parse_crs(value)
    assert isinstance(crs, pyproj.CRS)
    # the same projection: a point lands on the same grid coordinates (to 1 mm)
    x, y = _utm33_point(crs)
    x0, y0 = _utm33_point(pyproj.CRS.from_epsg(32633))
    assert abs(x - x0) < 1e-3 and abs(y - y0) < 1e-3


@pytest.mark.parametrize(
    "value, match",
    [
        ("EPSG:999999", r"unknown CRS 'EPSG:999999'"),
        ("not a crs", r"unknown CRS 'not a crs'"),
        (999999, r"unknown CRS 999999"),
        ("", r"CRS is empty"),
        (0, r"not an EPSG code"),
        (-4326, r"not an EPSG code"),
        (10**400, r"not an EPSG code"),
        (True, r"CRS True is a bool"),
        (3.5, r"CRS 3\.5 is a float"),
        (None, r"CRS None is a NoneType"),
        ([4326], r"is a list"),
    ],
    ids=[
        "unknown_code",
        "text",
        "unknown_int",
        "empty",
        "zero",
        "negative",
        "huge",
        "bool",
        "float",
        "none",
        "list",
    ],
)
def test_parse_crs_rejects(value, match):
    with pytest.raises(GeoreferenceError, match=match):
        C.parse_crs(value)


def test_parse_crs_chains_pyproj_error():
    with pytest.raises(GeoreferenceError) as info:
        C.parse_crs("EPSG:999999")
    assert isinstance(info.value.__cause__, pyproj.exceptions.CRSError)


# ----------------------------------------------------------------- working_crs


def _pyproj_utm(lon, lat):
    """pyproj's own answer for a small box well inside one zone and hemisphere."""
    infos = query_utm_crs_info(
        datum_name="WGS 84",
        area_of_interest=AreaOfInterest(min(lon), min(lat), max(lon), max(lat)),
    )
    return {int(i.code) for i in infos}


@pytest.mark.parametrize(
    "lon, lat, zone_code",
    [
        # EPSG codes 326zz (north) / 327zz (south); zone = floor((lon + 180) / 6) + 1 (UTM definition)
        ((15.10, 15.12), (48.20, 48.21), 32633),
        ((-122.45, -122.40), (37.75, 37.80), 32610),
        ((18.40, 18.45), (-33.95, -33.90), 32734),
        ((139.70, 139.75), (35.65, 35.70), 32654),
        ((-70.70, -70.60), (-33.50, -33.40), 32719),
        ((172.60, 172.70), (-43.55, -43.50), 32759),
    ],
    ids=["central_europe", "california", "cape_town", "tokyo", "santiago", "christchurch"],
)
def test_working_crs_auto_utm_equals_pyproj_query(lon, lat, zone_code):
    got = C.working_crs("EPSG:4326", lon, lat)
    assert got.to_epsg() == zone_code
    assert _pyproj_utm(lon, lat) == {zone_code}
    zone = math.floor((np.mean(lon) + 180) / 6) + 1
    assert zone_code % 100 == zone


def test_working_crs_straddling_zones_is_deterministic():
    # a box across 12 E (boundary of zones 32 and 33): pyproj offers both, we take the zone whose
    # central meridian (9 E or 15 E) is nearest the box centre
    lon, lat = (11.99, 12.03), (47.0, 47.01)
    assert {32632, 32633} <= _pyproj_utm(lon, lat)
    assert C.working_crs(4326, lon, lat).to_epsg() == 32633
    assert C.working_crs(4326, (11.97, 12.01), lat).to_epsg() == 32632
    # straddling the equator: hemisphere of the box centre
    assert C.working_crs(4326, (15.0, 15.01), (-0.01, 0.03)).to_epsg() == 32633
    assert C.working_crs(4326, (15.0, 15.01), (-0.03, 0.01)).to_epsg() == 32733


def test_working_crs_rules():
    assert C.working_crs("EPSG:32633").to_epsg() == 32633  # projected input kept
    assert C.working_crs("EPSG:3035").to_epsg() == 3035
    assert C.working_crs("EPSG:4326", [15], [48], requested="EPSG:3035").to_epsg() == 3035
    # compound (horizontal + height) input: the horizontal part
    assert C.working_crs("EPSG:32633+5783").to_epsg() == 32633
    with pytest.raises(GeoreferenceError, match=r"requested working CRS EPSG:4258 .*not a projected CRS"):
        C.working_crs("EPSG:4326", [15], [48], requested="EPSG:4258")
    with pytest.raises(GeoreferenceError, match=r"has axes in .*foot.*metres"):
        C.working_crs("EPSG:2263")  # NAD83 / New York Long Island (ftUS)
    with pytest.raises(GeoreferenceError, match=r"no WGS 84 / UTM zone covers .*set work_crs"):
        C.working_crs("EPSG:4326", [10.0, 10.1], [86.0, 86.1])  # UTM ends at 84 N
    with pytest.raises(GeoreferenceError, match=r"longitudes and latitudes are needed"):
        C.working_crs("EPSG:4326")
    with pytest.raises(GeoreferenceError, match=r"out of range"):
        C.working_crs("EPSG:4326", [200.0], [10.0])
    with pytest.raises(GeoreferenceError, match=r"no finite longitude"):
        C.working_crs("EPSG:4326", [np.nan], [np.nan])


# ----------------------------------------------------------------- transform_xy


def test_transform_known_points_epsg_definitions():
    # UTM zone 33N (EPSG:32633): central meridian 15 E, false easting 500000 m, false northing 0
    x, y = C.transform_xy([15.0], [0.0], "EPSG:4326", "EPSG:32633")
    assert abs(x[0] - 500000.0) < 1e-6 and abs(y[0]) < 1e-6
    # ETRS89-LAEA (EPSG:3035, axes northing-first by authority): centre 52 N 10 E maps to the false
    # origin E = 4321000, N = 3210000; always_xy keeps x = easting
    x, y = C.transform_xy([10.0], [52.0], "EPSG:4258", "EPSG:3035")
    assert abs(x[0] - 4321000.0) < 1e-6 and abs(y[0] - 3210000.0) < 1e-6


@pytest.mark.parametrize("dst", ["EPSG:32633", "EPSG:3035", "EPSG:31256"], ids=["utm33", "laea", "gk_austria"])
def test_transform_round_trip_below_1mm(dst, rng):
    lon = rng.uniform(14.0, 16.0, 500)
    lat = rng.uniform(46.5, 48.5, 500)
    src = "EPSG:4326" if dst != "EPSG:31256" else "EPSG:4312"  # MGI for the Austrian grid
    x, y = C.transform_xy(lon, lat, src, dst)
    lon2, lat2 = C.transform_xy(x, y, dst, src)
    _, _, d = GEOD.inv(lon, lat, lon2, lat2)
    assert np.max(np.abs(d)) < 1e-3  # metres: the brief's round-trip requirement
    x2, y2 = C.transform_xy(lon2, lat2, src, dst)
    assert np.max(np.hypot(x2 - x, y2 - y)) < 1e-3


def test_transform_same_crs_is_a_copy_and_shapes_kept():
    x = np.array([[1.0, 2.0], [3.0, 4.0]])
    xo, _ = C.transform_xy(x, x, "EPSG:32633", "EPSG:32633")
    assert xo.shape == (2, 2) and np.array_equal(xo, x) and xo is not x
    xo, _ = C.transform_xy(np.full((2, 3), 15.0), np.full((2, 3), 48.0), 4326, 32633)
    assert xo.shape == (2, 3)


def test_transform_non_finite_raises_naming_the_point():
    with pytest.raises(GeoreferenceError, match=r"1 point\(s\) cannot be transformed .*x=15, y=95:"):
        C.transform_xy([15.0, 15.0], [48.0, 95.0], "EPSG:4326", "EPSG:32633")
    x, _ = C.transform_xy([15.0, 15.0], [48.0, 95.0], "EPSG:4326", "EPSG:32633", check_finite=False)
    assert np.isfinite(x[0]) and not np.isfinite(x[1])
    with pytest.raises(GeoreferenceError, match="different shapes"):
        C.transform_xy([1.0, 2.0], [1.0], 4326, 32633)


def test_transformer_is_cached():
    C._transformer.cache_clear()
    for _ in range(5):
        C.transform_xy([15.0], [48.0], "EPSG:4326", "EPSG:32633")
    info = C._transformer.cache_info()
    assert info.misses == 1 and info.hits == 4


# ----------------------------------------------------------------- scale factor


def _snyder_tm_k(lon, lat, lon0, k0=0.9996):
    """Transverse Mercator point scale factor, Snyder (1987, USGS PP 1395) eq. 8-11."""
    a, f = 6378137.0, 1 / 298.257223563  # WGS 84 ellipsoid (EPSG:7030)
    e2 = f * (2 - f)
    ep2 = e2 / (1 - e2)
    phi = np.radians(lat)
    T = np.tan(phi) ** 2
    Cc = ep2 * np.cos(phi) ** 2
    A = np.radians(lon - lon0) * np.cos(phi)
    del a
    return k0 * (
        1
        + (1 + Cc) * A**2 / 2
        + (5 - 4 * T + 42 * Cc + 13 * Cc**2 - 28 * ep2) * A**4 / 24
        + (61 - 148 * T + 16 * T**2) * A**6 / 720
    )


@pytest.mark.parametrize("lat", [0.0, 30.0, 48.0, 70.0], ids=["equator", "lat30", "lat48", "lat70"])
def test_scale_factor_on_central_meridian_is_k0(lat):
    x, y = C.transform_xy([15.0], [lat], 4326, 32633)
    k = C.grid_scale_factor("EPSG:32633", x, y)
    # EPSG definition of UTM: scale factor at natural origin k0 = 0.9996
    assert abs(k[0] - 0.9996) < 1e-9


def test_scale_factor_grows_away_from_central_meridian_as_snyder():
    lon = np.linspace(15.0, 18.0, 13)
    lat = np.full_like(lon, 45.0)
    x, y = C.transform_xy(lon, lat, 4326, 32633)
    k = C.grid_scale_factor(32633, x, y)
    assert np.all(np.diff(k) > 0)
    # the series of Snyder eq. 8-11 is accurate to ~1e-10 within 3 degrees of the central meridian
    np.testing.assert_allclose(k, _snyder_tm_k(lon, lat, 15.0), rtol=0, atol=1e-8)
    # symmetric about the central meridian
    xw, yw = C.transform_xy(30.0 - lon, lat, 4326, 32633)
    np.testing.assert_allclose(C.grid_scale_factor(32633, xw, yw), k, atol=1e-12)


@pytest.mark.parametrize(
    "lon0, lat0, crs",
    [
        (15.0, 48.0, 32633),
        (17.8, 48.0, 32633),
        (12.2, 0.5, 32633),
        (-122.4, 37.8, 32610),
        (10.0, 52.0, 25832),
    ],
    ids=["central_meridian", "zone_edge_east", "zone_edge_equator", "california", "etrs89_utm32"],
)
def test_grid_distance_over_k_equals_geodesic(lon0, lat0, crs, rng):
    # a spread of points within ~300 m; reference distances from pyproj.Geod (Karney's geodesics)
    dlon = rng.uniform(-0.002, 0.002, 40)
    dlat = rng.uniform(-0.0015, 0.0015, 40)
    lon, lat = lon0 + dlon, lat0 + dlat
    geog = pyproj.CRS.from_epsg(crs).geodetic_crs
    x, y = C.transform_xy(lon, lat, geog, crs)
    i, j = np.triu_indices(len(lon), 1)
    grid = np.hypot(x[i] - x[j], y[i] - y[j])
    xm, ym = 0.5 * (x[i] + x[j]), 0.5 * (y[i] + y[j])
    k = C.grid_scale_factor(crs, xm, ym)  # scale at the midpoint of each pair
    _, _, geo = GEOD.inv(lon[i], lat[i], lon[j], lat[j])
    keep = geo > 50.0
    rel = np.abs(grid[keep] / k[keep] - geo[keep]) / geo[keep]
    # brief: better than 1e-6 relative over a few hundred metres (k varies ~1e-8 across 300 m)
    assert rel.max() < 1e-6
    # and ignoring k would be wrong by up to 4e-4 (1 - 0.9996 on the central meridian)
    assert np.max(np.abs(grid[keep] - geo[keep]) / geo[keep]) > 1e-5


def test_scale_factor_rejects_geographic():
    with pytest.raises(GeoreferenceError, match="not projected"):
        C.grid_scale_factor(4326, [15.0], [48.0])


# ----------------------------------------------------------------- axis order, helpers


def test_axis_order_note():
    # EPSG:4326 and EPSG:3035 are north-first by authority; UTM is east-first
    assert C.axis_order_note(C.parse_crs(4326)) == C.AXIS_ORDER_NOTE
    assert C.axis_order_note(C.parse_crs(3035)) == C.AXIS_ORDER_NOTE
    assert C.axis_order_note(C.parse_crs(32633)) is None
    # and transform_xy still takes x = longitude for EPSG:4326
    x, _ = C.transform_xy([15.0], [48.0], 4326, 32633)
    assert abs(x[0] - 500000.0) < 1.0


def test_degrees_outside_and_bounds():
    b = C.geographic_bounds(32633)
    assert b == (12.0, 0.0, 18.0, 84.0)  # EPSG area of use of UTM zone 33N
    d = C.degrees_outside([15.0, 11.0, 15.0, 21.0], [45.0, 45.0, -2.0, 88.0], b)
    np.testing.assert_allclose(d, [0.0, 1.0, 2.0, 5.0])
    # a box across the antimeridian (west > east)
    d = C.degrees_outside([179.0, -179.0, 0.0], [0.0, 0.0, 0.0], (170.0, -10.0, -170.0, 10.0))
    np.testing.assert_allclose(d, [0.0, 0.0, 170.0])


def test_crs_label_and_is_geographic():
    assert C.crs_label(C.parse_crs(32633)) == "EPSG:32633 (WGS 84 / UTM zone 33N)"
    assert C.is_geographic(C.parse_crs(4326)) and not C.is_geographic(C.parse_crs(32633))
    lon, lat = C.to_lonlat([500000.0], [0.0], 32633)
    assert abs(lon[0] - 15.0) < 1e-9 and abs(lat[0]) < 1e-9
