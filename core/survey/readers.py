"""Readers of the survey's tables: stations, picks and boreholes, checked line by line.

Files
-----
``stations.csv``
    ``line, station, x, y, z``: x/y in the survey CRS (longitude/latitude in
    degrees for a geographic CRS), z ground elevation in metres.
``picks.csv``
    ``line, shot, receiver, time_ms`` and optional ``sigma_ms`` (an empty cell
    takes ``default_sigma_ms``) and ``reflector`` (label; ``"1"`` when the
    column is absent or empty in every row; an empty cell among labelled rows is
    an error). Reflector labels are compared without regard to case: ``rock``
    and ``Rock`` are one reflector (with a warning), spelled as most rows spell
    it. ``shot`` and ``receiver`` are station labels of that line.
``boreholes.csv``
    ``borehole, x, y, z, depth_m`` and optional ``sigma_m`` (empty:
    ``borehole_sigma_m``); z is the collar elevation, depth_m the depth of the
    reflector below the collar.

The CSV format itself (separators, comments, quoting, header) is that of
:mod:`.csvfile`. Labels (line, station, shot, receiver, reflector, borehole)
are text compared exactly after stripping spaces: ``1`` and ``01`` are
different labels.

Decisions on suspicious input
-----------------------------
Points of a projected CRS that lie outside the CRS's EPSG area of use give a
warning (a UTM zone is routinely used a little beyond its 6 degree strip);
more than :data:`AREA_OF_USE_ERROR_DEG` degrees outside is an error, since the
coordinates then cannot belong to that CRS. Boreholes farther from every
station than the survey's extent give a warning with the distance.

Every error is an :class:`~core.errors.InputFileError` naming the file, the
1-based physical line and the field. Nothing here ever writes to the input
files.
"""

from __future__ import annotations

import difflib
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Optional, Union

import numpy as np
import pyproj

from .. import crs as crsmod
from ..errors import GeoreferenceError, InputFileError, RockheadWarning
from .csvfile import (
    BOREHOLE_COLUMNS,
    BOREHOLE_OPTIONAL,
    PICK_COLUMNS,
    PICK_OPTIONAL,
    STATION_COLUMNS,
    CsvTable,
    excerpt,
    read_csv_table,
)
from .model import Boreholes, Picks, Stations

__all__ = [
    "AREA_OF_USE_ERROR_DEG",
    "DEFAULT_REFLECTOR",
    "MAX_ABS_ELEVATION_M",
    "MAX_TIME_MS",
    "MIN_SIGMA_M",
    "MIN_SIGMA_MS",
    "MIN_TIME_MS",
    "StationRows",
    "locate_lonlat",
    "parse_stations",
    "read_boreholes",
    "read_picks",
    "read_stations",
    "to_working_crs",
]

CrsLike = Union[str, int, pyproj.CRS]

#: Largest two-way time accepted in picks.csv (ms). Shallow engineering reflections
#: arrive within a few hundred ms; more is a unit or typing error (common practice).
MAX_TIME_MS = 2000.0
#: Smallest two-way time accepted (ms): 0.1 ms is a 0.1-0.3 m reflection path in soil.
MIN_TIME_MS = 0.1
#: Smallest pick sigma accepted (ms, i.e. 1 microsecond, finer than any seismograph's timing).
MIN_SIGMA_MS = 0.001
#: A borehole farther than this many times the survey's extent from every station is refused.
FAR_BOREHOLE_FACTOR = 10.0
#: Smallest borehole depth sigma accepted (m).
MIN_SIGMA_M = 0.001
#: Largest |elevation| (m) accepted for stations and borehole collars.
MAX_ABS_ELEVATION_M = 10000.0
#: Points farther than this (degrees) outside the CRS's area of use are an error.
AREA_OF_USE_ERROR_DEG = 3.0
#: Reflector label of picks without one.
DEFAULT_REFLECTOR = "1"


