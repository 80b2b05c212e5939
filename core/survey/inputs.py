"""Read a survey: survey.toml and the CSV files it names, checked line by line.

File formats (DESIGN.md section 5)
----------------------------------
CSV files are comma-separated UTF-8 text (a byte-order mark is accepted) with
LF or CRLF line ends and one header row. Blank lines and lines whose first
non-blank character is ``#`` are skipped anywhere. Header names are matched
without regard to case or surrounding spaces; fields may be quoted
(``"L1","101"``), but a field may not span lines. Trailing empty fields
(``1,101,5,6,7,``, as some spreadsheets write) are ignored, and so are rows
of empty fields (``,,,,``).

``stations.csv``
    ``line, station, x, y, z``: x/y in the survey CRS (longitude/latitude in
    degrees for a geographic CRS), z ground elevation in metres.
``picks.csv``
    ``line, shot, receiver, time_ms`` and optional ``sigma_ms`` (an empty cell
    takes ``default_sigma_ms``) and ``reflector`` (label; ``"1"`` when absent or
    empty). ``shot`` and ``receiver`` are station labels of that line.
``boreholes.csv``
    ``borehole, x, y, z, depth_m`` and optional ``sigma_m`` (empty:
    ``borehole_sigma_m``); z is the collar elevation, depth_m the depth of the
    reflector below the collar.

Labels (line, station, shot, receiver, reflector, borehole) are text compared
exactly after stripping spaces: ``1`` and ``01`` are different labels.

``survey.toml``
    ``[survey]``: ``name`` (text; default the folder's name), ``crs`` (required:
    ``"EPSG:32633"``, WKT, a PROJ string, or an integer EPSG code such as
    ``32633``), ``work_crs`` (optional projected CRS in metres to compute in;
    without it a projected ``crs`` is kept and a geographic one goes to the
    WGS 84 / UTM zone of the data). ``[files]``: ``stations``, ``picks``
    (required), ``boreholes``, ``dem`` (optional); paths relative to the TOML
    file. ``[processing]``: the fields of :class:`core.model.Settings` except
    ``dem`` and ``work_crs``, type- and range-checked. Unknown keys in any table
    are errors naming the nearest valid key. Outputs are never set here (the
    command line's ``--out``). A UTF-8 byte-order mark is accepted.

Decisions on suspicious input
-----------------------------
Unknown CSV columns are *ignored with a* :class:`RockheadWarning` (extra
columns such as a remark or a pick quality are common and harmless). Points of
a projected CRS that lie outside the CRS's EPSG area of use give a warning (a
UTM zone is routinely used a little beyond its 6 degree strip); more than
:data:`AREA_OF_USE_ERROR_DEG` degrees outside is an error, since the
coordinates then cannot belong to that CRS. Boreholes farther from every
station than the survey's extent give a warning with the distance.

Every error is an :class:`InputFileError` (a :class:`SurveyConfigError` for
survey.toml) naming the file, the 1-based physical line and the field.
Nothing here ever writes to the input files.
"""

from __future__ import annotations

import codecs
import csv
import dataclasses
import difflib
import math
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .. import crs as crsmod
from ..errors import GeoreferenceError, InputFileError, RockheadWarning, SurveyConfigError
from .handoff import DESIGN_KEYS, SECTION_KEYS, SURVEY_EXTRA_KEYS, read_handoff
from .model import Boreholes, Picks, Settings, Stations, Survey

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.9/3.10
    import tomli as tomllib

__all__ = [
    "AREA_OF_USE_ERROR_DEG",
    "MAX_ABS_ELEVATION_M",
    "MAX_TIME_MS",
    "MIN_SIGMA_M",
    "MIN_SIGMA_MS",
    "MIN_TIME_MS",
    "CsvTable",
    "load_survey",
    "read_boreholes",
    "read_csv_table",
    "read_picks",
    "read_settings",
    "read_stations",
]

#: Largest two-way time accepted in picks.csv (ms). Shallow engineering reflections
#: arrive within a few hundred ms; more is a unit or typing error (common practice).
MAX_TIME_MS = 2000.0
#: Smallest two-way time accepted (ms): 0.1 ms is a 0.1-0.3 m reflection path in soil.
MIN_TIME_MS = 0.1
#: Smallest pick sigma accepted (ms, i.e. 1 microsecond, finer than any seismograph's timing).
MIN_SIGMA_MS = 0.001
#: Smallest borehole depth sigma accepted (m).
MIN_SIGMA_M = 0.001
#: Largest |elevation| (m) accepted for stations and borehole collars.
MAX_ABS_ELEVATION_M = 10000.0
#: Points farther than this (degrees) outside the CRS's area of use are an error.
AREA_OF_USE_ERROR_DEG = 3.0

STATION_COLUMNS = ("line", "station", "x", "y", "z")
PICK_COLUMNS = ("line", "shot", "receiver", "time_ms")
PICK_OPTIONAL = ("sigma_ms", "reflector")
BOREHOLE_COLUMNS = ("borehole", "x", "y", "z", "depth_m")
BOREHOLE_OPTIONAL = ("sigma_m",)
DEFAULT_REFLECTOR = "1"

_ROLE_COLUMNS = {
    "stations": STATION_COLUMNS,
    "picks": PICK_COLUMNS,
    "boreholes": BOREHOLE_COLUMNS,
}

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+$")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")


# --------------------------------------------------------------------------- CSV


@dataclass(frozen=True)
class CsvTable:
    """A checked CSV file: lower-case column names and the data rows as text.

    ``rows[i][j]`` is the stripped text of column ``columns[j]`` in data row i,
    found on physical line ``lines[i]`` (1-based) of ``path``.
    """

    path: Path
    columns: tuple
    header_line: int
    rows: list
    lines: list

    def column(self, name: str) -> list:
        j = self.columns.index(name)
        return [r[j] for r in self.rows]


