"""Every raster and vector file, read and written through GDAL.

Two ways to reach GDAL, the same files either way:

``"osgeo"``
    GDAL's own Python bindings (``osgeo.gdal``, ``ogr``, ``osr``), which every
    QGIS installation ships; used whenever they import.
``"pypi"``
    rasterio (rasters) and pyogrio (vectors), the wheels of the command line's
    Python environment, each with GDAL inside.

Rasters come from a :class:`~rockhead.core.grid.GridSpec` (row 0 north, cell
centres; its ``geotransform``) and a (ny, nx) array. The driver follows the
file's extension: ``.tif``/``.tiff`` give a cloud-optimised GeoTIFF (GDAL's COG
driver: 256 x 256 tiles, Deflate with the floating-point predictor, averaged
overviews until the image fits one tile, the nodata value declared), other
extensions the GDAL driver that claims them (``.asc`` Arc/Info ASCII grid,
``.img`` Erdas Imagine, ...). Values are 32-bit floats; NaN cells are written
as the nodata value. Dataset metadata (caution, provenance) and the band's
description, unit and metadata go into the file (the GDAL_METADATA tag of a
GeoTIFF; the ``.aux.xml`` beside formats without a place for them).

Vectors are :class:`~.layer.Layer` tables written to a GeoPackage 1.3 (OGC
12-128r18): one feature table per spatial layer (3D when its geometries carry
z) with an R-tree index, one attributes table per non-spatial layer, the CRS in
``gpkg_spatial_ref_sys``, dataset and layer metadata as GDAL records in
``gpkg_metadata`` / ``gpkg_metadata_reference`` (extension F.8).

CRS. A CRS is passed to GDAL as WKT 2 and comes back as a :class:`pyproj.CRS`;
EPSG codes, projection parameters and datum shifts (``+towgs84``, kept as a
bound CRS) round-trip. A compound CRS is written as its horizontal and vertical
parts (GeoTIFF's ProjectedCSTypeGeoKey and VerticalGeoKey, which GDAL writes
only for that form).

Determinism. GDAL puts no clock time in a COG (the TIFF DateTime tag is
written only from the ``timestamp`` given); the GeoPackage's
``last_change`` and metadata-reference times are set from ``timestamp`` too
(GDAL's ``OGR_CURRENT_DATE``), so the same inputs give byte-identical files on
one GDAL build.

Every write is atomic: the file (and any side-car such as ``.prj`` or
``.aux.xml``) is made in a hidden temporary folder beside the target and
renamed into place only when complete.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import math
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Dict, Mapping, Tuple

import numpy as np

from ..errors import GeoreferenceError, InputFileError, MissingDependencyError, OutputError
from .atomic import flushed_later
from .layer import Layer, check_layer, encode_geometries

__all__ = [
    "COG_OPTIONS",
    "GPKG_VERSION",
    "Raster",
    "check_engine",
    "engine",
    "gdal_crs",
    "gdal_timestamp",
    "list_layers",
    "raster_driver",
    "read_grid",
    "read_layer",
    "read_raster",
    "vector_metadata",
    "write_layers",
    "write_raster",
]

#: Creation options of every GeoTIFF (GDAL's COG driver, GDAL >= 3.1)
COG_OPTIONS = {
    "BLOCKSIZE": "256",
    "COMPRESS": "DEFLATE",
    "PREDICTOR": "YES",  # floating-point predictor for float bands
    "RESAMPLING": "AVERAGE",  # overviews: mean of the finer cells, nodata left out
    "OVERVIEWS": "AUTO",
    "BIGTIFF": "IF_SAFER",
}
#: GeoPackage version written (1.3: the R-tree triggers every GDAL >= 2.2 validator knows)
GPKG_VERSION = "1.3"
_ENGINES = ("osgeo", "pypi")
_TIFF_EXTENSIONS = (".tif", ".tiff")
_HINT = (
    "inside QGIS, GDAL's Python bindings come with QGIS; for the command line install rasterio and "
    "pyogrio with 'python3 -m pip install rasterio pyogrio'"
)


# ----------------------------------------------------------------------------- engine


def _importable(name: str) -> bool:
    import importlib

    try:
        importlib.import_module(name)
    except ImportError:
        return False
    return True


def engine(preferred: str | None = None, *, feature: str = "reading and writing GIS files") -> str:
    """The way to GDAL: ``"osgeo"`` when GDAL's bindings import, else ``"pypi"``.

    Parameters
    ----------
    preferred : {None, "osgeo", "pypi"}
        Ask for one; None picks as above.
    feature : str
        What needs GDAL, for the message when neither is installed.

    Raises
    ------
    MissingDependencyError
        Neither GDAL's bindings nor rasterio and pyogrio (or the one asked for).
    """
    if preferred is not None and preferred not in _ENGINES:
        raise OutputError(f"GDAL engine {preferred!r}; expected one of {_ENGINES}")
    for name in [preferred] if preferred else _ENGINES:
        if name == "osgeo" and _importable("osgeo.gdal") and _importable("osgeo.ogr"):
            return "osgeo"
        if name == "pypi":
            missing = [m for m in ("rasterio", "pyogrio") if not _importable(m)]
            if not missing:
                return "pypi"
            if preferred:
                raise MissingDependencyError(missing[0], feature, _HINT)
    raise MissingDependencyError("GDAL (osgeo) or rasterio and pyogrio", feature, _HINT)


def check_engine(feature: str = "reading and writing GIS files") -> None:
    """Say now, cheaply, when no way to GDAL is installed: what :func:`engine` would raise, without importing.

    The packages are looked up (``importlib.util.find_spec``), not imported:
    rasterio and pyogrio take half a second or more to import (pyogrio brings
    pandas and geopandas), which a run pays where it writes its files. A
    package that is installed but fails to import is reported by
    :func:`engine` there.

    Raises
    ------
    MissingDependencyError
        Neither GDAL's bindings nor rasterio and pyogrio are installed.
    """
    from importlib.util import find_spec

    def found(name: str) -> bool:
        try:
            return find_spec(name) is not None
        except (ImportError, ValueError):
            return False

    if not (found("osgeo") or (found("rasterio") and found("pyogrio"))):
        engine(feature=feature)  # raises the message naming what is missing (or finds what find_spec did not)


def _adapter(name: str | None, feature: str):
    """The adapter module of the engine (:mod:`.gdal_osgeo` or :mod:`.gdal_pypi`)."""
    if engine(name, feature=feature) == "osgeo":
        from . import gdal_osgeo

        return gdal_osgeo
    from . import gdal_pypi

    return gdal_pypi


# -------------------------------------------------------------------------------- CRS


def gdal_crs(crs):
    """The CRS as GDAL gets it: a :class:`pyproj.CRS`, a compound one rebuilt from its parts.

    ``EPSG:7405`` (British National Grid + ODN height, one EPSG code) becomes
    the compound of ``EPSG:27700`` and ``EPSG:5701``: the form a GeoTIFF's
    projected and vertical keys can hold (GDAL writes a single-code compound CRS
    as a user-defined projection and loses its vertical part).
    """
    if crs is None:
        return None
    import pyproj

    from ..crs import parse_crs

    crs = parse_crs(crs)
    if crs.is_compound and len(crs.sub_crs_list) == 2:
        h, v = crs.sub_crs_list
        return pyproj.CRS.from_json_dict(
            {"type": "CompoundCRS", "name": crs.name, "components": [h.to_json_dict(), v.to_json_dict()]}
        )
    return crs


def _crs_from_wkt(wkt: str | None):
    import pyproj

    if not wkt:
        return None
    try:
        return pyproj.CRS.from_user_input(wkt)
    except pyproj.exceptions.CRSError as exc:  # pragma: no cover - GDAL's own WKT
        raise GeoreferenceError(f"cannot read the CRS GDAL returned: {exc}") from exc


def gdal_timestamp(when: _dt.datetime | _dt.date | str | None) -> str:
    """ISO 8601 UTC text with milliseconds (the GeoPackage's form); None: 1970-01-01.

    >>> gdal_timestamp(_dt.date(2024, 5, 14))
    '2024-05-14T00:00:00.000Z'
    """
    if when is None:
        when = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)
    if isinstance(when, str):
        return when
    if not isinstance(when, _dt.datetime):
        when = _dt.datetime(when.year, when.month, when.day, tzinfo=_dt.timezone.utc)
    if when.tzinfo is not None:
        when = when.astimezone(_dt.timezone.utc)
    return when.strftime("%Y-%m-%dT%H:%M:%S.") + f"{when.microsecond // 1000:03d}Z"


def _tiff_datetime(when) -> str:
    """TIFF 6.0 DateTime tag text, ``YYYY:MM:DD HH:MM:SS``."""
    iso = gdal_timestamp(when)
    return iso[:10].replace("-", ":") + " " + iso[11:19]


# ---------------------------------------------------------------------- atomic output


@contextlib.contextmanager
def _atomic_files(target: Path):
    """Yield a path in a hidden temporary folder beside ``target``; move its files in on success.

    GDAL may write side-cars (``x.prj``, ``x.asc.aux.xml``) next to the file;
    they are moved too, before the main file, each by an atomic rename.
    """
    target = Path(os.fspath(target))
    if target.is_dir():
        raise OutputError(f"output path '{target}' is a folder; give a file name")
    try:
        folder = Path(tempfile.mkdtemp(prefix=f".{target.stem}.", suffix=".tmp", dir=target.parent))
    except OSError as exc:
        raise OutputError(
            f"cannot create a file in the output folder '{target.parent}': {exc.strerror or exc}; "
            "choose a folder you can write to"
        ) from exc
    try:
        yield folder / target.name
        made = sorted(folder.iterdir(), key=lambda p: p.name == target.name)  # main file last
        if not made or made[-1].name != target.name:
            raise OutputError(f"GDAL did not write '{target.name}'")
        for p in made:
            try:
                os.replace(p, target.parent / p.name)
            except OSError as exc:
                raise OutputError(
                    f"cannot replace '{target.parent / p.name}': {exc.strerror or exc}; is it open in another "
                    "program (close it there) or read-only?"
                ) from exc
    finally:
        shutil.rmtree(folder, ignore_errors=True)


# ------------------------------------------------------------------------------ rasters


@dataclass(frozen=True)
class Raster:
    """One band of a raster file, as read.

    ``values[i, j]`` is the cell whose centre is at
    ``(x0_edge + (j + 0.5) * dx, y0_edge + (i + 0.5) * dy)``; for a north-up
    raster ``dy`` is negative and ``y0_edge`` is the north edge (GDAL's
    geotransform ``(x0_edge, dx, 0, y0_edge, 0, dy)``).
    """

    values: np.ndarray  # (ny, nx) float64, NaN where the file has nodata
    x0_edge: float
    y0_edge: float
    dx: float
    dy: float
    crs: object | None  # pyproj.CRS or None when the file has none
    nodata: float | None
    metadata: Dict[str, str] = field(default_factory=dict)  # dataset metadata (default domain)
    band_metadata: Dict[str, str] = field(default_factory=dict)
    description: str = ""  # the band's description
    unit: str = ""  # the band's unit

    @property
    def shape(self) -> Tuple[int, int]:
        """(ny, nx) of the band."""
        return self.values.shape

    @property
    def geotransform(self) -> Tuple[float, float, float, float, float, float]:
        """GDAL's affine ``(x0_edge, dx, 0, y0_edge, 0, dy)``."""
        return (self.x0_edge, self.dx, 0.0, self.y0_edge, 0.0, self.dy)

    @property
    def x_centres(self) -> np.ndarray:
        """Eastings (m) of the column centres."""
        return self.x0_edge + (np.arange(self.values.shape[1]) + 0.5) * self.dx

    @property
    def y_centres(self) -> np.ndarray:
        """Northings (m) of the row centres."""
        return self.y0_edge + (np.arange(self.values.shape[0]) + 0.5) * self.dy

    @property
    def spec(self):
        """The :class:`~rockhead.core.grid.GridSpec` of a north-up raster of square cells."""
        from ..grid import GridSpec

        ny, nx = self.values.shape
        if not (self.dx > 0 and self.dy < 0 and math.isclose(self.dx, -self.dy, rel_tol=1e-9)):
            raise GeoreferenceError(
                f"the raster's cells are {self.dx:g} x {self.dy:g}: a GridSpec needs north-up square cells"
            )
        return GridSpec(self.x0_edge + self.dx / 2, self.y0_edge + self.dy / 2, self.dx, nx, ny)


def raster_driver(path) -> str:
    """GDAL raster driver for a file name: COG for ``.tif``/``.tiff``, else the driver claiming the extension."""
    suffix = Path(os.fspath(path)).suffix.lower()
    if suffix in _TIFF_EXTENSIONS:
        return "COG"
    table = _raster_extensions()
    if suffix.lstrip(".") in table:
        return table[suffix.lstrip(".")]
    known = ", ".join(sorted({"." + e for e in table} | set(_TIFF_EXTENSIONS)))
    raise OutputError(
        f"no GDAL raster driver writes '{suffix or Path(path).name}' files; use one of {known} (.tif recommended)"
    )


def _raster_extensions() -> Dict[str, str]:
    """Map each file extension to the GDAL raster driver that writes it (the first driver claiming it wins)."""
    out = dict(_adapter(None, "choosing a raster format").raster_extensions())
    out.pop("vrt", None)  # a VRT only points at other files
    return out


def _float32(values, spec, nodata: float | None) -> np.ndarray:
    data = np.asarray(values, dtype=float)
    if data.shape != spec.shape:
        raise OutputError(f"raster values have shape {data.shape}; the grid is {spec.shape} (ny, nx)")
    out = data.astype(np.float32)
    if nodata is not None:
        if float(np.float32(nodata)) != nodata and not math.isnan(nodata):
            raise OutputError(f"nodata {nodata!r} is not exactly representable as float32; use e.g. -9999")
        out[np.isnan(data)] = np.float32(nodata)
    return out


def write_raster(
    path,
    values,
    spec,
    crs,
    *,
    nodata: float | None = -9999.0,
    metadata: Mapping[str, str] | None = None,
    description: str = "",
    unit: str = "m",
    band_metadata: Mapping[str, str] | None = None,
    timestamp=None,
    software: str | None = None,
    driver: str | None = None,
    engine_name: str | None = None,
) -> Path:
    """Write one band of float32 values on a grid, atomically, through GDAL.

    Parameters
    ----------
    path : str or path-like
        Output file; its extension picks the driver (:func:`raster_driver`).
    values : array-like, shape ``spec.shape``
        Row 0 north, column 0 west; NaN marks empty cells.
    spec : rockhead.core.grid.GridSpec
        The grid (cell centres, square cells).
    crs : pyproj.CRS, text or None
        CRS of the grid; a compound one (horizontal + vertical) for elevations.
    nodata : float or None
        Value written for NaN and declared; must be exact in float32.
    metadata, band_metadata : mapping of str to str
        Dataset and band metadata items (default domain).
    description, unit : str
        The band's description and unit (``"m"``).
    timestamp : datetime, date or ISO text, optional
        TIFF DateTime tag (TIFF only; no tag without it).
    software : str, optional
        TIFF Software tag (TIFF only).
    driver : str, optional
        GDAL driver short name instead of the extension's.
    engine_name : {None, "osgeo", "pypi"}
        See :func:`engine`.

    Returns
    -------
    pathlib.Path
    """
    path = Path(os.fspath(path))
    driver = driver or raster_driver(path)
    data = _float32(values, spec, None if nodata is None else float(nodata))
    md = {str(k): str(v) for k, v in (metadata or {}).items()}
    if driver in ("COG", "GTiff"):
        if timestamp is not None:
            md["TIFFTAG_DATETIME"] = _tiff_datetime(timestamp)
        if software:
            md["TIFFTAG_SOFTWARE"] = software
        if description:
            md["TIFFTAG_IMAGEDESCRIPTION"] = description
    md["AREA_OR_POINT"] = "Area"  # a value covers its cell (GridSpec cell centres)
    bmd = {str(k): str(v) for k, v in (band_metadata or {}).items()}
    options = dict(COG_OPTIONS) if driver == "COG" else {}
    crs = gdal_crs(crs)
    wkt = crs.to_wkt("WKT2_2019") if crs is not None else ""
    adapter = _adapter(engine_name, f"writing '{path.name}'")
    with _atomic_files(path) as tmp:
        adapter.write_raster(tmp, data, spec.geotransform, wkt, nodata, md, bmd, description, unit, driver, options)
    return path


def read_raster(path, band: int = 1, *, engine_name: str | None = None) -> Raster:
    """Read one band of a raster (a DEM, or a grid this module wrote) in any format GDAL reads.

    Returns values as float64 with NaN for nodata, the CRS as a
    :class:`pyproj.CRS` (None when the file declares none) and the metadata.
    A rotated raster raises :class:`GeoreferenceError`.
    """
    path = Path(os.fspath(path))
    if not path.exists():
        raise InputFileError(path, None, None, "raster file not found; check the path")
    adapter = _adapter(engine_name, f"reading the raster '{path.name}'")
    gt, values, nodata, wkt, md, bmd, desc, unit = adapter.read_raster(path, band)
    if gt[2] != 0 or gt[4] != 0:
        raise GeoreferenceError(f"'{path.name}' is a rotated raster; resample it north-up first")
    if nodata is not None and not math.isnan(nodata):
        values[values == nodata] = np.nan
    x0_edge, y0_edge, dx, dy = (float(v) for v in (gt[0], gt[3], gt[1], gt[5]))
    return Raster(
        values, x0_edge, y0_edge, dx, dy, _crs_from_wkt(wkt), nodata, dict(md), dict(bmd), desc or "", unit or ""
    )


def read_grid(path, band: int = 1, *, engine_name: str | None = None):
    """``(GridSpec, values, crs)`` of a north-up raster of square cells (the project's grid convention).

    Values are float64 with NaN for nodata, row 0 north; raises
    :class:`GeoreferenceError` for a raster that is not north-up with square
    cells (read it with :func:`read_raster`).
    """
    r = read_raster(path, band, engine_name=engine_name)
    return r.spec, r.values, r.crs


# ------------------------------------------------------------------------------ vectors


def write_layers(
    path,
    layers: Mapping[str, Layer],
    crs,
    *,
    dataset_metadata: Mapping[str, str] | None = None,
    layer_metadata: Mapping[str, Mapping[str, str]] | None = None,
    timestamp=None,
    engine_name: str | None = None,
) -> Path:
    """Write layers to a new GeoPackage through GDAL, atomically.

    Parameters
    ----------
    path : str or path-like
        Output file (``.gpkg``); replaced as a whole once the new one is complete.
    layers : mapping of str to Layer
        Tables in the order a GIS lists them. Names: letters, digits and ``_``.
    crs : pyproj.CRS or text
        CRS of every geometry (compound when z is an elevation in a stated
        vertical datum); required when a layer has geometries (GDAL versions
        disagree on what an undefined CRS is).
    dataset_metadata : mapping of str to str
        GDAL metadata of the file (a ``gpkg_metadata`` record of scope
        ``dataset`` referenced by the whole GeoPackage).
    layer_metadata : mapping of layer name to mapping of str to str
        GDAL metadata of each table.
    timestamp : datetime, date or ISO text, optional
        ``gpkg_contents.last_change`` and the metadata references' time
        (default 1970-01-01T00:00:00.000Z: never the clock).
    engine_name : {None, "osgeo", "pypi"}
        See :func:`engine`.
    """
    path = Path(os.fspath(path))
    if not layers:
        raise OutputError(f"no layers to write to '{path}'")
    prepared = []
    for lname, layer in layers.items():
        columns = check_layer(lname, layer)
        gtype, wkb = encode_geometries(lname, layer)
        prepared.append((lname, layer, columns, gtype, wkb))
    if crs is None and any(p[3] is not None for p in prepared):
        raise OutputError(f"no CRS for the geometries of '{path.name}'; give the survey's CRS")
    crs = gdal_crs(crs)
    wkt = crs.to_wkt("WKT2_2019") if crs is not None else ""
    adapter = _adapter(engine_name, f"writing '{path.name}'")
    dmd = {str(k): str(v) for k, v in (dataset_metadata or {}).items()}
    lmd = {k: {str(a): str(b) for a, b in v.items()} for k, v in (layer_metadata or {}).items()}
    # SQLite would flush the file to disk at every layer's transaction; it is flushed once, when complete.
    # Its rollback journal is kept in memory, not in a file created and removed at every transaction: the
    # file is a temporary one until complete (a failed write removes it), so the journal only serves rollbacks
    options = {
        "OGR_CURRENT_DATE": gdal_timestamp(timestamp),
        "OGR_SQLITE_SYNCHRONOUS": "OFF",
        "OGR_SQLITE_JOURNAL": "MEMORY",
    }
    with adapter.config(options), _atomic_files(path) as tmp:
        adapter.write_layers(tmp, prepared, wkt, dmd, lmd, {"VERSION": GPKG_VERSION}, _layer_options)
        _flush_to_disk(tmp)
    return path


def _flush_to_disk(path: Path) -> None:
    """Flush a finished file to disk before it is renamed into place (the rename never exposes a partial file).

    Inside a run's staging folder the run folder's commit flushes it (:func:`~.atomic.flushed_later`).
    """
    if flushed_later(path):
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _layer_options(lname, layer) -> dict:
    return {
        "FID": "fid",
        "GEOMETRY_NAME": "geom",
        "SPATIAL_INDEX": "YES",
        "IDENTIFIER": lname,
        "DESCRIPTION": layer.description or "",
    }


def list_layers(path, *, engine_name: str | None = None) -> list:
    """Names of the layers (tables) of a vector file, in order."""
    return _adapter(engine_name, "reading a vector file").list_layers(Path(os.fspath(path)))


def read_layer(path, name: str, *, engine_name: str | None = None) -> Tuple[Layer, object]:
    """Read one table back: a :class:`Layer` (shapely geometries, numpy columns) and its CRS.

    Text columns come back as object arrays (None for NULL), real ones as float
    (NaN for NULL), integers as int64 and booleans as bool (float with NaN when
    NULLs are present), date-times as ``datetime64[ms]`` (UTC).
    """
    from shapely import wkb as shapely_wkb

    path = Path(os.fspath(path))
    wkb, raw, wkt, desc = _adapter(engine_name, "reading a vector file").read_layer(path, name)
    geoms = None if wkb is None else [None if b is None else shapely_wkb.loads(b) for b in wkb]
    fields = {fname: _column(values, kind) for fname, (kind, values) in raw.items()}
    return Layer(geoms, fields, description=desc), _crs_from_wkt(wkt)


def _column(values, kind):
    if kind == "f":
        return np.array([np.nan if v is None else v for v in values], dtype=float)
    if kind in "ib":
        if any(v is None for v in values):
            return np.array([np.nan if v is None else v for v in values], dtype=float)
        return np.array(values, dtype=np.int64 if kind == "i" else bool)
    if kind == "M":
        return np.array(["NaT" if v is None else v for v in values], dtype="datetime64[ms]")
    out = np.empty(len(values), dtype=object)
    out[:] = values
    return out


def vector_metadata(path, layer: str | None = None, *, engine_name: str | None = None) -> Dict[str, str]:
    """GDAL metadata (default domain) of a vector file, or of one of its layers."""
    return _adapter(engine_name, "reading a vector file").vector_metadata(Path(os.fspath(path)), layer)
