"""Every Processing algorithm runs through processing.run and gives the core's results.

The reference is the core called directly on the same survey (the sample
survey of the invented Tarnwick Creek site): the algorithms are thin adapters,
so their outputs must equal the core's to floating-point round trip (values
pass through QGIS as doubles: exact), and the GeoTIFFs to float32.
"""

import csv
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import (
    QgsFeature,
    QgsGeometry,
    QgsPointXY,
    QgsProcessingException,
    QgsProcessingFeedback,
    QgsVectorLayer,
)
from qgis.PyQt.QtCore import QVariant
from rockhead.core import workflow
from rockhead.core.products import layers
from rockhead.core.survey import config
from rockhead.plugin.algorithms.run_survey import METHODS
from rockhead.plugin.feedback import FeedbackProgress


def run(alg, params, feedback=None):
    import processing

    return processing.run(f"rockhead:{alg}", params, feedback=feedback)


def layer_columns(layer):
    names = [f.name() for f in layer.fields()]
    rows = [f.attributes() for f in layer.getFeatures()]
    cols = {n: [r[i] for r in rows] for i, n in enumerate(names)}
    xy = np.array([[f.geometry().asPoint().x(), f.geometry().asPoint().y()] for f in layer.getFeatures()])
    return names, cols, xy


def is_null(value):
    return value is None or (isinstance(value, QVariant) and value.isNull())


def assert_same_as_core(layer, core_layer):
    names, cols, xy = layer_columns(layer)
    assert names == list(core_layer.fields)  # same fixed fields in the same order
    for name, values in core_layer.fields.items():
        values = np.asarray(values)
        got = cols[name]
        if values.dtype.kind == "f":
            got = np.array([np.nan if is_null(v) else float(v) for v in got])
            # doubles pass through QGIS unchanged (NaN written as NULL); the reference is a second
            # call of the core, whose threaded batches may differ in the last bit (seen: 4e-16)
            np.testing.assert_allclose(got, values, rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=name)
        else:
            assert [str(v) for v in got] == [str(v) for v in values], name
    core_xy = np.array([[g.x, g.y] for g in core_layer.geometries])
    np.testing.assert_array_equal(xy, core_xy)


def read_csv_rows(path):
    with open(path, encoding="utf-8") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


def memory_layers(survey_toml, stations_geometry="Point"):
    """The survey's stations and picks as QGIS memory layers (as a user would have them)."""
    folder = survey_toml.parent
    st = QgsVectorLayer(
        f"{stations_geometry}?crs=EPSG:32633&field=line:string&field=station:string&field=z:double",
        "stations",
        "memory",
    )
    feats = []
    for r in read_csv_rows(folder / "stations.csv"):
        f = QgsFeature(st.fields())
        x, y = float(r["x"]), float(r["y"])
        if stations_geometry == "Point":
            f.setGeometry(QgsGeometry.fromPointXY(QgsPointXY(x, y)))
        else:
            f.setGeometry(QgsGeometry.fromPolylineXY([QgsPointXY(x, y), QgsPointXY(x + 1, y)]))
        f.setAttributes([r["line"], r["station"], float(r["z"])])
        feats.append(f)
    st.dataProvider().addFeatures(feats)
    pk = QgsVectorLayer(
        "None?field=ln:string&field=sp:string&field=rcv:string&field=twt:double&field=err:double", "picks", "memory"
    )
    feats = []
    for r in read_csv_rows(folder / "picks.csv"):
        f = QgsFeature(pk.fields())
        f.setAttributes([r["line"], r["shot"], r["receiver"], float(r["time_ms"]), float(r["sigma_ms"])])
        feats.append(f)
    pk.dataProvider().addFeatures(feats)
    return st, pk


