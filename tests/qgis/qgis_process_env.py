"""Running the qgis_process command line with the plugin enabled, in a private profile.

Debian's /usr/bin/qgis_process wrapper passes an option 3.22 rejects, so the
binary /usr/bin/qgis_process.bin is called. A private profile folder keeps the
user's QGIS settings untouched.
"""

import os
import shutil
import subprocess

import pytest

QGIS_PROCESS = shutil.which("qgis_process.bin") or "/usr/bin/qgis_process.bin"


def enabled_env(home, plugin_path):
    """Environment for qgis_process with ``plugin_path`` on the plugin path and the plugin enabled.

    Without qgis_process: a failure on CI (CI=true), a skip elsewhere.
    """
    if not os.path.exists(QGIS_PROCESS):
        if os.environ.get("CI") == "true":
            pytest.fail(f"{QGIS_PROCESS} not found on CI")
        pytest.skip(f"{QGIS_PROCESS} not found")
    env = dict(
        os.environ,
        HOME=str(home),
        QGIS_CUSTOM_CONFIG_PATH=str(home),
        QGIS_PLUGINPATH=str(plugin_path),
        QT_QPA_PLATFORM="offscreen",
        XDG_RUNTIME_DIR=str(home),
    )
    env.setdefault("PROJ_DATA", "/usr/share/proj")
    out = run(env, "plugins", "enable", "rockhead", timeout=120)
    assert out.returncode == 0, out.stderr
    return env


def run(env, *args, timeout=300):
    """Run qgis_process with ``args``; returns the CompletedProcess."""
    return subprocess.run([QGIS_PROCESS, *args], env=env, capture_output=True, text=True, timeout=timeout)
