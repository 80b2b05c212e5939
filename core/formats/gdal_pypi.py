"""GDAL through rasterio (rasters) and pyogrio (vectors), the command line's Python packages.

The adapter behind :mod:`.gdalio` where GDAL's own bindings are absent: plain
values in and out (WKT, geotransforms, WKB, numpy arrays), no project types.
Each package carries its own GDAL build.
"""

from __future__ import annotations

import contextlib
import math
import warnings
from typing import Dict, Mapping

import numpy as np

from ..errors import InputFileError, OutputError

__all__ = [
    "config",
    "import_for_writing",
    "list_layers",
    "raster_extensions",
    "read_layer",
    "read_raster",
    "vector_metadata",
    "write_layers",
    "write_raster",
]

#: What pyogrio imports at its own import for its DataFrame functions, which this adapter never calls
_DATAFRAME_PACKAGES = ("pandas", "geopandas", "pyarrow")


def import_for_writing() -> None:
    """Import rasterio and pyogrio for a process that only writes through them, without pandas and geopandas.

    pyogrio imports pandas, geopandas and pyarrow when it is imported (for
    ``read_dataframe`` and ``write_dataframe``): 0.6 s of the 0.8 s its import
    and rasterio's take. This adapter uses its raw, numpy API only, so a
    process that writes a run's files and then ends (the command line's
    worker) imports it with those packages hidden; pyogrio's DataFrame
    functions then say geopandas is missing, in that process only. Packages
    already imported are left as they are, and nothing is hidden once pyogrio
    is imported.
    """
    import importlib
    import sys

    if "pyogrio" in sys.modules:
        importlib.import_module("rasterio")
        return
    hidden = [name for name in _DATAFRAME_PACKAGES if name not in sys.modules]
    for name in hidden:
        sys.modules[name] = None  # type: ignore[assignment]  # ``import name`` raises ImportError meanwhile
    try:
        importlib.import_module("pyogrio")
        importlib.import_module("rasterio")
    finally:
        for name in hidden:
            if sys.modules.get(name, 0) is None:
                del sys.modules[name]


_GEOMETRY_NAMES = {
    "POINT": "Point",
    "LINESTRING": "LineString",
    "POLYGON": "Polygon",
    "MULTIPOINT": "MultiPoint",
    "MULTILINESTRING": "MultiLineString",
    "MULTIPOLYGON": "MultiPolygon",
    "GEOMETRY": "Unknown",
}


@contextlib.contextmanager
def config(options: Mapping[str, str | None]):
    """GDAL configuration options (pyogrio's GDAL) for the block, restored after."""
    import pyogrio

    before = {k: pyogrio.get_gdal_config_option(k) for k in options}
    pyogrio.set_gdal_config_options(dict(options))
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options(before)


def raster_extensions() -> Dict[str, str]:
    """Map each file extension to the short name of the raster driver that writes it."""
    from rasterio.drivers import raster_driver_extensions

    return {ext.lower(): name for ext, name in raster_driver_extensions().items()}


def write_raster(tmp, data, geotransform, wkt, nodata, md, bmd, description, unit, driver, options) -> None:
    """One float32 band from an in-memory GeoTIFF, copied by ``driver`` (COG is a copy-only driver)."""
    import rasterio.shutil
    from rasterio.crs import CRS
    from rasterio.errors import RasterioError
    from rasterio.io import MemoryFile
    from rasterio.transform import Affine

    ny, nx = data.shape
    gt = geotransform
    profile = dict(
        driver="GTiff",
        width=nx,
        height=ny,
        count=1,
        dtype="float32",
        nodata=nodata,
        crs=CRS.from_wkt(wkt) if wkt else None,
        transform=Affine(gt[1], gt[2], gt[0], gt[4], gt[5], gt[3]),
    )
    try:
        with MemoryFile() as mf:
            with mf.open(**profile) as ds:
                ds.write(data, 1)
                ds.update_tags(**md)
                if bmd:
                    ds.update_tags(1, **bmd)
                if description:
                    ds.set_band_description(1, description)
                if unit:
                    ds.set_band_unit(1, unit)
            with mf.open() as src:
                rasterio.shutil.copy(src, str(tmp), driver=driver, **options)
    except RasterioError as exc:
        raise OutputError(f"GDAL cannot write '{tmp.name}' with the {driver} driver: {exc}") from exc


def read_raster(path, band: int):
    """(geotransform, float64 values, nodata, WKT 2, metadata, band metadata, description, unit)."""
    import rasterio
    from rasterio.errors import RasterioError

    try:
        with rasterio.open(path) as ds:
            t = ds.transform
            values = ds.read(band).astype(np.float64)
            wkt = ds.crs.to_wkt(version="WKT2_2019") if ds.crs is not None else ""
            return (
                (t.c, t.a, t.b, t.f, t.d, t.e),
                values,
                ds.nodatavals[band - 1],
                wkt,
                ds.tags(),
                ds.tags(band),
                ds.descriptions[band - 1],
                ds.units[band - 1],
            )
    except (RasterioError, IndexError) as exc:
        raise InputFileError(path, None, None, f"GDAL cannot read the raster: {exc}") from exc


