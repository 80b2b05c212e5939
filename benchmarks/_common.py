"""Shared set-up of the benchmark scripts (run as ``python benchmarks/<name>.py``)."""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def import_package() -> None:
    """Make this checkout importable as ``rockhead`` (the folder may have any name).

    An installed ``rockhead`` that is this checkout is used as it is;
    otherwise a temporary folder with a link named after the package goes on
    ``sys.path`` (the way QGIS loads a plugin folder).
    """
    try:
        import rockhead

        if Path(rockhead.__file__).resolve().parent == ROOT:
            return
    except ImportError:
        pass
    link_dir = Path(tempfile.mkdtemp(prefix="rm-bench-"))
    os.symlink(ROOT, link_dir / "rockhead")
    sys.path.insert(0, str(link_dir))
    for name in [m for m in sys.modules if m == "rockhead" or m.startswith("rockhead.")]:
        del sys.modules[name]


def package_env() -> dict:
    """The environment of a child Python that imports this checkout as ``rockhead``.

    A temporary folder with a link named after the package goes first on its
    ``PYTHONPATH`` (an editable install maps the package onto a checkout whose
    folder may have another name, which a child such as QGIS's Python would
    not find).
    """
    link_dir = Path(tempfile.mkdtemp(prefix="rm-bench-"))
    os.symlink(ROOT, link_dir / "rockhead")
    path = [str(link_dir)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]
    return dict(os.environ, PYTHONPATH=os.pathsep.join(path))


def load_average() -> str:
    """The 1, 5 and 15 minute load averages ("n/a" where the system has none)."""
    try:
        return " ".join(f"{v:.1f}" for v in os.getloadavg())
    except (AttributeError, OSError):
        return "n/a"


def memory_gib() -> float:
    """Physical memory of the machine (GiB; NaN when unknown)."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    except (ValueError, OSError, AttributeError):
        return float("nan")


def machine() -> str:
    """Processor, cores, memory and the numeric library versions, for RESULTS.md."""
    import platform

    import numpy
    import scipy

    return (
        f"{platform.machine()}, {os.cpu_count()} cores, {memory_gib():.1f} GiB RAM; Python "
        f"{platform.python_version()}, numpy {numpy.__version__}, scipy {scipy.__version__}"
    )
