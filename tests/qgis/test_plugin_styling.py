"""The strike-and-dip symbol is drawn at the strike angle on the map, with its dip label.

Checks are made on rendered pixels (offscreen QGIS map renderer): the long
bar's pixels are fitted with a principal axis and its azimuth compared with
the strike; the tick's pixels must lie on the dip side (strike + 90 degrees,
right-hand rule, FGDC-STD-013-2006 symbol); the label's pixels appear beside
the symbol on the dip side.
"""

import io
import math
import os
import shutil
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import (
    QgsCoordinateReferenceSystem,
    QgsExpressionContext,
    QgsExpressionContextUtils,
    QgsFeature,
    QgsGeometry,
    QgsMapRendererParallelJob,
    QgsMapSettings,
    QgsPointXY,
    QgsRectangle,
    QgsVectorLayer,
)
from qgis.PyQt.QtCore import QSize
from qgis.PyQt.QtGui import QColor
from rockhead.plugin import styling

REPO = Path(__file__).resolve().parents[2]
LAYER_CRS = "EPSG:32633"
POINT = (560000.0, 5320000.0)  # UTM 33N, about 15.8 E 48.0 N
DPI = 300  # bar 7 mm = 83 px: orientation good to a fraction of a degree
SIZE = 600


def dip_layer(strike_deg, dip_deg=25.0, crs=LAYER_CRS, point=POINT):
    layer = QgsVectorLayer(
        f"Point?crs={crs}&field=dip_deg:double&field=dip_direction_deg:double&field=strike_deg:double", "dips", "memory"
    )
    f = QgsFeature(layer.fields())
    f.setGeometry(QgsGeometry.fromPointXY(QgsPointXY(*point)))
    f.setAttributes([dip_deg, (strike_deg + 90.0) % 360.0, strike_deg])
    layer.dataProvider().addFeatures([f])
    layer.updateExtents()
    return layer


def render(layer, map_crs=LAYER_CRS, rotation=0.0, labels=True):
    from qgis.core import QgsCoordinateTransform, QgsProject

    layer.setLabelsEnabled(labels)
    settings = QgsMapSettings()
    settings.setLayers([layer])
    dest = QgsCoordinateReferenceSystem(map_crs)
    settings.setDestinationCrs(dest)
    centre = QgsCoordinateTransform(layer.crs(), dest, QgsProject.instance()).transform(QgsPointXY(*POINT))
    half = 60.0 if not dest.isGeographic() else 0.001
    settings.setExtent(QgsRectangle(centre.x() - half, centre.y() - half, centre.x() + half, centre.y() + half))
    settings.setRotation(rotation)
    settings.setOutputSize(QSize(SIZE, SIZE))
    settings.setOutputDpi(DPI)
    settings.setBackgroundColor(QColor("white"))
    # as the map canvas and print layouts do: the map scope gives @map_crs to expressions
    context = QgsExpressionContext()
    context.appendScopes(QgsExpressionContextUtils.globalProjectLayerScopes(layer))
    context.appendScope(QgsExpressionContextUtils.mapSettingsScope(settings))
    settings.setExpressionContext(context)
    job = QgsMapRendererParallelJob(settings)
    job.start()
    job.waitForFinished()
    image = job.renderedImage()
    # the point's pixel position (rotation about the map centre keeps the centre fixed)
    px = settings.mapToPixel().transform(centre)
    return image, (px.x(), px.y())