def _read_text(path: Path, role: str) -> str:
    try:
        is_dir = path.is_dir()
    except (OSError, ValueError) as exc:
        raise InputFileError(path, None, None, f"cannot use the path '{path}': {exc}") from exc
    if is_dir:
        raise InputFileError(path, None, None, f"'{path}' is a folder, not the {role} file")
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise InputFileError(path, None, None, f"{role} file not found: '{path}'") from exc
    except (OSError, ValueError) as exc:
        raise InputFileError(path, None, None, f"cannot read the {role} file '{path}': {exc}") from exc
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise InputFileError(path, 1, None, "the file is UTF-16 text: save it as UTF-8 (CSV UTF-8)")
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    nul = data.find(b"\x00")
    if nul >= 0:
        raise InputFileError(
            path,
            data.count(b"\n", 0, nul) + 1,
            None,
            "the file contains NUL bytes: it is not a text CSV file (save it as CSV UTF-8)",
        )
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        bad = data[exc.start : exc.start + 1].hex().upper()
        raise InputFileError(
            path,
            line,
            None,
            f"byte 0x{bad} is not UTF-8 text (probably saved as Latin-1/Windows-1252): "
            "save the file as UTF-8 (CSV UTF-8)",
        ) from exc


def _split_row(path: Path, lineno: int, text: str) -> list:
    try:
        rows = list(csv.reader([text], strict=True, skipinitialspace=True))
    except csv.Error as exc:
        raise InputFileError(
            path,
            lineno,
            None,
            f'malformed CSV row ({exc}): quote a whole field as "..." and keep each row on one line',
        ) from exc
    fields = rows[0] if rows else []
    return [f.strip().strip("\ufeff").strip() for f in fields]


def _looks_numeric(s: str) -> bool:
    return bool(_NUMBER.match(s)) or bool(_DECIMAL_COMMA.match(s))


def _role_hint(found) -> str:
    for role, cols in _ROLE_COLUMNS.items():
        if set(cols) <= set(found):
            return f" (these are the columns of a {role} file: is the right file named in survey.toml?)"
    return ""


def read_csv_table(path, required, optional=(), role="CSV") -> CsvTable:
    """Read and check the structure of one CSV file.

    Checks: readable UTF-8 text, comma separator (semicolon, tab and space
    separated files are recognised and refused with a hint), a header with
    every required column, no duplicate or empty column name, at least one
    data row, and the same number of fields in every row. Unknown columns are
    ignored with a :class:`RockheadWarning`.

    Parameters
    ----------
    path : str or Path
    required, optional : sequence of str
        Lower-case column names.
    role : str
        Name of the file's role for messages ("stations", "picks", ...).

    Returns
    -------
    CsvTable
        Only the known columns (required first, then the optional ones found).

    Raises
    ------
    InputFileError
    """
    path = Path(path)
    text = _read_text(path, role)
    lines = _LINE_BREAK.split(text)
    header = None
    rows, linenos = [], []
    for i, raw in enumerate(lines, start=1):
        stripped = raw.strip().strip("\ufeff").strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = _split_row(path, i, raw)
        if not any(fields):  # ",,,,": a blank row as spreadsheets export it
            continue
        if header is None:
            header, header_line, header_raw = fields, i, raw
            continue
        rows.append(fields)
        linenos.append(i)
    if header is None:
        raise InputFileError(path, None, None, f"the {role} file is empty: expected a header row and data rows")

    columns = [h.lower() for h in header]
    while columns and columns[-1] == "":  # trailing separators after the last name
        columns.pop()
    if len(columns) <= 1:
        wanted = ", ".join(required)
        for sep, name in ((";", "semicolons"), ("\t", "tabs"), ("|", "vertical bars")):
            if sep in header_raw:
                raise InputFileError(
                    path,
                    header_line,
                    None,
                    f"fields are separated by {name}: use commas (',') between fields and points ('.') "
                    f"as decimal marks; expected the header {wanted}",
                )
        if len(header_raw.split()) > 1:
            raise InputFileError(
                path,
                header_line,
                None,
                f"fields are separated by spaces: use commas; expected the header {wanted}",
            )
    known_names = set(required) | set(optional)
    if columns and not known_names & set(columns) and any(_looks_numeric(c) for c in columns):
        raise InputFileError(
            path,
            header_line,
            None,
            f"the first row {header_raw.strip()[:60]!r} holds data, not column names: add the header "
            f"row {', '.join(required)}",
        )
    for j, name in enumerate(columns):
        if name == "":
            raise InputFileError(
                path, header_line, None, f"column {j + 1} of the header has no name: name it or delete it"
            )
        if columns.index(name) != j:
            raise InputFileError(path, header_line, name, f"column '{name}' appears twice in the header: keep one")
    missing = [c for c in required if c not in columns]
    if missing:
        unknown = [c for c in columns if c not in required and c not in optional]
        hints = []
        for m in missing:
            close = difflib.get_close_matches(m, unknown, n=1, cutoff=0.6)
            if close:
                hints.append(f"rename '{close[0]}' to '{m}'")
        if "time_ms" in missing and any(c in ("time_s", "time", "t", "twt") for c in columns):
            hints.append("time_ms holds two-way times in milliseconds")
        hint = ("; " + "; ".join(hints)) if hints else ""
        raise InputFileError(
            path,
            header_line,
            missing[0],
            f"missing column{'s' if len(missing) > 1 else ''} {', '.join(repr(m) for m in missing)}: "
            f"the header has {', '.join(columns) or 'nothing'}; required: {', '.join(required)}"
            f"{hint}{_role_hint(columns)}",
        )
    known = list(required) + [c for c in optional if c in columns]
    extra = [c for c in columns if c not in known]
    if extra:
        suggestions = []
        for c in extra:
            close = difflib.get_close_matches(c, list(required) + list(optional), n=1, cutoff=0.6)
            suggestions.append(f"'{c}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        warnings.warn(
            RockheadWarning(
                f"{path.name}, line {header_line}: column{'s' if len(extra) > 1 else ''} "
                f"{', '.join(suggestions)} not used by Rockhead and ignored; known columns: "
                f"{', '.join(list(required) + list(optional))}"
            ),
            stacklevel=3,
        )
    if not rows:
        raise InputFileError(path, header_line, None, f"the {role} file has a header but no data rows")
    index = [columns.index(c) for c in known]
    ncol = len(columns)
    out = []
    for fields, lineno in zip(rows, linenos):
        if len(fields) > ncol:
            if any(f for f in fields[ncol:]):
                hint = ""
                if any(_DECIMAL_COMMA.match(f"{a},{b}") for a, b in zip(fields, fields[1:])):
                    hint = (
                        "; if a number such as '12,5' is meant, write it with a decimal point (12.5): "
                        "a comma separates fields"
                    )
                raise InputFileError(
                    path,
                    lineno,
                    None,
                    f"the row has {len(fields)} fields but the header has {ncol} ({', '.join(columns)}){hint}",
                )
            fields = fields[:ncol]
        elif len(fields) < ncol:
            if len(fields) == 1 and ";" in fields[0]:
                raise InputFileError(
                    path, lineno, None, "fields are separated by semicolons: use commas (',') between fields"
                )
            raise InputFileError(
                path,
                lineno,
                columns[len(fields)],
                f"the row has {len(fields)} field{'s' if len(fields) != 1 else ''} but the header has "
                f"{ncol} ({', '.join(columns)}): value of '{columns[len(fields)]}' missing",
            )
        out.append([fields[j] for j in index])
    return CsvTable(path=path, columns=tuple(known), header_line=header_line, rows=out, lines=linenos)


