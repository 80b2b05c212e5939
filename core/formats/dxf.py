"""DXF drawings of contour lines (ASCII DXF, AutoCAD Release 12 subset).

Release 12 (``$ACADVER = AC1009``) is the oldest DXF every CAD and GIS program
still reads and the simplest to write correctly: no object handles, no class
or object sections. A file holds

* a HEADER with the version and the drawing extents,
* a TABLES section with the CONTINUOUS line type and one LAYER entry per layer
  (name and AutoCAD Color Index, ACI),
* an ENTITIES section of 3D polylines (``POLYLINE`` with flag 8, ``VERTEX``
  entities with flag 32, ``SEQEND``), whose vertex z is the contour's value,
  and optional ``TEXT`` labels.

Coordinates are written with six decimals (micrometres in a metric CRS), so
the same drawing gives a byte-identical file. A DXF has no CRS: the
coordinates are those of the survey's working CRS, which the report names and
the header comment states.

Header comment. The file opens with comment lines (group code 999, which
every DXF reader skips) carrying what the drawing cannot say otherwise: the
caution, the software and survey it came from, the CRS and the vertical datum
(:func:`write_dxf`'s ``comments``); each line is kept to 250 characters, in
ASCII.

Why this writer and not GDAL's DXF driver or ezdxf: the drawing is a handful
of 3D polylines, labels and layers in the simplest DXF every CAD program reads
(R12); GDAL's driver writes from a template header and turns 3D lines into its
own entity choices, and ezdxf is not part of QGIS's Python on Windows or macOS
(it would become a dependency for one small file). The output is checked
against both (ezdxf and GDAL's DXF reader) in the tests.
"""

from __future__ import annotations

import math
import os
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from ..errors import OutputError
from .atomic import atomic_path

__all__ = [
    "CONTOUR_LAYERS",
    "DxfPolyline",
    "DxfText",
    "write_contours_dxf",
    "write_dxf",
]

#: layer name -> ACI colour of the contour drawing (8 grey, 5 blue, 1 red)
CONTOUR_LAYERS = {
    "elevation": {"line": ("CONTOUR", 8), "index": ("CONTOUR_INDEX", 5), "label": ("CONTOUR_LABEL", 5)},
    "depth": {
        "line": ("DEPTH_CONTOUR", 8),
        "index": ("DEPTH_CONTOUR_INDEX", 1),
        "label": ("DEPTH_CONTOUR_LABEL", 1),
    },
}

_LAYER_RE = re.compile(r"^[A-Z0-9_$-]{1,31}$")


@dataclass(frozen=True)
class DxfPolyline:
    """A 3D polyline: ``xyz`` (n, 3) vertices, on ``layer``, optionally closed."""

    xyz: np.ndarray
    layer: str
    closed: bool = False


@dataclass(frozen=True)
class DxfText:
    """A one-line text centred on (x, y, z), ``height`` drawing units tall, rotated anticlockwise."""

    x: float
    y: float
    z: float
    text: str
    height: float
    layer: str
    rotation_deg: float = 0.0


def _num(v: float) -> str:
    v = float(v)
    if not math.isfinite(v):
        raise OutputError(f"a DXF coordinate or size is {v!r}; every value must be finite")
    text = f"{v:.6f}".rstrip("0")
    text = text + "0" if text.endswith(".") else text
    return "0.0" if text in ("-0.0", "0.0") else text


def _text(s: str) -> str:
    """DXF R12 text: ASCII, other characters as \\U+XXXX escapes, no line breaks."""
    s = s.replace("\r", " ").replace("\n", " ")
    return "".join(c if 32 <= ord(c) < 127 else f"\\U+{ord(c):04X}" for c in s)


class _Writer:
    def __init__(self):
        self.parts = []

    def pair(self, code: int, value) -> None:
        self.parts.append(f"{code:>3}\r\n{value}\r\n")

    def getvalue(self) -> bytes:
        return "".join(self.parts).encode("ascii")


def _comment_lines(comments: Iterable[str]) -> list:
    """Comments as DXF lines: ASCII (other characters escaped), at most 250 characters each."""
    out = []
    for c in comments:
        out += textwrap.wrap(_text(str(c)), 250, break_long_words=True) or [""]
    return out


