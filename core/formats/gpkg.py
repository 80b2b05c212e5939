"""A GeoPackage writer on the standard library's :mod:`sqlite3`.

Writes the subset of OGC GeoPackage 1.3 (OGC 12-128r18) that the project's
layers need, without GDAL: point, line and polygon feature tables, plain
attribute tables, the survey CRS and an R-tree spatial index. QGIS, GDAL/OGR,
geopandas and ArcGIS read the result.

What the file holds (section numbers of 12-128r18):

* ``PRAGMA application_id = 0x47504B47`` ('GPKG') and
  ``PRAGMA user_version = 10300`` (1.1.1.1.1, Req 2);
* ``gpkg_spatial_ref_sys`` with the three rows every GeoPackage has (srs_id
  4326, -1 undefined Cartesian, 0 undefined geographic; 1.1.2.1.2, Req 11) and
  the survey CRS: organisation ``EPSG`` and its code when
  :meth:`pyproj.CRS.to_epsg` finds one, else organisation
  ``ROCKHEAD`` with srs_id 100000 and the WKT;
* ``gpkg_contents`` (1.1.3) with each table's extent, in the order given;
* ``gpkg_geometry_columns`` (2.1.5) and one table per layer with
  ``fid INTEGER PRIMARY KEY AUTOINCREMENT`` (Req 29) and a ``geom`` column of
  GeoPackage binary geometries (2.1.3): header ``'GP'``, version 0, flags
  (little-endian, envelope ``[minx, maxx, miny, maxy]`` for non-points), srs_id,
  envelope, then standard WKB (2D);
* for feature tables, the ``gpkg_rtree_index`` extension (F.3): an ``rtree_*``
  virtual table filled from the envelopes and the triggers of the standard that
  keep it up to date when the layer is edited in QGIS.

Attribute columns take their SQL type from the numpy dtype: float -> REAL,
integer -> INTEGER, bool -> BOOLEAN (0/1), str/object -> TEXT. NaN and
``None`` are written as NULL.

Determinism: the same layers give a byte-identical file. The one timestamp of
the format, ``gpkg_contents.last_change``, is taken from the ``timestamp``
argument, else from the ``SOURCE_DATE_EPOCH`` environment variable (the
reproducible-builds convention), else the fixed value
``1970-01-01T00:00:00.000Z``: it is *not* the time of writing.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import re
import sqlite3
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import OutputError
from .atomic import atomic_path

__all__ = ["GPKG_APPLICATION_ID", "GPKG_USER_VERSION", "Layer", "crs_srs_row", "write_geopackage"]

GPKG_APPLICATION_ID = 0x47504B47  # 'GPKG'
GPKG_USER_VERSION = 10300  # GeoPackage 1.3.0
PROJECT_ORGANIZATION = "ROCKHEAD"
PROJECT_SRS_ID = 100000
GEOMETRY_COLUMN = "geom"
FID_COLUMN = "fid"

_GEOMETRY_TYPES = (
    "POINT",
    "LINESTRING",
    "POLYGON",
    "MULTIPOINT",
    "MULTILINESTRING",
    "MULTIPOLYGON",
    "GEOMETRY",
)

_WGS84_WKT = (
    'GEOGCS["WGS 84",DATUM["WGS_1984",SPHEROID["WGS 84",6378137,298.257223563,'
    'AUTHORITY["EPSG","7030"]],AUTHORITY["EPSG","6326"]],PRIMEM["Greenwich",0,'
    'AUTHORITY["EPSG","8901"]],UNIT["degree",0.0174532925199433,AUTHORITY["EPSG","9122"]],'
    'AXIS["Latitude",NORTH],AXIS["Longitude",EAST],AUTHORITY["EPSG","4326"]]'
)

# the three rows every GeoPackage holds (12-128r18 Req 11)
_MANDATORY_SRS = (
    ("WGS 84 geodetic", 4326, "EPSG", 4326, _WGS84_WKT,
     "longitude/latitude coordinates in decimal degrees on the WGS 84 spheroid"),
    ("Undefined cartesian SRS", -1, "NONE", -1, "undefined",
     "undefined cartesian coordinate reference system"),
    ("Undefined geographic SRS", 0, "NONE", 0, "undefined",
     "undefined geographic coordinate reference system"),
)

_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class Layer:
    """One table of a GeoPackage.

    Parameters
    ----------
    geometries : sequence of shapely geometries, or None
        One geometry per row (an element may be None or empty: NULL geometry).
        ``None`` for the whole argument makes a non-spatial attribute table.
    fields : mapping of str to array-like
        Attribute columns in order, each of the same length as ``geometries``.
    geometry_type : str, optional
        ``POINT``, ``LINESTRING``, ``POLYGON``, ``MULTIPOINT``,
        ``MULTILINESTRING``, ``MULTIPOLYGON`` or ``GEOMETRY``. Inferred from the
        geometries when omitted; single parts are promoted to the multi type
        when the layer mixes both (a line layer with some multi-part lines).
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


