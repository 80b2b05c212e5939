"""Check, before anything heavy is imported, that the core's packages are there.

QGIS installs differ: the Windows (OSGeo4W) and macOS builds ship numpy, GDAL's
Python bindings and matplotlib, usually scipy, pyproj and shapely; a Linux
distribution may split them into separate packages. A missing one must give a
message that names it and says how to install it into the Python that QGIS
runs, never a traceback at QGIS start-up.

Every package here is required by the whole-survey run (the same list as the
command line's, with GDAL's own bindings in place of rasterio and pyogrio):
numpy, scipy, pyproj and shapely for the computation, contourpy for the
contours, matplotlib for the QC figures and the report, GDAL (``osgeo``) for
every raster and vector file.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass

#: (module to import, pip name, Debian package) of the packages the core needs
REQUIRED = (
    ("numpy", "numpy", "python3-numpy"),
    ("scipy", "scipy", "python3-scipy"),
    ("pyproj", "pyproj", "python3-pyproj"),
    ("shapely", "shapely", "python3-shapely"),
    ("contourpy", "contourpy", "python3-contourpy"),
    ("matplotlib", "matplotlib", "python3-matplotlib"),
    ("PIL", "pillow", "python3-pil"),  # PNG files of the figures (comes with matplotlib)
    ("osgeo.gdal", "GDAL", "python3-gdal"),
)

#: Optional: the feature is simply absent without it.
OPTIONAL = (
    (
        "matplotlib.backends.backend_qt5agg",
        "matplotlib",
        "python3-matplotlib",
        "interactive plots in the quality-control panel",
    ),
)


@dataclass(frozen=True)
class MissingPackage:
    """One package that could not be imported."""

    name: str  # the module QGIS's Python could not import
    debian: str
    error: str
    pip: str = ""  # the name to give pip (default: ``name``)

    def hint(self) -> str:
        """How to install it into QGIS's Python, for the usual QGIS installations."""
        pip = self.pip or self.name
        if self.name.startswith("osgeo"):
            return (
                "GDAL's Python bindings come with QGIS's own installers: on Windows run the OSGeo4W "
                "setup (Advanced install) and add the package 'python3-gdal', or reinstall QGIS; "
                f"Debian/Ubuntu: 'sudo apt install {self.debian}'; other systems: the GDAL Python "
                f"package of your distribution (or 'python3 -m pip install {pip}==<the GDAL version QGIS "
                "shows in Help > About>' with the Python that QGIS uses)"
            )
        return (
            f"Windows: open the OSGeo4W Shell and run 'python -m pip install {pip}' "
            f"(or add it with the OSGeo4W installer); "
            f"macOS: '/Applications/QGIS.app/Contents/MacOS/bin/python3 -m pip install {pip}'; "
            f"Debian/Ubuntu: 'sudo apt install {self.debian}'; "
            f"other systems: 'python3 -m pip install {pip}' with the Python that QGIS uses (in QGIS's "
            "Python console, 'import sys; sys.executable' names it)"
        )


def find_missing(required=REQUIRED, importer=importlib.import_module) -> list[MissingPackage]:
    """Return the required packages that cannot be imported (empty list when all are there).

    ``required`` holds ``(module, pip name, Debian package)`` triples (or the
    older ``(module, Debian package)`` pairs); ``importer`` is the import
    function (a parameter so tests can simulate a missing package without
    uninstalling it).
    """
    missing = []
    for entry in required:
        name, pip, debian = entry if len(entry) == 3 else (entry[0], entry[0], entry[1])
        try:
            importer(name)
        except ImportError as err:  # also catches a broken binary (ImportError subclass)
            missing.append(MissingPackage(name, debian, str(err), pip))
    return missing


def missing_message(missing: list[MissingPackage]) -> str:
    """One readable message naming every missing package and how to install it."""
    names = ", ".join(m.pip or m.name for m in missing)
    lines = [
        f"Rockhead cannot start: the Python package(s) {names} could not be imported "
        f"by QGIS's Python. Its Processing tools are not available until they are installed."
    ]
    for m in missing:
        lines.append(f"- {m.pip or m.name} ({m.error}). To install: {m.hint()}.")
    lines.append("Then restart QGIS.")
    return "\n".join(lines)


def has_matplotlib() -> bool:
    """True when matplotlib with its Qt5 canvas can be imported."""
    try:
        importlib.import_module("matplotlib.backends.backend_qt5agg")
    except ImportError:
        return False
    return True