@dataclass(frozen=True)
class StationRows:
    """stations.csv read and checked, before its coordinates are georeferenced.

    Attributes
    ----------
    table : CsvTable
        The file (for located messages).
    line, station : (n,) object ndarray
        Labels.
    x, y : (n,) ndarray
        Coordinates as in the file (survey CRS: m, or degrees for a geographic one).
    z : (n,) ndarray
        Ground elevation (m).
    """

    table: CsvTable
    line: np.ndarray
    station: np.ndarray
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray

    def stations(self, x_m: np.ndarray, y_m: np.ndarray) -> Stations:
        """Return the stations with their coordinates in the working CRS.

        Parameters
        ----------
        x_m, y_m : (n,) ndarray
            Easting and northing in the working CRS (m), e.g. from :func:`to_working_crs`.

        Returns
        -------
        Stations
        """
        return Stations(
            line=self.line,
            station=self.station,
            x_m=x_m,
            y_m=y_m,
            z_m=self.z,
            file_line=np.asarray(self.table.lines, dtype=int),
        )


def _coords(table: CsvTable, i_cols: tuple = ("x", "y", "z")) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    xs = np.empty(len(table.rows))
    ys = np.empty(len(table.rows))
    zs = np.empty(len(table.rows))
    jx, jy, jz = (table.columns.index(c) for c in i_cols)
    for i, r in enumerate(table.rows):
        xs[i] = table.number(i, "x", r[jx])
        ys[i] = table.number(i, "y", r[jy])
        zs[i] = table.number(i, "z", r[jz])
        if abs(zs[i]) > MAX_ABS_ELEVATION_M:
            raise InputFileError(
                table.path,
                table.lines[i],
                "z",
                f"elevation {r[jz]!r} m is outside +-{MAX_ABS_ELEVATION_M:g} m: z must be in metres",
            )
    return xs, ys, zs


def _check_geographic(table: CsvTable, x: np.ndarray, y: np.ndarray, crs_in: pyproj.CRS) -> None:
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


def locate_lonlat(table: CsvTable, x: np.ndarray, y: np.ndarray, crs_in: pyproj.CRS) -> tuple[np.ndarray, np.ndarray]:
    """Check coordinates against their CRS and return their longitude and latitude.

    Geographic coordinates are range-checked (with a hint when longitude and
    latitude look swapped); projected ones are transformed and must lie
    within :data:`AREA_OF_USE_ERROR_DEG` degrees of the CRS's area of use
    (a warning when just outside it; a hint when x and y look swapped).

    Parameters
    ----------
    table : CsvTable
        The file the coordinates come from (for located messages).
    x, y : (n,) ndarray
        Coordinates in ``crs_in`` (m, or degrees for a geographic CRS).
    crs_in : pyproj.CRS
        Their CRS.

    Returns
    -------
    lon, lat : (n,) ndarray
        Longitude and latitude (degrees) on the CRS's own datum.

    Raises
    ------
    InputFileError
        Naming the first point at fault (file, line, field ``x`` or ``y``).
    """
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


def _swapped_fits(x: np.ndarray, y: np.ndarray, crs_in: pyproj.CRS, bounds: Optional[tuple]) -> bool:
    """Tell whether (y, x) would lie inside the area of use of the projected ``crs_in``."""
    if bounds is None:
        return False
    h = crsmod.horizontal_crs(crs_in)
    try:
        lon, lat = crsmod.transform_xy(y, x, h, h.geodetic_crs, check_finite=False)
    except GeoreferenceError:
        return False
    ok = np.isfinite(lon) & np.isfinite(lat)
    return bool(ok.all() and np.all(crsmod.degrees_outside(lon, lat, bounds) == 0.0))