# ---------------------------------------------------------------- CRS rows


def crs_srs_row(crs) -> tuple:
    """The ``gpkg_spatial_ref_sys`` row of a CRS.

    Returns ``(srs_name, srs_id, organization, organization_coordsys_id,
    definition, description)``. The definition is WKT 1 (the format the
    standard names, OGC 01-009, as GDAL writes it) when pyproj can export it,
    else WKT 2.

    >>> row = crs_srs_row("EPSG:32633")
    >>> row[:4]
    ('WGS 84 / UTM zone 33N', 32633, 'EPSG', 32633)
    >>> crs_srs_row("+proj=tmerc +lon_0=15.5 +k=1 +x_0=50000 +ellps=GRS80 +units=m")[1:4]
    (100000, 'ROCKHEAD', 100000)
    """
    import pyproj

    from ..crs import horizontal_crs, parse_crs

    crs = horizontal_crs(parse_crs(crs))  # the horizontal part; elevations are plain numbers
    code = crs.to_epsg()
    try:
        wkt = crs.to_wkt("WKT1_GDAL")
    except pyproj.exceptions.CRSError:  # pragma: no cover - CRSs that WKT 1 cannot express
        wkt = None
    if not wkt:
        wkt = crs.to_wkt()
    name = crs.name or "unnamed"
    if code is not None:
        return (name, int(code), "EPSG", int(code), wkt, None)
    return (name, PROJECT_SRS_ID, PROJECT_ORGANIZATION, PROJECT_SRS_ID, wkt, "defined by the survey")


# ---------------------------------------------------------- geometry blobs


_TYPE_NAMES = {
    0: "Point", 1: "LineString", 2: "LinearRing", 3: "Polygon", 4: "MultiPoint", 5: "MultiLineString",
    6: "MultiPolygon", 7: "GeometryCollection",
}


def _geometry_columns(geometries: Sequence[Any]):
    """Type name (None for null/empty), 2D WKB and bounds of every geometry.

    Vectorised with shapely 2; a loop over the geometries with shapely 1.8.
    Bounds are NaN for null or empty geometries.
    """
    import shapely
    from shapely import wkb

    n = len(geometries)
    if hasattr(shapely, "to_wkb"):  # shapely >= 2
        arr = np.empty(n, dtype=object)
        arr[:] = list(geometries)
        null = shapely.is_missing(arr) | shapely.is_empty(arr)
        ids = shapely.get_type_id(arr)
        types = [None if nl else _TYPE_NAMES.get(int(t), "Geometry") for t, nl in zip(ids.tolist(), null)]
        bodies = shapely.to_wkb(arr, output_dimension=2, byte_order=1, include_srid=False).tolist()
        bounds = shapely.bounds(arr)
        bounds[null] = np.nan
        bodies = [None if nl else b for b, nl in zip(bodies, null)]
        return types, bodies, bounds
    types, bodies = [], []
    bounds = np.full((n, 4), np.nan)
    for i, g in enumerate(geometries):
        if g is None or g.is_empty:
            types.append(None)
            bodies.append(None)
            continue
        types.append(g.geom_type)
        bodies.append(wkb.dumps(g, output_dimension=2))
        bounds[i] = g.bounds
    return types, bodies, bounds


