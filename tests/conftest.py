"""Make the plugin importable under its own package name, ``rockhead``.

The checkout folder may have any name (CI clones into another one), so the
package is reached through a temporary folder holding a link named after the
plugin, which is also how QGIS loads it. An editable install that points at
this checkout is used as it is.
"""

import importlib
import os
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
PACKAGE = "rockhead"


def _ensure_package():
    """Import ``rockhead`` from this checkout through a folder holding a link named ``rockhead``.

    An editable install maps the package onto the checkout itself, whose folder may have any name;
    child processes of another Python (the other stack) need a folder whose entry ``rockhead`` is
    this checkout, so the tests always import through one.
    """
    try:
        mod = importlib.import_module(PACKAGE)
        here = Path(mod.__path__[0])
        if here.name == PACKAGE and here.resolve() == REPO:
            return
        for name in [m for m in sys.modules if m == PACKAGE or m.startswith(PACKAGE + ".")]:
            del sys.modules[name]
    except ImportError:
        pass
    link_dir = Path(tempfile.mkdtemp(prefix="rockhead-pkg-"))
    os.symlink(REPO, link_dir / PACKAGE)
    sys.path.insert(0, str(link_dir))
    importlib.invalidate_caches()
    mod = importlib.import_module(PACKAGE)
    assert Path(mod.__path__[0]).name == PACKAGE, mod.__path__


_ensure_package()

SAMPLE = REPO / "sample_project"


def pytest_collection_modifyitems(config, items):
    """Two tiers: a test that needs the whole sample-project run is slow, whatever its file."""
    for item in items:
        if "sample_run" in getattr(item, "fixturenames", ()):
            item.add_marker(pytest.mark.slow)


def cli_env() -> dict:
    """Environment in which a child Python imports the same ``rockhead`` as the tests."""
    import rockhead

    env = dict(os.environ)
    parent = str(Path(rockhead.__path__[0]).parent)  # the link folder made above, or the install
    env["PYTHONPATH"] = os.pathsep.join([parent, env.get("PYTHONPATH", "")])
    return env


def run_cli_process(*args, timeout_s: float = 600.0):
    """``python -m rockhead.core.cli ARGS`` in a child process (the installed command's code)."""
    import subprocess

    return subprocess.run(
        [sys.executable, "-m", "rockhead.core.cli", *map(str, args)],
        capture_output=True,
        text=True,
        env=cli_env(),
        timeout=timeout_s,
    )


@pytest.fixture(scope="session")
def repo_root():
    return REPO


@pytest.fixture(scope="session")
def sample_dir():
    return SAMPLE


@pytest.fixture(scope="session")
def run_cli():
    """The command line in a child process: ``run_cli("run", survey, "--out", folder)``."""
    return run_cli_process


@dataclass(frozen=True)
class SampleRun:
    """The sample project run once: where, what the command printed, and the result it wrote."""

    survey_toml: Path  # a private copy of the sample survey's inputs
    out: Path  # the output folder written by ``rockhead run``
    exit_code: int
    stdout: str
    stderr: str
    result: object  # the RunResult the command computed and wrote


@pytest.fixture(scope="session")
def sample_run(tmp_path_factory):
    """``rockhead run`` once per session on a copy of the sample survey (a :class:`SampleRun`).

    The command line's own ``main`` runs in this process, so the :class:`RunResult` it wrote
    is kept (a spy around ``job.run``) besides its output folder and messages. Shared by every
    test that needs the sample project's outputs or result (the core's end-to-end checks and
    the QGIS comparisons); the surface method is the survey's own (``auto``). Tests using it
    are marked slow. The command in a child process is tested on its own (test_bad_inputs,
    test_pipeline).
    """
    import contextlib
    import io
    import shutil

    from rockhead.core import cli, job

    folder = tmp_path_factory.mktemp("sample_run")
    for path in SAMPLE.iterdir():  # the inputs (no results folder), so the run reads what survey.toml names
        if path.is_file():
            shutil.copy2(path, folder / path.name)
    out = folder / "results"
    seen = []
    real_run = job.run

    def spy(*args, **kwargs):
        seen.append(real_run(*args, **kwargs))
        return seen[-1]

    stdout, stderr = io.StringIO(), io.StringIO()
    with pytest.MonkeyPatch.context() as mp, contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        mp.setattr(job, "run", spy)
        code = cli.main(["run", str(folder / "survey.toml"), "--out", str(out)])
    assert code == 0 and len(seen) == 1, stderr.getvalue()
    return SampleRun(folder / "survey.toml", out, code, stdout.getvalue(), stderr.getvalue(), seen[0])


@pytest.fixture
def rng():
    import numpy as np

    return np.random.default_rng(20261202)


# ------------------------------------------------------------------ GDAL's conformance checkers
SYSTEM_PYTHON = "/usr/bin/python3"  # Debian's Python with GDAL's bindings (python3-gdal)
VALIDATE_SCRIPT = Path(__file__).resolve().parent / "gdal_validate.py"
PRODUCT_MARK = b"Rockhead "  # every product file carries "Rockhead <version>" in its metadata


