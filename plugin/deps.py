"""Check, before anything heavy is imported, that the core's packages are there.

QGIS installs differ: the Windows (OSGeo4W) and macOS builds ship numpy and
usually scipy, pyproj and shapely, a Linux distribution may not. A missing one
must give a message that names it and says how to install it, never a
traceback at QGIS start-up.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass

#: Packages the core needs, with the Debian package that provides each.
REQUIRED = (
    ("numpy", "python3-numpy"),
    ("scipy", "python3-scipy"),
    ("pyproj", "python3-pyproj"),
    ("shapely", "python3-shapely"),
)

#: Optional packages: the feature is simply absent without them.
OPTIONAL = (("matplotlib", "python3-matplotlib", "plots in the quality-control panel"),)


@dataclass(frozen=True)
class MissingPackage:
    """One package that could not be imported."""

    name: str
    debian: str
    error: str

    def hint(self) -> str:
        """How to install it, for the three usual QGIS installations."""
        return (
            f"Windows: open the OSGeo4W Shell and run 'python -m pip install {self.name}' "
            f"(or add it with the OSGeo4W installer); "
            f"Debian/Ubuntu: 'sudo apt install {self.debian}'; "
            f"other systems: 'python3 -m pip install {self.name}' with the Python that QGIS uses"
        )


def find_missing(required=REQUIRED, importer=importlib.import_module) -> list[MissingPackage]:
    """Return the required packages that cannot be imported (empty list when all are there).

    ``importer`` is the import function (a parameter so tests can simulate a
    missing package without uninstalling it).
    """
    missing = []
    for name, debian in required:
        try:
            importer(name)
        except ImportError as err:  # also catches a broken binary (ImportError subclass)
            missing.append(MissingPackage(name, debian, str(err)))
    return missing


def missing_message(missing: list[MissingPackage]) -> str:
    """One readable message naming every missing package and how to install it."""
    names = ", ".join(m.name for m in missing)
    lines = [
        f"Rockhead cannot start: the Python package(s) {names} could not be imported "
        f"by QGIS's Python. Its Processing tools are not available until they are installed."
    ]
    for m in missing:
        lines.append(f"- {m.name} ({m.error}). To install: {m.hint()}.")
    lines.append("Then restart QGIS.")
    return "\n".join(lines)


def has_matplotlib() -> bool:
    """True when matplotlib with its Qt5 canvas can be imported."""
    try:
        importlib.import_module("matplotlib.backends.backend_qt5agg")
    except ImportError:
        return False
    return True