def _blobs(types, bodies, bounds, srs_id: int) -> list:
    """GeoPackage binary geometries (12-128r18 2.1.3.1.1); None for null geometries."""
    point_header = b"GP\x00\x01" + struct.pack("<i", srs_id)
    out = []
    for t, body, (minx, miny, maxx, maxy) in zip(types, bodies, bounds.tolist()):
        if body is None:
            out.append(None)
        elif t == "Point":
            # flags 0b0000_0001: little-endian header, no envelope (a point is its own envelope)
            out.append(point_header + body)
        else:
            # flags 0b0000_0011: little-endian header, envelope indicator 1 = [minx, maxx, miny, maxy]
            out.append(b"GP\x00\x03" + struct.pack("<i4d", srs_id, minx, maxx, miny, maxy) + body)
    return out


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


# -------------------------------------------------------------- attributes


def _sql_type(values: np.ndarray) -> str:
    kind = values.dtype.kind
    if kind == "f":
        return "REAL"
    if kind in "iu":
        return "INTEGER"
    if kind == "b":
        return "BOOLEAN"
    if kind in "USO":
        return "TEXT"
    raise OutputError(
        f"cannot store a column of numpy dtype {values.dtype} in a GeoPackage; "
        "convert it to float, int, bool or str"
    )


def _column_values(name: str, values: np.ndarray, sql_type: str) -> list:
    if sql_type == "REAL":
        out = values.astype(float).tolist()
        return [None if (v != v) else v for v in out]  # NaN -> NULL
    if sql_type == "INTEGER":
        return [int(v) for v in values.tolist()]
    if sql_type == "BOOLEAN":
        return [int(bool(v)) for v in values.tolist()]
    out = []
    for v in values.tolist():
        if v is None or (isinstance(v, float) and math.isnan(v)):
            out.append(None)
        elif isinstance(v, bytes):
            out.append(v.decode("utf-8"))
        else:
            out.append(str(v))
    return out