LAYER_PARAMS = {
    "LINE_FIELD": "ln",
    "SHOT_FIELD": "sp",
    "RECEIVER_FIELD": "rcv",
    "TIME_FIELD": "twt",
    "SIGMA_FIELD": "err",
    "STATION_LINE_FIELD": "line",
    "STATION_FIELD": "station",
    "Z_FIELD": "z",
}


@pytest.fixture
def core_fit(sample_survey):
    survey = config.load_survey(sample_survey)
    return survey, workflow.fit_step(survey)


def test_fit_gathers_equals_core(provider, sample_survey, core_fit):
    _survey, step = core_fit
    res = run(
        "fitgathers",
        {"SURVEY": str(sample_survey), "SHOTS": "TEMPORARY_OUTPUT", "REFLECTOR_POINTS": "TEMPORARY_OUTPUT"},
    )
    shots, points = res["SHOTS"], res["REFLECTOR_POINTS"]
    assert shots.crs().authid() == "EPSG:32633"
    assert shots.featureCount() == len(step.fits) > 0
    assert_same_as_core(shots, layers.shots_layer(step.gathers, step.fits))
    assert_same_as_core(points, layers.reflector_points_layer(step.points))


def test_fit_gathers_from_qgis_layers_equals_survey_file(provider, sample_survey, core_fit):
    _survey, step = core_fit
    stations, picks = memory_layers(sample_survey)
    res = run(
        "fitgathers",
        {
            "PICKS": picks,
            "STATIONS": stations,
            **LAYER_PARAMS,
            "SHOTS": "TEMPORARY_OUTPUT",
            "REFLECTOR_POINTS": "TEMPORARY_OUTPUT",
        },
    )
    # the same numbers as from the survey file: coordinates and times pass unchanged (repr of doubles)
    assert_same_as_core(res["SHOTS"], layers.shots_layer(step.gathers, step.fits))


def test_setting_override_reaches_the_core(provider, sample_survey):
    # a minimum pick count above every gather's size: no gather may be fitted
    res = run(
        "fitgathers",
        {
            "SURVEY": str(sample_survey),
            "MIN_PICKS": 100000,
            "SHOTS": "TEMPORARY_OUTPUT",
            "REFLECTOR_POINTS": "TEMPORARY_OUTPUT",
        },
    )
    status = {f["status"] for f in res["SHOTS"].getFeatures()}
    assert status == {"too_few_picks"}


def test_stations_must_be_points(provider, sample_survey):
    stations, picks = memory_layers(sample_survey, stations_geometry="LineString")
    with pytest.raises(QgsProcessingException, match="point layer"):
        run(
            "fitgathers",
            {
                "PICKS": picks,
                "STATIONS": stations,
                **LAYER_PARAMS,
                "SHOTS": "TEMPORARY_OUTPUT",
                "REFLECTOR_POINTS": "TEMPORARY_OUTPUT",
            },
        )


def test_core_input_error_becomes_processing_error(provider, sample_survey):
    text = sample_survey.read_text().replace('crs = "EPSG:32633"', 'crs = "EPSG:999999"')
    sample_survey.write_text(text)
    with pytest.raises(QgsProcessingException, match="999999"):
        run(
            "fitgathers",
            {"SURVEY": str(sample_survey), "SHOTS": "TEMPORARY_OUTPUT", "REFLECTOR_POINTS": "TEMPORARY_OUTPUT"},
        )


def test_cancel_stops_cleanly(provider, sample_survey):
    feedback = QgsProcessingFeedback()
    feedback.cancel()
    res = run(
        "fitgathers",
        {"SURVEY": str(sample_survey), "SHOTS": "TEMPORARY_OUTPUT", "REFLECTOR_POINTS": "TEMPORARY_OUTPUT"},
        feedback=feedback,
    )
    assert "SHOTS" not in res or res["SHOTS"] is None


