"""Ground model: exact on planar and bilinear DEMs, CRS plumbing, exact at stations."""

import numpy as np
import pyproj
import pytest
from rockhead.core.errors import GeoreferenceError, InputFileError, RockheadWarning
from rockhead.core.formats.gdalio import Raster, write_raster
from rockhead.core.formats.gdalio import engine as gdalio_engine
from rockhead.core.survey.ground import GroundModel

X0, Y0, CELL, NX, NY = 512000.0, 5001200.0, 10.0, 40, 30  # north-up DEM, top-left edge


def _plane(x, y):
    return 230.0 + 0.05 * (x - X0) - 0.02 * (y - Y0)


def _dem(func, crs="EPSG:32633"):
    xc = X0 + (np.arange(NX) + 0.5) * CELL
    yc = Y0 - (np.arange(NY) + 0.5) * CELL
    return Raster(func(*np.meshgrid(xc, yc)), X0, Y0, CELL, -CELL, pyproj.CRS(crs), None)


def _inside(rng, n=500):
    # points between the outermost cell centres
    x = rng.uniform(X0 + CELL / 2, X0 + (NX - 0.5) * CELL, n)
    y = rng.uniform(Y0 - (NY - 0.5) * CELL, Y0 - CELL / 2, n)
    return x, y


def test_planar_dem_sampled_exactly(rng):
    model = GroundModel.from_dem(_dem(_plane), "EPSG:32633")
    x, y = _inside(rng)
    # bilinear interpolation reproduces a plane exactly; 1e-9 m is float rounding at ~230 m
    np.testing.assert_allclose(model(x, y), _plane(x, y), atol=1e-9)
    assert model.source_ == "dem"


def test_bilinear_not_nearest(rng):
    # f = (x - X0)(y - Y0) is bilinear: reproduced exactly by bilinear interpolation and by
    # nothing cruder (nearest-cell sampling would be off by up to ~CELL * 300 here)
    def f(x, y):
        return (x - X0) * (y - Y0) / 1000.0

    model = GroundModel.from_dem(_dem(f))
    x, y = _inside(rng)
    np.testing.assert_allclose(model.ground(x, y), f(x, y), atol=1e-9)


def test_planar_dem_from_geotiff_file(tmp_path, rng):
    dem = _dem(_plane)
    path = write_raster(tmp_path / "dem.tif", dem.values, dem.spec, "EPSG:32633")
    for engine in (None, gdalio_engine()):
        model = GroundModel.from_raster(path, "EPSG:32633", engine=engine)
        x, y = _inside(rng)
        # float32 storage of ~230 m: spacing 1.5e-5 m, so 1e-4 m
        np.testing.assert_allclose(model(x, y), _plane(x, y), atol=1e-4)
        assert "dem.tif" in model.description_


def test_dem_in_another_crs(rng):
    # DEM in UTM 33N; survey worked in ETRS89-LAEA (EPSG:3035)
    model = GroundModel.from_dem(_dem(_plane, "EPSG:32633"), "EPSG:3035")
    x33, y33 = _inside(rng, 200)
    to_work = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:3035", always_xy=True)
    xw, yw = to_work.transform(x33, y33)
    # the plane is defined in UTM coordinates; a round trip through pyproj is good to ~1e-9 m,
    # times the slope 0.05 -> far below 1e-6 m
    np.testing.assert_allclose(model(xw, yw), _plane(x33, y33), atol=1e-6)
    assert "transformation" in model.description_


def test_edges_and_outside():
    model = GroundModel.from_dem(_dem(_plane))
    # within the outer half cell: the edge column's value (flat extension over half a cell)
    x_edge = X0 + 0.2 * CELL
    y_mid = Y0 - 10.5 * CELL
    assert model(x_edge, y_mid) == pytest.approx(_plane(X0 + 0.5 * CELL, y_mid), abs=1e-9)
    # beyond the DEM: NaN, and check_covers names the problem
    assert np.isnan(model(X0 - 1.0, y_mid))
    with pytest.raises(GeoreferenceError, match=r"1 of 2 stations have no ground elevation .*x=511999\.00"):
        model.check_covers(np.array([X0 + 50.0, X0 - 1.0]), np.array([y_mid, y_mid]), "stations")