def _check_name(kind: str, name: str) -> None:
    if not isinstance(name, str) or not _NAME_RE.match(name) or len(name) > 63:
        raise OutputError(
            f"{kind} name {name!r} is not usable in a GeoPackage; use letters, digits and '_', "
            "starting with a letter (at most 63 characters)"
        )


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _timestamp(timestamp) -> str:
    if timestamp is None:
        env = os.environ.get("SOURCE_DATE_EPOCH")
        seconds = 0
        if env:
            try:
                seconds = int(env)
            except ValueError as exc:
                raise OutputError(f"SOURCE_DATE_EPOCH={env!r} is not an integer number of seconds") from exc
        timestamp = _dt.datetime.fromtimestamp(seconds, tz=_dt.timezone.utc)
    if isinstance(timestamp, str):
        return timestamp
    if timestamp.tzinfo is not None:
        timestamp = timestamp.astimezone(_dt.timezone.utc)
    return timestamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{timestamp.microsecond // 1000:03d}Z"


# ---------------------------------------------------------------- schema

_CORE_SCHEMA = """
CREATE TABLE gpkg_spatial_ref_sys (
  srs_name TEXT NOT NULL,
  srs_id INTEGER NOT NULL PRIMARY KEY,
  organization TEXT NOT NULL,
  organization_coordsys_id INTEGER NOT NULL,
  definition TEXT NOT NULL,
  description TEXT
);
CREATE TABLE gpkg_contents (
  table_name TEXT NOT NULL PRIMARY KEY,
  data_type TEXT NOT NULL,
  identifier TEXT UNIQUE,
  description TEXT DEFAULT '',
  last_change DATETIME NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')),
  min_x DOUBLE,
  min_y DOUBLE,
  max_x DOUBLE,
  max_y DOUBLE,
  srs_id INTEGER,
  CONSTRAINT fk_gc_r_srs_id FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys(srs_id)
);
CREATE TABLE gpkg_geometry_columns (
  table_name TEXT NOT NULL,
  column_name TEXT NOT NULL,
  geometry_type_name TEXT NOT NULL,
  srs_id INTEGER NOT NULL,
  z TINYINT NOT NULL,
  m TINYINT NOT NULL,
  CONSTRAINT pk_geom_cols PRIMARY KEY (table_name, column_name),
  CONSTRAINT uk_gc_table_name UNIQUE (table_name),
  CONSTRAINT fk_gc_tn FOREIGN KEY (table_name) REFERENCES gpkg_contents(table_name),
  CONSTRAINT fk_gc_srs FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys (srs_id)
);
CREATE TABLE gpkg_extensions (
  table_name TEXT,
  column_name TEXT,
  extension_name TEXT NOT NULL,
  definition TEXT NOT NULL,
  scope TEXT NOT NULL,
  CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name)
);
"""

# Triggers of the R-tree extension (12-128r18 F.3, the 1.3 form): they call the
# ST_* functions that GDAL/QGIS register, so they only run when such a program
# edits the layer; this writer fills the index itself.
_RTREE_TRIGGERS = """
CREATE TRIGGER "rtree_{t}_{c}_insert" AFTER INSERT ON "{t}"
WHEN (new."{c}" NOT NULL AND NOT ST_IsEmpty(NEW."{c}"))
BEGIN
  INSERT OR REPLACE INTO "rtree_{t}_{c}" VALUES (
    NEW."{i}", ST_MinX(NEW."{c}"), ST_MaxX(NEW."{c}"), ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")
  );
END;
CREATE TRIGGER "rtree_{t}_{c}_update1" AFTER UPDATE OF "{c}" ON "{t}"
WHEN OLD."{i}" = NEW."{i}" AND (NEW."{c}" NOTNULL AND NOT ST_IsEmpty(NEW."{c}"))
BEGIN
  INSERT OR REPLACE INTO "rtree_{t}_{c}" VALUES (
    NEW."{i}", ST_MinX(NEW."{c}"), ST_MaxX(NEW."{c}"), ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")
  );
END;
CREATE TRIGGER "rtree_{t}_{c}_update2" AFTER UPDATE OF "{c}" ON "{t}"
WHEN OLD."{i}" = NEW."{i}" AND (NEW."{c}" ISNULL OR ST_IsEmpty(NEW."{c}"))
BEGIN
  DELETE FROM "rtree_{t}_{c}" WHERE id = OLD."{i}";
END;
CREATE TRIGGER "rtree_{t}_{c}_update3" AFTER UPDATE ON "{t}"
WHEN OLD."{i}" != NEW."{i}" AND (NEW."{c}" NOTNULL AND NOT ST_IsEmpty(NEW."{c}"))
BEGIN
  DELETE FROM "rtree_{t}_{c}" WHERE id = OLD."{i}";
  INSERT OR REPLACE INTO "rtree_{t}_{c}" VALUES (
    NEW."{i}", ST_MinX(NEW."{c}"), ST_MaxX(NEW."{c}"), ST_MinY(NEW."{c}"), ST_MaxY(NEW."{c}")
  );
END;
CREATE TRIGGER "rtree_{t}_{c}_update4" AFTER UPDATE ON "{t}"
WHEN OLD."{i}" != NEW."{i}" AND (NEW."{c}" ISNULL OR ST_IsEmpty(NEW."{c}"))
BEGIN
  DELETE FROM "rtree_{t}_{c}" WHERE id IN (OLD."{i}", NEW."{i}");
END;
CREATE TRIGGER "rtree_{t}_{c}_delete" AFTER DELETE ON "{t}"
WHEN old."{c}" NOT NULL
BEGIN
  DELETE FROM "rtree_{t}_{c}" WHERE id = OLD."{i}";
END;
"""


def _rtree_available(con: sqlite3.Connection) -> bool:
    try:
        con.execute("CREATE VIRTUAL TABLE temp.rm_probe USING rtree(id, a, b)")
    except sqlite3.OperationalError:
        return False
    con.execute("DROP TABLE temp.rm_probe")
    return True


def _write_layer(con, name: str, layer: Layer, srs_id: int, last_change: str, use_rtree: bool) -> None:
    _check_name("layer", name)
    if name.lower().startswith(("gpkg_", "rtree_", "sqlite_")):
        raise OutputError(
            f"layer name {name!r} starts with a prefix GeoPackage reserves; choose another name"
        )
    n = len(layer)
    columns = []
    seen = {FID_COLUMN}
    spatial = layer.geometries is not None
    if spatial:
        seen.add(GEOMETRY_COLUMN)
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
        sql_type = _sql_type(arr)
        columns.append((fname, sql_type, _column_values(fname, arr, sql_type)))

    defs = [f"{_quote(FID_COLUMN)} INTEGER PRIMARY KEY AUTOINCREMENT NOT NULL"]
    names = []
    rows_cols = []
    extent = (None, None, None, None)
    if spatial:
        geoms = list(layer.geometries)
        types, bodies, bounds = _geometry_columns(geoms)
        gtype = (layer.geometry_type or _infer_type(set(types))).upper()
        if gtype not in _GEOMETRY_TYPES:
            raise OutputError(
                f"geometry type {layer.geometry_type!r} of layer '{name}' is not one of {_GEOMETRY_TYPES}"
            )
        if gtype.startswith("MULTI") and gtype[5:] in {t.upper() for t in types if t}:
            geoms = [_promote(g, gtype) for g in geoms]  # single parts into a multi-part layer
            types, bodies, bounds = _geometry_columns(geoms)
        if gtype != "GEOMETRY":
            wrong = sorted({t for t in types if t is not None and t.upper() != gtype})
            if wrong:
                raise OutputError(f"layer '{name}' is declared {gtype} but holds a {wrong[0]}")
        blobs = _blobs(types, bodies, bounds, srs_id)
        valid = np.isfinite(bounds[:, 0])
        if np.any(valid):
            extent = (
                float(bounds[valid, 0].min()),
                float(bounds[valid, 1].min()),
                float(bounds[valid, 2].max()),
                float(bounds[valid, 3].max()),
            )
        defs.append(f"{_quote(GEOMETRY_COLUMN)} {gtype}")
        names.append(GEOMETRY_COLUMN)
        rows_cols.append(blobs)
    for fname, sql_type, vals in columns:
        defs.append(f"{_quote(fname)} {sql_type}")
        names.append(fname)
        rows_cols.append(vals)

    con.execute(f"CREATE TABLE {_quote(name)} ({', '.join(defs)})")
    con.execute(
        "INSERT INTO gpkg_contents (table_name, data_type, identifier, description, last_change, "
        "min_x, min_y, max_x, max_y, srs_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (
            name,
            "features" if spatial else "attributes",
            name,
            layer.description or "",
            last_change,
            *extent,
            srs_id if spatial else None,
        ),
    )
    fids = list(range(1, n + 1))
    if names:
        placeholders = ", ".join("?" * (len(names) + 1))
        cols = ", ".join(map(_quote, [FID_COLUMN, *names]))
        sql = f"INSERT INTO {_quote(name)} ({cols}) VALUES ({placeholders})"
        con.executemany(sql, zip(fids, *rows_cols))
    else:
        con.executemany(f"INSERT INTO {_quote(name)} ({_quote(FID_COLUMN)}) VALUES (?)", ((f,) for f in fids))
    if not spatial:
        return
    con.execute(
        "INSERT INTO gpkg_geometry_columns VALUES (?, ?, ?, ?, 0, 0)", (name, GEOMETRY_COLUMN, gtype, srs_id)
    )
    if not use_rtree:
        return
    rtree = f"rtree_{name}_{GEOMETRY_COLUMN}"
    con.execute(f"CREATE VIRTUAL TABLE {_quote(rtree)} USING rtree(id, minx, maxx, miny, maxy)")
    keep = np.flatnonzero(valid)
    rows = zip((keep + 1).tolist(), *(bounds[keep][:, j].tolist() for j in (0, 2, 1, 3)))
    con.executemany(f"INSERT INTO {_quote(rtree)} VALUES (?, ?, ?, ?, ?)", rows)
    triggers = _RTREE_TRIGGERS.format(t=name, c=GEOMETRY_COLUMN, i=FID_COLUMN)
    for statement in triggers.split("\nEND;")[:-1]:
        con.execute(statement + "\nEND;")
    con.execute(
        "INSERT INTO gpkg_extensions VALUES (?, ?, 'gpkg_rtree_index', "
        "'http://www.geopackage.org/spec120/#extension_rtree', 'write-only')",
        (name, GEOMETRY_COLUMN),
    )