def test_combine_lines_equals_core(provider, sample_survey, core_fit):
    survey, step = core_fit
    dips, _ = workflow.dips_step(survey, step)
    res = run("combinelines", {"SURVEY": str(sample_survey), "MIN_ANGLE": 30.0, "DIP_MEASUREMENTS": "TEMPORARY_OUTPUT"})
    layer = res["DIP_MEASUREMENTS"]
    assert layer.featureCount() == len(dips.dip_deg) > 0
    assert_same_as_core(layer, layers.dips_layer(dips))
    # strike by the right-hand rule: dip direction = strike + 90 (common practice)
    for f in layer.getFeatures():
        if not is_null(f["dip_deg"]):
            assert math.isclose((f["strike_deg"] + 90.0) % 360.0, f["dip_direction_deg"], abs_tol=1e-9)


def _read_band(path):
    from osgeo import gdal

    ds = gdal.Open(str(path))
    band = ds.GetRasterBand(1)
    arr = band.ReadAsArray().astype(float)
    if band.GetNoDataValue() is not None:
        arr[arr == band.GetNoDataValue()] = np.nan
    gt = ds.GetGeoTransform()
    band = ds = None  # release the dataset only after its band (GDAL)
    return arr, gt


def test_interpolate_surface_chains_after_fit_and_equals_core(provider, sample_survey, core_fit, tmp_path):
    from rockhead.core.grid import GridSpec
    from rockhead.core.surface.contours import contours_layer
    from rockhead.core.surface.trend import grid_with_trend
    from rockhead.core.survey.model import Settings

    _survey, step = core_fit
    fit = run(
        "fitgathers",
        {"SURVEY": str(sample_survey), "SHOTS": "TEMPORARY_OUTPUT", "REFLECTOR_POINTS": "TEMPORARY_OUTPUT"},
    )
    out, std = tmp_path / "surface.tif", tmp_path / "std.tif"
    # a coarse grid and few neighbours keep the test fast; the core gets the same arguments
    params = {
        "INPUT": fit["REFLECTOR_POINTS"],
        "VALUE_FIELD": "elevation_m",
        "ERROR_FIELD": "sigma_m",
        "METHOD": 0,
        "VARIOGRAM": 0,
        "CELL_SIZE": 20.0,
        "NEIGHBOURS": 12,
        "CONTOUR_INTERVAL": 2.0,
        "OUTPUT": str(out),
        "STD_OUTPUT": str(std),
        "CONTOURS": "TEMPORARY_OUTPUT",
    }
    res = run("interpolatesurface", params)
    assert res["OUTPUT"] == str(out)
    p = step.points
    ok = p.finite & np.isfinite(p.sigma_m)
    x, y = p.x_m[ok], p.y_m[ok]
    spec = GridSpec.from_data(x, y, cell_size_m=20.0)
    settings = Settings(neighbours=12, variogram_model="auto", trend="linear")  # the algorithm's defaults
    surf, _ = grid_with_trend(x, y, p.elevation_m[ok], p.sigma_m[ok], spec, settings, "kriging")
    got, gt = _read_band(out)
    assert gt == pytest.approx(spec.geotransform)
    # float32 storage: relative 6e-8, i.e. < 1e-4 m at elevations of a few hundred metres
    np.testing.assert_allclose(got, surf.z, rtol=0, atol=1e-4, equal_nan=True)
    assert np.isfinite(got).sum() > 10
    got_std, _ = _read_band(std)
    np.testing.assert_allclose(got_std, surf.std, rtol=0, atol=1e-4, equal_nan=True)
    ref = contours_layer(spec.x_centres, spec.y_centres, elevation_m=surf.z, elevation_interval_m=2.0)
    lines = res["CONTOURS"]
    assert lines.featureCount() == len(ref) > 0
    assert [f["elevation_m"] for f in lines.getFeatures()] == [float(v) for v in ref.fields["elevation_m"]]