def _text(arr) -> np.ndarray:
    out = np.empty(len(arr), dtype=object)
    out[:] = [
        None
        if v is None or (isinstance(v, float) and math.isnan(v))
        else (v.decode("utf-8") if isinstance(v, bytes) else str(v))
        for v in arr.tolist()
    ]
    return out


def write_layers(tmp, prepared, wkt, dmd, lmd, dataset_options, layer_options) -> None:
    """Create the file and write every prepared layer ``(name, layer, columns, type, wkb)``."""
    import pyogrio
    from pyogrio.errors import DataLayerError, DataSourceError, FieldError, GeometryError

    for k, (lname, layer, columns, gtype, wkb) in enumerate(prepared):
        names, data, tz = [], [], {}
        for fname, (kind, arr) in columns.items():
            names.append(fname)
            if kind == "M":
                tz[fname] = np.full(len(arr), 100, dtype=np.int64)  # GDAL's code for UTC ('Z')
            data.append(
                {
                    "S": _text,
                    "i": lambda a: a.astype(np.int64),
                    "f": lambda a: a.astype(np.float64),
                    "M": lambda a: a.astype("datetime64[ms]"),
                    "b": lambda a: a.astype(bool),
                }[kind](arr)
            )
        geometry = None
        gname = None
        if gtype is not None:
            geometry = np.empty(len(wkb), dtype=object)
            geometry[:] = wkb
            base = _GEOMETRY_NAMES[gtype.replace(" Z", "")]
            gname = base + " Z" if gtype.endswith(" Z") and base != "Unknown" else base
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # "'crs' was not provided" for attribute tables
                pyogrio.raw.write(
                    str(tmp),
                    geometry,
                    data,
                    names,
                    layer=lname,
                    driver="GPKG",
                    geometry_type=gname,
                    crs=wkt if (wkt and gtype) else None,
                    append=k > 0,
                    promote_to_multi=False,
                    dataset_metadata=(dmd or None) if k == 0 else None,
                    layer_metadata=lmd.get(lname) or None,
                    dataset_options=dict(dataset_options) if k == 0 else None,
                    layer_options=layer_options(lname, layer),
                    gdal_tz_offsets=tz or None,
                )
        except (DataSourceError, DataLayerError, FieldError, GeometryError) as exc:
            raise OutputError(f"GDAL cannot write the GeoPackage '{tmp.name}': {exc}") from exc


@contextlib.contextmanager
def _reading(path):
    """Turn pyogrio's errors for an unreadable file into the project's input error."""
    from pyogrio.errors import DataLayerError, DataSourceError

    try:
        yield
    except (DataSourceError, DataLayerError) as exc:
        raise InputFileError(path, None, None, f"GDAL cannot read the file: {exc}") from exc


def list_layers(path) -> list:
    """Names of the layers of a vector file, in the file's order."""
    import pyogrio

    with _reading(path):
        return [str(n) for n in pyogrio.list_layers(str(path))[:, 0]]


def read_layer(path, name: str):
    """(WKB list or None, {field: (kind, values)}, WKT 2, description) of one table."""
    import pyogrio

    with _reading(path):
        meta, _fids, geoms, data = pyogrio.raw.read(str(path), layer=name)
    fields = {}
    for fname, arr, ogr_type, sub in zip(meta["fields"], data, meta["ogr_types"], meta["ogr_subtypes"]):
        kind = {"OFTReal": "f", "OFTInteger64": "i", "OFTDateTime": "M"}.get(ogr_type, "S")
        if ogr_type == "OFTInteger":
            kind = "b" if sub == "OFSTBoolean" else "i"
        values = arr.tolist() if kind != "M" else [None if np.isnat(v) else str(v) for v in arr]
        if kind == "f":
            values = [None if (v is None or (isinstance(v, float) and math.isnan(v))) else v for v in values]
        fields[str(fname)] = (kind, values)
    wkb = None
    if meta.get("geometry_type") is not None:
        wkb = [] if geoms is None else [None if g is None else bytes(g) for g in geoms]
    with _reading(path):
        info = pyogrio.read_info(str(path), layer=name)
    desc = (info.get("layer_metadata") or {}).get("DESCRIPTION", "")
    return wkb, fields, meta["crs"] or "", desc


def vector_metadata(path, layer=None) -> dict:
    """Metadata (default domain) of a vector file, or of one of its layers."""
    import pyogrio

    with _reading(path):
        info = pyogrio.read_info(str(path), layer=0 if layer is None else layer)
    return dict(info.get("dataset_metadata" if layer is None else "layer_metadata") or {})