def _number(table: CsvTable, i: int, name: str, text: str) -> float:
    """Parse a finite number, or raise naming the file, line and field."""
    path, lineno = table.path, table.lines[i]
    if text == "":
        raise InputFileError(path, lineno, name, f"empty value: '{name}' needs a number")
    if _NUMBER.match(text):
        value = float(text)
        if math.isfinite(value):
            return value
        raise InputFileError(path, lineno, name, f"value {text!r} overflows: expected a finite number")
    low = text.lower()
    if low.lstrip("+-") in ("nan", "inf", "infinity"):
        raise InputFileError(path, lineno, name, f"value {text!r} is not a finite number: give a number")
    if _DECIMAL_COMMA.match(text):
        raise InputFileError(
            path,
            lineno,
            name,
            f"value {text!r} uses a decimal comma: write {text.replace(',', '.')} (decimal point; "
            "commas separate fields)",
        )
    raise InputFileError(path, lineno, name, f"value {text!r} is not a number")


def _label(table: CsvTable, i: int, name: str, text: str) -> str:
    if text == "":
        raise InputFileError(table.path, table.lines[i], name, f"empty label: '{name}' needs a value")
    return text


# --------------------------------------------------------------------------- coordinates


def _coords(table, i_cols=("x", "y", "z")):
    xs = np.empty(len(table.rows))
    ys = np.empty(len(table.rows))
    zs = np.empty(len(table.rows))
    jx, jy, jz = (table.columns.index(c) for c in i_cols)
    for i, r in enumerate(table.rows):
        xs[i] = _number(table, i, "x", r[jx])
        ys[i] = _number(table, i, "y", r[jy])
        zs[i] = _number(table, i, "z", r[jz])
        if abs(zs[i]) > MAX_ABS_ELEVATION_M:
            raise InputFileError(
                table.path,
                table.lines[i],
                "z",
                f"elevation {r[jz]!r} m is outside +-{MAX_ABS_ELEVATION_M:g} m: z must be in metres",
            )
    return xs, ys, zs


def _check_geographic(table: CsvTable, x, y, crs_in) -> None:
    """Range checks for longitude (x) and latitude (y) in degrees."""
    path, lines = table.path, table.lines
    label = crsmod.crs_label(crs_in)
    note = " (x = longitude, y = latitude)"
    big = (np.abs(x) > 360) | (np.abs(y) > 360)
    if big.any():
        i = int(np.flatnonzero(big)[0])
        fld = "x" if abs(x[i]) > 360 else "y"
        raise InputFileError(
            path,
            lines[i],
            fld,
            f"x={x[i]:.10g}, y={y[i]:.10g} look like projected coordinates in metres, but the survey CRS "
            f"{label} is geographic{note}: set crs in survey.toml to the projected CRS of the "
            "coordinates",
        )
    lat_bad = np.abs(y) > 90
    if lat_bad.any() and np.all(np.abs(x) <= 90) and np.all(np.abs(y) <= 180):
        i = int(np.flatnonzero(lat_bad)[0])
        raise InputFileError(
            path,
            lines[i],
            "y",
            f"latitude y={y[i]:.10g} is out of [-90, 90] while every x is a valid latitude: longitude and "
            f"latitude look swapped; x must be the longitude and y the latitude ({crsmod.AXIS_ORDER_NOTE})",
        )
    lon_bad = np.abs(x) > 180
    if lon_bad.any():
        i = int(np.flatnonzero(lon_bad)[0])
        raise InputFileError(path, lines[i], "x", f"longitude x={x[i]:.10g} is out of [-180, 180]{note}")
    if lat_bad.any():
        i = int(np.flatnonzero(lat_bad)[0])
        raise InputFileError(path, lines[i], "y", f"latitude y={y[i]:.10g} is out of [-90, 90]{note}")