def write_dxf(
    path,
    polylines: Sequence[DxfPolyline],
    texts: Iterable[DxfText] = (),
    layer_colours: Mapping[str, int] | None = None,
    comments: Iterable[str] = (),
) -> Path:
    """Write 3D polylines and texts to an ASCII DXF (R12), atomically.

    Parameters
    ----------
    path : str or path-like
        Output file (``.dxf``).
    polylines : sequence of DxfPolyline
        Lines to draw (each with at least 2 vertices).
    texts : iterable of DxfText
        Labels.
    layer_colours : mapping of str to int, optional
        ACI colour (1-255) of each layer; layers used but not listed get 7
        (white on dark, black on light backgrounds). Layer names: up to 31 of
        ``A-Z 0-9 _ $ -``.
    comments : iterable of str
        Header comment lines (group code 999): caution and provenance.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    polylines = list(polylines)
    texts = list(texts)
    colours = dict(layer_colours or {})
    for layer_name in [p.layer for p in polylines] + [t.layer for t in texts]:
        colours.setdefault(layer_name, 7)
    for name, colour in colours.items():
        if not isinstance(name, str) or not _LAYER_RE.match(name):
            raise OutputError(f"DXF layer name {name!r} is not valid for Release 12; use up to 31 of A-Z 0-9 _ $ -")
        if not (isinstance(colour, (int, np.integer)) and 1 <= int(colour) <= 255):
            raise OutputError(f"colour {colour!r} of DXF layer '{name}' is not an ACI number from 1 to 255")
    arrays = []
    for k, pl in enumerate(polylines):
        xyz = np.asarray(pl.xyz, dtype=float)
        if xyz.ndim != 2 or xyz.shape[1] != 3 or len(xyz) < 2:
            raise OutputError(f"polyline {k} has vertices of shape {xyz.shape}; expected (n >= 2, 3)")
        if not np.all(np.isfinite(xyz)):
            raise OutputError(f"polyline {k} has a non-finite coordinate; remove NaN vertices first")
        arrays.append(xyz)
    pts = [*arrays] + [np.array([[t.x, t.y, t.z]], dtype=float) for t in texts]
    if pts:
        allp = np.vstack(pts)
        lo, hi = allp.min(axis=0), allp.max(axis=0)
    else:
        lo = hi = np.zeros(3)

    w = _Writer()
    for line in _comment_lines(comments):
        w.pair(999, line)
    w.pair(0, "SECTION")
    w.pair(2, "HEADER")
    w.pair(9, "$ACADVER")
    w.pair(1, "AC1009")
    for name, p in (("$EXTMIN", lo), ("$EXTMAX", hi)):
        w.pair(9, name)
        for code, v in zip((10, 20, 30), p):
            w.pair(code, _num(v))
    w.pair(0, "ENDSEC")

    w.pair(0, "SECTION")
    w.pair(2, "TABLES")
    w.pair(0, "TABLE")
    w.pair(2, "LTYPE")
    w.pair(70, 1)
    w.pair(0, "LTYPE")
    w.pair(2, "CONTINUOUS")
    w.pair(70, 0)
    w.pair(3, "Solid line")
    w.pair(72, 65)
    w.pair(73, 0)
    w.pair(40, "0.0")
    w.pair(0, "ENDTAB")
    w.pair(0, "TABLE")
    w.pair(2, "LAYER")
    table = {"0": 7, **colours}  # layer 0 exists in every drawing
    w.pair(70, len(table))
    for name, colour in table.items():
        w.pair(0, "LAYER")
        w.pair(2, name)
        w.pair(70, 0)
        w.pair(62, int(colour))
        w.pair(6, "CONTINUOUS")
    w.pair(0, "ENDTAB")
    w.pair(0, "ENDSEC")

    w.pair(0, "SECTION")
    w.pair(2, "ENTITIES")
    for pl, xyz in zip(polylines, arrays):
        closed = bool(pl.closed)
        if closed and np.array_equal(xyz[0], xyz[-1]) and len(xyz) > 2:
            xyz = xyz[:-1]  # the closed flag draws the closing segment
        w.pair(0, "POLYLINE")
        w.pair(8, pl.layer)
        w.pair(66, 1)  # vertices follow
        for code in (10, 20, 30):
            w.pair(code, "0.0")
        w.pair(70, 8 | (1 if closed else 0))  # 3D polyline (+ closed)
        for x, y, z in xyz.tolist():
            w.pair(0, "VERTEX")
            w.pair(8, pl.layer)
            w.pair(10, _num(x))
            w.pair(20, _num(y))
            w.pair(30, _num(z))
            w.pair(70, 32)  # 3D polyline vertex
        w.pair(0, "SEQEND")
        w.pair(8, pl.layer)
    for t in texts:
        if not (t.height > 0):
            raise OutputError(f"text height {t.height!r} must be positive")
        w.pair(0, "TEXT")
        w.pair(8, t.layer)
        for code, v in zip((10, 20, 30), (t.x, t.y, t.z)):
            w.pair(code, _num(v))
        w.pair(40, _num(t.height))
        w.pair(1, _text(t.text))
        w.pair(50, _num(t.rotation_deg % 360.0))
        w.pair(72, 1)  # centred horizontally ...
        for code, v in zip((11, 21, 31), (t.x, t.y, t.z)):
            w.pair(code, _num(v))
        w.pair(73, 2)  # ... and vertically on the alignment point
    w.pair(0, "ENDSEC")
    w.pair(0, "EOF")

    path = Path(os.fspath(path))
    with atomic_path(path) as tmp:
        tmp.write_bytes(w.getvalue())
    return path


def _label_value(v: float) -> str:
    text = f"{v:.3f}".rstrip("0").rstrip(".")
    return "0" if text == "-0" else text


def write_contours_dxf(
    path,
    layer,
    *,
    kind: str = "elevation",
    labels: str = "index",
    label_height_m: float | None = None,
    comments: Iterable[str] = (),
) -> Path:
    """Write one kind of contour of a contour layer to a DXF, z = the contour value.

    Parameters
    ----------
    path : str or path-like
        Output file.
    layer : rockhead.core.formats.layer.Layer
        A layer from :func:`.contours.contours_layer` (fields ``kind``,
        ``elevation_m``, ``depth_m``, ``index``).
    kind : {"elevation", "depth"}
        Which contours to draw. Elevation contours get z = elevation (m);
        depth contours get z = depth below ground (m, positive down), so that
        the z of every vertex is the value the line stands for.
    labels : {"index", "all", "none"}
        Which lines get a value label at the middle of their length, along
        the line and kept upright.
    label_height_m : float, optional
        Text height; default 1/150 of the larger side of the drawing's extent.
    comments : iterable of str
        Header comment lines (caution and provenance), see :func:`write_dxf`.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    if kind not in CONTOUR_LAYERS:
        raise OutputError(f"kind={kind!r}; expected 'elevation' or 'depth'")
    if labels not in ("index", "all", "none"):
        raise OutputError(f"labels={labels!r}; expected 'index', 'all' or 'none'")
    names = CONTOUR_LAYERS[kind]
    kinds = np.asarray(layer.fields["kind"]).astype(str)
    values = np.asarray(layer.fields["elevation_m" if kind == "elevation" else "depth_m"], dtype=float)
    index = np.asarray(layer.fields["index"], dtype=bool)
    chosen = [
        (g, float(v), bool(ix))
        for g, k, v, ix in zip(layer.geometries, kinds, values, index)
        if k == kind and g is not None and not g.is_empty
    ]
    polylines = []
    label_at = []
    for geom, value, is_index in chosen:
        parts = list(geom.geoms) if hasattr(geom, "geoms") else [geom]
        lname = names["index" if is_index else "line"][0]
        for part in parts:
            xy = np.asarray(part.coords, dtype=float)[:, :2]
            if len(xy) < 2:
                continue
            closed = len(xy) > 3 and np.array_equal(xy[0], xy[-1])
            polylines.append(DxfPolyline(np.column_stack([xy, np.full(len(xy), value)]), lname, closed))
            if labels == "all" or (labels == "index" and is_index):
                label_at.append((part, value))
    texts = []
    if label_at:
        if label_height_m is None:
            allxy = np.vstack([p.xyz[:, :2] for p in polylines])
            span = float(np.max(allxy.max(axis=0) - allxy.min(axis=0)))
            label_height_m = max(span / 150.0, 1e-3)
        for part, value in label_at:
            length = part.length
            mid = part.interpolate(0.5 * length)
            a = part.interpolate(max(0.0, 0.5 * length - label_height_m))
            b = part.interpolate(min(length, 0.5 * length + label_height_m))
            angle = math.degrees(math.atan2(b.y - a.y, b.x - a.x))
            if angle > 90.0:
                angle -= 180.0
            elif angle <= -90.0:
                angle += 180.0
            texts.append(DxfText(mid.x, mid.y, value, _label_value(value), label_height_m, names["label"][0], angle))
    colours = {name: colour for name, colour in names.values()}
    return write_dxf(path, polylines, texts, colours, comments)
