"""survey.toml's hand-off settings: ``[design]``, ``[sections]`` and title-block facts.

Keys (all optional)::

    [survey]
    date = 2025-06-14            # day of the field survey (TOML date or "YYYY-MM-DD"), for the map sheet
    vertical_crs = "EPSG:5703"   # vertical datum of the heights (or give crs as a compound CRS)

    [design]
    elevation_m = 312.5          # design level: pile toe, excavation grade (m, the survey's heights)
    area = "area.geojson"        # polygon for the rock volume; default the whole mapped area
    simulations = 500            # conditional simulations behind P10/P50/P90 (at least 200)
    seed = 1                     # their random seed: the same inputs give the same volumes

    [sections]
    alignment = "axis.csv"       # vertex file (x, y), or a list of them; sections along every line always
    corridor_m = 25.0            # full width of the strip whose boreholes and shots are projected
    format = "pdf"               # "pdf" or "svg"

Vertex files (``alignment``, and ``area`` as CSV) are CSV files with columns
``x, y`` in the survey CRS (longitude/latitude for a geographic one), vertices
in order; a polygon's last vertex may repeat its first. ``area`` may also be a
GeoJSON file (read here; its ``crs`` member is honoured, without one the
coordinates are longitude/latitude as RFC 7946 says) or any polygon file GDAL/OGR
reads (shapefile, GeoPackage, KML, ...), through :mod:`rockhead.core.formats.gdalio`.
Every problem is a located error: the survey.toml key, or
the vertex file's line and field.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import re
import stat
from pathlib import Path
from typing import Any, Callable, Optional, Union

import numpy as np
import pyproj

from .. import crs as crsmod
from ..errors import GeoreferenceError, InputFileError
from ..text import printable
from .csvfile import file_kind, read_csv_table
from .model import Alignment, Handoff

__all__ = [
    "DESIGN_KEYS",
    "MIN_SIMULATIONS",
    "SECTION_FORMATS",
    "SECTION_KEYS",
    "SURVEY_EXTRA_KEYS",
    "read_alignment_csv",
    "read_area",
    "read_handoff",
]

DESIGN_KEYS = ("elevation_m", "area", "simulations", "seed")
SECTION_KEYS = ("alignment", "corridor_m", "format")
SURVEY_EXTRA_KEYS = ("date", "vertical_crs")
SECTION_FORMATS = ("pdf", "svg")

#: Fewest conditional simulations accepted: the P10 and P90 of 200 draws move by
#: about 0.1 standard deviation of the volume from one seed to the next.
MIN_SIMULATIONS = 200
#: Largest |design elevation| (m), the same limit as station elevations.
MAX_ABS_ELEVATION_M = 10000.0

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_SAFE_NAME = re.compile(r"[^A-Za-z0-9_-]+")


def _type_name(value) -> str:
    return {str: "text", int: "integer", float: "number", bool: "true/false"}.get(type(value), type(value).__name__)


def _resolve_file(toml_dir: Path, table: str, key: str, value, error, confine_to: Optional[Path] = None) -> Path:
    if not isinstance(value, str) or not value.strip():
        raise error(table, key, f"value {value!r} is {_type_name(value)}; expected a file name in quotes")
    if any(ord(c) < 32 for c in value):
        raise error(
            table,
            key,
            f"the file name {value!r} holds a control character: write Windows paths with "
            "forward slashes or in single quotes",
        )
    try:
        resolved = (toml_dir / Path(value.strip()).expanduser()).resolve()
        st = os.stat(resolved)
    except FileNotFoundError:
        raise error(
            table,
            key,
            f"file not found: '{printable(value)}' (resolved to {printable(resolved)}; paths are "
            "relative to survey.toml)",
        ) from None
    except (OSError, ValueError, RuntimeError) as exc:
        raise error(table, key, f"cannot use the path {printable(value)!r}: {exc}") from exc
    if not stat.S_ISREG(st.st_mode):
        raise error(
            table,
            key,
            f"'{printable(value)}' ({printable(resolved)}) is {file_kind(st.st_mode)}, not a "
            "regular file: name the vertex or polygon file",
        )
    if confine_to is not None:
        try:
            resolved.relative_to(Path(confine_to).resolve())
        except ValueError:
            raise error(
                table,
                key,
                f"'{printable(value)}' resolves to {printable(resolved)}, outside the survey's "
                f"folder {printable(confine_to)}: inputs are confined to it here; copy the file "
                "into that folder",
            ) from None
    return resolved


def _number(error, table, key, value, *, minimum=None, integer=False):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise error(
            table, key, f"value {value!r} is {_type_name(value)}; expected a {'whole number' if integer else 'number'}"
        )
    if integer and not isinstance(value, int):
        raise error(table, key, f"value {value!r} is a number with decimals; expected a whole number")
    if not math.isfinite(value):
        raise error(table, key, f"value {value!r} is not a finite number")
    if minimum is not None and value < minimum:
        raise error(table, key, f"value {value!r} must be at least {minimum:g}")
    return value


def _vertical_crs(survey_table, error, crs_in) -> Optional[pyproj.CRS]:
    """The vertical CRS of the heights (pyproj.CRS), from a compound crs or vertical_crs; None if not stated."""
    stated, key = None, "crs"
    if crs_in is not None and crs_in.is_compound and len(crs_in.sub_crs_list) > 1:
        stated = crs_in.sub_crs_list[1]
    if "vertical_crs" in survey_table:
        value = survey_table["vertical_crs"]
        if isinstance(value, bool) or not isinstance(value, (str, int)):
            raise error(
                "survey", "vertical_crs", f'value {value!r} is {_type_name(value)}; expected text such as "EPSG:5703"'
            )
        try:
            vcrs = crsmod.parse_crs(value)
        except GeoreferenceError as exc:
            raise error("survey", "vertical_crs", str(exc)) from exc
        if not vcrs.is_vertical:
            raise error(
                "survey",
                "vertical_crs",
                f'{crsmod.crs_label(vcrs)} is not a vertical CRS: give one such as "EPSG:5703" (NAVD88 height)',
            )
        if stated is not None and stated.name != vcrs.name:
            raise error(
                "survey",
                "vertical_crs",
                f"the compound crs already names the vertical datum {stated.name!r}; state it once",
            )
        stated, key = vcrs, "vertical_crs"
    if stated is not None:
        units = sorted({a.unit_name or "" for a in stated.axis_info})
        if not {u.lower() for u in units} <= {"metre", "meter", "m"}:
            raise error(
                "survey",
                key,
                f"{crsmod.crs_label(stated)} measures heights in {', '.join(units)}, "
                "but z in stations.csv and boreholes.csv is in metres: give the metre-based "
                'vertical CRS of that datum (e.g. "EPSG:5703", NAVD88 height)',
            )
    return stated


def _survey_date(survey_table, error) -> Optional[str]:
    if "date" not in survey_table:
        return None
    value = survey_table["date"]
    if isinstance(value, _dt.datetime):
        return value.date().isoformat()
    if isinstance(value, _dt.date):
        return value.isoformat()
    if isinstance(value, str):
        try:
            return _dt.date.fromisoformat(value.strip()).isoformat()
        except ValueError:
            pass
    raise error("survey", "date", f"value {value!r} is not a date: write it as 2025-06-14 (year-month-day)")


def read_handoff(
    survey_table: dict,
    design_table: dict,
    sections_table: dict,
    *,
    toml_dir: Union[str, Path],
    error: Callable[[str, str, str], Exception],
    crs_in: pyproj.CRS,
    crs_work: pyproj.CRS,
    read_table: Callable = read_csv_table,
    confine_to: Optional[Path] = None,
) -> Handoff:
    """Check the hand-off keys of survey.toml and read the files they name.

    Parameters
    ----------
    survey_table, design_table, sections_table : dict
        The parsed ``[survey]``, ``[design]`` and ``[sections]`` tables (unknown
        keys already refused by the caller).
    toml_dir : Path
        Folder of survey.toml (file paths are relative to it).
    error : callable
        ``error(table, key, message)`` returns the located exception to raise.
    crs_in, crs_work : pyproj.CRS
        CRS of x/y in the vertex files (the survey CRS) and the working CRS.
    read_table : callable
        The survey's CSV reader, ``read_table(path, required, optional, role)``
        returning a table with ``rows``, ``lines``, ``columns`` and ``path``
        (default :func:`.csvfile.read_csv_table`).
    confine_to : Path, optional
        When given, every file named must lie in this folder (or below it).

    Returns
    -------
    Handoff
        The design level (m), area, simulations, alignments, corridor width (m),
        section format and title-block facts.
    """
    toml_dir = Path(toml_dir)
    vertical = _vertical_crs(survey_table, error, crs_in)
    values: dict[str, Any] = {
        "survey_date": _survey_date(survey_table, error),
        "vertical_datum": vertical.name if vertical is not None else None,
        "vertical_crs": vertical,
    }
    if "elevation_m" in design_table:
        z = float(_number(error, "design", "elevation_m", design_table["elevation_m"]))
        if abs(z) > MAX_ABS_ELEVATION_M:
            raise error(
                "design",
                "elevation_m",
                f"value {z!r} m is outside +-{MAX_ABS_ELEVATION_M:g} m: give the "
                "design level as an elevation in metres",
            )
        values["design_elevation_m"] = z
    if "area" in design_table:
        path = _resolve_file(toml_dir, "design", "area", design_table["area"], error, confine_to)
        values["design_area_path"] = path
        values["design_area"] = read_area(path, crs_in, crs_work, read_table=read_table)
    if ("area" in design_table or "simulations" in design_table) and "elevation_m" not in design_table:
        key = "area" if "area" in design_table else "simulations"
        raise error("design", key, "[design] has no elevation_m: give the design level, e.g. elevation_m = 312.5")
    if "simulations" in design_table:
        values["simulations"] = int(
            _number(error, "design", "simulations", design_table["simulations"], minimum=MIN_SIMULATIONS, integer=True)
        )
    if "seed" in design_table:
        values["seed"] = int(_number(error, "design", "seed", design_table["seed"], minimum=0, integer=True))
    if "corridor_m" in sections_table:
        c = float(_number(error, "sections", "corridor_m", sections_table["corridor_m"]))
        if not c > 0:
            raise error("sections", "corridor_m", f"value {c!r} must be > 0 (m)")
        values["corridor_m"] = c
    if "format" in sections_table:
        fmt = sections_table["format"]
        if fmt not in SECTION_FORMATS:
            raise error("sections", "format", f"value {fmt!r} is not one of {', '.join(map(repr, SECTION_FORMATS))}")
        values["section_format"] = fmt
    if "alignment" in sections_table:
        names = sections_table["alignment"]
        names = [names] if isinstance(names, str) else names
        if not isinstance(names, list) or not names:
            raise error(
                "sections",
                "alignment",
                f"value {names!r} is {_type_name(names)}; expected a file name in "
                'quotes or a list of them, e.g. ["axis.csv", "ramp.csv"]',
            )
        alignments, seen = [], set()
        for value in names:
            path = _resolve_file(toml_dir, "sections", "alignment", value, error, confine_to)
            name = _SAFE_NAME.sub("_", path.stem).strip("_") or "alignment"
            while name in seen:
                name += "_2"
            seen.add(name)
            alignments.append(read_alignment_csv(path, crs_in, crs_work, name=name, read_table=read_table))
        values["alignments"] = tuple(alignments)
    return Handoff(**values)


# --------------------------------------------------------------------------- vertex files


def _cell_number(table: Any, i: int, name: str, text: str) -> float:
    if text == "":
        raise InputFileError(table.path, table.lines[i], name, f"empty value: '{name}' needs a number")
    if _NUMBER.match(text):
        value = float(text)
        if math.isfinite(value):
            return value
    if re.match(r"^[+-]?\d*,\d+$", text):
        raise InputFileError(
            table.path, table.lines[i], name, f"value {text!r} uses a decimal comma: write {text.replace(',', '.')}"
        )
    raise InputFileError(table.path, table.lines[i], name, f"value {text!r} is not a finite number")


def _vertices(
    path: Path, crs_in: pyproj.CRS, crs_work: pyproj.CRS, read_table: Callable, role: str
) -> tuple[Any, np.ndarray, np.ndarray]:
    table = read_table(path, ("x", "y"), (), role)
    x = np.array([_cell_number(table, i, "x", r[0]) for i, r in enumerate(table.rows)])
    y = np.array([_cell_number(table, i, "y", r[1]) for i, r in enumerate(table.rows)])
    try:
        xw, yw = crsmod.transform_xy(x, y, crs_in, crs_work)
    except GeoreferenceError as exc:
        raise InputFileError(table.path, table.lines[0], "x", f"{exc}") from exc
    return table, xw, yw


def read_alignment_csv(
    path: Union[str, Path],
    crs_in: pyproj.CRS,
    crs_work: pyproj.CRS,
    *,
    name: Optional[str] = None,
    read_table: Callable = read_csv_table,
) -> Alignment:
    """Read an alignment: a CSV of vertices ``x, y`` in order (survey CRS) -> working CRS.

    At least two vertices; consecutive repeats are dropped; the polyline must
    have a length. Errors name the file, line and field.

    Parameters
    ----------
    path : str or Path
        The vertex file.
    crs_in, crs_work : pyproj.CRS
        CRS of its x/y (the survey CRS) and the working CRS.
    name : str, optional
        The alignment's name (default the file's stem).
    read_table : callable
        The CSV reader (default :func:`.csvfile.read_csv_table`).

    Returns
    -------
    Alignment
        Vertices in the working CRS (m).

    Raises
    ------
    InputFileError
        Naming the file, line and field.
    """
    path = Path(path)
    table, x, y = _vertices(path, crs_in, crs_work, read_table, "alignment")
    keep = np.ones(len(x), bool)
    keep[1:] = np.hypot(np.diff(x), np.diff(y)) > 1e-9
    x, y = x[keep], y[keep]
    if len(x) < 2:
        raise InputFileError(
            path, table.lines[-1], None, "an alignment needs at least two distinct vertices (x, y), in order along it"
        )
    return Alignment(name=name or path.stem, x_m=x, y_m=y, path=path)


def read_area(
    path: Union[str, Path], crs_in: pyproj.CRS, crs_work: pyproj.CRS, *, read_table: Optional[Callable] = None
) -> Any:
    """Read the design area polygon in the working CRS (shapely Polygon or MultiPolygon).

    ``.csv``: vertices ``x, y`` in order (survey CRS), closed or not.
    ``.geojson``/``.json``: read here; the ``crs`` member names its CRS (else
    longitude/latitude, RFC 7946). Any other file: through GDAL/OGR (osgeo or
    pyogrio), in the layer's own CRS (the survey CRS when it has none).
    Every polygon of the file is merged into one area.

    Parameters
    ----------
    path : str or Path
        The area file.
    crs_in, crs_work : pyproj.CRS
        The survey CRS (of a CSV, or of a layer without one) and the working CRS.
    read_table : callable, optional
        The CSV reader (default :func:`.csvfile.read_csv_table`).

    Returns
    -------
    shapely Polygon or MultiPolygon
        The area in the working CRS (m).

    Raises
    ------
    InputFileError
        A bad file, naming it (and the line and field of a CSV).
    MissingDependencyError
        A file only GDAL/OGR reads, without GDAL's bindings or rasterio and pyogrio.
    """
    from shapely.geometry import Polygon
    from shapely.ops import unary_union

    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".csv":
        table, x, y = _vertices(path, crs_in, crs_work, read_table or read_csv_table, "area")
        if len(x) >= 2 and math.hypot(x[-1] - x[0], y[-1] - y[0]) < 1e-9:
            x, y = x[:-1], y[:-1]
        if len(x) < 3:
            raise InputFileError(path, table.lines[-1], None, "a polygon needs at least three vertices (x, y)")
        geoms = [Polygon(np.column_stack([x, y]))]
        where = (path, table.lines[0])
    else:
        if suffix in (".geojson", ".json"):
            geoms, src = _geojson_polygons(path)
        else:
            geoms, src = _ogr_polygons(path)
        src = crs_in if src is None else src
        geoms = [_transform_geom(g, src, crs_work, path) for g in geoms if g is not None and not g.is_empty]
        where = (path, None)
    area = unary_union([g for g in geoms if g is not None and not g.is_empty])
    if area.is_empty or area.geom_type not in ("Polygon", "MultiPolygon"):
        raise InputFileError(*where, None, "holds no polygon with an area: give the outline of the design area")
    if not area.is_valid:
        raise InputFileError(
            *where,
            None,
            "the polygon is not valid (its edges cross themselves): list the vertices in order around the outline",
        )
    if not area.area > 0:
        raise InputFileError(*where, None, "the polygon has no area")
    return area


def _geojson_polygons(path: Path):
    from shapely.geometry import shape

    try:
        doc = json.loads(path.read_text(encoding="utf-8-sig"))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(path, None, None, f"cannot read the area file: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise InputFileError(path, exc.lineno, None, f"not valid GeoJSON: {exc.msg}") from exc
    crs = None
    member = doc.get("crs") if isinstance(doc, dict) else None
    if member is not None:
        name = (member.get("properties") or {}).get("name") if isinstance(member, dict) else None
        try:
            crs = crsmod.parse_crs(name)
        except GeoreferenceError as exc:
            raise InputFileError(path, None, "crs", f"{exc}") from exc
    else:
        crs = crsmod.parse_crs("EPSG:4326")  # RFC 7946: longitude, latitude on WGS 84
    if not isinstance(doc, dict):
        raise InputFileError(path, None, None, "not a GeoJSON object")
    kind = doc.get("type")
    if kind == "FeatureCollection":
        raw = [f.get("geometry") for f in doc.get("features") or [] if isinstance(f, dict)]
    elif kind == "Feature":
        raw = [doc.get("geometry")]
    else:
        raw = [doc]
    geoms = []
    for g in raw:
        if not isinstance(g, dict) or g.get("type") not in ("Polygon", "MultiPolygon"):
            continue
        try:
            geoms.append(shape(g))
        except (ValueError, TypeError, AttributeError, IndexError) as exc:
            raise InputFileError(path, None, None, f"a polygon cannot be read: {exc}") from exc
    return geoms, crs


def _ogr_polygons(path: Path):
    """Polygons of a GDAL-readable file (its first layer) and their CRS (None when the file has none)."""
    from ..formats.gdalio import list_layers, read_layer

    names = list_layers(path)
    if not names:
        raise InputFileError(path, None, None, "the area file holds no layer: give a polygon file")
    layer, crs = read_layer(path, names[0])
    geoms = [g for g in (layer.geometries or []) if g is not None and g.geom_type in ("Polygon", "MultiPolygon")]
    return geoms, crs


def _transform_geom(geom, src, dst, path):
    """Transform every ring of a (Multi)Polygon from ``src`` to ``dst`` (shapely 1.8 and 2)."""
    from shapely.geometry import MultiPolygon, Polygon

    def ring(coords):
        xy = np.asarray(coords, float)[:, :2]
        try:
            x, y = crsmod.transform_xy(xy[:, 0], xy[:, 1], src, dst)
        except GeoreferenceError as exc:
            raise InputFileError(path, None, None, f"{exc}") from exc
        return np.column_stack([x, y])

    def poly(p):
        return Polygon(ring(p.exterior.coords), [ring(r.coords) for r in p.interiors])

    if geom.geom_type == "Polygon":
        return poly(geom)
    return MultiPolygon([poly(p) for p in geom.geoms])
