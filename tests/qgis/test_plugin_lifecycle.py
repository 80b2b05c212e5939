"""The plugin loads through classFactory in QGIS, registers its provider, and unloads cleanly."""

import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

import rockhead
from qgis.core import Qgis, QgsApplication
from qgis.PyQt.QtWidgets import QAction

ALGORITHM_IDS = {
    "fitgathers",
    "combinelines",
    "interpolatesurface",
    "runsurvey",
    "mapsheet",
    "sectionalongalignment",
    "designlevel",
}


def _registry():
    return QgsApplication.processingRegistry()


def test_load_and_unload_through_class_factory(iface, qgis_processing, monkeypatch):
    from unittest.mock import MagicMock

    for name in ("removePluginMenu", "removeToolBarIcon", "removeDockWidget"):
        monkeypatch.setattr(iface, name, MagicMock(wraps=getattr(iface, name)))
    assert _registry().providerById("rockhead") is None
    plugin = rockhead.classFactory(iface)
    plugin.initGui()
    try:
        prov = _registry().providerById("rockhead")
        assert prov is not None
        assert {a.name() for a in prov.algorithms()} == ALGORITHM_IDS
        actions = list(plugin.actions)
        plugin_qc_action = plugin.qc_action
        assert len(actions) == 3 and all(isinstance(a, QAction) for a in actions)
        plugin.show_qc_panel(True)
        assert plugin.dock is not None and not plugin.dock.isHidden()
    finally:
        plugin.unload()
    assert _registry().providerById("rockhead") is None
    assert plugin.provider is None and plugin.dock is None and plugin.actions == []
    # every menu entry and the toolbar button were taken out again (the stub records the calls)
    removed = [c.args[1] for c in iface.removePluginMenu.call_args_list]
    assert all(any(a is r for r in removed) for a in actions)
    assert any(c.args[0] is plugin_qc_action for c in iface.removeToolBarIcon.call_args_list)
    assert iface.removeDockWidget.call_count == 1


def test_load_twice_in_a_row_leaves_one_provider(iface, qgis_processing):
    # QGIS reloads plugins (Plugin Reloader, updates): unload must leave nothing behind.
    for _ in range(2):
        plugin = rockhead.classFactory(iface)
        plugin.initGui()
        assert _registry().providerById("rockhead") is not None
        plugin.unload()
        assert _registry().providerById("rockhead") is None


def test_every_algorithm_has_help_with_the_caution(provider):
    for alg in provider.algorithms():
        text = alg.shortHelpString()
        assert "does not replace borings" in text, alg.id()
        assert "licensed professionals" in text, alg.id()
        assert alg.id().startswith("rockhead:")


def test_run_survey_help_names_the_files_a_run_writes(provider):
    """The whole-survey help names the outputs a user looks for (the QC figures, DXF and CSV were missing)."""
    help_text = provider.algorithm("runsurvey").shortHelpString()
    names = ("survey.gpkg", "elevation_sigma.tif", "contours_depth.dxf", "csv/", "qc/", "report.html", "map_sheet.pdf")
    for name in names:
        assert name in help_text, name


@pytest.mark.parametrize(
    ("missing", "pip", "debian"),
    [
        ("scipy", "scipy", "python3-scipy"),
        ("shapely", "shapely", "python3-shapely"),
        ("contourpy", "contourpy", "python3-contourpy"),
        ("matplotlib", "matplotlib", "python3-matplotlib"),
        ("osgeo.gdal", "GDAL", "python3-gdal"),
    ],
    ids=["no-scipy", "no-shapely", "no-contourpy", "no-matplotlib", "no-gdal-bindings"],
)
def test_missing_package_is_named_and_no_provider(iface, qgis_processing, missing, pip, debian):
    import importlib

    def importer(name):
        if name == missing:
            raise ImportError(f"No module named '{name}'")
        return importlib.import_module(name)

    bar = iface.messageBar()
    bar.clear_messages()
    from rockhead.plugin.main import RockheadPlugin

    plugin = RockheadPlugin(iface, importer=importer)
    plugin.initGui()
    try:
        assert _registry().providerById("rockhead") is None
        messages = bar.get_messages(Qgis.Critical)
        assert messages and pip in messages[-1]
        from rockhead.plugin import deps

        full = deps.missing_message(plugin.missing)
        assert f"pip install {pip}" in full and f"apt install {debian}" in full
        assert "OSGeo4W" in full
    finally:
        plugin.unload()
