"""The provider works from the qgis_process command line (the plugin loaded as QGIS loads it)."""

import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsVectorLayer
from qgis_process_env import enabled_env
from qgis_process_env import run as qgis_process
from rockhead.core import workflow
from rockhead.core.products import layers
from rockhead.core.survey import config


@pytest.fixture(scope="module")
def qp_env(plugin_dir, tmp_path_factory):
    return enabled_env(tmp_path_factory.mktemp("qgis-home"), plugin_dir)


def test_list_shows_provider(qp_env):
    out = qgis_process(qp_env, "list")
    assert out.returncode == 0, out.stderr
    for alg in ("fitgathers", "combinelines", "interpolatesurface", "runsurvey"):
        assert f"rockhead:{alg}" in out.stdout


def test_help_carries_the_caution(qp_env):
    out = qgis_process(qp_env, "help", "rockhead:runsurvey")
    assert out.returncode == 0, out.stderr
    assert "does not replace borings" in out.stdout
    assert "SURVEY" in out.stdout and "OUTPUT" in out.stdout


def test_run_fit_gathers(qp_env, sample_survey, tmp_path):
    shots = tmp_path / "shots.gpkg"
    out = qgis_process(
        qp_env,
        "run",
        "rockhead:fitgathers",
        "--",
        f"SURVEY={sample_survey}",
        f"SHOTS={shots}",
        f"REFLECTOR_POINTS={tmp_path / 'points.gpkg'}",
    )
    assert out.returncode == 0, out.stdout + out.stderr
    step = workflow.fit_step(config.load_survey(sample_survey))
    ref = layers.shots_layer(step.gathers, step.fits)
    layer = QgsVectorLayer(str(shots), "shots", "ogr")
    assert layer.featureCount() == len(ref)
    got = {(f["line"], str(f["shot"])): f["velocity_m_s"] for f in layer.getFeatures()}
    for line, shot, v in zip(ref.fields["line"], ref.fields["shot"], ref.fields["velocity_m_s"]):
        # another process: the iterative fit (stopping at relative steps of 1e-10) may differ in the
        # last digits with the thread layout of the linear algebra; 1e-7 relative is 0.2 mm/s,
        # far below the velocity's standard error (metres per second)
        assert got[(str(line), str(shot))] == pytest.approx(float(v), rel=1e-7)
    del layer


@pytest.mark.slow
def test_run_whole_survey(qp_env, sample_survey, tmp_path):
    out_dir = tmp_path / "results"
    out = qgis_process(
        qp_env,
        "run",
        "rockhead:runsurvey",
        "--",
        f"SURVEY={sample_survey}",
        f"OUTPUT={out_dir}",
        "LOAD_RESULTS=false",
        "METHOD=2",
    )  # 2 = kriging
    assert out.returncode == 0, out.stdout + out.stderr
    for name in ("survey.gpkg", "reflector_elevation.tif", "reflector_depth.tif", "depth_sigma.tif", "report.html"):
        assert (out_dir / name).is_file(), name


def test_stripped_environment_names_what_is_missing(plugin_dir, tmp_path):
    """A QGIS whose Python lacks contourpy (a module of that name raising ImportError, first on the
    path): the plugin says which package and how to install it, registers no provider, no traceback."""
    shim = tmp_path / "shim" / "contourpy"
    shim.mkdir(parents=True)
    (shim / "__init__.py").write_text('raise ImportError("No module named contourpy (hidden by the test)")\n')
    env = enabled_env(tmp_path / "home", plugin_dir)
    env["PYTHONPATH"] = str(tmp_path / "shim")
    out = qgis_process(env, "list")
    assert out.returncode == 0, out.stderr
    assert "rockhead:" not in out.stdout  # no provider without its packages
    text = out.stdout + out.stderr
    assert "Rockhead cannot start: the Python package(s) contourpy could not be imported" in text
    assert "pip install contourpy" in text and "apt install python3-contourpy" in text
    assert "Traceback" not in text


def test_inputs_confined_to_the_survey_folder_under_qgis_process(qp_env, sample_survey, tmp_path):
    """Under qgis_process (a server, a batch of folders from elsewhere) a survey.toml may not name
    files outside its own folder unless the parameter is turned off."""
    import shutil
    from pathlib import Path

    folder = tmp_path / "confined"
    shutil.copytree(Path(sample_survey).parent, folder)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    shutil.move(str(folder / "picks.csv"), elsewhere / "picks.csv")
    toml = folder / "survey.toml"
    toml.write_text(toml.read_text().replace('picks = "picks.csv"', 'picks = "../elsewhere/picks.csv"'))
    args = [
        "run",
        "rockhead:fitgathers",
        "--",
        f"SURVEY={toml}",
        f"SHOTS={tmp_path / 'shots.gpkg'}",
        f"REFLECTOR_POINTS={tmp_path / 'points.gpkg'}",
    ]
    out = qgis_process(qp_env, *args)
    assert out.returncode != 0
    assert "outside the survey's folder" in out.stdout + out.stderr
    out = qgis_process(qp_env, *args, "INPUTS_IN_SURVEY_FOLDER=false")
    assert out.returncode == 0, out.stdout + out.stderr