def write_geopackage(
    path,
    layers: Mapping[str, Layer],
    crs,
    *,
    timestamp=None,
    spatial_index: bool = True,
) -> Path:
    """Write layers to a new GeoPackage, atomically.

    Parameters
    ----------
    path : str or path-like
        Output file (``.gpkg``). An existing file is replaced as a whole, and
        only once the new one is complete (see :func:`.atomic.atomic_path`).
    layers : mapping of str to Layer
        Tables in the order they appear in ``gpkg_contents`` and in GIS layer
        lists. Names: letters, digits and ``_``.
    crs : pyproj.CRS or anything :meth:`pyproj.CRS.from_user_input` accepts, or None
        CRS of every geometry (the survey's working CRS); None writes the
        standard's "undefined Cartesian" reference system (srs_id -1).
    timestamp : datetime.datetime or str, optional
        Value of ``gpkg_contents.last_change``; default ``SOURCE_DATE_EPOCH`` or
        1970-01-01 (see the module notes on determinism).
    spatial_index : bool
        Add an R-tree index to each feature table (when the sqlite library has
        the R-tree module).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(os.fspath(path))
    if not layers:
        raise OutputError(f"no layers to write to '{path}'")
    row = crs_srs_row(crs) if crs is not None else None
    srs_id = row[1] if row is not None else -1  # -1: undefined Cartesian (12-128r18 Req 11)
    last_change = _timestamp(timestamp)
    with atomic_path(path) as tmp:
        con = sqlite3.connect(str(tmp), isolation_level=None)
        try:
            con.execute(f"PRAGMA application_id = {GPKG_APPLICATION_ID}")
            con.execute(f"PRAGMA user_version = {GPKG_USER_VERSION}")
            # the file is fsynced once, complete, by atomic_path: no journal syncing needed here
            con.execute("PRAGMA journal_mode = MEMORY")
            con.execute("PRAGMA synchronous = OFF")
            use_rtree = spatial_index and _rtree_available(con)
            con.executescript(_CORE_SCHEMA)
            con.execute("BEGIN")
            srs_rows = list(_MANDATORY_SRS)
            if row is not None and srs_id not in (4326, -1, 0):
                srs_rows.append(row)
            con.executemany("INSERT INTO gpkg_spatial_ref_sys VALUES (?, ?, ?, ?, ?, ?)", srs_rows)
            for name, layer in layers.items():
                _write_layer(con, name, layer, srs_id, last_change, use_rtree)
            con.execute("COMMIT")
            con.execute("VACUUM")
        except sqlite3.Error as exc:
            raise OutputError(f"cannot write the GeoPackage '{path}': {exc}") from exc
        finally:
            con.close()
    return path

