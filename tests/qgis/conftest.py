"""Fixtures for the tests that run inside a real, headless QGIS.

These tests need Debian's (or any) QGIS Python bindings and pytest-qgis. When
QGIS cannot be imported they are skipped with a reason, except on CI
(``CI=true``), where a missing QGIS is an error: the plugin must be tested there.
"""

import os
import shutil
import tempfile
from pathlib import Path

import pytest

try:
    import qgis.core  # noqa: F401

    HAVE_QGIS = True
    QGIS_ERROR = ""
except ImportError as err:  # pragma: no cover - depends on the machine
    HAVE_QGIS = False
    QGIS_ERROR = str(err)
    if os.environ.get("CI") == "true":
        raise RuntimeError(
            f"CI=true but QGIS's Python bindings cannot be imported ({err}); the QGIS tests must run on CI. "
            "Install qgis and python3-qgis and use the .venv-qgis interpreter (scripts/test.sh)."
        ) from err

REPO = Path(__file__).resolve().parents[2]
SAMPLE_INPUTS = ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv")


def pytest_collection_modifyitems(config, items):
    if HAVE_QGIS:
        return
    skip = pytest.mark.skip(
        reason=f"QGIS Python bindings not importable here ({QGIS_ERROR}); run with .venv-qgis (see scripts/test.sh)"
    )
    for item in items:
        if "tests/qgis" in str(item.fspath).replace(os.sep, "/"):
            item.add_marker(skip)


@pytest.fixture(scope="session")
def plugin_dir():
    """A folder holding a link named ``rockhead`` to this checkout (as QGIS loads it)."""
    folder = Path(tempfile.mkdtemp(prefix="rm-plugins-"))
    os.symlink(REPO, folder / "rockhead")
    yield folder
    shutil.rmtree(folder, ignore_errors=True)


@pytest.fixture
def sample_survey(tmp_path):
    """A private copy of the sample survey's inputs (no results), returns its survey.toml."""
    src = REPO / "sample_project"
    dst = tmp_path / "survey"
    dst.mkdir()
    for name in SAMPLE_INPUTS:
        if (src / name).exists():
            shutil.copy2(src / name, dst / name)
    return dst / "survey.toml"


@pytest.fixture(scope="session")
def core_results(sample_run):
    """``(output folder, RunResult)`` of the core on the sample survey (reference for the plugin's outputs).

    The session's one command-line run of the sample project (``sample_run`` in
    tests/conftest.py), with the survey's own surface method.
    """
    return sample_run.out, sample_run.result


@pytest.fixture
def provider(qgis_processing):
    """The Rockhead provider registered for one test, removed afterwards."""
    from qgis.core import QgsApplication
    from rockhead.plugin.provider import RockheadProvider

    registry = QgsApplication.processingRegistry()
    existing = registry.providerById("rockhead")
    if existing is not None:
        yield existing
        return
    prov = RockheadProvider()
    assert registry.addProvider(prov)
    yield prov
    registry.removeProvider(prov)


@pytest.fixture(autouse=True)
def _clean_project():
    """Remove every layer from the project after each test (file-backed layers alive at
    exitQgis() crash the interpreter)."""
    yield
    if HAVE_QGIS:
        from qgis.core import QgsProject

        QgsProject.instance().removeAllMapLayers()
        QgsProject.instance().layerTreeRoot().removeAllChildren()


@pytest.fixture
def iface(qgis_iface):
    """pytest-qgis's stub iface, its map canvas given a projected CRS (without one PROJ complains
    'unrecognized format' when layers are added)."""
    from qgis.core import QgsCoordinateReferenceSystem

    qgis_iface.mapCanvas().setDestinationCrs(QgsCoordinateReferenceSystem("EPSG:32633"))
    return qgis_iface