def _lonlat(table: CsvTable, x, y, crs_in):
    """Check coordinates against ``crs_in`` and return their longitude/latitude."""
    if crsmod.is_geographic(crs_in):
        _check_geographic(table, x, y, crs_in)
        lon, lat = x.copy(), y.copy()
    else:
        try:
            lon, lat = crsmod.transform_xy(
                x,
                y,
                crsmod.horizontal_crs(crs_in),
                crsmod.horizontal_crs(crs_in).geodetic_crs,
                check_finite=False,
            )
        except GeoreferenceError as exc:
            raise InputFileError(table.path, None, "x", str(exc)) from exc
        bad = ~(np.isfinite(lon) & np.isfinite(lat))
        bounds = crsmod.geographic_bounds(crs_in)
        far = bad.copy()
        if bounds is not None:
            far |= crsmod.degrees_outside(lon, lat, bounds) > AREA_OF_USE_ERROR_DEG
        if far.any() and _swapped_fits(x, y, crs_in, bounds):
            i = int(np.flatnonzero(far)[0])
            raise InputFileError(
                table.path,
                table.lines[i],
                "x",
                f"x={x[i]:.10g}, y={y[i]:.10g} fall outside the survey CRS {crsmod.crs_label(crs_in)}, but "
                "with x and y exchanged every point fits: the columns look swapped; x must be the easting "
                "and y the northing",
            )
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputFileError(
                table.path,
                table.lines[i],
                "x",
                f"x={x[i]:.10g}, y={y[i]:.10g} cannot be located in the survey CRS "
                f"{crsmod.crs_label(crs_in)}: check crs in survey.toml",
            )
    bounds = crsmod.geographic_bounds(crs_in)
    if bounds is not None:
        out = crsmod.degrees_outside(lon, lat, bounds)
        worst = int(np.argmax(out))
        if out[worst] > AREA_OF_USE_ERROR_DEG:
            raise InputFileError(
                table.path,
                table.lines[worst],
                "x",
                f"x={x[worst]:.10g}, y={y[worst]:.10g} "
                f"(longitude {lon[worst]:.3f}, latitude {lat[worst]:.3f}) "
                f"lies {out[worst]:.1f} degrees outside the area of use of {crsmod.crs_label(crs_in)} "
                f"(longitude {bounds[0]:g}..{bounds[2]:g}, latitude {bounds[1]:g}..{bounds[3]:g}): the "
                "coordinates do not belong to this CRS; check crs in survey.toml",
            )
        if out[worst] > 0:
            n = int(np.count_nonzero(out > 0))
            warnings.warn(
                RockheadWarning(
                    f"{table.path.name}, line {table.lines[worst]}: {n} point(s) lie outside the area of "
                    f"use of {crsmod.crs_label(crs_in)}, up to {out[worst]:.2f} degrees: check that crs in "
                    "survey.toml is right"
                ),
                stacklevel=4,
            )
    return lon, lat


def _swapped_fits(x, y, crs_in, bounds) -> bool:
    """True when (y, x) would lie inside the area of use of the projected ``crs_in``."""
    if bounds is None:
        return False
    h = crsmod.horizontal_crs(crs_in)
    try:
        lon, lat = crsmod.transform_xy(y, x, h, h.geodetic_crs, check_finite=False)
    except GeoreferenceError:
        return False
    ok = np.isfinite(lon) & np.isfinite(lat)
    return bool(ok.all() and np.all(crsmod.degrees_outside(lon, lat, bounds) == 0.0))


def _to_work(table, x, y, crs_in, crs_work):
    try:
        return crsmod.transform_xy(x, y, crs_in, crs_work)
    except GeoreferenceError as exc:
        raise InputFileError(table.path, None, "x", str(exc)) from exc


def _resolve_crs(crs_in, crs_work, lon, lat, where):
    try:
        crs_in = crsmod.parse_crs(crs_in)
        if crs_work is None:
            crs_work = crsmod.working_crs(crs_in, lon, lat)
        else:
            crs_work = crsmod.working_crs(crs_in, requested=crs_work)
    except GeoreferenceError as exc:
        raise InputFileError(where, None, None, str(exc)) from exc
    return crs_in, crs_work


# --------------------------------------------------------------------------- stations


def _parse_stations(path):
    table = read_csv_table(path, STATION_COLUMNS, role="stations")
    n = len(table.rows)
    line = np.empty(n, dtype=object)
    station = np.empty(n, dtype=object)
    seen = {}
    for i, r in enumerate(table.rows):
        line[i] = _label(table, i, "line", r[0])
        station[i] = _label(table, i, "station", r[1])
        key = (line[i], station[i])
        if key in seen:
            raise InputFileError(
                table.path,
                table.lines[i],
                "station",
                f"duplicate station {station[i]!r} on line {line[i]!r}: also on line {seen[key]}; "
                "station labels must be unique within a line",
            )
        seen[key] = table.lines[i]
    x, y, z = _coords(table)
    return table, line, station, x, y, z


def read_stations(path, crs_in, crs_work=None) -> Stations:
    """Read stations.csv and return the stations in the working CRS.

    Parameters
    ----------
    path : str or Path
    crs_in : str, int or pyproj.CRS
        CRS of x/y in the file.
    crs_work : str, int or pyproj.CRS, optional
        Working CRS; None: :func:`core.crs.working_crs` of ``crs_in`` and the data.

    Returns
    -------
    Stations
        x_m, y_m in the working CRS, z_m as in the file.

    Raises
    ------
    InputFileError
    """
    table, line, station, x, y, z = _parse_stations(path)
    crs_in = _parse_crs_or_raise(crs_in, table.path)
    lon, lat = _lonlat(table, x, y, crs_in)
    crs_in, crs_work = _resolve_crs(crs_in, crs_work, lon, lat, table.path)
    xw, yw = _to_work(table, x, y, crs_in, crs_work)
    return Stations(line=line, station=station, x_m=xw, y_m=yw, z_m=z, file_line=np.asarray(table.lines, dtype=int))


def _parse_crs_or_raise(value, path):
    try:
        return crsmod.parse_crs(value)
    except GeoreferenceError as exc:
        raise InputFileError(path, None, None, str(exc)) from exc


# --------------------------------------------------------------------------- picks


