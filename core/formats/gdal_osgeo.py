"""GDAL through its own Python bindings (``osgeo``), the way every QGIS installation reaches it.

The adapter behind :mod:`.gdalio` on QGIS's Python: plain values in and out
(WKT, geotransforms, WKB, numpy arrays), no project types. GDAL's exception
mode is switched on only for the calls made here and the caller's setting
restored after (QGIS and other plugins share the module-wide flag).
"""

from __future__ import annotations

import contextlib
import math
from typing import Dict, List, Mapping, Optional

import numpy as np

from ..errors import InputFileError, OutputError

__all__ = [
    "config",
    "list_layers",
    "raster_extensions",
    "read_layer",
    "read_raster",
    "vector_metadata",
    "write_layers",
    "write_raster",
]


@contextlib.contextmanager
def exceptions():
    """GDAL/OGR/OSR errors as Python exceptions for the block, the caller's setting restored after."""
    from osgeo import gdal, ogr, osr

    modules = (gdal, ogr, osr)
    before = [m.GetUseExceptions() for m in modules]
    for m in modules:
        m.UseExceptions()
    try:
        yield
    finally:
        for m, was in reversed(list(zip(modules, before))):  # GDAL 3.6 keeps the handlers on a stack
            if not was:
                m.DontUseExceptions()


@contextlib.contextmanager
def config(options: Mapping[str, str | None]):
    """GDAL configuration options for the block, restored after."""
    from osgeo import gdal

    before = {k: gdal.GetConfigOption(k) for k in options}
    for k, v in options.items():
        gdal.SetConfigOption(k, v)
    try:
        yield
    finally:
        for k, v in before.items():
            gdal.SetConfigOption(k, v)


def _srs(wkt: str):
    from osgeo import osr

    if not wkt:
        return None
    srs = osr.SpatialReference()
    srs.ImportFromWkt(wkt)
    srs.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    return srs


def raster_extensions() -> Dict[str, str]:
    """Map each file extension to the short name of the raster driver that writes it (the first claiming it)."""
    from osgeo import gdal

    out: Dict[str, str] = {}
    for i in range(gdal.GetDriverCount()):
        d = gdal.GetDriver(i)
        md = d.GetMetadata() or {}
        if md.get("DCAP_RASTER") != "YES" or not (md.get("DCAP_CREATE") or md.get("DCAP_CREATECOPY")):
            continue
        for ext in (md.get("DMD_EXTENSIONS") or md.get("DMD_EXTENSION") or "").split():
            out.setdefault(ext.lower(), d.ShortName)
    return out


def write_raster(tmp, data, geotransform, wkt, nodata, md, bmd, description, unit, driver, options) -> None:
    """One float32 band from an in-memory dataset, copied by ``driver`` (COG is a copy-only driver)."""
    from osgeo import gdal

    ny, nx = data.shape
    with exceptions():
        drv = gdal.GetDriverByName(driver)
        if drv is None:
            raise OutputError(f"this GDAL ({gdal.__version__}) has no '{driver}' driver")
        mem = gdal.GetDriverByName("MEM").Create("", nx, ny, 1, gdal.GDT_Float32)
        mem.SetGeoTransform(geotransform)
        if wkt:
            mem.SetSpatialRef(_srs(wkt))
        mem.SetMetadata(dict(md))
        band = mem.GetRasterBand(1)
        if nodata is not None:
            band.SetNoDataValue(float(nodata))
        band.WriteRaster(0, 0, nx, ny, np.ascontiguousarray(data, dtype="<f4").tobytes())
        if description:
            band.SetDescription(description)
        if unit:
            band.SetUnitType(unit)
        if bmd:
            band.SetMetadata(dict(bmd))
        band = None
        try:
            out = drv.CreateCopy(str(tmp), mem, 0, [f"{k}={v}" for k, v in options.items()])
        except RuntimeError as exc:
            raise OutputError(f"GDAL cannot write '{tmp.name}' with the {driver} driver: {exc}") from exc
        out.FlushCache()
        out = None
        mem = None


