"""GeoTIFF writer and a small reader, without GDAL; DEM reading through GDAL or rasterio.

The writer produces a single-band, north-up, 32-bit float GeoTIFF (TIFF 6.0
baseline strips, uncompressed or Deflate) with the georeferencing of GeoTIFF
1.1 (OGC 19-008r4):

* ModelPixelScaleTag (33550) = (dx, dy, 0) and ModelTiepointTag (33922)
  tying raster point (0, 0), the outer corner of the first pixel, to the
  top-left edge (x0, y0) of the grid;
* GeoKeyDirectoryTag (34735), version 1.1.1: GTModelTypeGeoKey = 1
  (projected) or 2 (geographic), GTRasterTypeGeoKey = 1 (PixelIsArea: a value
  covers its cell and pixel (i, j) has its centre at
  ``(x0 + (j + 0.5) dx, y0 - (i + 0.5) dy)``), GTCitationGeoKey = the CRS name,
  and ProjectedCSTypeGeoKey (or GeographicTypeGeoKey) = the EPSG code;
* for a projected CRS without an EPSG code, GTModelTypeGeoKey = 32767
  (user-defined) and the CRS as ESRI WKT 1 in PCSCitationGeoKey after the
  prefix ``ESRI PE String = ``, a convention GDAL (hence QGIS and rasterio)
  reads back as the full projection and ellipsoid; the datum *name* and any
  towgs84 shift are lost, and GeoTIFF readers that ignore the convention see
  an unnamed user-defined CRS;
* the nodata value in the GDAL_NODATA tag (42113, ASCII), as GDAL and
  rasterio read it. NaN cells are written as the nodata value.

The same array gives a byte-identical file (no date tag; zlib's output is fixed
for one zlib version and level).

:func:`read_geotiff` reads such files back (and simple stripped or tiled
GeoTIFFs from other software: uncompressed or Deflate, integer or float
samples). :func:`read_raster` reads a DEM in any format through ``osgeo.gdal``
if importable (always inside QGIS), else ``rasterio``, else this reader.
"""

from __future__ import annotations

import math
import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Dict, Tuple

import numpy as np

from ..errors import GeoreferenceError, InputFileError, MissingDependencyError, OutputError
from .atomic import atomic_path

__all__ = ["Raster", "read_geotiff", "read_raster", "write_geotiff", "write_geotiff_grid"]

# TIFF tags (TIFF 6.0) and GeoTIFF tags/keys (OGC 19-008r4)
_IMAGE_WIDTH, _IMAGE_LENGTH, _BITS_PER_SAMPLE, _COMPRESSION = 256, 257, 258, 259
_PHOTOMETRIC, _STRIP_OFFSETS, _SAMPLES_PER_PIXEL, _ROWS_PER_STRIP = 262, 273, 277, 278
_STRIP_BYTE_COUNTS, _PLANAR_CONFIG, _PREDICTOR = 279, 284, 317
_TILE_WIDTH, _TILE_LENGTH, _TILE_OFFSETS, _TILE_BYTE_COUNTS = 322, 323, 324, 325
_SAMPLE_FORMAT = 339
_MODEL_PIXEL_SCALE, _MODEL_TIEPOINT, _MODEL_TRANSFORMATION = 33550, 33922, 34264
_GEO_KEY_DIRECTORY, _GEO_DOUBLE_PARAMS, _GEO_ASCII_PARAMS = 34735, 34736, 34737
_GDAL_NODATA = 42113

_GT_MODEL_TYPE, _GT_RASTER_TYPE, _GT_CITATION = 1024, 1025, 1026
_GEOGRAPHIC_TYPE, _GEOG_CITATION, _GEOG_ANGULAR_UNITS = 2048, 2049, 2054
_PROJECTED_CS_TYPE, _PCS_CITATION, _PROJ_LINEAR_UNITS = 3072, 3073, 3076
_USER_DEFINED = 32767
_ESRI_PREFIX = "ESRI PE String = "