def dark_pixels(image, threshold=110):
    ptr = image.constBits()
    ptr.setsize(image.sizeInBytes())
    arr = np.frombuffer(ptr, np.uint8).reshape(image.height(), image.bytesPerLine() // 4, 4)[:, : image.width()]
    grey = arr[..., :3].mean(axis=2)  # BGRA or RGBA: the mean is the same
    rows, cols = np.nonzero(grey < threshold)
    return cols.astype(float), rows.astype(float)


def image_azimuth(dx, dy):
    """Azimuth (deg clockwise from screen up) of a screen vector (x right, y down)."""
    return math.degrees(math.atan2(dx, -dy)) % 360.0


def axial_difference(a, b):
    d = (a - b) % 180.0
    return min(d, 180.0 - d)


def symbol_geometry(image, centre):
    """Azimuth of the bar (axial) and of the tick (from the centre) of the rendered symbol."""
    x, y = dark_pixels(image)
    dx, dy = x - centre[0], y - centre[1]
    r = np.hypot(dx, dy)
    mm = DPI / 25.4
    far = r > 3.2 * mm  # beyond the tick (2.4 mm): bar pixels only
    assert far.sum() > 50, "no bar drawn"
    cov = np.cov(np.vstack([dx[far], dy[far]]))
    _w, v = np.linalg.eigh(cov)
    bar_az = image_azimuth(v[0, 1], v[1, 1]) % 180.0
    # tick: pixels well off the bar's axis, within the tick length
    along = np.array([v[0, 1], v[1, 1]])
    across = np.abs(dx * along[1] - dy * along[0])
    near_tick = (r < 3.0 * mm) & (across > 0.6 * mm)
    assert near_tick.sum() > 20, "no tick drawn"
    tick_az = image_azimuth(dx[near_tick].mean(), dy[near_tick].mean())
    return bar_az, tick_az


def expected_convergence(map_crs):
    """Azimuth on the map of the layer CRS's grid north at POINT (independently, with pyproj)."""
    from pyproj import Transformer

    t = Transformer.from_crs(LAYER_CRS, map_crs, always_xy=True)
    x0, y0 = t.transform(*POINT)
    x1, y1 = t.transform(POINT[0], POINT[1] + 10.0)
    return math.degrees(math.atan2(x1 - x0, y1 - y0))


CASES = [
    # (strike, map CRS, map rotation)
    pytest.param(30.0, LAYER_CRS, 0.0, id="strike30-same-crs"),
    pytest.param(125.0, LAYER_CRS, 0.0, id="strike125-same-crs"),
    pytest.param(300.0, LAYER_CRS, 0.0, id="strike300-same-crs"),
    pytest.param(30.0, LAYER_CRS, 25.0, id="strike30-map-rotated-25"),
    # polar stereographic (conformal): grid north of UTM 33 is turned ~16 degrees there
    pytest.param(30.0, "EPSG:3995", 0.0, id="strike30-polar-stereographic"),
]


@pytest.mark.parametrize(("strike", "map_crs", "rotation"), CASES)
def test_strike_dip_symbol_drawn_at_strike(qgis_app, strike, map_crs, rotation):
    layer = dip_layer(strike)
    styling.style_dips(layer, measured=True)
    image, centre = render(layer, map_crs, rotation, labels=False)
    bar_az, tick_az = symbol_geometry(image, centre)
    convergence = 0.0 if map_crs == LAYER_CRS else expected_convergence(map_crs)
    if map_crs != LAYER_CRS:
        assert abs(convergence) > 5.0  # the case must test something
    want = strike + convergence + rotation  # QGIS: map rotation is clockwise on screen
    # 1 degree: a 83 px bar antialiased; pixel quantisation alone is < 0.5 degree
    assert axial_difference(bar_az, want) < 1.0, (bar_az, want)
    # tick toward the dip direction = strike + 90 (right-hand rule); its pixels' mean direction
    # is within a few degrees (the bar's width near the centre pulls it slightly)
    d = (tick_az - (want + 90.0)) % 360.0
    assert min(d, 360.0 - d) < 8.0, (tick_az, want + 90.0)


@pytest.mark.parametrize("rotation", [0.0, 40.0], ids=["north-up", "rotated-40"])
def test_dip_label_drawn_beside_symbol_on_dip_side(qgis_app, rotation):
    strike = 60.0
    layer = dip_layer(strike, dip_deg=37.0)
    styling.style_dips(layer, measured=True)
    labeling = layer.labeling().settings()
    assert "dip_deg" in labeling.fieldName and layer.labelsEnabled()
    without, centre = render(layer, rotation=rotation, labels=False)
    with_labels, _ = render(layer, rotation=rotation, labels=True)
    x0, y0 = dark_pixels(without)
    x1, y1 = dark_pixels(with_labels)
    before = set(zip(x0.astype(int), y0.astype(int)))
    added = np.array([p for p in zip(x1.astype(int), y1.astype(int)) if p not in before], float)
    assert len(added) > 30, "the label added no dark pixels"
    dx, dy = added[:, 0].mean() - centre[0], added[:, 1].mean() - centre[1]
    mm = DPI / 25.4
    assert math.hypot(dx, dy) < 10 * mm  # beside the symbol, not elsewhere on the map
    dip_dir = math.radians(strike + 90.0 + rotation)
    toward_dip = dx * math.sin(dip_dir) - dy * math.cos(dip_dir)
    assert toward_dip > 1.5 * mm, "label not on the dip side"


def test_measured_and_surface_symbols_differ(qgis_app):
    a, b = dip_layer(45.0), dip_layer(45.0)
    styling.style_dips(a, measured=True)
    styling.style_dips(b, measured=False)
    sa = a.renderer().rootRule().children()[0].symbol()
    sb = b.renderer().rootRule().children()[0].symbol()
    assert sa.color().name() != sb.color().name()
    assert sa.symbolLayer(0).size() > sb.symbolLayer(0).size()


# --------------------------------------------------------------------------------- the styled group
def _pixel(image, x, y):
    c = QColor(image.pixel(round(x), round(y)))
    return np.array([c.red(), c.green(), c.blue()], float)


def _ramp_colour(ramp, t):
    pos = np.array([p for p, _ in ramp])
    rgb = np.array([[QColor(c).red(), QColor(c).green(), QColor(c).blue()] for _, c in ramp], float)
    return np.array([np.interp(t, pos, rgb[:, k]) for k in range(3)])


@pytest.mark.slow
def test_styled_group_renders(qgis_app, core_results, tmp_path):
    from osgeo import gdal
    from qgis.core import QgsProject, QgsRasterLayer
    from rockhead.plugin.make_sample_project import full_extent, render_png

    out_dir, _ = core_results
    project = QgsProject.instance()
    group = styling.load_results(str(out_dir), project)
    layers = styling.group_layers(group)
    names = [lyr.name() for lyr in layers]
    assert names[0].startswith("Dip and strike") and "Reflector depth below ground" in names
    crs = layers[0].crs()
    extent = full_extent(layers)
    png = tmp_path / "group.png"
    image = render_png(layers, png, crs, extent, size=(800, 640))
    assert png.is_file() and png.stat().st_size > 10_000
    white = sum(QColor(image.pixel(x, y)).name() == "#ffffff" for x in range(0, 800, 8) for y in range(0, 640, 8))
    # the map is drawn, not blank: the full extent is the grid's, wider than the mapped cells (about a
    # third of the image is map, lines and labels); a blank render is all white
    assert white < 0.8 * (100 * 80), white

    # the depth ramp: the colour at a cell is the ramp's colour for that cell's depth
    depth = next(lyr for lyr in layers if isinstance(lyr, QgsRasterLayer) and "depth" in lyr.name().lower())
    legend = [label for label, _colour in depth.renderer().legendSymbologyItems()]
    assert len(legend) == len(styling.DEPTH_RAMP) and all(text.endswith(" m") for text in legend)
    ds = gdal.Open(depth.source())
    band = ds.GetRasterBand(1)
    arr = band.ReadAsArray().astype(float)
    if band.GetNoDataValue() is not None:
        arr[arr == band.GetNoDataValue()] = np.nan
    gt = ds.GetGeoTransform()
    band = None
    ds = None
    lo, hi = np.nanmin(arr), np.nanmax(arr)
    only_raster = render_png([depth], None, crs, extent, size=(800, 640))
    from qgis.core import QgsMapSettings, QgsPointXY
    from qgis.PyQt.QtCore import QSize

    ms = QgsMapSettings()
    ms.setDestinationCrs(crs)
    ms.setOutputSize(QSize(800, 640))
    ms.setExtent(extent)
    m2p = ms.mapToPixel()
    rows, cols = np.nonzero(np.isfinite(arr))
    checked = 0
    for k in np.linspace(0, len(rows) - 1, 25).astype(int):
        r, c = rows[k], cols[k]
        # cell centre; skip cells at the edge of the mask (their pixel may straddle nodata)
        if not np.all(np.isfinite(arr[max(r - 1, 0) : r + 2, max(c - 1, 0) : c + 2])):
            continue
        x = gt[0] + (c + 0.5) * gt[1]
        y = gt[3] + (r + 0.5) * gt[5]
        p = m2p.transform(QgsPointXY(x, y))
        want = _ramp_colour(styling.DEPTH_RAMP, (arr[r, c] - lo) / (hi - lo))
        got = _pixel(only_raster, p.x(), p.y())
        # 8-bit colours, linear interpolation between the stops: within a few levels
        assert np.abs(got - want).max() <= 6, (arr[r, c], got, want)
        checked += 1
    assert checked >= 10

    # shots coloured by fit status (all ok in the sample: green)
    shots = next(lyr for lyr in layers if lyr.name().startswith("Shots"))
    shots_only = render_png([shots], None, crs, extent, size=(800, 640))
    f = next(shots.getFeatures())
    assert f["status"] == "ok"
    p = m2p.transform(f.geometry().asPoint())
    np.testing.assert_allclose(
        _pixel(shots_only, p.x(), p.y()),
        _ramp_colour([(0, styling.STATUS_COLOURS["ok"]), (1, styling.STATUS_COLOURS["ok"])], 0),
        atol=3,
    )

    # labelled contours: labels add pixels; index contours are drawn heavier
    all_layers = styling.group_layers(group, visible_only=False)
    contours = next(lyr for lyr in all_layers if lyr.name() == "Reflector elevation contours")
    contours.setLabelsEnabled(False)
    plain = render_png([contours], None, crs, extent, size=(800, 640))
    contours.setLabelsEnabled(True)
    labelled = render_png([contours], None, crs, extent, size=(800, 640))
    changed = sum(plain.pixel(x, y) != labelled.pixel(x, y) for x in range(0, 800, 2) for y in range(0, 640, 2))
    assert changed > 50
    rules = contours.renderer().rootRule().children()
    assert rules[0].symbol().width() > rules[1].symbol().width()
    assert "index" in rules[0].filterExpression() and "'elevation'" in rules[0].filterExpression()


def test_sample_project_builder(qgis_app, core_results, tmp_path):
    from qgis.core import QgsProject
    from rockhead.plugin.make_sample_project import build_project
    from rockhead.plugin.qc_dock import PROJECT_KEY_SURVEY, PROJECT_SCOPE

    out_dir, _ = core_results
    results = tmp_path / "results"
    shutil.copytree(out_dir, results)
    (tmp_path / "survey.toml").write_text("# placeholder\n")
    qgz = tmp_path / "demo.qgz"
    build_project(results, qgz, tmp_path / "survey.toml")
    assert qgz.is_file()
    QgsProject.instance().clear()
    project = QgsProject.instance()
    assert project.read(str(qgz))
    group = project.layerTreeRoot().findGroup(styling.GROUP_NAME)
    assert group is not None and len(group.findLayers()) >= 8
    assert all(node.layer().isValid() for node in group.findLayers())
    stored = project.readEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, "")[0]
    assert stored.startswith("./") or not stored.startswith("/")  # relative to the project
    assert project.readPath(stored) == str(tmp_path / "survey.toml")
    # the written project keeps the styles (rule-based dips rotated by strike)
    dips = next(n.layer() for n in group.findLayers() if n.layer().name().startswith("Dip and strike (crossing"))
    sym = dips.renderer().rootRule().children()[0].symbol()
    assert "strike_deg" in sym.dataDefinedAngle().expressionString()
    project.clear()