def _plane_points(n=40, crs="EPSG:32633"):
    """A memory layer of points on a dipping plane (elevation and a small standard error)."""
    layer = QgsVectorLayer(f"Point?crs={crs}&field=elevation_m:double&field=sigma_m:double", "p", "memory")
    rng = np.random.default_rng(5)
    feats = []
    for x, y in rng.uniform(0.0, 200.0, (n, 2)):
        f = QgsFeature(layer.fields())
        f.setGeometry(QgsGeometry.fromPointXY(QgsPointXY(512000.0 + float(x), 5001000.0 + float(y))))
        f.setAttributes([float(230.0 - 0.05 * x + 0.02 * y), 0.1])
        feats.append(f)
    layer.dataProvider().addFeatures(feats)
    return layer


@pytest.mark.parametrize(
    ("name", "driver"),
    [("surface.tif", "GTiff"), ("surface.asc", "AAIGrid"), ("surface.img", "HFA")],
    ids=["cog", "arc-ascii-grid", "erdas-imagine"],
)
def test_interpolate_surface_writes_the_format_of_the_extension(provider, tmp_path, gdal_validate, name, driver):
    from osgeo import gdal

    out = tmp_path / name
    run(
        "interpolatesurface",
        {
            "INPUT": _plane_points(),
            "VALUE_FIELD": "elevation_m",
            "ERROR_FIELD": "sigma_m",
            "CELL_SIZE": 10.0,
            "OUTPUT": str(out),
            "STD_OUTPUT": str(tmp_path / f"std{out.suffix}"),
            "CONTOURS": "TEMPORARY_OUTPUT",
        },
    )
    ds = gdal.Open(str(out))
    assert ds.GetDriver().ShortName == driver  # a .asc is an ASCII grid, not TIFF bytes
    md = ds.GetMetadata()
    assert "does not replace borings" in md["CAUTION"] and md["SOFTWARE"].startswith("Rockhead ")
    arr = ds.GetRasterBand(1).ReadAsArray().astype(float)
    nodata = ds.GetRasterBand(1).GetNoDataValue()
    ds = None
    vals = arr[arr != nodata]
    # a plane kriged with a linear trend removed is the plane (within 1 cm; the ASCII grid prints float32)
    assert vals.size > 100 and 219.0 < vals.min() and vals.max() < 235.0
    if driver == "GTiff":
        gdal_validate(out, tmp_path / "std.tif")


def test_interpolate_surface_refuses_geographic_points(provider):
    layer = QgsVectorLayer("Point?crs=EPSG:4326&field=elevation_m:double", "p", "memory")
    feats = []
    for i in range(5):
        f = QgsFeature(layer.fields())
        f.setGeometry(QgsGeometry.fromPointXY(QgsPointXY(15 + i * 0.001, 48 + (i % 2) * 0.001)))
        f.setAttributes([200.0 + i])
        feats.append(f)
    layer.dataProvider().addFeatures(feats)
    with pytest.raises(QgsProcessingException, match="geographic"):
        run("interpolatesurface", {"INPUT": layer, "VALUE_FIELD": "elevation_m", "OUTPUT": "TEMPORARY_OUTPUT"})


def test_feedback_adapter():
    fb = QgsProcessingFeedback()
    progress = FeedbackProgress(fb)
    progress.set_progress(42.0)
    assert fb.progress() == pytest.approx(42.0)
    progress.set_progress(250.0)  # clipped
    assert fb.progress() == pytest.approx(100.0)
    assert not progress.is_canceled()
    fb.cancel()
    assert progress.is_canceled()
    FeedbackProgress(None).info("nothing")  # no feedback: silently ignored