_SHORT, _LONG, _ASCII, _DOUBLE = 3, 4, 2, 12
_TYPE_SIZES = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 6: 1, 7: 1, 8: 2, 9: 4, 10: 8, 11: 4, 12: 8, 16: 8}
_TYPE_CODES = {
    1: "B", 2: "s", 3: "H", 4: "I", 5: "II", 6: "b", 7: "B", 8: "h", 9: "i", 10: "ii", 11: "f",
    12: "d", 16: "Q",
}


@dataclass(frozen=True)
class Raster:
    """A single-band, axis-aligned raster.

    ``values[i, j]`` is the cell whose centre is at
    ``(x0_edge + (j + 0.5) * dx, y0_edge + (i + 0.5) * dy)``; for a north-up
    raster ``dy`` is negative and ``y0_edge`` is the top (north) edge. This is
    GDAL's geotransform ``(x0_edge, dx, 0, y0_edge, 0, dy)``.
    """

    values: np.ndarray  # (ny, nx) float64, NaN where the file has nodata
    x0_edge: float
    y0_edge: float
    dx: float
    dy: float
    crs: object | None  # pyproj.CRS or None when the file has none
    nodata: float | None

    @property
    def shape(self) -> Tuple[int, int]:
        return self.values.shape

    @property
    def geotransform(self) -> Tuple[float, float, float, float, float, float]:
        return (self.x0_edge, self.dx, 0.0, self.y0_edge, 0.0, self.dy)

    @property
    def x_centres(self) -> np.ndarray:
        return self.x0_edge + (np.arange(self.values.shape[1]) + 0.5) * self.dx

    @property
    def y_centres(self) -> np.ndarray:
        return self.y0_edge + (np.arange(self.values.shape[0]) + 0.5) * self.dy


# ------------------------------------------------------------------ CRS keys


def _crs_geokeys(crs):
    """GeoKey entries (key, value or ascii) and the citation for a CRS."""
    from ..crs import horizontal_crs, parse_crs

    crs = horizontal_crs(parse_crs(crs))  # the horizontal part; elevations are plain numbers
    code = crs.to_epsg()
    keys: Dict[int, object] = {_GT_RASTER_TYPE: 1}  # RasterPixelIsArea
    if crs.is_geographic:
        keys[_GT_MODEL_TYPE] = 2
        if code is None:
            raise GeoreferenceError(
                f"the geographic CRS '{crs.name}' has no EPSG code; write rasters in a projected CRS"
            )
        keys[_GEOGRAPHIC_TYPE] = code
        keys[_GT_CITATION] = crs.name
    elif crs.is_projected:
        keys[_GT_MODEL_TYPE] = 1
        if code is not None:
            keys[_PROJECTED_CS_TYPE] = code
            keys[_GT_CITATION] = crs.name
        else:
            # user-defined model with the ESRI WKT in PCSCitationGeoKey: the form GDAL reads back
            keys[_GT_MODEL_TYPE] = _USER_DEFINED
            keys[_GT_CITATION] = crs.name
            keys[_PCS_CITATION] = _ESRI_PREFIX + crs.to_wkt("WKT1_ESRI")
    else:
        raise GeoreferenceError(f"CRS '{crs.name}' is neither projected nor geographic; cannot georeference")
    return keys


def _geokey_payload(keys: Dict[int, object]):
    """GeoKeyDirectoryTag shorts and GeoAsciiParamsTag text (19-008r4, 7.1.3)."""
    entries = []
    ascii_params = ""
    for key in sorted(keys):
        value = keys[key]
        if isinstance(value, str):
            text = value.replace("|", "/") + "|"
            entries.append((key, _GEO_ASCII_PARAMS, len(text), len(ascii_params)))
            ascii_params += text
        else:
            entries.append((key, 0, 1, int(value)))
    # KeyDirectoryVersion 1, KeyRevision 1, MinorRevision 1 (GeoTIFF 1.1)
    shorts = [1, 1, 1, len(entries)]
    for e in entries:
        shorts.extend(e)
    return shorts, ascii_params