def read_picks(path, default_sigma_ms=0.5, stations=None, *, max_time_ms=MAX_TIME_MS) -> Picks:
    """Read picks.csv.

    Parameters
    ----------
    path : str or Path
    default_sigma_ms : float
        Pick standard error where the file has no (or an empty) ``sigma_ms``.
    stations : Stations, optional
        When given, every pick's line, shot and receiver must be stations of it.
    max_time_ms : float
        Largest two-way time accepted.

    Returns
    -------
    Picks
        Times and sigmas in seconds; reflector ``"1"`` when the file has none.

    Raises
    ------
    InputFileError
        Per row: bad number, time <= 0 or > ``max_time_ms``, sigma <= 0 (or
        below :data:`MIN_SIGMA_MS`),
        duplicate (line, shot, receiver, reflector), unknown line or station;
        per file: times that look like seconds; then any time below
        :data:`MIN_TIME_MS`.
    """
    if not (isinstance(default_sigma_ms, (int, float)) and default_sigma_ms >= MIN_SIGMA_MS):
        raise InputFileError(
            path,
            None,
            "sigma_ms",
            f"default sigma {default_sigma_ms!r} ms must be >= {MIN_SIGMA_MS:g} (and > 0)",
        )
    table = read_csv_table(path, PICK_COLUMNS, PICK_OPTIONAL, role="picks")
    cols = table.columns
    j_sig = cols.index("sigma_ms") if "sigma_ms" in cols else None
    j_ref = cols.index("reflector") if "reflector" in cols else None
    n = len(table.rows)
    line = np.empty(n, dtype=object)
    shot = np.empty(n, dtype=object)
    receiver = np.empty(n, dtype=object)
    reflector = np.empty(n, dtype=object)
    time_ms = np.empty(n)
    sigma_ms = np.empty(n)
    known = None
    if stations is not None:
        known = {}
        for ln, st in zip(stations.line, stations.station):
            known.setdefault(ln, set()).add(st)
    seen = {}
    path = table.path
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        line[i] = _label(table, i, "line", r[0])
        shot[i] = _label(table, i, "shot", r[1])
        receiver[i] = _label(table, i, "receiver", r[2])
        t = _number(table, i, "time_ms", r[3])
        if t <= 0:
            raise InputFileError(path, lineno, "time_ms", f"time {r[3]!r} ms must be > 0 (two-way time)")
        if t > max_time_ms:
            raise InputFileError(
                path,
                lineno,
                "time_ms",
                f"time {r[3]!r} ms is beyond {max_time_ms:g} ms, implausible for a shallow reflection: "
                "time_ms must be two-way time in milliseconds",
            )
        time_ms[i] = t
        if j_sig is not None and r[j_sig] != "":
            s = _number(table, i, "sigma_ms", r[j_sig])
            if s <= 0:
                raise InputFileError(path, lineno, "sigma_ms", f"sigma {r[j_sig]!r} ms must be > 0")
            if s < MIN_SIGMA_MS:
                raise InputFileError(
                    path,
                    lineno,
                    "sigma_ms",
                    f"sigma {r[j_sig]!r} ms is below {MIN_SIGMA_MS:g} ms, finer than any seismograph's timing",
                )
            sigma_ms[i] = s
        else:
            sigma_ms[i] = default_sigma_ms
        reflector[i] = r[j_ref] if (j_ref is not None and r[j_ref] != "") else DEFAULT_REFLECTOR
        if known is not None:
            _check_pick_stations(table, i, line[i], shot[i], receiver[i], known, stations)
        key = (line[i], shot[i], receiver[i], reflector[i])
        if key in seen:
            raise InputFileError(
                path,
                lineno,
                "receiver",
                f"duplicate pick: line {line[i]!r}, shot {shot[i]!r}, receiver {receiver[i]!r}, reflector "
                f"{reflector[i]!r} is on lines {seen[key]} and {lineno}; keep one",
            )
        seen[key] = lineno
    if np.all(time_ms < 1.0) and np.median(time_ms) < 0.5:
        raise InputFileError(
            path,
            table.lines[0],
            "time_ms",
            f"times look like seconds (all below 1, median {np.median(time_ms):.3g}); time_ms must be "
            "milliseconds: multiply by 1000",
        )
    small = np.flatnonzero(time_ms < MIN_TIME_MS)
    if small.size:
        i = int(small[0])
        raise InputFileError(
            path,
            table.lines[i],
            "time_ms",
            f"time {table.rows[i][3]!r} ms is below {MIN_TIME_MS:g} ms: not a reflection two-way time",
        )
    return Picks(
        line=line,
        shot=shot,
        receiver=receiver,
        time_s=time_ms / 1000.0,
        sigma_s=sigma_ms / 1000.0,
        reflector=reflector,
        file_line=np.asarray(table.lines, dtype=int),
    )


def _near(label, choices) -> str:
    close = difflib.get_close_matches(str(label), sorted(map(str, choices)), n=3, cutoff=0.5)
    return f" (close: {', '.join(repr(c) for c in close)})" if close else ""


def _check_pick_stations(table, i, ln, sh, rc, known, stations):
    lineno = table.lines[i]
    if ln not in known:
        lines = sorted(known)
        shown = ", ".join(repr(v) for v in lines[:10]) + (", ..." if len(lines) > 10 else "")
        raise InputFileError(
            table.path, lineno, "line", f"line {ln!r} is not in the stations file (lines there: {shown})"
        )
    for name, lab in (("shot", sh), ("receiver", rc)):
        if lab not in known[ln]:
            raise InputFileError(
                table.path,
                lineno,
                name,
                f"{name} {lab!r} is not a station of line {ln!r} in the stations file{_near(lab, known[ln])}",
            )


# --------------------------------------------------------------------------- boreholes


