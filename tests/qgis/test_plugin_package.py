"""`make package` builds a zip that follows the plugin repository's rules and loads in QGIS."""

import importlib.util
import zipfile
from pathlib import Path

import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def packager():
    spec = importlib.util.spec_from_file_location("package_plugin", REPO / "scripts" / "package_plugin.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def plugin_zip(packager, tmp_path_factory):
    return packager.build(tmp_path_factory.mktemp("dist"))


def test_zip_follows_repository_rules(packager, plugin_zip):
    version = packager.read_metadata(REPO / "metadata.txt")["version"]
    assert plugin_zip.name == f"rockhead-{version}.zip"
    assert packager.check(plugin_zip) == []
    names = zipfile.ZipFile(plugin_zip).namelist()
    assert {n.split("/")[0] for n in names} == {"rockhead"}
    for needed in (
        "metadata.txt",
        "LICENSE",
        "__init__.py",
        "core/workflow.py",
        "core/seismic/forward.py",
        "plugin/main.py",
        "plugin/provider.py",
        "plugin/icons/icon.svg",
    ):
        assert f"rockhead/{needed}" in names, needed
    for n in names:
        assert "/tests/" not in n and "/benchmarks/" not in n and "/sample_project/" not in n, n
        assert "__pycache__" not in n and not n.endswith(".pyc"), n


def test_zip_is_reproducible(packager, plugin_zip, tmp_path):
    again = packager.build(tmp_path)
    assert again.read_bytes() == plugin_zip.read_bytes()


def test_checker_finds_broken_zips(packager, tmp_path):
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(bad, "w") as zf:
        zf.writestr("1plugin/metadata.txt", "[general]\nname=x\n")
        zf.writestr("other/__init__.py", "")
        zf.writestr("1plugin/lib/fast.so", b"\x7fELF")
    problems = "\n".join(packager.check(bad))
    assert "one top-level folder" in problems
    assert "qgisMinimumVersion" in problems
    assert "binary file" in problems
    assert "LICENSE" in problems


def test_unzipped_plugin_loads_in_qgis_process(plugin_zip, tmp_path):
    from qgis_process_env import enabled_env, run

    plugins = tmp_path / "plugins"
    zipfile.ZipFile(plugin_zip).extractall(plugins)
    home = tmp_path / "home"
    home.mkdir()
    env = enabled_env(home, plugins)
    out = run(env, "list", timeout=120)
    assert "rockhead:runsurvey" in out.stdout