# ------------------------------------------------------------------- writer


def _format_nodata(nodata: float) -> str:
    if math.isnan(nodata):
        return "nan"
    text = repr(float(nodata))
    return text[:-2] if text.endswith(".0") else text


def write_geotiff(
    path,
    array,
    x0_edge: float,
    y0_top_edge: float,
    cell_size_m,
    crs,
    nodata: float | None = -9999.0,
    *,
    compress: str = "deflate",
) -> Path:
    """Write a north-up single-band float32 GeoTIFF, atomically.

    Parameters
    ----------
    path : str or path-like
        Output file (``.tif``).
    array : array-like, shape (ny, nx)
        Values; row 0 is the northernmost row, column 0 the westernmost. NaN
        marks empty cells.
    x0_edge, y0_top_edge : float
        Easting of the west edge and northing of the north edge of the grid
        (edges, not cell centres), metres in ``crs``.
    cell_size_m : float or (float, float)
        Cell size, or (dx, dy) both positive.
    crs : pyproj.CRS or anything :meth:`pyproj.CRS.from_user_input` accepts, or None
        CRS of the grid (None: no CRS keys, only the pixel-is-area key).
    nodata : float or None
        Value written in place of NaN and declared in the GDAL_NODATA tag;
        None writes NaN cells as NaN and declares no nodata.
    compress : {"deflate", "none"}
        Deflate (TIFF compression 8, zlib) or no compression.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    path = Path(os.fspath(path))
    data = np.asarray(array, dtype=float)
    if data.ndim != 2 or 0 in data.shape:
        raise OutputError(f"a GeoTIFF needs a non-empty 2-D array (ny, nx); got shape {data.shape}")
    dx, dy = (cell_size_m, cell_size_m) if np.ndim(cell_size_m) == 0 else tuple(cell_size_m)
    dx, dy = float(dx), float(dy)
    if not (dx > 0 and dy > 0 and math.isfinite(dx) and math.isfinite(dy)):
        raise OutputError(f"cell size must be positive and finite; got {cell_size_m!r}")
    if not (math.isfinite(x0_edge) and math.isfinite(y0_top_edge)):
        raise OutputError(f"grid origin ({x0_edge!r}, {y0_top_edge!r}) is not finite")
    if compress not in ("deflate", "none"):
        raise OutputError(f"compress={compress!r}; expected 'deflate' or 'none'")
    keys = _crs_geokeys(crs) if crs is not None else {_GT_RASTER_TYPE: 1}
    ny, nx = data.shape
    values = data.astype("<f4")
    if nodata is not None:
        nodata = float(nodata)
        if float(np.float32(nodata)) != nodata and not math.isnan(nodata):
            raise OutputError(f"nodata {nodata!r} is not exactly representable as float32; use e.g. -9999")
        values[np.isnan(data)] = np.float32(nodata)

    rows_per_strip = max(1, min(ny, 65536 // (4 * nx)))
    strips = []
    for r0 in range(0, ny, rows_per_strip):
        raw = values[r0 : r0 + rows_per_strip].tobytes()
        strips.append(zlib.compress(raw, 6) if compress == "deflate" else raw)

    geokeys, ascii_params = _geokey_payload(keys)
    entries = [
        (_IMAGE_WIDTH, _LONG, [nx]),
        (_IMAGE_LENGTH, _LONG, [ny]),
        (_BITS_PER_SAMPLE, _SHORT, [32]),
        (_COMPRESSION, _SHORT, [8 if compress == "deflate" else 1]),
        (_PHOTOMETRIC, _SHORT, [1]),  # BlackIsZero
        (_STRIP_OFFSETS, _LONG, [0] * len(strips)),  # filled in below
        (_SAMPLES_PER_PIXEL, _SHORT, [1]),
        (_ROWS_PER_STRIP, _LONG, [rows_per_strip]),
        (_STRIP_BYTE_COUNTS, _LONG, [len(s) for s in strips]),
        (_PLANAR_CONFIG, _SHORT, [1]),
        (_SAMPLE_FORMAT, _SHORT, [3]),  # IEEE floating point
        (_MODEL_PIXEL_SCALE, _DOUBLE, [dx, dy, 0.0]),
        (_MODEL_TIEPOINT, _DOUBLE, [0.0, 0.0, 0.0, float(x0_edge), float(y0_top_edge), 0.0]),
        (_GEO_KEY_DIRECTORY, _SHORT, geokeys),
    ]
    if ascii_params:
        entries.append((_GEO_ASCII_PARAMS, _ASCII, ascii_params))
    if nodata is not None:
        entries.append((_GDAL_NODATA, _ASCII, _format_nodata(nodata)))
    entries.sort(key=lambda e: e[0])

    def payload(typ, vals) -> bytes:
        if typ == _ASCII:
            return vals.encode("ascii", "replace") + b"\x00"
        return struct.pack(f"<{len(vals)}{_TYPE_CODES[typ]}", *vals)

    ifd_offset = 8
    ifd_size = 2 + 12 * len(entries) + 4
    extra_offset = ifd_offset + ifd_size
    # lay out out-of-line values (word aligned), then the strips
    layout = []
    cursor = extra_offset
    for _tag, typ, vals in entries:
        size = len(payload(typ, vals))
        if size > 4:
            cursor += cursor % 2
            layout.append(cursor)
            cursor += size
        else:
            layout.append(None)
    strip_offsets = []
    for s in strips:
        cursor += cursor % 2
        strip_offsets.append(cursor)
        cursor += len(s)
    if cursor >= 2**32:
        raise OutputError(
            f"grid of {ny} x {nx} cells is too large for a classic TIFF (4 GiB); coarsen the grid"
        )
    entries = [(t, ty, strip_offsets if t == _STRIP_OFFSETS else v) for t, ty, v in entries]

    out = bytearray(b"II*\x00" + struct.pack("<I", ifd_offset))
    ifd = bytearray(struct.pack("<H", len(entries)))
    extra = bytearray()
    for (tag, typ, vals), where in zip(entries, layout):
        blob = payload(typ, vals)
        count = len(blob) if typ == _ASCII else len(vals)
        if where is None:
            ifd += struct.pack("<HHI", tag, typ, count) + blob.ljust(4, b"\x00")
        else:
            pad = where - (extra_offset + len(extra))
            extra += b"\x00" * pad + blob
            ifd += struct.pack("<HHII", tag, typ, count, where)
    ifd += struct.pack("<I", 0)  # no next IFD
    out += ifd + extra
    for off, s in zip(strip_offsets, strips):
        out += b"\x00" * (off - len(out)) + s

    with atomic_path(path) as tmp:
        tmp.write_bytes(bytes(out))
    return path


def write_geotiff_grid(path, x_centres, y_centres, z, crs, nodata: float | None = -9999.0, **kwargs) -> Path:
    """Write a grid given by cell-centre coordinates (either row order) as a GeoTIFF.

    ``z[i, j]`` is the value at ``(x_centres[j], y_centres[i])``. Both axes must
    be regularly spaced (to 1e-6 of a cell); ``y_centres`` may increase (rows
    are then flipped to north-up) or decrease.
    """
    x = np.asarray(x_centres, dtype=float)
    y = np.asarray(y_centres, dtype=float)
    z = np.asarray(z, dtype=float)
    if z.shape != (len(y), len(x)) or len(x) < 2 or len(y) < 2:
        raise OutputError(
            f"z has shape {z.shape}; expected (len(y), len(x)) = ({len(y)}, {len(x)}), both >= 2"
        )
    dx = np.diff(x)
    dy = np.diff(y)
    for name, d in (("x", dx), ("y", dy)):
        if not (np.all(np.sign(d) == np.sign(d[0])) and np.allclose(d, d[0], rtol=0, atol=1e-6 * abs(d[0]))):
            raise OutputError(
                f"{name} cell centres are not regularly spaced (steps {d.min()!r} .. {d.max()!r})"
            )
    if dx[0] < 0:
        x, z = x[::-1], z[:, ::-1]
    if dy[0] > 0:
        y, z = y[::-1], z[::-1]
    cx = abs(float(x[-1] - x[0])) / (len(x) - 1)
    cy = abs(float(y[-1] - y[0])) / (len(y) - 1)
    return write_geotiff(path, z, float(x[0]) - cx / 2, float(y[0]) + cy / 2, (cx, cy), crs, nodata, **kwargs)


# ------------------------------------------------------------------- reader


def _missing(feature):
    return MissingDependencyError(
        "GDAL (osgeo) or rasterio",
        feature,
        "run inside QGIS (which ships GDAL's Python bindings) or install rasterio "
        "with 'python3 -m pip install rasterio'",
    )


def _tiff_error(path, message):
    return InputFileError(path, None, None, message)


def _read_ifd(buf: bytes, path):
    if buf[:4] not in (b"II*\x00", b"MM\x00*"):
        if buf[:4] in (b"II+\x00", b"MM\x00+"):
            raise _missing(f"reading the BigTIFF '{os.path.basename(path)}'")
        raise _tiff_error(path, "not a TIFF file (bad header); give a GeoTIFF")
    bo = "<" if buf[:2] == b"II" else ">"
    (ifd,) = struct.unpack_from(bo + "I", buf, 4)
    (n,) = struct.unpack_from(bo + "H", buf, ifd)
    tags = {}
    for k in range(n):
        tag, typ, count, raw = struct.unpack_from(bo + "HHI4s", buf, ifd + 2 + 12 * k)
        if typ not in _TYPE_SIZES:
            continue
        size = _TYPE_SIZES[typ] * count
        data = raw if size <= 4 else buf[struct.unpack(bo + "I", raw)[0] :][:size]
        if typ == _ASCII:
            tags[tag] = data[:count].split(b"\x00")[0].decode("latin-1")
        else:
            code = _TYPE_CODES[typ]
            vals = struct.unpack(f"{bo}{count * len(code)}{code[0]}", data[:size])
            if typ in (5, 10):  # rationals
                vals = tuple(vals[i] / vals[i + 1] for i in range(0, len(vals), 2))
            tags[tag] = vals
    return bo, tags


def _geokeys(tags):
    keys = {}
    d = tags.get(_GEO_KEY_DIRECTORY)
    if not d:
        return keys
    ascii_params = tags.get(_GEO_ASCII_PARAMS, "")
    doubles = tags.get(_GEO_DOUBLE_PARAMS, ())
    for i in range(d[3]):
        key, loc, count, value = d[4 + 4 * i : 8 + 4 * i]
        if loc == 0:
            keys[key] = value
        elif loc == _GEO_ASCII_PARAMS:
            keys[key] = ascii_params[value : value + count].rstrip("|\x00")
        elif loc == _GEO_DOUBLE_PARAMS:
            keys[key] = doubles[value : value + count]
    return keys


def _crs_from_keys(keys):
    import pyproj

    for key in (_PROJECTED_CS_TYPE, _GEOGRAPHIC_TYPE):
        code = keys.get(key)
        if isinstance(code, int) and 0 < code < _USER_DEFINED:
            return pyproj.CRS.from_epsg(code)
    for key in (_GT_CITATION, _PCS_CITATION):
        text = keys.get(key)
        if isinstance(text, str) and text.startswith(_ESRI_PREFIX):
            try:
                return pyproj.CRS.from_wkt(text[len(_ESRI_PREFIX) :])
            except pyproj.exceptions.CRSError:
                return None
    return None


def read_geotiff(path) -> Raster:
    """Read band 1 of a GeoTIFF written by :func:`write_geotiff` (or a similar simple one).

    Handles strips and tiles, uncompressed or Deflate, 8- to 64-bit integer and
    float samples, horizontal differencing of integers (predictor 2), and
    GeoTIFF tie point + pixel scale (or an axis-aligned transformation matrix).
    Other compressions (LZW, JPEG, ...) raise
    :class:`~.errors.MissingDependencyError` naming GDAL and rasterio.
    Returns values as float64 with NaN for nodata cells.
    """
    path = Path(os.fspath(path))
    try:
        buf = path.read_bytes()
    except OSError as exc:
        raise InputFileError(path, None, None, f"cannot read the raster: {exc.strerror or exc}") from exc
    if len(buf) < 16:
        raise _tiff_error(path, "file too short to be a TIFF")
    bo, tags = _read_ifd(buf, path)
    what = f"reading the raster '{path.name}'"
    try:
        nx, ny = tags[_IMAGE_WIDTH][0], tags[_IMAGE_LENGTH][0]
    except KeyError as exc:
        raise _tiff_error(path, "TIFF without image size tags") from exc
    bits = tags.get(_BITS_PER_SAMPLE, (1,))[0]
    fmt = tags.get(_SAMPLE_FORMAT, (1,))[0]
    spp = tags.get(_SAMPLES_PER_PIXEL, (1,))[0]
    comp = tags.get(_COMPRESSION, (1,))[0]
    predictor = tags.get(_PREDICTOR, (1,))[0]
    kind = {1: "u", 2: "i", 3: "f"}.get(fmt)
    if kind is None or bits not in (8, 16, 32, 64) or (kind == "f" and bits < 32):
        raise _missing(f"{what} (sample format {fmt}, {bits} bits)")
    if comp not in (1, 8, 32946) or predictor not in (1, 2) or (predictor == 2 and kind == "f"):
        raise _missing(f"{what} (TIFF compression {comp}, predictor {predictor})")
    planar = tags.get(_PLANAR_CONFIG, (1,))[0]
    dtype = np.dtype(f"{bo}{kind}{bits // 8}")

    def decode(offset, count, rows, cols):
        raw = buf[offset : offset + count]
        if comp in (8, 32946):
            raw = zlib.decompress(raw)
        per_row = cols * (spp if planar == 1 else 1)
        block = np.frombuffer(raw, dtype=dtype, count=rows * per_row).reshape(rows, per_row)
        if predictor == 2:
            block = np.cumsum(block.reshape(rows, cols, -1), axis=1, dtype=dtype).reshape(rows, per_row)
        return block[:, ::spp] if planar == 1 and spp > 1 else block

    out = np.empty((ny, nx), dtype=dtype)
    if _TILE_OFFSETS in tags:
        tw, th = tags[_TILE_WIDTH][0], tags[_TILE_LENGTH][0]
        offsets, counts = tags[_TILE_OFFSETS], tags[_TILE_BYTE_COUNTS]
        across = -(-nx // tw)
        for k in range(across * (-(-ny // th))):
            r0, c0 = (k // across) * th, (k % across) * tw
            tile = decode(offsets[k], counts[k], th, tw)
            out[r0 : r0 + th, c0 : c0 + tw] = tile[: min(th, ny - r0), : min(tw, nx - c0)]
    else:
        rps = tags.get(_ROWS_PER_STRIP, (ny,))[0]
        offsets, counts = tags[_STRIP_OFFSETS], tags[_STRIP_BYTE_COUNTS]
        for k, r0 in enumerate(range(0, ny, rps)):
            rows = min(rps, ny - r0)
            out[r0 : r0 + rows] = decode(offsets[k], counts[k], rows, nx)

    values = out.astype(float)
    nodata = None
    if _GDAL_NODATA in tags:
        try:
            nodata = float(tags[_GDAL_NODATA].strip())
        except ValueError:
            nodata = None
    if nodata is not None:
        values[values == nodata] = np.nan

    keys = _geokeys(tags)
    if _MODEL_TRANSFORMATION in tags:
        m = tags[_MODEL_TRANSFORMATION]
        if m[1] != 0 or m[4] != 0:
            raise GeoreferenceError(f"'{path.name}' is a rotated raster; resample it north-up first")
        dx, x0, dy, y0 = m[0], m[3], m[5], m[7]
    elif _MODEL_PIXEL_SCALE in tags and _MODEL_TIEPOINT in tags:
        sx, sy = tags[_MODEL_PIXEL_SCALE][:2]
        i, j, _, x, y, _ = tags[_MODEL_TIEPOINT][:6]
        dx, dy = sx, -sy
        x0, y0 = x - i * dx, y - j * dy
    else:
        raise GeoreferenceError(f"'{path.name}' has no georeferencing (no GeoTIFF tie point); give a GeoTIFF")
    if keys.get(_GT_RASTER_TYPE) == 2:  # PixelIsPoint: the tie point is a cell centre
        x0, y0 = x0 - dx / 2, y0 - dy / 2
    return Raster(values, float(x0), float(y0), float(dx), float(dy), _crs_from_keys(keys), nodata)


def _read_with_gdal(path, band):
    from osgeo import gdal

    gdal.UseExceptions()
    try:
        ds = gdal.Open(str(path))
    except RuntimeError as exc:
        raise InputFileError(path, None, None, f"GDAL cannot open the raster: {exc}") from exc
    gt = ds.GetGeoTransform()
    b = ds.GetRasterBand(band)
    values = b.ReadAsArray().astype(float)
    nodata = b.GetNoDataValue()
    wkt = ds.GetProjection()
    ds = None
    return gt, values, nodata, wkt


def _read_with_rasterio(path, band):
    import rasterio

    try:
        with rasterio.open(path) as ds:
            t = ds.transform
            gt = (t.c, t.a, t.b, t.f, t.d, t.e)
            values = ds.read(band).astype(float)
            nodata = ds.nodatavals[band - 1]
            wkt = ds.crs.to_wkt() if ds.crs is not None else ""
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(path, None, None, f"rasterio cannot open the raster: {exc}") from exc
    return gt, values, nodata, wkt


def read_raster(path, band: int = 1, *, engine: str | None = None) -> Raster:
    """Read one band of a raster (a DEM) in any format GDAL knows.

    Parameters
    ----------
    path : str or path-like
        The raster file.
    band : int
        1-based band number.
    engine : {None, "gdal", "rasterio", "builtin"}
        None picks ``osgeo.gdal`` if importable, else ``rasterio``, else
        :func:`read_geotiff` (GeoTIFF only).

    Returns
    -------
    Raster
        Values as float64 with NaN for nodata; the CRS as :class:`pyproj.CRS`
        (None when the file declares none).
    """
    import pyproj

    path = Path(os.fspath(path))
    if not path.exists():
        raise InputFileError(path, None, None, "raster file not found; check the path")
    engines = [engine] if engine else ["gdal", "rasterio", "builtin"]
    for name in engines:
        if name == "builtin":
            if band != 1:
                raise _missing(f"reading band {band} of '{path.name}'")
            if path.suffix.lower() not in (".tif", ".tiff", ".gtiff"):
                raise _missing(f"reading the raster '{path.name}'")
            return read_geotiff(path)
        try:
            reader = _read_with_gdal if name == "gdal" else _read_with_rasterio
            gt, values, nodata, wkt = reader(path, band)
        except ImportError:
            if engine:
                raise MissingDependencyError(
                    "GDAL (osgeo)" if name == "gdal" else "rasterio", f"reading '{path.name}'"
                ) from None
            continue
        if gt[2] != 0 or gt[4] != 0:
            raise GeoreferenceError(f"'{path.name}' is a rotated raster; resample it north-up first")
        if nodata is not None and not math.isnan(nodata):
            values[values == nodata] = np.nan
        crs = pyproj.CRS.from_wkt(wkt) if wkt else None
        return Raster(values, *map(float, (gt[0], gt[3], gt[1], gt[5])), crs, nodata)
    raise AssertionError("unreachable")  # pragma: no cover