def read_boreholes(path, crs_in, crs_work=None, default_sigma_m=0.1, stations=None) -> Boreholes:
    """Read boreholes.csv and return the boreholes in the working CRS.

    Parameters
    ----------
    path : str or Path
    crs_in, crs_work : str, int or pyproj.CRS
        As in :func:`read_stations`.
    default_sigma_m : float
        Depth standard error where the file has no (or an empty) ``sigma_m``.
    stations : Stations, optional
        Stations in the working CRS; a borehole farther from every station
        than the stations' extent (at least 100 m) gives a warning.

    Returns
    -------
    Boreholes

    Raises
    ------
    InputFileError
    """
    if not (isinstance(default_sigma_m, (int, float)) and default_sigma_m >= MIN_SIGMA_M):
        raise InputFileError(
            path, None, "sigma_m", f"default sigma {default_sigma_m!r} m must be >= {MIN_SIGMA_M:g} (and > 0)"
        )
    table = read_csv_table(path, BOREHOLE_COLUMNS, BOREHOLE_OPTIONAL, role="boreholes")
    path = table.path
    n = len(table.rows)
    name = np.empty(n, dtype=object)
    depth = np.empty(n)
    sigma = np.empty(n)
    j_sig = table.columns.index("sigma_m") if "sigma_m" in table.columns else None
    seen = {}
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        name[i] = _label(table, i, "borehole", r[0])
        if name[i] in seen:
            raise InputFileError(
                path, lineno, "borehole", f"duplicate borehole {name[i]!r}: also on line {seen[name[i]]}"
            )
        seen[name[i]] = lineno
    x, y, z = _coords(table)
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        depth[i] = _number(table, i, "depth_m", r[4])
        if depth[i] <= 0:
            raise InputFileError(
                path,
                lineno,
                "depth_m",
                f"depth {r[4]!r} m must be > 0 (depth below the collar, down positive)",
            )
        if j_sig is not None and r[j_sig] != "":
            s = _number(table, i, "sigma_m", r[j_sig])
            if s <= 0:
                raise InputFileError(path, lineno, "sigma_m", f"sigma {r[j_sig]!r} m must be > 0")
            if s < MIN_SIGMA_M:
                raise InputFileError(
                    path,
                    lineno,
                    "sigma_m",
                    f"sigma {r[j_sig]!r} m is below {MIN_SIGMA_M:g} m: give a realistic error",
                )
            sigma[i] = s
        else:
            sigma[i] = default_sigma_m
    crs_in = _parse_crs_or_raise(crs_in, path)
    lon, lat = _lonlat(table, x, y, crs_in)
    crs_in, crs_work = _resolve_crs(crs_in, crs_work, lon, lat, path)
    xw, yw = _to_work(table, x, y, crs_in, crs_work)
    if stations is not None and len(stations):
        _warn_far_boreholes(table, name, xw, yw, stations)
    return Boreholes(
        name=name,
        x_m=xw,
        y_m=yw,
        z_m=z,
        depth_m=depth,
        sigma_m=sigma,
        file_line=np.asarray(table.lines, dtype=int),
    )


def _warn_far_boreholes(table, name, xw, yw, stations):
    sx, sy = np.asarray(stations.x_m, float), np.asarray(stations.y_m, float)
    extent = float(np.hypot(np.ptp(sx), np.ptp(sy)))
    limit = max(extent, 100.0)
    # distance from each borehole to its nearest station, (nb, ns) at once
    d = np.hypot(xw[:, None] - sx[None, :], yw[:, None] - sy[None, :]).min(axis=1)
    for i in np.flatnonzero(d > limit):
        warnings.warn(
            RockheadWarning(
                f"{table.path.name}, line {table.lines[i]}, field 'x': borehole {name[i]!r} is "
                f"{d[i]:.0f} m from the nearest station, farther than the survey's extent ({limit:.0f} m): "
                "check its coordinates; it will hardly constrain the map"
            ),
            stacklevel=3,
        )


# --------------------------------------------------------------------------- survey.toml

_SURVEY_KEYS = ("name", "crs", "work_crs")
_FILE_KEYS = ("stations", "picks", "boreholes", "dem")
_NOT_PROCESSING = {"dem": "files", "work_crs": "survey"}
_CHOICES = {
    "gather": ("shot", "cmp"),
    "robust_loss": ("huber", "soft_l1", "cauchy", "linear"),
    "surface_method": ("auto", "kriging", "spline", "tomography"),
    "variogram_model": ("auto", "spherical", "exponential", "gaussian"),
    "trend": ("linear", "none"),
}
_MINIMUM = {
    "min_picks": 3,
    "neighbours": 3,
    "index_contour_every": 1,
    "default_sigma_ms": MIN_SIGMA_MS,
    "borehole_sigma_m": MIN_SIGMA_M,
}
_RANGES = {"min_line_angle_deg": (0.0, 90.0)}
_TOML_INT_MAX = 2**63 - 1  # (exclusive low, inclusive high)


def _processing_fields() -> dict:
    out = {}
    for f in dataclasses.fields(Settings):
        if f.name in _NOT_PROCESSING:
            continue
        out[f.name] = f
    return out


def _tables() -> dict:
    return {"survey": _SURVEY_KEYS + SURVEY_EXTRA_KEYS, "files": _FILE_KEYS, "processing": tuple(_processing_fields()),
            "design": DESIGN_KEYS, "sections": SECTION_KEYS}


class _Toml:
    """survey.toml text with key-to-line lookup for messages."""

    _HEADER = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$")

    def __init__(self, path: Path, text: str):
        self.path = path
        self.text = text
        self.lines = _LINE_BREAK.split(text)

    def line_of(self, table, key=None):
        current = None
        for i, raw in enumerate(self.lines, start=1):
            m = self._HEADER.match(raw)
            if m:
                current = m.group(1).strip().strip("\"'")
                if (key is None and current == table) or (table is None and current == key):
                    return i
                continue
            if key is not None and current == table:
                if re.match(rf"^\s*([\"']?){re.escape(key)}\1\s*=", raw):
                    return i
            if key is not None and table is None and current is None:
                if re.match(rf"^\s*([\"']?){re.escape(key)}\1\s*=", raw):
                    return i
        return None

    def error(self, table, key, message, cls=SurveyConfigError):
        field = f"{table}.{key}" if (table and key) else (key or table)
        return cls(self.path, self.line_of(table, key), field, message)


_ALIASES = {"epsg": "crs", "srs": "crs", "projection": "crs", "coordinate_system": "crs", "title": "name"}


def _suggest(key, valid) -> str:
    alias = _ALIASES.get(str(key).lower())
    if alias in valid:
        return f"did you mean '{alias}'? "
    close = difflib.get_close_matches(str(key).lower(), list(valid), n=1, cutoff=0.5)
    return f"did you mean '{close[0]}'? " if close else ""


def _unknown_key(toml: _Toml, table, key, valid):
    elsewhere = [t for t, keys in _tables().items() if key in keys and t != table]
    if key in _NOT_PROCESSING and table == "processing":
        elsewhere = [_NOT_PROCESSING[key]]
    hint = f"'{key}' belongs in [{elsewhere[0]}]; " if elsewhere else _suggest(key, valid)
    if str(key).lower().startswith("out"):
        hint = "outputs are not set in survey.toml: give the output folder on the command line (--out DIR); "
    where = f"in [{table}]" if table else "at the top level"
    return toml.error(
        table,
        key,
        f"unknown key '{key}' {where}: {hint}valid keys: {', '.join(valid)}",
    )


def _type_name(value) -> str:
    return {str: "text", int: "integer", float: "number", bool: "true/false"}.get(type(value), type(value).__name__)