def _clean_env(debian: bool) -> dict:
    """This environment without another interpreter's paths; PROJ's data of Debian for its Python
    (a PyPI pyproj or rasterio carries its own, of another PROJ version)."""
    drop = ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV", "PROJ_DATA", "PROJ_LIB", "GDAL_DATA")
    env = {k: v for k, v in os.environ.items() if k not in drop}
    if debian:
        env["PROJ_DATA"] = "/usr/share/proj"
    return env


def run_gdal_validators(paths) -> dict:
    """file -> problems found by GDAL's GeoPackage and cloud-optimised GeoTIFF validators.

    Runs ``tests/gdal_validate.py`` with Debian's Python (GDAL 3.6 there), in a
    clean environment, whichever stack the tests run on. Skips (fails on CI)
    when that Python has no GDAL bindings.
    """
    import json
    import subprocess

    paths = [str(p) for p in paths]
    if not paths:
        return {}
    env = _clean_env(debian=True)
    try:
        proc = subprocess.run(
            [SYSTEM_PYTHON, str(VALIDATE_SCRIPT), *paths], capture_output=True, text=True, env=env, timeout=600
        )
    except FileNotFoundError:
        proc = None
    if proc is None or "No module named 'osgeo" in proc.stderr:
        message = f"GDAL's validators need {SYSTEM_PYTHON} with GDAL's Python bindings (Debian: python3-gdal)"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


@pytest.fixture(scope="session")
def gdal_validate():
    """A function asserting that GDAL's validators accept every file given."""

    def check(*paths):
        found = run_gdal_validators(paths)
        bad = {p: msgs for p, msgs in found.items() if msgs}
        assert not bad, bad
        return found

    return check


def _is_product(path: Path) -> bool:
    if path.suffix.lower() in (".tif", ".tiff"):
        with open(path, "rb") as fh:
            return PRODUCT_MARK in fh.read(1 << 16)
    import sqlite3

    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            rows = con.execute("SELECT metadata FROM gpkg_metadata").fetchall()
        finally:
            con.close()
    except sqlite3.Error:
        return False
    return any(PRODUCT_MARK.decode() in (r[0] or "") for r in rows)


@pytest.fixture(scope="session", autouse=True)
def _every_product_passes_gdal_validators(tmp_path_factory):
    """After the session: every GeoTIFF and GeoPackage the project wrote anywhere in the tests'
    temporary folders passes GDAL's validators (files marked as products: their metadata names
    Rockhead; reference files and deliberately broken inputs are not)."""
    yield
    base = tmp_path_factory.getbasetemp()
    found = [
        p
        for p in sorted(base.rglob("*"))
        if p.suffix.lower() in (".tif", ".tiff", ".gpkg")
        and p.is_file()
        and not p.name.startswith(".")
        and not p.is_symlink()
        and _is_product(p)
    ]
    if not found:
        return
    try:
        results = run_gdal_validators(found)
    except pytest.skip.Exception:  # no validator on this machine (never on CI: it fails there)
        return
    bad = {p: m for p, m in results.items() if m}
    assert not bad, f"{len(bad)} of {len(found)} product files fail GDAL's validators: {bad}"


# ------------------------------------------------------------------ the other Python stack
def _this_engine() -> str:
    from rockhead.core.formats.gdalio import engine

    return engine()


def other_stack_python():
    """(interpreter, engine) of the other stack: Debian's Python with GDAL's bindings when the
    tests run on PyPI packages (rasterio, pyogrio), the PyPI venv when they run with osgeo."""
    if _this_engine() == "pypi":
        return SYSTEM_PYTHON, "osgeo"
    candidates = [os.environ.get("ROCKHEAD_PYPI_PYTHON"), str(REPO / ".venv" / "bin" / "python")]
    for c in candidates:
        if c and Path(c).exists():
            return c, "pypi"
    return None, "pypi"


@pytest.fixture(scope="session")
def run_on_other_stack():
    """Run Python code on the other stack with this checkout's ``rockhead`` importable; return stdout.

    Skipped (failed on CI) when the other stack is not installed.
    """
    import subprocess

    python, name = other_stack_python()
    if python is None or not Path(python).exists():
        message = f"the other Python stack ({name}) is not installed here"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    link_parent = str(Path(importlib.import_module(PACKAGE).__path__[0]).parent)

    def run(code: str, *args) -> str:
        env = _clean_env(debian=name == "osgeo")
        env["PYTHONPATH"] = link_parent
        proc = subprocess.run(
            [python, "-c", code, *map(str, args)], capture_output=True, text=True, env=env, timeout=600
        )
        if name == "osgeo" and "No module named 'osgeo" in proc.stderr:
            pytest.skip(f"{python} has no GDAL bindings")
        assert proc.returncode == 0, proc.stderr
        return proc.stdout

    run.engine = name
    return run