def test_sample_project_rebuild_keeps_an_unchanged_file(qgis_app, core_results, tmp_path):
    """A rebuild from the same results leaves the .qgz's bytes alone (QGIS stamps each save with the time
    and new random layer ids: the demo must not show the shipped project as modified); a real change is written."""
    from qgis.core import QgsProject
    from rockhead.plugin.make_sample_project import project_content, same_content, write_if_changed

    out_dir, _ = core_results
    shutil.copytree(out_dir, tmp_path / "results")
    qgz = tmp_path / "demo.qgz"
    assert write_if_changed(tmp_path / "results", qgz)  # new
    first = qgz.read_bytes()
    assert not write_if_changed(tmp_path / "results", qgz)
    assert qgz.read_bytes() == first
    assert not (set(p.name for p in tmp_path.iterdir()) - {"results", "demo.qgz"})  # nothing left beside it
    assert write_if_changed(tmp_path / "results", qgz, title="another title")
    assert qgz.read_bytes() != first and project_content(qgz) != project_content(io.BytesIO(first))
    # decimals compared to 1e-6 (legend limits in their last digits), everything else exactly
    assert same_content('<a v="0.0862692520022392"/>', '<a v="0.0862692445516586"/>')
    assert not same_content('<a v="0.0862692520022392"/>', '<a v="0.0863"/>')
    assert not same_content('<a v="0.5" w="x"/>', '<a v="0.5" w="y"/>')
    QgsProject.instance().clear()