def to_working_crs(
    table: CsvTable, x: np.ndarray, y: np.ndarray, crs_in: pyproj.CRS, crs_work: pyproj.CRS
) -> tuple[np.ndarray, np.ndarray]:
    """Transform coordinates of a file into the working CRS.

    Parameters
    ----------
    table : CsvTable
        The file the coordinates come from (for located messages).
    x, y : (n,) ndarray
        Coordinates in ``crs_in``.
    crs_in, crs_work : pyproj.CRS
        Their CRS and the projected working CRS.

    Returns
    -------
    x_m, y_m : (n,) ndarray
        Easting and northing in the working CRS (m).

    Raises
    ------
    InputFileError
        When the transformation fails (file and field ``x``).
    """
    try:
        return crsmod.transform_xy(x, y, crs_in, crs_work)
    except GeoreferenceError as exc:
        raise InputFileError(table.path, None, "x", str(exc)) from exc


def _resolve_crs(
    crs_in: CrsLike, crs_work: Optional[CrsLike], lon: np.ndarray, lat: np.ndarray, where: Path
) -> tuple[pyproj.CRS, pyproj.CRS]:
    try:
        crs_in = crsmod.parse_crs(crs_in)
        if crs_work is None:
            crs_work = crsmod.working_crs(crs_in, lon, lat)
        else:
            crs_work = crsmod.working_crs(crs_in, requested=crs_work)
    except GeoreferenceError as exc:
        raise InputFileError(where, None, None, str(exc)) from exc
    return crs_in, crs_work


def parse_stations(path: Union[str, Path]) -> StationRows:
    """Read stations.csv: labels, coordinates as in the file, elevations.

    Parameters
    ----------
    path : str or Path
        The stations file.

    Returns
    -------
    StationRows
        Checked rows (labels unique within a line, finite numbers, elevations
        within :data:`MAX_ABS_ELEVATION_M`), not yet georeferenced.

    Raises
    ------
    InputFileError
        Naming the file, line and field.
    """
    table = read_csv_table(path, STATION_COLUMNS, role="stations")
    n = len(table.rows)
    line = np.empty(n, dtype=object)
    station = np.empty(n, dtype=object)
    seen: dict[Any, int] = {}
    for i, r in enumerate(table.rows):
        line[i] = table.label(i, "line", r[0])
        station[i] = table.label(i, "station", r[1])
        key = (line[i], station[i])
        if key in seen:
            raise InputFileError(
                table.path,
                table.lines[i],
                "station",
                f"duplicate station {excerpt(station[i])} on line {excerpt(line[i])}: also on line {seen[key]}; "
                "station labels must be unique within a line",
            )
        seen[key] = table.lines[i]
    x, y, z = _coords(table)
    return StationRows(table, line, station, x, y, z)


def read_stations(path: Union[str, Path], crs_in: CrsLike, crs_work: Optional[CrsLike] = None) -> Stations:
    """Read stations.csv and return the stations in the working CRS.

    Parameters
    ----------
    path : str or Path
        The stations file.
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
        Naming the file, line and field (an unknown CRS names the file only).
    """
    rows = parse_stations(path)
    table = rows.table
    crs_in = _parse_crs_or_raise(crs_in, table.path)
    lon, lat = locate_lonlat(table, rows.x, rows.y, crs_in)
    crs_in, crs_work = _resolve_crs(crs_in, crs_work, lon, lat, table.path)
    xw, yw = to_working_crs(table, rows.x, rows.y, crs_in, crs_work)
    return rows.stations(xw, yw)


def _parse_crs_or_raise(value: CrsLike, path: Union[str, Path]) -> pyproj.CRS:
    try:
        return crsmod.parse_crs(value)
    except GeoreferenceError as exc:
        raise InputFileError(path, None, None, str(exc)) from exc