@pytest.mark.slow
def test_run_survey_equals_core(provider, sample_survey, core_results, tmp_path):
    from osgeo import gdal

    core_out, _result = core_results
    out = tmp_path / "results"
    # the survey's own surface method, as the core's command-line run used
    res = run(
        "runsurvey",
        {
            "SURVEY": str(sample_survey),
            "OUTPUT": str(out),
            "LOAD_RESULTS": False,
            "METHOD": METHODS.index("survey setting"),
        },
    )
    assert res["OUTPUT"] == str(out)
    for key, name in (
        ("GEOPACKAGE", "survey.gpkg"),
        ("DEPTH", "reflector_depth.tif"),
        ("ELEVATION", "reflector_elevation.tif"),
        ("DEPTH_SIGMA", "depth_sigma.tif"),
        ("REPORT", "report.html"),
    ):
        assert res[key] == str(out / name), key
    for table in ("shots", "reflector_points", "dip_measurements", "contours"):
        a = QgsVectorLayer(f"{out / 'survey.gpkg'}|layername={table}", table, "ogr")
        b = QgsVectorLayer(f"{core_out / 'survey.gpkg'}|layername={table}", table, "ogr")
        assert a.isValid() and b.isValid(), table
        assert a.featureCount() == b.featureCount() > 0, table
        assert [f.name() for f in a.fields()] == [f.name() for f in b.fields()]
        for fa, fb in zip(a.getFeatures(), b.getFeatures()):
            for va, vb in zip(fa.attributes(), fb.attributes()):
                if isinstance(vb, float):
                    # two runs of the core's iterative, threaded fits agree to rounding (seen: 3e-15)
                    assert va == pytest.approx(vb, rel=1e-9, abs=1e-9)
                else:
                    assert va == vb
            assert fa.geometry().asWkt(3) == fb.geometry().asWkt(3)  # to the millimetre
        del a, b
    for name in ("reflector_depth.tif", "reflector_elevation.tif", "depth_sigma.tif"):
        da, db = gdal.Open(str(out / name)), gdal.Open(str(core_out / name))
        # float32 grids of two runs: equal to float32 rounding of values of a few hundred metres
        np.testing.assert_allclose(da.ReadAsArray(), db.ReadAsArray(), rtol=0, atol=1e-4, equal_nan=True)
        da = db = None
    # the QC panel opening after the run takes the run's computation instead of redoing it (4 s of the
    # sample), while none of the survey's inputs has changed; a pick edit written beside the survey
    # (what the command line would read) makes it compute the survey again, with the edit
    from rockhead.plugin.last_run import kept_run
    from rockhead.plugin.qc_dock import GatherQc

    kept = kept_run(sample_survey)
    assert kept is not None and Path(kept.survey.path).resolve() == Path(sample_survey).resolve()
    assert GatherQc(sample_survey).result is kept
    (sample_survey.parent / "pick_edits.csv").write_text(
        "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\nB,1105,1102,,exclude,,test,\n"
    )
    assert kept_run(sample_survey) is None
    again = GatherQc(sample_survey).result
    assert again is not kept and int(np.sum(again.fit.fits.picks_excluded)) == 1


def test_run_survey_loads_styled_group(provider, sample_survey, core_results, tmp_path):
    from qgis.core import QgsProject

    # the whole-survey algorithm's post-processing loads the styled group into the project
    out = tmp_path / "results"
    shutil.copytree(core_results[0], out)
    from rockhead.plugin.styling import GROUP_NAME, load_results

    group = load_results(str(out), QgsProject.instance())
    assert QgsProject.instance().layerTreeRoot().findGroup(GROUP_NAME) is group
    names = {node.layer().name() for node in group.findLayers()}
    assert {
        "Shots (fit status)",
        "Reflector depth below ground",
        "Reflector elevation contours",
        "Dip and strike (crossing lines)",
    } <= names


