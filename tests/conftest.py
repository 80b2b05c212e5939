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
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
PACKAGE = "rockhead"


def _ensure_package():
    try:
        mod = importlib.import_module(PACKAGE)
        if Path(mod.__file__).resolve().parent == REPO:
            return
        for name in [m for m in sys.modules if m == PACKAGE or m.startswith(PACKAGE + ".")]:
            del sys.modules[name]
    except ImportError:
        pass
    link_dir = Path(tempfile.mkdtemp(prefix="rockhead-pkg-"))
    os.symlink(REPO, link_dir / PACKAGE)
    sys.path.insert(0, str(link_dir))
    importlib.import_module(PACKAGE)


_ensure_package()

SAMPLE = REPO / "sample_project"


@pytest.fixture(scope="session")
def repo_root():
    return REPO


@pytest.fixture(scope="session")
def sample_dir():
    return SAMPLE


@pytest.fixture
def rng():
    import numpy as np

    return np.random.default_rng(20261202)