def read_picks(
    path: Union[str, Path],
    default_sigma_ms: float = 0.5,
    stations: Optional[Stations] = None,
    *,
    max_time_ms: float = MAX_TIME_MS,
) -> Picks:
    """Read picks.csv.

    Parameters
    ----------
    path : str or Path
        The picks file.
    default_sigma_ms : float
        Pick standard error (ms) where the file has no (or an empty) ``sigma_ms``.
    stations : Stations, optional
        When given, every pick's line, shot and receiver must be stations of it.
    max_time_ms : float
        Largest two-way time accepted (ms).

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
    known: Optional[dict[str, set[str]]] = None
    if stations is not None:
        known = {}
        for ln, st in zip(stations.line, stations.station):
            known.setdefault(ln, set()).add(st)
    seen: dict[Any, int] = {}
    path = table.path
    canonical = _reflector_spellings(table, j_ref) if j_ref is not None else {}
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        line[i] = table.label(i, "line", r[0])
        shot[i] = table.label(i, "shot", r[1])
        receiver[i] = table.label(i, "receiver", r[2])
        t = table.number(i, "time_ms", r[3])
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
            s = table.number(i, "sigma_ms", r[j_sig])
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
        reflector[i] = canonical.get(r[j_ref].casefold(), DEFAULT_REFLECTOR) if j_ref is not None else DEFAULT_REFLECTOR
        if known is not None:
            _check_pick_stations(table, i, line[i], shot[i], receiver[i], known)
        key = (line[i], shot[i], receiver[i], reflector[i])
        if key in seen:
            raise InputFileError(
                path,
                lineno,
                "receiver",
                f"duplicate pick: line {excerpt(line[i])}, shot {excerpt(shot[i])}, receiver "
                f"{excerpt(receiver[i])}, reflector {excerpt(reflector[i])} is on lines {seen[key]} and {lineno}; "
                "keep one",
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


def _reflector_spellings(table: CsvTable, j_ref: int) -> dict[str, str]:
    """Case-folded reflector label -> the spelling most rows use; refuses empty cells among labels.

    ``rock`` and ``Rock`` are one reflector: labels differing only in case are
    taken as one (the most frequent spelling, the first seen on a tie), with a
    :class:`RockheadWarning` naming both and a line of each. An empty cell
    while other rows name a reflector is an error (it would silently become a
    reflector of its own); a column empty everywhere means one reflector.
    """
    texts = [r[j_ref] for r in table.rows]
    labelled = [i for i, t in enumerate(texts) if t != ""]
    if not labelled:
        return {}
    if len(labelled) < len(texts):
        i = next(i for i, t in enumerate(texts) if t == "")
        raise InputFileError(
            table.path,
            table.lines[i],
            "reflector",
            f"empty reflector label while other picks name one ({excerpt(texts[labelled[0]])} on line "
            f"{table.lines[labelled[0]]}): give the reflector of every pick, or leave the column out for a survey "
            "of one reflector",
        )
    counts: dict[str, dict[str, int]] = {}
    first_line: dict[str, int] = {}
    for i in labelled:
        counts.setdefault(texts[i].casefold(), {}).setdefault(texts[i], 0)
        counts[texts[i].casefold()][texts[i]] += 1
        first_line.setdefault(texts[i], table.lines[i])
    out = {}
    for key, spellings in counts.items():
        best = max(spellings, key=lambda sp: (spellings[sp], -first_line[sp]))
        out[key] = best
        others = [sp for sp in spellings if sp != best]
        if others:
            other = others[0]
            warnings.warn(
                RockheadWarning(
                    f"{table.path.name}, line {first_line[other]}, field 'reflector': reflector labels "
                    f"{excerpt(other)} ({spellings[other]} picks) and {excerpt(best)} ({spellings[best]} picks, "
                    f"first on line {first_line[best]}) differ only in case: taken as one reflector {excerpt(best)}"
                ),
                stacklevel=4,
            )
    return out


def _near(label: str, choices: Any) -> str:
    close = difflib.get_close_matches(str(label), sorted(map(str, choices)), n=3, cutoff=0.5)
    return f" (close: {', '.join(repr(c) for c in close)})" if close else ""


def _check_pick_stations(table: CsvTable, i: int, ln: str, sh: str, rc: str, known: dict[str, set[str]]) -> None:
    lineno = table.lines[i]
    if ln not in known:
        lines = sorted(known)
        shown = ", ".join(repr(v) for v in lines[:10]) + (", ..." if len(lines) > 10 else "")
        raise InputFileError(
            table.path, lineno, "line", f"line {excerpt(ln)} is not in the stations file (lines there: {shown})"
        )
    for name, lab in (("shot", sh), ("receiver", rc)):
        if lab not in known[ln]:
            raise InputFileError(
                table.path,
                lineno,
                name,
                f"{name} {excerpt(lab)} is not a station of line {excerpt(ln)} in the stations "
                f"file{_near(lab, known[ln])}",
            )


def read_boreholes(
    path: Union[str, Path],
    crs_in: CrsLike,
    crs_work: Optional[CrsLike] = None,
    default_sigma_m: float = 0.1,
    stations: Optional[Stations] = None,
) -> Boreholes:
    """Read boreholes.csv and return the boreholes in the working CRS.

    Parameters
    ----------
    path : str or Path
        The boreholes file.
    crs_in, crs_work : str, int or pyproj.CRS
        As in :func:`read_stations`.
    default_sigma_m : float
        Depth standard error (m) where the file has no (or an empty) ``sigma_m``.
    stations : Stations, optional
        Stations in the working CRS; a borehole farther from every station
        than the stations' extent (at least 100 m) gives a warning.

    Returns
    -------
    Boreholes
        Collars in the working CRS, elevations and depths as in the file (m).

    Raises
    ------
    InputFileError
        Naming the file, line and field.
    """
    if not (isinstance(default_sigma_m, (int, float)) and default_sigma_m >= MIN_SIGMA_M):
        raise InputFileError(
            path, None, "sigma_m", f"default sigma {default_sigma_m!r} m must be >= {MIN_SIGMA_M:g} (and > 0)"
        )
    try:
        table = read_csv_table(
            path, BOREHOLE_COLUMNS, BOREHOLE_OPTIONAL, role="boreholes", optional_pattern=INTERFACE_COLUMNS
        )
    except InputFileError as err:
        # without depth_m, the depths of named reflectors (depth_<label>_m) are enough
        if err.field != "depth_m":
            raise
        table = read_csv_table(
            path, BOREHOLE_COLUMNS[:4], BOREHOLE_OPTIONAL, role="boreholes", optional_pattern=INTERFACE_COLUMNS
        )
        if not any(c.startswith("depth_") for c in table.columns):
            raise err from None
    path = table.path
    n = len(table.rows)
    name = np.empty(n, dtype=object)
    depth = np.full(n, np.nan)
    sigma = np.full(n, float(default_sigma_m))
    j_sig = table.columns.index("sigma_m") if "sigma_m" in table.columns else None
    j_depth = table.columns.index("depth_m") if "depth_m" in table.columns else None
    seen: dict[Any, int] = {}
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        name[i] = table.label(i, "borehole", r[0])
        if name[i] in seen:
            raise InputFileError(
                path, lineno, "borehole", f"duplicate borehole {excerpt(name[i])}: also on line {seen[name[i]]}"
            )
        seen[name[i]] = lineno
    x, y, z = _coords(table)
    for i, r in enumerate(table.rows):
        if j_depth is not None:
            depth[i] = _depth_value(table, i, "depth_m", r[j_depth])
        if j_sig is not None and r[j_sig] != "":
            sigma[i] = _sigma_value(table, i, "sigma_m", r[j_sig])
    interface_depth, interface_sigma = _interface_columns(table, default_sigma_m)
    crs_in = _parse_crs_or_raise(crs_in, path)
    lon, lat = locate_lonlat(table, x, y, crs_in)
    crs_in, crs_work = _resolve_crs(crs_in, crs_work, lon, lat, path)
    xw, yw = to_working_crs(table, x, y, crs_in, crs_work)
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
        interface_depth_m=interface_depth,
        interface_sigma_m=interface_sigma,
        path=path,
        header_line=table.header_line,
    )


#: Columns of the depths of named reflectors in boreholes.csv and their errors: depth_<label>_m, sigma_<label>_m
INTERFACE_COLUMNS = r"(depth|sigma)_.+_m"


def _depth_value(table: CsvTable, i: int, field: str, text: str) -> float:
    """A borehole depth (m, > 0), located errors."""
    value = table.number(i, field, text)
    if value <= 0:
        raise InputFileError(
            table.path, table.lines[i], field, f"depth {text!r} m must be > 0 (depth below the collar, down positive)"
        )
    return value


def _sigma_value(table: CsvTable, i: int, field: str, text: str) -> float:
    """A borehole depth's standard error (m, >= MIN_SIGMA_M), located errors."""
    value = table.number(i, field, text)
    if value <= 0:
        raise InputFileError(table.path, table.lines[i], field, f"sigma {text!r} m must be > 0")
    if value < MIN_SIGMA_M:
        raise InputFileError(
            table.path, table.lines[i], field, f"sigma {text!r} m is below {MIN_SIGMA_M:g} m: give a realistic error"
        )
    return value