def test_algorithms_chain_in_a_model(provider, sample_survey, tmp_path):
    # the model designer's way: fit gathers -> reflector points -> interpolate surface
    from qgis.core import (
        QgsProcessingModelAlgorithm,
        QgsProcessingModelChildAlgorithm,
        QgsProcessingModelChildParameterSource,
        QgsProcessingModelOutput,
        QgsProcessingModelParameter,
        QgsProcessingParameterFile,
    )

    model = QgsProcessingModelAlgorithm("reflector chain", "tests")
    model.addModelParameter(
        QgsProcessingParameterFile("survey", "survey", extension="toml"), QgsProcessingModelParameter("survey")
    )
    fit = QgsProcessingModelChildAlgorithm("rockhead:fitgathers")
    fit.setChildId("fit")
    fit.addParameterSources("SURVEY", [QgsProcessingModelChildParameterSource.fromModelParameter("survey")])
    model.addChildAlgorithm(fit)
    surf = QgsProcessingModelChildAlgorithm("rockhead:interpolatesurface")
    surf.setChildId("surf")
    surf.addParameterSources(
        "INPUT", [QgsProcessingModelChildParameterSource.fromChildOutput("fit", "REFLECTOR_POINTS")]
    )
    for name, value in (
        ("VALUE_FIELD", "elevation_m"),
        ("ERROR_FIELD", "sigma_m"),
        ("CELL_SIZE", 20.0),
        ("NEIGHBOURS", 12),
        ("METHOD", 0),
        ("VARIOGRAM", 0),
        ("TREND", 0),
    ):
        surf.addParameterSources(name, [QgsProcessingModelChildParameterSource.fromStaticValue(value)])
    out = QgsProcessingModelOutput("surface")
    out.setChildOutputName("OUTPUT")
    surf.setModelOutputs({"surface": out})
    model.addChildAlgorithm(surf)
    ok, errors = model.validate()
    assert ok, errors
    target = tmp_path / "chained.tif"
    res = run_model(model, {"survey": str(sample_survey), "surf:surface": str(target)})
    assert target.is_file()
    arr, _ = _read_band(target)
    assert np.isfinite(arr).sum() > 10
    assert res["surf:surface"] == str(target)


def run_model(model, params):
    import processing

    return processing.run(model, params)


def test_geographic_stations_layer_with_chosen_crs(provider, sample_survey, core_fit):
    # stations held in lon/lat (EPSG:4326), the survey CRS chosen in the dialog: the plugin
    # transforms them back; the fits must match the projected survey's
    from pyproj import Transformer

    _survey, step = core_fit
    stations, picks = memory_layers(sample_survey)
    to_geo = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)  # independent of QGIS
    geo = QgsVectorLayer(
        "Point?crs=EPSG:4326&field=line:string&field=station:string&field=z:double", "stations_ll", "memory"
    )
    feats = []
    for f in stations.getFeatures():
        p = f.geometry().asPoint()
        lon, lat = to_geo.transform(p.x(), p.y())
        g = QgsFeature(geo.fields())
        g.setGeometry(QgsGeometry.fromPointXY(QgsPointXY(lon, lat)))
        g.setAttributes(f.attributes())
        feats.append(g)
    geo.dataProvider().addFeatures(feats)
    res = run(
        "fitgathers",
        {
            "PICKS": picks,
            "STATIONS": geo,
            **LAYER_PARAMS,
            "CRS": "EPSG:32633",
            "SHOTS": "TEMPORARY_OUTPUT",
            "REFLECTOR_POINTS": "TEMPORARY_OUTPUT",
        },
    )
    shots = res["SHOTS"]
    assert shots.crs().authid() == "EPSG:32633"
    ref = layers.shots_layer(step.gathers, step.fits)
    _names, cols, xy = layer_columns(shots)
    ref_xy = np.array([[g.x, g.y] for g in ref.geometries])
    # a UTM -> lon/lat -> UTM round trip through two PROJ pipelines: well under a millimetre
    np.testing.assert_allclose(xy, ref_xy, rtol=0, atol=1e-3)
    # station positions moved by < 1 mm: velocities agree to 1e-6 relative (2 mm/s at 2000 m/s)
    np.testing.assert_allclose(np.array(cols["velocity_m_s"], float), ref.fields["velocity_m_s"], rtol=1e-6)