def test_nodata_cells_give_nan():
    dem = _dem(_plane)
    values = dem.values.copy()
    values[10, 10] = np.nan
    model = GroundModel.from_dem(Raster(values, X0, Y0, CELL, -CELL, dem.crs, None))
    xc, yc = X0 + 10.5 * CELL, Y0 - 10.5 * CELL
    assert np.isnan(model(xc + 3.0, yc - 3.0))  # in a cell touching the hole
    assert np.isfinite(model(xc + 13.0, yc))  # one cell further: fine


def test_unknown_working_crs_is_the_crs_modules_message():
    # one CRS parser for the whole core: the same words as core.crs.parse_crs, and an integer EPSG
    # code is accepted like everywhere else
    from rockhead.core.crs import parse_crs

    with pytest.raises(GeoreferenceError) as expected:
        parse_crs("EPSG:999999")
    with pytest.raises(GeoreferenceError) as got:
        GroundModel.from_dem(_dem(_plane), "EPSG:999999")
    assert str(got.value) == str(expected.value)
    assert "unknown CRS 'EPSG:999999'" in str(got.value)
    model = GroundModel.from_dem(_dem(_plane), 32633)
    assert "transformation" not in model.description_  # same CRS as the DEM: sampled directly


def test_dem_without_crs_warns():
    dem = _dem(_plane)
    with pytest.warns(RockheadWarning, match="declares no CRS"):
        GroundModel.from_dem(Raster(dem.values, X0, Y0, CELL, -CELL, None, None), "EPSG:32633")


def test_empty_dem_is_refused():
    dem = _dem(_plane)
    with pytest.raises(InputFileError, match="no valid cell"):
        GroundModel.from_dem(Raster(np.full_like(dem.values, np.nan), X0, Y0, CELL, -CELL, dem.crs, None))


def test_stations_exact_at_stations_and_on_a_plane(rng):
    xs = rng.uniform(0, 500, 60)
    ys = rng.uniform(0, 300, 60)
    zs = 100.0 + 0.03 * xs - 0.01 * ys
    model = GroundModel.from_stations(xs, ys, zs)
    np.testing.assert_allclose(model(xs, ys), zs, atol=1e-9)  # exact at the data
    # inside the hull: linear interpolation of a plane is exact (barycentric weights)
    from scipy.spatial import Delaunay

    qx, qy = rng.uniform(0, 500, 400), rng.uniform(0, 300, 400)
    inside = Delaunay(np.column_stack([xs, ys])).find_simplex(np.column_stack([qx, qy])) >= 0
    np.testing.assert_allclose(model(qx[inside], qy[inside]), 100.0 + 0.03 * qx[inside] - 0.01 * qy[inside], atol=1e-9)
    # outside the hull: the ground at the nearest point of the hull's outline, flat beyond it (the
    # outline's nearest point from shapely, the plane's value there; 1e-9 m: rounding)
    from shapely.geometry import MultiPoint, Point
    from shapely.ops import nearest_points

    far_x, far_y = np.array([-200.0, 800.0, 250.0]), np.array([150.0, -90.0, 700.0])
    hull = MultiPoint([tuple(p) for p in zip(xs, ys)]).convex_hull
    near = [nearest_points(hull.exterior, Point(x, y))[0] for x, y in zip(far_x, far_y)]
    expected = [100.0 + 0.03 * p.x - 0.01 * p.y for p in near]
    np.testing.assert_allclose(model(far_x, far_y), expected, atol=1e-9)