def _interface_columns(table: CsvTable, default_sigma_m: float) -> tuple[dict, dict]:
    """Depths of named reflectors (``depth_<label>_m``; empty: not logged) and their sigmas, by label."""
    depths: dict[str, np.ndarray] = {}
    sigmas: dict[str, np.ndarray] = {}
    labels = [c[len("depth_") : -len("_m")] for c in table.columns if c.startswith("depth_") and c != "depth_m"]
    for c in table.columns:
        if c.startswith("sigma_") and c != "sigma_m" and c[len("sigma_") : -len("_m")] not in labels:
            raise InputFileError(
                table.path,
                table.header_line,
                c,
                f"column '{c}' gives the error of a depth no column gives: add 'depth_{c[len('sigma_') :]}' "
                "or remove it",
            )
    for label in labels:
        jd = table.columns.index(f"depth_{label}_m")
        js = table.columns.index(f"sigma_{label}_m") if f"sigma_{label}_m" in table.columns else None
        d = np.full(len(table.rows), np.nan)
        sd = np.full(len(table.rows), float(default_sigma_m))
        for i, r in enumerate(table.rows):
            if r[jd] != "":  # empty: this borehole did not log the reflector
                d[i] = _depth_value(table, i, f"depth_{label}_m", r[jd])
            if js is not None and r[js] != "":
                sd[i] = _sigma_value(table, i, f"sigma_{label}_m", r[js])
        depths[label], sigmas[label] = d, sd
    return depths, sigmas