# --------------------------------------------------------------------------------- the shipped project
def test_shipped_project_legends_are_the_data_ranges(qgis_app, core_results, tmp_path):
    """sample_project/tarnwick.qgz (rebuilt by scripts/demo.sh) over the sample's results: every raster's
    legend runs over that raster's own data range, in units; every vector layer has aliases, the
    contours, boreholes and lines their labels."""
    from osgeo import gdal
    from qgis.core import QgsProject, QgsRasterLayer, QgsVectorLayer
    from rockhead.core.products.styles import raster_style

    out_dir, _ = core_results
    shutil.copy(REPO / "sample_project" / "tarnwick.qgz", tmp_path / "tarnwick.qgz")
    shutil.copytree(out_dir, tmp_path / "results")  # the project refers to ./results/
    project = QgsProject.instance()
    project.clear()
    assert project.read(str(tmp_path / "tarnwick.qgz"))
    layers = list(project.mapLayers().values())
    assert layers and all(lyr.isValid() for lyr in layers)
    rasters = [lyr for lyr in layers if isinstance(lyr, QgsRasterLayer)]
    assert {os.path.basename(r.source()) for r in rasters} >= {"reflector_depth.tif", "depth_sigma.tif"}
    for r in rasters:
        name = os.path.basename(r.source())
        ds = gdal.Open(r.source())
        band = ds.GetRasterBand(1)
        arr = band.ReadAsArray().astype(float)
        nodata = band.GetNoDataValue()
        if nodata is not None:
            arr[arr == nodata] = np.nan
        ds = None
        lo, hi = np.nanmin(arr), np.nanmax(arr)
        renderer = r.renderer()
        _ramp, suffix, prefix, decimals, _fixed = raster_style(name)
        hi = hi if hi > lo else lo + 10.0**-decimals  # a constant field spans one step of its legend
        # the legend shows the range to `decimals` decimals: it must be the data's to that rounding
        half = 0.5 * 10.0**-decimals
        assert abs(renderer.classificationMin() - lo) <= half, (name, renderer.classificationMin(), lo)
        assert abs(renderer.classificationMax() - hi) <= half, (name, renderer.classificationMax(), hi)
        labels = [text for text, _colour in renderer.legendSymbologyItems()]
        assert labels[0] == f"{prefix}{lo:.{decimals}f}{suffix}" and labels[-1] == f"{prefix}{hi:.{decimals}f}{suffix}"
    vectors = {lyr.name(): lyr for lyr in layers if isinstance(lyr, QgsVectorLayer)}
    for lyr in vectors.values():
        for i, field in enumerate(lyr.fields()):
            assert lyr.attributeAlias(i), (lyr.name(), field.name())
    for name in ("Reflector depth contours", "Reflector elevation contours", "Boreholes", "Seismic lines"):
        lyr = vectors[name]
        assert lyr.labelsEnabled(), name
    assert "' m'" in vectors["Reflector depth contours"].labeling().settings().fieldName
    assert "residual" in vectors["Boreholes"].labeling().settings().fieldName
    project.clear()


