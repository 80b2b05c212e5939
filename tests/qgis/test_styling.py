"""The strike-and-dip symbol is drawn at the strike angle on the map, with its dip label.

Checks are made on rendered pixels (offscreen QGIS map renderer): the long
bar's pixels are fitted with a principal axis and its azimuth compared with
the strike; the tick's pixels must lie on the dip side (strike + 90 degrees,
right-hand rule, FGDC-STD-013-2006 symbol); the label's pixels appear beside
the symbol on the dip side.
"""

import math

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import (  # noqa: E402
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
from qgis.PyQt.QtCore import QSize  # noqa: E402
from qgis.PyQt.QtGui import QColor  # noqa: E402

from reflector_mapper.plugin import styling  # noqa: E402

LAYER_CRS = "EPSG:32633"
POINT = (560000.0, 5320000.0)  # UTM 33N, about 15.8 E 48.0 N
DPI = 300  # bar 7 mm = 83 px: orientation good to a fraction of a degree
SIZE = 600


def dip_layer(strike_deg, dip_deg=25.0, crs=LAYER_CRS, point=POINT):
    layer = QgsVectorLayer(f"Point?crs={crs}&field=dip_deg:double&field=dip_direction_deg:double"
                           "&field=strike_deg:double", "dips", "memory")
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
    w, v = np.linalg.eigh(cov)
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
    ca = a.renderer().symbol().color().name()
    cb = b.renderer().symbol().color().name()
    assert ca != cb
    assert a.renderer().symbol().symbolLayer(0).size() > b.renderer().symbol().symbolLayer(0).size()
