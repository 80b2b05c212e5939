"""One table of GIS features: geometries (2D or 3D) and typed attribute columns.

A :class:`Layer` is what every vector output is made from: the GeoPackage
(through GDAL, :mod:`.gdalio`), the CSV tables (:mod:`.tables`), the QGIS
Processing sinks and the report. It holds shapely geometries, one per row
(``None`` for a row without one), or no geometry column at all (an attribute
table), and named columns whose numpy dtype fixes their type in every file:

==============  ===============================  ===================
numpy kind      GeoPackage column (via OGR)      CSV cell
==============  ===============================  ===================
float           REAL; NaN is NULL                shortest repr; empty
int             INTEGER (64-bit)                 integer
bool            BOOLEAN                          true / false
str / object    TEXT; None is NULL               guarded text
datetime64      DATETIME (UTC)                   -
==============  ===============================  ===================

Geometries with z coordinates make a 3D (Z) layer; every geometry of such a
layer must then carry z.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import OutputError

__all__ = ["GEOMETRY_TYPES", "Layer", "check_layer", "encode_geometries", "geometry_type_names", "point_xy"]

GEOMETRY_TYPES = ("POINT", "LINESTRING", "POLYGON", "MULTIPOINT", "MULTILINESTRING", "MULTIPOLYGON", "GEOMETRY")
_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_RESERVED = ("fid", "geom")
_TYPE_NAMES = {
    0: "Point",
    1: "LineString",
    2: "LinearRing",
    3: "Polygon",
    4: "MultiPoint",
    5: "MultiLineString",
    6: "MultiPolygon",
    7: "GeometryCollection",
}


@dataclass(frozen=True)
class Layer:
    """One table of a GeoPackage.

    Parameters
    ----------
    geometries : sequence of shapely geometries, or None
        One geometry per row (an element may be None or empty: NULL geometry),
        2D or, for a 3D layer, all with z. ``None`` for the whole argument makes
        a non-spatial attribute table.
    fields : mapping of str to array-like
        Attribute columns in order, each of the same length as ``geometries``.
    geometry_type : str, optional
        ``POINT``, ``LINESTRING``, ``POLYGON``, ``MULTIPOINT``,
        ``MULTILINESTRING``, ``MULTIPOLYGON`` or ``GEOMETRY`` (without the Z,
        which follows the geometries). Inferred when omitted; single parts are
        promoted to the multi type when the layer mixes both.
    description : str
        Stored in ``gpkg_contents.description``.
    """

    geometries: Sequence[Any] | None
    fields: Mapping[str, Any] = field(default_factory=dict)
    geometry_type: str | None = None
    description: str = ""

    def __len__(self) -> int:
        if self.geometries is not None:
            return len(self.geometries)
        if self.fields:
            return len(np.asarray(next(iter(self.fields.values()))))
        return 0

    @property
    def has_z(self) -> bool:
        """True when the geometries carry z (a 3D layer)."""
        return self.geometries is not None and any(
            g is not None and not g.is_empty and g.has_z for g in self.geometries
        )


def _check_name(kind: str, name: str) -> None:
    if not isinstance(name, str) or not _NAME_RE.match(name) or len(name) > 63:
        raise OutputError(
            f"{kind} name {name!r} is not usable in a GeoPackage; use letters, digits and '_', "
            "starting with a letter (at most 63 characters)"
        )


def _column_kind(values: np.ndarray) -> str:
    kind = values.dtype.kind
    if kind in "fiubM":
        return kind if kind != "u" else "i"
    if kind in "USO":
        return "S"
    raise OutputError(
        f"cannot store a column of numpy dtype {values.dtype} in a GeoPackage; "
        "convert it to float, int, bool, str or datetime64"
    )


def check_layer(name: str, layer: Layer) -> dict:
    """Check a layer's name and columns; return ``{field: (kind, array)}``.

    ``kind`` is ``"f"`` (float), ``"i"`` (integer), ``"b"`` (bool), ``"S"``
    (text) or ``"M"`` (datetime64). Raises :class:`OutputError` naming the
    layer and the field for a bad name, a reserved or repeated field, a
    column of the wrong length or an unsupported dtype.
    """
    _check_name("layer", name)
    if name.lower().startswith(("gpkg_", "rtree_", "sqlite_")):
        raise OutputError(f"layer name {name!r} starts with a prefix GeoPackage reserves; choose another name")
    n = len(layer)
    seen = set(_RESERVED)
    out = {}
    for fname, values in layer.fields.items():
        _check_name(f"field of layer '{name}'", fname)
        if fname.lower() in seen:
            raise OutputError(f"field '{fname}' of layer '{name}' is repeated or reserved; rename it")
        seen.add(fname.lower())
        arr = np.asarray(values)
        if arr.ndim != 1 or len(arr) != n:
            raise OutputError(
                f"field '{fname}' of layer '{name}' has shape {arr.shape}, expected ({n},) like the layer"
            )
        out[fname] = (_column_kind(arr), arr)
    return out


def _object_array(geometries) -> np.ndarray:
    arr = np.empty(len(geometries), dtype=object)
    arr[:] = list(geometries)
    return arr


def geometry_type_names(geometries) -> list:
    """Each geometry's type name ("Point", "LineString", ...), None for a null or empty one.

    Parameters
    ----------
    geometries : sequence of shapely geometries or None

    Returns
    -------
    list of str or None
    """
    import shapely

    if hasattr(shapely, "get_type_id"):  # shapely >= 2: one vectorised call per property
        arr = _object_array(geometries)
        ids, empty = shapely.get_type_id(arr).tolist(), shapely.is_empty(arr).tolist()
        return [None if i < 0 or e else _TYPE_NAMES[i] for i, e in zip(ids, empty)]
    return [None if g is None or g.is_empty else g.geom_type for g in geometries]  # shapely 1.8


def point_xy(geometries) -> np.ndarray:
    """The (x, y) of each point, as an (n, 2) float array; NaN for a null or empty point.

    Parameters
    ----------
    geometries : sequence of shapely points or None

    Returns
    -------
    numpy.ndarray
        Shape (n, 2), map units.
    """
    import shapely

    if hasattr(shapely, "get_x"):  # shapely >= 2
        arr = _object_array(geometries)
        xy = np.full((len(arr), 2), np.nan)
        ok = ~(shapely.is_missing(arr) | shapely.is_empty(arr))
        xy[ok, 0], xy[ok, 1] = shapely.get_x(arr[ok]), shapely.get_y(arr[ok])
        return xy
    # shapely 1.8: one coordinate lookup per point (``g.x`` and ``g.y`` would make two)
    return np.array(
        [g.coords[0][:2] if g is not None and not g.is_empty else (np.nan, np.nan) for g in geometries], dtype=float
    ).reshape(-1, 2)


def _infer_type(kinds) -> str:
    kinds = {k for k in kinds if k is not None}
    if not kinds:
        return "GEOMETRY"
    if len(kinds) == 1:
        return kinds.pop().upper()
    bases = {k.replace("Multi", "") for k in kinds}
    if len(bases) == 1:
        return "MULTI" + bases.pop().upper()
    return "GEOMETRY"


def _promote(geom, geometry_type: str):
    from shapely.geometry import MultiLineString, MultiPoint, MultiPolygon

    single = geometry_type[5:].title().replace("string", "String")
    if geom is not None and geom.geom_type == single:
        return {"Point": MultiPoint, "LineString": MultiLineString, "Polygon": MultiPolygon}[single]([geom])
    return geom


def _wkb(geometries, dims: int) -> list:
    """ISO/extended WKB (little-endian) of each geometry, None for null or empty ones."""
    import shapely

    if hasattr(shapely, "to_wkb"):  # shapely >= 2: one vectorised call
        arr = np.empty(len(geometries), dtype=object)
        arr[:] = list(geometries)
        null = shapely.is_missing(arr) | shapely.is_empty(arr)
        out = shapely.to_wkb(arr, output_dimension=dims, byte_order=1, include_srid=False).tolist()
        return [None if nl else b for b, nl in zip(out, null.tolist())]
    from shapely import wkb  # shapely 1.8 (Debian's QGIS)

    return [None if g is None or g.is_empty else wkb.dumps(g, output_dimension=dims) for g in geometries]


def _has_z(geoms, types) -> list:
    """``has_z`` of each non-null, non-empty geometry (``types`` from :func:`geometry_type_names`)."""
    import shapely

    if hasattr(shapely, "get_type_id"):  # shapely >= 2
        flags = shapely.has_z(_object_array(geoms)).tolist()
        return [f for f, t in zip(flags, types) if t is not None]
    return [g.has_z for g, t in zip(geoms, types) if t is not None]


def encode_geometries(name: str, layer: Layer):
    """Geometry type name (with ``" Z"`` for a 3D layer) and the WKB of every row.

    Returns ``(None, None)`` for an attribute table. Single parts are promoted
    to the declared (or inferred) multi type; a geometry of another type than
    the declared one, or a 2D geometry in a 3D layer, raises
    :class:`OutputError`.
    """
    if layer.geometries is None:
        return None, None
    geoms = list(layer.geometries)
    types = geometry_type_names(geoms)
    gtype = (layer.geometry_type or _infer_type(set(types))).upper()
    if gtype not in GEOMETRY_TYPES:
        raise OutputError(f"geometry type {layer.geometry_type!r} of layer '{name}' is not one of {GEOMETRY_TYPES}")
    if gtype.startswith("MULTI") and gtype[5:] in {t.upper() for t in types if t}:
        geoms = [_promote(g, gtype) for g in geoms]
        types = geometry_type_names(geoms)
    if gtype != "GEOMETRY":
        wrong = sorted({t for t in types if t is not None and t.upper() != gtype})
        if wrong:
            raise OutputError(f"layer '{name}' is declared {gtype} but holds a {wrong[0]}")
    has_z = _has_z(geoms, types)
    z = any(has_z)
    if z and not all(has_z):
        raise OutputError(f"layer '{name}' mixes 2D and 3D geometries; give every geometry a z or none")
    return gtype + (" Z" if z else ""), _wkb(geoms, 3 if z else 2)