def read_raster(path, band: int):
    """(geotransform, float64 values, nodata, WKT 2, metadata, band metadata, description, unit)."""
    from osgeo import gdal

    with exceptions():
        try:
            ds = gdal.Open(str(path))
            b = ds.GetRasterBand(band)
        except RuntimeError as exc:
            raise InputFileError(path, None, None, f"GDAL cannot read the raster: {exc}") from exc
        nx, ny = ds.RasterXSize, ds.RasterYSize
        raw = b.ReadRaster(0, 0, nx, ny, buf_type=gdal.GDT_Float64)
        values = np.frombuffer(raw, dtype=np.float64).reshape(ny, nx).copy()
        srs = ds.GetSpatialRef()
        wkt = srs.ExportToWkt(["FORMAT=WKT2_2019"]) if srs is not None else ""
        out = (
            ds.GetGeoTransform(),
            values,
            b.GetNoDataValue(),
            wkt,
            ds.GetMetadata() or {},
            b.GetMetadata() or {},
            b.GetDescription(),
            b.GetUnitType(),
        )
        b = None
        ds = None
    return out


_OGR_BASE = {
    "POINT": 1,
    "LINESTRING": 2,
    "POLYGON": 3,
    "MULTIPOINT": 4,
    "MULTILINESTRING": 5,
    "MULTIPOLYGON": 6,
    "GEOMETRY": 0,
}


def _ogr_type(gtype):
    from osgeo import ogr

    if gtype is None:
        return ogr.wkbNone
    base = _OGR_BASE[gtype.replace(" Z", "")]
    return ogr.GT_SetZ(base) if gtype.endswith(" Z") and base else base


def write_layers(tmp, prepared, wkt, dmd, lmd, dataset_options, layer_options) -> None:
    """Create the file and write every prepared layer ``(name, layer, columns, type, wkb)``."""
    from osgeo import ogr

    with exceptions():
        srs = _srs(wkt)
        ds = ogr.GetDriverByName("GPKG").CreateDataSource(str(tmp), [f"{k}={v}" for k, v in dataset_options.items()])
        try:
            if dmd:
                ds.SetMetadata(dict(dmd))
            for lname, layer, columns, gtype, wkb in prepared:
                options = [f"{k}={v}" for k, v in layer_options(lname, layer).items()]
                lyr = ds.CreateLayer(lname, srs if gtype else None, _ogr_type(gtype), options)
                _fields(lyr, columns)
                _features(lyr, columns, wkb, len(layer))
                if lname in lmd:
                    lyr.SetMetadata(dict(lmd[lname]))
                lyr = None
        except RuntimeError as exc:
            raise OutputError(f"GDAL cannot write the GeoPackage '{tmp.name}': {exc}") from exc
        finally:
            ds = None


def _fields(lyr, columns) -> None:
    from osgeo import ogr

    types = {"f": ogr.OFTReal, "i": ogr.OFTInteger64, "b": ogr.OFTInteger, "S": ogr.OFTString, "M": ogr.OFTDateTime}
    for fname, (kind, _arr) in columns.items():
        fd = ogr.FieldDefn(fname, types[kind])
        if kind == "b":
            fd.SetSubType(ogr.OFSTBoolean)
        lyr.CreateField(fd)


def _python_values(kind, arr) -> list:
    if kind == "M":
        return [None if np.isnat(v) else v.astype("datetime64[ms]").item() for v in arr]
    if kind == "f":
        return [None if math.isnan(v) else v for v in arr.astype(float).tolist()]
    if kind == "S":
        return [
            None
            if v is None or (isinstance(v, float) and math.isnan(v))
            else (v.decode("utf-8") if isinstance(v, bytes) else str(v))
            for v in arr.tolist()
        ]
    return [int(v) for v in arr.tolist()]