def test_stations_on_one_line():
    # a straight line of stations bearing 60 degrees from north, ground rising along it
    t = np.arange(0.0, 235.0, 5.0)
    ux, uy = np.sin(np.radians(60.0)), np.cos(np.radians(60.0))
    xs, ys = 1000.0 + t * ux, 2000.0 + t * uy
    zs = 50.0 + 0.1 * t + 0.5 * np.sin(t / 20.0)
    model = GroundModel.from_stations(xs, ys, zs)
    np.testing.assert_allclose(model(xs, ys), zs, atol=1e-9)
    # between two stations: linear along the line; 30 m across the line: the same value
    tq = 52.5
    mid = 0.5 * (zs[10] + zs[11])
    assert model(1000.0 + tq * ux, 2000.0 + tq * uy) == pytest.approx(mid, abs=1e-9)
    assert model(1000.0 + tq * ux + 30 * uy, 2000.0 + tq * uy - 30 * ux) == pytest.approx(mid, abs=1e-9)
    # beyond the ends: flat
    assert model(1000.0 - 50 * ux, 2000.0 - 50 * uy) == pytest.approx(zs[0], abs=1e-9)
    assert "one straight line" in model.description_


def test_duplicate_and_single_stations():
    model = GroundModel.from_stations([0.0, 0.0, 10.0, 0.0], [0.0, 0.0, 0.0, 10.0], [100.0, 102.0, 110.0, 90.0])
    assert model(0.0, 0.0) == pytest.approx(101.0)  # two surveys of one point are averaged
    flat = GroundModel.from_stations([5.0], [5.0], [42.0])
    np.testing.assert_array_equal(flat(np.array([0.0, 100.0]), np.array([0.0, -3.0])), [42.0, 42.0])
    with pytest.raises(GeoreferenceError, match="no station has a finite"):
        GroundModel.from_stations([np.nan], [0.0], [1.0])
    with pytest.raises(GeoreferenceError, match="differ in length"):
        GroundModel.from_stations([0.0, 1.0], [0.0], [1.0])


def test_broadcast_shapes():
    model = GroundModel.from_dem(_dem(_plane))
    gx, gy = np.meshgrid(X0 + np.array([15.0, 25.0, 35.0]), Y0 - np.array([15.0, 25.0]))
    z = model(gx, gy)
    assert z.shape == (2, 3)
    np.testing.assert_allclose(z, _plane(gx, gy), atol=1e-9)


@pytest.mark.parametrize(
    "make",
    [
        lambda rng: GroundModel.from_dem(_dem(_plane), "EPSG:32633"),
        lambda rng: GroundModel.from_dem(_dem(_plane, "EPSG:32634"), "EPSG:32633"),  # through a transformation
        lambda rng: GroundModel.from_stations(
            rng.uniform(X0, X0 + 300, 40), rng.uniform(Y0 - 250, Y0, 40), rng.uniform(200, 230, 40)
        ),
        lambda rng: GroundModel.from_stations([X0, X0 + 100], [Y0, Y0 - 50], [210.0, 220.0]),  # one line
        lambda rng: GroundModel.from_stations([X0], [Y0], [215.0]),  # one station: flat
    ],
    ids=["dem", "dem-other-crs", "stations", "stations-on-a-line", "one-station"],
)
def test_ground_model_pickles_as_its_recipe(make, rng):
    """A pickled model (handed to the drawing processes of a run) answers exactly as the original."""
    import pickle
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = make(rng)
    again = pickle.loads(pickle.dumps(model))
    x = rng.uniform(X0 - 50, X0 + 450, 300)  # inside and outside the DEM and the stations' outline
    y = rng.uniform(Y0 - 350, Y0 + 50, 300)
    np.testing.assert_array_equal(again.ground(x, y), model.ground(x, y))  # built again by the same code: bit for bit
    if model.source_ == "stations":
        np.testing.assert_array_equal(again.outside_distance_m(x, y), model.outside_distance_m(x, y))
    assert (again.source_, again.description_, again.slope_bound_) == (
        model.source_,
        model.description_,
        model.slope_bound_,
    )


def test_ground_model_from_a_sampler_does_not_pickle():
    import pickle

    with pytest.raises(TypeError, match="cannot be pickled"):
        pickle.dumps(GroundModel(lambda px, py: px * 0.0, "stations", "test"))
