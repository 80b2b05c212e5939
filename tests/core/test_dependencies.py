"""Dependencies declared truthfully, and a missing one said in one line, never a traceback.

Every third-party package the core imports is a required dependency of the
package (pyproject) and of the QGIS plugin (plugin/deps.py, which looks for
GDAL's own bindings where the command line uses rasterio and pyogrio).
Hiding a package from a real interpreter (a module of that name that raises
ImportError, first on the path) must give the command line's one-line message
naming it, exit code 2, and no output file.
"""

import ast
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import rockhead

try:
    import tomllib
except ImportError:  # Python < 3.11
    import tomli as tomllib

REPO = Path(__file__).resolve().parents[2]
SAMPLE = REPO / "sample_project"
# import name -> distribution name where they differ
DISTRIBUTIONS = {"osgeo": "GDAL", "PIL": "pillow"}
# the command line reaches GDAL through these two; QGIS through GDAL's own bindings
GDAL_ON_PYPI = {"rasterio", "pyogrio"}


def _names(node) -> list:
    if isinstance(node, ast.Import):
        return [a.name.split(".")[0] for a in node.names]
    if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
        return [node.module.split(".")[0]]
    return []


def _third_party_imports(folder: Path) -> set:
    """Top-level third-party modules imported under ``folder``, leaving out truly optional ones:
    imported in a ``try`` whose ``except ImportError`` carries on without raising."""
    stdlib = set(sys.stdlib_module_names) | {"tomli"}  # tomli: the tomllib of Python < 3.11
    found, optional = set(), set()
    for path in folder.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            found |= set(_names(node))
            if isinstance(node, ast.Try):
                carries_on = [
                    h
                    for h in node.handlers
                    if "ImportError" in ast.dump(h.type or ast.Name("x"))
                    and not any(isinstance(n, ast.Raise) for n in ast.walk(h))
                ]
                if carries_on:
                    optional |= {n for stmt in node.body for sub in ast.walk(stmt) for n in _names(sub)}
    return (found - optional) - stdlib


def _requirement_name(spec: str) -> str:
    for sep in "<>=!;[ ":
        spec = spec.split(sep)[0]
    return spec.strip().lower()


@pytest.mark.slow  # 1-2 s: in the full tier, not the quick one
def test_pyproject_requires_every_package_the_core_imports():
    declared = {
        _requirement_name(d) for d in tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["dependencies"]
    }
    imported = _third_party_imports(REPO / "core") - {"osgeo"}  # osgeo: inside QGIS, see the next test
    assert {DISTRIBUTIONS.get(m, m).lower() for m in imported} <= declared
    assert GDAL_ON_PYPI <= declared


@pytest.mark.slow  # 1-2 s: in the full tier, not the quick one
def test_plugin_checks_every_package_the_core_imports():
    from rockhead.plugin import deps

    checked = {module.split(".")[0] for module, _pip, _deb in deps.REQUIRED}
    imported = _third_party_imports(REPO / "core") - GDAL_ON_PYPI
    assert imported <= checked, imported - checked
    assert "osgeo" in checked and "contourpy" in checked


def _hide(tmp_path, *modules) -> Path:
    shim = tmp_path / "shim"
    for m in modules:
        (shim / m).mkdir(parents=True)
        (shim / m / "__init__.py").write_text(f'raise ImportError("No module named {m} (hidden by the test)")\n')
    return shim


def _run_cli(tmp_path, shim, *args):
    env = dict(os.environ)
    parent = str(Path(rockhead.__path__[0]).parent)  # the link folder made by conftest
    env["PYTHONPATH"] = os.pathsep.join([str(shim), parent])
    return subprocess.run(
        [sys.executable, "-m", "rockhead.core.cli", *map(str, args)],
        capture_output=True,
        text=True,
        env=env,
        timeout=600,
    )


@pytest.mark.slow  # the command line in a child process
@pytest.mark.slow
def test_without_gdal_the_command_line_says_what_to_install(tmp_path):
    shim = _hide(tmp_path, "osgeo", "rasterio", "pyogrio")
    out = tmp_path / "out"
    proc = _run_cli(tmp_path, shim, "run", SAMPLE / "survey.toml", "--out", out)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert "GDAL (osgeo) or rasterio and pyogrio" in lines[0] and "pip install rasterio pyogrio" in lines[0]
    assert not out.exists() or not any(out.iterdir())  # said before any work, nothing written


@pytest.mark.slow  # a whole computation in a child process
@pytest.mark.slow
def test_without_contourpy_the_command_line_names_it(tmp_path):
    shim = _hide(tmp_path, "contourpy")
    out = tmp_path / "out"
    proc = _run_cli(tmp_path, shim, "run", SAMPLE / "survey.toml", "--out", out, "--method", "kriging")
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert "contourpy" in lines[0] and "pip install contourpy" in lines[0]
    assert not [p for p in out.rglob("*") if p.is_file()]  # outputs are written as one set, or not at all


@pytest.mark.slow  # a child process (the check behind the two above)
def test_shim_really_hides(tmp_path):
    # the check above is only meaningful if the shim wins over the installed package
    shim = _hide(tmp_path, "contourpy")
    code = textwrap.dedent("""
        try:
            import contourpy
        except ImportError as e:
            print("hidden:", e)
    """)
    env = dict(os.environ, PYTHONPATH=str(shim))
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert proc.stdout.startswith("hidden:")