def _check_settings_value(toml: _Toml, key, value, field):
    ann = field.type if isinstance(field.type, str) else getattr(field.type, "__name__", str(field.type))
    optional = ann.startswith("Optional[") or "None" in ann
    base = ann[len("Optional[") : -1] if ann.startswith("Optional[") else ann
    shown = repr(value)

    def bad(expected):
        return toml.error("processing", key, f"value {shown} is {_type_name(value)}; expected {expected}")

    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > _TOML_INT_MAX:
        # TOML integers are 64-bit; Python's parser accepts longer ones
        raise toml.error("processing", key, f"value {str(value)[:20]}... is too large")

    if base == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad("a number" + (" (leave the key out for the automatic choice)" if optional else ""))
        value = float(value)
        if not math.isfinite(value):
            raise toml.error("processing", key, f"value {shown} is not a finite number")
    elif base == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                raise bad(f"a whole number without decimals ({int(value)})")
            raise bad("a whole number")
    elif base == "bool":
        if not isinstance(value, bool):
            raise bad("true or false")
    elif base == "str":
        if not isinstance(value, str):
            raise bad("text in quotes")
    if key in _CHOICES and value not in _CHOICES[key]:
        raise toml.error(
            "processing",
            key,
            f"value {shown} is not one of {', '.join(repr(c) for c in _CHOICES[key])}"
            + _choice_hint(value, _CHOICES[key]),
        )
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if key in _MINIMUM and value < _MINIMUM[key]:
            raise toml.error("processing", key, f"value {shown} must be at least {_MINIMUM[key]}")
        if key in _RANGES:
            lo, hi = _RANGES[key]
            if not lo < value <= hi:
                raise toml.error("processing", key, f"value {shown} must be in ({lo:g}, {hi:g}]")
        elif key not in _MINIMUM and base in ("float", "int") and value <= 0:
            raise toml.error("processing", key, f"value {shown} must be > 0")
    return value


def _choice_hint(value, choices) -> str:
    close = difflib.get_close_matches(str(value).lower(), list(choices), n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else ""


def read_settings(table, toml_path="survey.toml", toml_text="", *, dem=None, work_crs=None) -> Settings:
    """Check a ``[processing]`` table and build :class:`core.model.Settings`.

    Keys are the fields of Settings (except ``dem``, set from ``[files]``, and
    ``work_crs``, set from ``[survey]``). Floats accept integers; integers
    must be whole numbers; keys with a fixed set of values are checked;
    lengths, times, sigmas and velocities must be > 0; ``min_picks`` and
    ``neighbours`` >= 3; ``velocity_max_m_s`` > ``velocity_min_m_s``.

    Parameters
    ----------
    table : dict
        The parsed ``[processing]`` table (may be empty).
    toml_path, toml_text : str or Path, str
        The file and its text, to name the line of a bad key.
    dem, work_crs
        Values for those two fields.

    Returns
    -------
    Settings

    Raises
    ------
    SurveyConfigError
        Naming the key, with the nearest valid key for an unknown one.
    """
    toml = _Toml(Path(toml_path), toml_text or "")
    if not isinstance(table, dict):
        raise toml.error(None, "processing", f"[processing] must be a table, not {_type_name(table)}")
    fields = _processing_fields()
    values = {}
    for key, value in table.items():
        if key not in fields:
            raise _unknown_key(toml, "processing", key, tuple(fields))
        values[key] = _check_settings_value(toml, key, value, fields[key])
    vmin = values.get("velocity_min_m_s", Settings.velocity_min_m_s)
    vmax = values.get("velocity_max_m_s", Settings.velocity_max_m_s)
    if vmax <= vmin:
        key = "velocity_max_m_s" if "velocity_max_m_s" in values else "velocity_min_m_s"
        raise toml.error(
            "processing", key, f"velocity_max_m_s ({vmax:g}) must be greater than velocity_min_m_s ({vmin:g})"
        )
    return Settings(**values, dem=dem, work_crs=work_crs)


def _read_toml(path: Path):
    if not isinstance(path, Path):
        path = Path(path)
    try:
        is_dir = path.is_dir()
    except (OSError, ValueError) as exc:
        raise SurveyConfigError(path, None, None, f"cannot use the path '{path}': {exc}") from exc
    if is_dir:
        raise SurveyConfigError(path, None, None, f"'{path}' is a folder: give the survey.toml file")
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise SurveyConfigError(path, None, None, f"survey file not found: '{path}'") from exc
    except (OSError, ValueError) as exc:
        raise SurveyConfigError(path, None, None, f"cannot read '{path}': {exc}") from exc
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SurveyConfigError(
            path,
            data.count(b"\n", 0, exc.start) + 1,
            None,
            "not UTF-8 text: save survey.toml as UTF-8",
        ) from exc
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        lineno = getattr(exc, "lineno", None)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        if m:
            lineno = lineno or int(m.group(1))
        elif re.search(r"\(at end of document\)", msg):
            lineno = lineno or len(_LINE_BREAK.split(text))
        reason = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg.splitlines()[0])
        lines = _LINE_BREAK.split(text)
        hint = "see survey.toml in the sample project"
        if "Illegal character '\\n'" in reason or "Unterminated string" in reason:
            hint = 'a quoted text is not closed on this line: end it with "'
        if lineno and 1 <= lineno <= len(lines) and "\\" in lines[lineno - 1]:
            hint = (
                'a backslash starts an escape in "...": write Windows paths with forward slashes '
                "(\"C:/data/picks.csv\") or in single quotes ('C:\\data\\picks.csv')"
            )
        raise SurveyConfigError(path, lineno, None, f"not valid TOML: {reason}; {hint}") from exc
    except RecursionError as exc:
        raise SurveyConfigError(path, None, None, "not valid TOML: nested too deeply") from exc
    return _Toml(path, text), doc


def _get_table(toml: _Toml, doc, name, required):
    if name not in doc:
        if required:
            raise SurveyConfigError(
                toml.path, None, name, f"the table [{name}] is missing: see survey.toml in the sample project"
            )
        return {}
    value = doc[name]
    if not isinstance(value, dict):
        raise toml.error(None, name, f"'{name}' must be a table ([{name}]), not {_type_name(value)}")
    valid = _tables()[name]
    for key in value:
        if key not in valid:
            raise _unknown_key(toml, name, key, valid)
    return value


