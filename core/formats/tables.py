"""Plain CSV tables of layer attributes, safe to open in a spreadsheet.

Format: UTF-8 (optionally with a byte-order mark, which some spreadsheet
programs need to detect UTF-8), comma separated, a header row, CRLF line ends
and double-quote quoting where needed (RFC 4180).

Cells are written by column type, never guessed from the text:

* float columns: the shortest text that reads back to the same double
  (Python's ``repr``), or ``digits`` significant digits when given; NaN is an
  empty cell; negative numbers stay numbers (``-3.5``);
* integer columns: plain integers; bool columns: ``true`` / ``false``;
* text columns: the text, with a leading apostrophe when it starts with
  ``=``, ``+``, ``-``, ``@``, a tab or a carriage return, so that a spreadsheet
  shows it as text instead of evaluating it as a formula (the OWASP guidance
  on CSV injection). ``None`` is an empty cell.

The same table gives byte-identical files.
"""

from __future__ import annotations

import csv
import io
import math
import os
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import OutputError
from .atomic import atomic_path
from .layer import geometry_type_names, point_xy

__all__ = ["FORMULA_PREFIXES", "guard_text", "layer_to_csv", "write_csv", "write_layer_csv"]

#: leading characters a spreadsheet may evaluate (OWASP, "CSV Injection")
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")


def guard_text(text: str) -> str:
    """Prefix an apostrophe to text a spreadsheet would take for a formula.

    >>> guard_text("=HYPERLINK(\\"x\\")"), guard_text("-2+3"), guard_text("L1"), guard_text("")
    ('\\'=HYPERLINK("x")', "'-2+3", 'L1', '')
    """
    return "'" + text if text.startswith(FORMULA_PREFIXES) else text


def _format_column(name: str, values: np.ndarray, digits: int | None) -> list:
    kind = values.dtype.kind
    if kind == "f":
        floats = values.astype(float).tolist()
        if digits is None:
            return ["" if math.isnan(v) else repr(v) for v in floats]
        return ["" if math.isnan(v) else f"{v:.{digits}g}" for v in floats]
    if kind in "iu":
        return [str(int(v)) for v in values.tolist()]
    if kind == "b":
        return ["true" if v else "false" for v in values.tolist()]
    if kind in "USO":
        out = []
        for v in values.tolist():
            if v is None or (isinstance(v, float) and math.isnan(v)):
                out.append("")
            else:
                if isinstance(v, bytes):
                    v = v.decode("utf-8")
                out.append(guard_text(str(v)))
        return out
    raise OutputError(f"cannot write column '{name}' of numpy dtype {values.dtype} to CSV; convert it first")


def write_csv(
    path,
    columns: Mapping[str, Any],
    *,
    digits: int | None = None,
    bom: bool = False,
) -> Path:
    """Write named columns to a CSV file, atomically.

    Parameters
    ----------
    path : str or path-like
        Output file.
    columns : mapping of str to array-like
        Columns in order, all of the same length.
    digits : int, optional
        Significant digits of float cells; default: as many as needed to read
        the same double back.
    bom : bool
        Start the file with a UTF-8 byte-order mark.

    Returns
    -------
    pathlib.Path
        ``path``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "t.csv"
    >>> _ = write_csv(p, {"line": np.array(["L1", "-A"]), "depth_m": np.array([-3.5, np.nan])})
    >>> p.read_bytes()
    b"line,depth_m\\r\\nL1,-3.5\\r\\n'-A,\\r\\n"
    """
    if digits is not None and not (isinstance(digits, int) and 1 <= digits <= 17):
        raise OutputError(f"digits={digits!r}; expected an integer from 1 to 17")
    names = list(columns)
    arrays = [np.asarray(columns[n]) for n in names]
    lengths = {len(a) for a in arrays if a.ndim == 1}
    if any(a.ndim != 1 for a in arrays) or len(lengths) > 1:
        shapes = {n: a.shape for n, a in zip(names, arrays)}
        raise OutputError(f"CSV columns must be 1-D and of one length; got shapes {shapes}")
    cells = [_format_column(n, a, digits) for n, a in zip(names, arrays)]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\r\n")
    writer.writerow([guard_text(str(n)) for n in names])
    writer.writerows(zip(*cells))
    data = buf.getvalue().encode("utf-8")
    path = Path(os.fspath(path))
    with atomic_path(path) as tmp:
        tmp.write_bytes((b"\xef\xbb\xbf" if bom else b"") + data)
    return path


def write_layer_csv(path, layer, *, geometry: str | None = "xy", digits: int | None = None, bom: bool = False) -> Path:
    """Write a :class:`.layer.Layer`'s attribute table to CSV.

    Parameters
    ----------
    path : str or path-like
        Output file.
    layer : rockhead.core.formats.layer.Layer
        The layer.
    geometry : {"xy", "wkt", None}
        ``"xy"``: ``x`` and ``y`` columns first (point layers; a point-less
        row has empty cells; other geometry types fall back to ``"wkt"``);
        ``"wkt"``: a ``wkt`` column first; None: attributes only.
    digits, bom
        As for :func:`write_csv`.
    """
    columns = {}
    geoms = layer.geometries
    if geoms is not None and geometry is not None:
        if geometry not in ("xy", "wkt"):
            raise OutputError(f"geometry={geometry!r}; expected 'xy', 'wkt' or None")
        kinds = set(geometry_type_names(geoms)) - {None}
        if geometry == "xy" and kinds <= {"Point"}:
            xy = point_xy(geoms)
            columns["x"] = xy[:, 0]
            columns["y"] = xy[:, 1]
        else:
            from shapely import wkt

            columns["wkt"] = np.array(
                [wkt.dumps(g, trim=True) if g is not None and not g.is_empty else None for g in geoms],
                dtype=object,
            )
    for name, values in layer.fields.items():
        if name in columns:
            raise OutputError(f"field '{name}' clashes with the geometry column '{name}'; rename the field")
        columns[name] = values
    return write_csv(path, columns, digits=digits, bom=bom)


#: the same function under its older name
layer_to_csv = write_layer_csv