@pytest.mark.slow
def test_other_interfaces_load_in_their_subgroup(qgis_app, tmp_path):
    """A layered survey's other interfaces and interval velocities load hidden, styled by their .qml."""
    import sys

    from qgis.core import QgsProject, QgsRasterLayer
    from rockhead.core import job

    sys.path.insert(0, str(REPO / "tests" / "core"))
    from test_pipeline_layers import _write_survey  # two flat reflectors, exact times

    path = _write_survey(tmp_path)
    path.write_text(path.read_text() + '[processing]\nsurface_method = "kriging"\n')
    job.run(path, tmp_path / "out")
    group = styling.load_results(str(tmp_path / "out"), QgsProject.instance())
    sub = next(g for g in group.children() if g.name() == "Other interfaces and layers")
    names = sorted(node.layer().name() for node in sub.findLayers())
    assert names == [
        "interval velocity ground to top",
        "interval velocity top to rock",
        "top depth",
        "top depth sigma",
        "top elevation",
        "top elevation sigma",
    ]
    assert not any(node.isVisible() for node in sub.findLayers())
    depth = next(n.layer() for n in sub.findLayers() if n.layer().name() == "top depth")
    assert isinstance(depth, QgsRasterLayer)
    legend = [label for label, _colour in depth.renderer().legendSymbologyItems()]
    assert len(legend) == len(styling.DEPTH_RAMP)  # the depth ramp of its .qml (the core's style)
