"""Error and warning types of Rockhead.

Every error the core raises on purpose derives from :class:`RockheadError`,
so callers (the command line, the QGIS adapter) can catch one root and show its
message. Messages quote the bad value, say what was expected and, for input
files, name the file, the line and the field.
"""

from __future__ import annotations

import os


class RockheadError(Exception):
    """Root of all errors raised on purpose by Rockhead."""


class InputFileError(RockheadError, ValueError):
    """Bad content in an input file (CSV, TOML, raster).

    Parameters
    ----------
    path : str or os.PathLike
        The file.
    line : int or None
        1-based line number in the file (None when the whole file is at fault).
    field : str or None
        Column or key name (None when no single field is at fault).
    message : str
        What is wrong and what was expected.
    """

    def __init__(self, path: str | os.PathLike[str] | None, line: int | None, field: str | None, message: str) -> None:
        self.path = os.fspath(path) if path is not None else None
        self.line = line
        self.field = field
        self.message = message
        super().__init__(self._format())

    def _format(self) -> str:
        where = []
        if self.path is not None:
            where.append(os.path.basename(self.path) if self.path else "<input>")
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.field is not None:
            where.append(f"field '{self.field}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class SurveyConfigError(InputFileError):
    """Bad or inconsistent survey.toml."""


class GeoreferenceError(RockheadError):
    """A CRS or coordinate transformation problem (wraps pyproj errors)."""


class InversionError(RockheadError):
    """A fit that cannot be set up at all (not a flagged gather: those carry a status)."""


class SurfaceError(RockheadError, ValueError):
    """Data or a setting the surface step cannot grid (points, variogram, kriging, spline).

    Also a :class:`ValueError` (it reports a bad value), so ``except ValueError``
    catches it too.
    """


class GridError(RockheadError, ValueError):
    """A raster grid that cannot be built (cell size, origin, shape, extent).

    Also a :class:`ValueError`, as :class:`SurfaceError`.
    """


class NotFittedError(RockheadError, RuntimeError):
    """A fitted model (kriging, spline) used before its ``fit``.

    Also a :class:`RuntimeError` (a call out of order, not a bad value).
    """


class OutputError(RockheadError):
    """An output cannot be written (folder not writable, output equals an input, ...)."""


class MissingDependencyError(RockheadError, ImportError):
    """An optional package needed for one feature is not installed."""

    def __init__(self, package: str, feature: str, hint: str | None = None):
        self.package = package
        self.feature = feature
        hint = hint or f"install it with 'python3 -m pip install {package}'"
        super().__init__(f"{feature} needs the Python package '{package}', which is not installed: {hint}")


class CancelledError(RockheadError):
    """The user cancelled a long computation."""


class RockheadWarning(UserWarning):
    """Input that is valid but suspicious (the run goes on)."""
