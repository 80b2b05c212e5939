"""A GeoPackage written by the command line opens styled in real QGIS, without the plugin.

The command line runs on the PyPI stack (rasterio and pyogrio write the
files); the core run of the session fixture on QGIS's own stack (GDAL's
bindings write them). QGIS opens each file as a user would (a plain
``QgsVectorLayer`` / ``QgsRasterLayer``): the layer's default style comes from
the GeoPackage's ``layer_styles`` table, a raster's from the ``.qml`` beside it,
the layer metadata from ``gpkg_metadata``. The stored strike-and-dip style is
rendered and measured like the plugin's (test_plugin_styling).
"""

import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsMapLayer, QgsRasterLayer, QgsReadWriteContext, QgsVectorLayer
from qgis.PyQt.QtXml import QDomDocument
from rockhead.core import colours
from rockhead.core.formats import gdalio
from rockhead.core.products import styles as core_styles
from test_plugin_styling import axial_difference, dip_layer, render, symbol_geometry

pytestmark = pytest.mark.slow  # the command line in a child process, and whole runs

_CLI = """
import sys
from rockhead.core.cli import main
sys.exit(main(["run", sys.argv[1], "--out", sys.argv[2], "--method", "kriging"]))
"""


@pytest.fixture(scope="module")
def cli_results(run_on_other_stack, tmp_path_factory):
    """The command line's results on the PyPI stack (the stack `rockhead run` is installed on)."""
    from pathlib import Path

    if run_on_other_stack.engine != "pypi":
        pytest.skip("the tests run on the PyPI stack; this check needs QGIS")
    src = Path(__file__).resolve().parents[2] / "sample_project"
    work = tmp_path_factory.mktemp("cli")
    for name in ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv"):
        (work / name).write_bytes((src / name).read_bytes())
    run_on_other_stack(_CLI, work / "survey.toml", work / "out")
    return work / "out"


@pytest.fixture(params=["cli-pypi-stack", "core-qgis-stack"])
def results(request):
    if request.param == "cli-pypi-stack":
        return request.getfixturevalue("cli_results")
    return request.getfixturevalue("core_results")[0]


def _open(out, table):
    layer = QgsVectorLayer(f"{out / 'survey.gpkg'}|layername={table}", table, "ogr")
    assert layer.isValid(), table
    return layer


def test_layers_open_with_their_default_styles(qgis_app, results):
    dips = _open(results, "dip_measurements")
    assert dips.renderer().type() == "RuleRenderer" and dips.labelsEnabled()
    symbol = dips.renderer().rootRule().children()[0].symbol()
    assert "strike_deg" in symbol.dataDefinedAngle().expressionString()
    assert symbol.color().name() == colours.MEASURED_DIP
    assert "dip_deg" in dips.labeling().settings().fieldName
    contours = _open(results, "contours")
    rules = contours.renderer().rootRule().children()
    assert contours.labelsEnabled() and len(rules) == 2
    # the default style shows the depth contours, index ones heavier
    assert "'depth'" in rules[0].filterExpression() and rules[0].symbol().width() > rules[1].symbol().width()
    shots = _open(results, "shots")
    assert [r.label()[:10] for r in shots.renderer().rootRule().children()] == ["fit ok", "not fitted", "fitted, fl"]
    for table in ("stations", "reflector_points", "boreholes", "lines", "reflection_points"):
        assert _open(results, table).renderer().type() == "singleSymbol", table
    # field aliases with units come with the style
    assert dips.attributeDisplayName(dips.fields().indexOf("dip_deg")) == "Dip (°)"
    del dips, contours, shots


def test_elevation_contours_are_a_second_stored_style(qgis_app, results):
    contours = _open(results, "contours")
    count, _ids, names, _descriptions, _error = contours.listStylesInDatabase()
    assert count == 2  # the styles of this table come first (QGIS lists the other tables' after them)
    assert names[:2] == [name for name, _kind in core_styles.CONTOUR_STYLES]
    del contours


def test_stored_styles_are_the_core_definitions(results):
    table, _crs = gdalio.read_layer(results / "survey.gpkg", "layer_styles")
    stored = dict(zip(zip(table.fields["f_table_name"], table.fields["styleName"]), table.fields["styleQML"]))
    names = gdalio.list_layers(results / "survey.gpkg")
    layers = {n: gdalio.read_layer(results / "survey.gpkg", n)[0] for n in ("shots", "dip_measurements")}
    for name, entries in core_styles.layer_styles(layers).items():
        for style_name, qml in entries:
            assert stored[(name, style_name)] == qml, name  # one definition, byte for byte
    assert {t for t, _s in stored} == {n for n in names if n != "layer_styles"}  # every layer has a style


@pytest.mark.parametrize("strike", [30.0, 125.0], ids=["strike30", "strike125"])
def test_stored_dip_style_draws_the_symbol_at_the_strike(qgis_app, results, strike):
    stored = _open(results, "dip_measurements")
    doc = QDomDocument()
    stored.exportNamedStyle(doc, QgsReadWriteContext(), QgsMapLayer.Symbology | QgsMapLayer.Labeling)
    layer = dip_layer(strike)
    assert layer.importNamedStyle(doc)[0]
    image, centre = render(layer, labels=False)
    bar_az, tick_az = symbol_geometry(image, centre)
    assert axial_difference(bar_az, strike) < 1.0  # as in test_plugin_styling: 83 px bar, antialiased
    d = (tick_az - (strike + 90.0)) % 360.0
    assert min(d, 360.0 - d) < 8.0  # tick toward the dip (right-hand rule)
    del stored


def test_layer_metadata_carries_the_caution_and_provenance(qgis_app, results):
    layer = _open(results, "reflector_points")
    md = layer.metadata()
    assert md.title().startswith("Reflector points - ")
    assert any(c.constraint.startswith("A seismic depth map is an interpretation") for c in md.constraints())
    assert "does not replace borings" in md.abstract() and "licensed professionals" in md.abstract()
    assert "Geometry z: reflector elevation" in md.abstract()
    assert any("Rockhead" in h and "kriging" in h for h in md.history())
    del layer


def test_rasters_open_with_their_ramps(qgis_app, results):
    for name, (ramp, suffix, _prefix, _decimals, _fixed) in core_styles.RASTER_STYLES.items():
        if not (results / name).exists():
            continue
        layer = QgsRasterLayer(str(results / name), name, "gdal")
        assert layer.isValid() and layer.renderer().type() == "singlebandpseudocolor", name
        items = layer.renderer().legendSymbologyItems()
        assert len(items) >= 2 and all(label.endswith(suffix) for label, _c in items), items
        assert items[0][1].name() == ramp[0][1] and items[-1][1].name() == ramp[-1][1]
        del layer