def _warn_far_boreholes(table: CsvTable, name: np.ndarray, xw: np.ndarray, yw: np.ndarray, stations: Stations) -> None:
    """Warn about boreholes far from every station; refuse those beyond :data:`FAR_BOREHOLE_FACTOR` times that.

    The distance to the nearest station comes from a KD-tree (memory linear
    in the number of stations and boreholes, whatever their counts).
    """
    from scipy.spatial import cKDTree

    sx, sy = np.asarray(stations.x_m, float), np.asarray(stations.y_m, float)
    extent = float(np.hypot(np.ptp(sx), np.ptp(sy)))
    limit = max(extent, 100.0)
    d, _ = cKDTree(np.column_stack([sx, sy])).query(np.column_stack([xw, yw]), k=1)
    d = np.asarray(d, float)
    far = np.flatnonzero(d > FAR_BOREHOLE_FACTOR * limit)
    if far.size:
        i = int(far[0])
        raise InputFileError(
            table.path,
            table.lines[i],
            "x",
            f"borehole {excerpt(name[i])} is {d[i]:.0f} m from the nearest station, more than "
            f"{FAR_BOREHOLE_FACTOR:g} times the survey's extent ({limit:.0f} m): it cannot belong to this survey's "
            "map; check its coordinates (and the CRS) or remove it",
        )
    for j in np.flatnonzero(d > limit):
        warnings.warn(
            RockheadWarning(
                f"{table.path.name}, line {table.lines[j]}, field 'x': borehole {excerpt(name[j])} is "
                f"{d[j]:.0f} m from the nearest station, farther than the survey's extent ({limit:.0f} m): "
                "check its coordinates; it will hardly constrain the map"
            ),
            stacklevel=3,
        )