def _crs_value(toml, key, value):
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise toml.error(
            "survey",
            key,
            f'value {value!r} is {_type_name(value)}; expected text such as "EPSG:32633" or an EPSG code',
        )
    try:
        return crsmod.parse_crs(value)
    except GeoreferenceError as exc:
        raise toml.error("survey", key, str(exc)) from exc


def _file_value(toml, key, value, required):
    if value is None:
        if required:
            raise SurveyConfigError(
                toml.path,
                toml.line_of("files"),
                f"files.{key}",
                f"[files] has no '{key}': name the {key} CSV file, e.g. {key} = \"{key}.csv\"",
            )
        return None
    if not isinstance(value, str):
        raise toml.error("files", key, f"value {value!r} is {_type_name(value)}; expected a file name in quotes")
    if not value.strip():
        raise toml.error("files", key, "the file name is empty")
    if any(ord(c) < 32 for c in value):
        raise toml.error(
            "files",
            key,
            f"the file name {value!r} holds a control character (a backslash escape such as \\n or \\t in "
            '"..."): write Windows paths with forward slashes or in single quotes',
        )
    try:
        resolved = (toml.path.parent / Path(value.strip()).expanduser()).resolve()
        is_dir, is_file = resolved.is_dir(), resolved.is_file()
    except (OSError, ValueError, RuntimeError) as exc:
        raise toml.error("files", key, f"cannot use the path {value!r}: {exc}") from exc
    if is_dir:
        raise toml.error("files", key, f"'{value}' is a folder ({resolved}), not a file")
    if not is_file:
        raise toml.error(
            "files",
            key,
            f"file not found: '{value}' (resolved to {resolved}; paths are relative to survey.toml)",
        )
    return resolved


def load_survey(toml_path) -> Survey:
    """Read survey.toml and every file it names into a :class:`core.model.Survey`.

    Parameters
    ----------
    toml_path : str or Path

    Returns
    -------
    Survey
        Stations and boreholes in the working CRS (:func:`core.crs.working_crs`),
        picks checked against the stations, settings checked.

    Raises
    ------
    SurveyConfigError
        survey.toml: TOML syntax (with its line), unknown keys (with the nearest
        valid one), wrong types, missing or unknown CRS, missing files (the key
        and the resolved path).
    InputFileError
        A CSV file's content (file, line, field).
    """
    toml, doc = _read_toml(Path(toml_path))
    for key in doc:
        if key not in _tables():
            raise _unknown_key(toml, None, key, tuple(_tables()))
    survey = _get_table(toml, doc, "survey", required=True)
    files = _get_table(toml, doc, "files", required=True)
    processing = doc.get("processing", {})
    if "processing" in doc and not isinstance(processing, dict):
        raise toml.error(None, "processing", f"'processing' must be a table, not {_type_name(processing)}")

    name = survey.get("name", toml.path.resolve().parent.name)
    if not isinstance(name, str):
        raise toml.error("survey", "name", f"value {name!r} is {_type_name(name)}; expected text in quotes")
    if "crs" not in survey:
        raise SurveyConfigError(
            toml.path,
            toml.line_of("survey"),
            "survey.crs",
            "[survey] has no 'crs': give the CRS of x/y in the CSV files, e.g. crs = \"EPSG:32633\"",
        )
    crs_in = _crs_value(toml, "crs", survey["crs"])
    requested = None
    work_crs_text = None
    if "work_crs" in survey:
        requested = _crs_value(toml, "work_crs", survey["work_crs"])
        work_crs_text = survey["work_crs"] if isinstance(survey["work_crs"], str) else f"EPSG:{survey['work_crs']}"
        try:
            crsmod.working_crs(crs_in, requested=requested)
        except GeoreferenceError as exc:
            raise toml.error("survey", "work_crs", str(exc)) from exc
    elif not crsmod.is_geographic(crs_in):
        try:
            crsmod.working_crs(crs_in)
        except GeoreferenceError as exc:
            raise toml.error("survey", "crs", f"{exc}; or set work_crs") from exc

    paths = {}
    for key in _FILE_KEYS:
        p = _file_value(toml, key, files.get(key), required=key in ("stations", "picks"))
        if p is not None:
            for other, q in paths.items():
                if q == p:
                    raise toml.error("files", key, f"'{files[key]}' is the same file as {other}")
            paths[key] = p

    settings = read_settings(processing, toml.path, toml.text, dem=paths.get("dem"), work_crs=work_crs_text)

    table, line, station, x, y, z = _parse_stations(paths["stations"])
    lon, lat = _lonlat(table, x, y, crs_in)
    try:
        crs_work = crsmod.working_crs(crs_in, lon, lat, requested=requested)
    except GeoreferenceError as exc:
        raise toml.error("survey", "crs", f"{exc}") from exc
    xw, yw = _to_work(table, x, y, crs_in, crs_work)
    stations = Stations(line=line, station=station, x_m=xw, y_m=yw, z_m=z, file_line=np.asarray(table.lines, dtype=int))
    picks = read_picks(paths["picks"], settings.default_sigma_ms, stations)
    boreholes = None
    if "boreholes" in paths:
        boreholes = read_boreholes(paths["boreholes"], crs_in, crs_work, settings.borehole_sigma_m, stations=stations)
    handoff = read_handoff(
        survey, _get_table(toml, doc, "design", required=False), _get_table(toml, doc, "sections", required=False),
        toml_dir=toml.path.parent, error=toml.error, crs_in=crs_in, crs_work=crs_work, read_table=read_csv_table,
    )
    if handoff.design_area_path is not None:
        paths["design_area"] = handoff.design_area_path
    for a in handoff.alignments:
        paths[f"alignment_{a.name}"] = a.path
    return Survey(
        name=name,
        path=toml.path,
        input_crs=crs_in,
        crs=crs_work,
        stations=stations,
        picks=picks,
        boreholes=boreholes,
        settings=settings,
        files=dict(paths),
        handoff=handoff,
    )