def _features(lyr, columns, wkb, n: int) -> None:
    from osgeo import ogr

    defn = lyr.GetLayerDefn()
    cols = [(k, kind, _python_values(kind, arr)) for k, (kind, arr) in enumerate(columns.values())]
    lyr.StartTransaction()
    for i in range(n):
        f = ogr.Feature(defn)
        f.SetFID(i + 1)
        for k, kind, values in cols:
            v = values[i]
            if v is None:
                f.SetFieldNull(k)
            elif kind == "M":
                f.SetField(k, v.year, v.month, v.day, v.hour, v.minute, v.second + v.microsecond / 1e6, 100)
            elif kind == "i":
                f.SetFieldInteger64(k, v)
            else:
                f.SetField(k, v)
        if wkb is not None and wkb[i] is not None:
            f.SetGeometryDirectly(ogr.CreateGeometryFromWkb(wkb[i]))
        lyr.CreateFeature(f)
    lyr.CommitTransaction()


def _open_vector(path):
    from osgeo import ogr

    try:
        ds = ogr.Open(str(path))
    except RuntimeError as exc:
        raise InputFileError(path, None, None, f"GDAL cannot open the file: {exc}") from exc
    if ds is None:  # pragma: no cover - exceptions are on
        raise InputFileError(path, None, None, "GDAL cannot open the file")
    return ds


def list_layers(path) -> list:
    """Names of the layers of a vector file, in the file's order."""
    with exceptions():
        ds = _open_vector(path)
        names = [ds.GetLayer(i).GetName() for i in range(ds.GetLayerCount())]
        ds = None
    return names


def _kind(fd) -> str:
    from osgeo import ogr

    typ, sub = fd.GetType(), fd.GetSubType()
    if typ == ogr.OFTReal:
        return "f"
    if typ == ogr.OFTDateTime:
        return "M"
    if typ == ogr.OFTInteger and sub == ogr.OFSTBoolean:
        return "b"
    if typ in (ogr.OFTInteger, ogr.OFTInteger64):
        return "i"
    return "S"


def read_layer(path, name: str):
    """(WKB list or None, {field: (kind, values)}, WKT 2, description) of one table."""
    with exceptions():
        ds = _open_vector(path)
        lyr = ds.GetLayerByName(name)
        if lyr is None:
            raise InputFileError(path, None, None, f"no layer '{name}'")
        defn = lyr.GetLayerDefn()
        fdefs = [defn.GetFieldDefn(i) for i in range(defn.GetFieldCount())]
        kinds = [_kind(fd) for fd in fdefs]
        cols: List[list] = [[] for _ in fdefs]
        geoms: Optional[list] = [] if defn.GetGeomFieldCount() > 0 else None
        for feat in lyr:
            for i, kind in enumerate(kinds):
                if not feat.IsFieldSetAndNotNull(i):
                    cols[i].append(None)
                elif kind == "M":
                    y, mo, d, h, mi, sec, _tz = feat.GetFieldAsDateTime(i)
                    cols[i].append(f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{sec:06.3f}")
                else:
                    cols[i].append(feat.GetField(i))
            if geoms is not None:
                g = feat.GetGeometryRef()
                geoms.append(None if g is None else bytes(g.ExportToIsoWkb()))
        srs = lyr.GetSpatialRef()
        wkt = srs.ExportToWkt(["FORMAT=WKT2_2019"]) if srs is not None else ""
        desc = lyr.GetMetadataItem("DESCRIPTION") or ""
        lyr = None
        ds = None
    fields = {fd.GetName(): (kind, values) for fd, kind, values in zip(fdefs, kinds, cols)}
    return geoms, fields, wkt, desc


def vector_metadata(path, layer=None) -> dict:
    """Metadata (default domain) of a vector file, or of one of its layers."""
    with exceptions():
        ds = _open_vector(path)
        obj = ds if layer is None else ds.GetLayerByName(layer)
        md = dict(obj.GetMetadata() or {})
        obj = None
        ds = None
    return md
