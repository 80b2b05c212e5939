"""Checks of a whole survey, files and settings together: what ``run`` would refuse, found by ``check``.

Each file is checked line by line by its reader; some faults show only when
the files and settings are seen together, and without these checks they would
surface minutes into a run, far from their cause (or as a grid of billions of
cells). :func:`check_survey` runs after the readers, in ``load_survey``, so
the command line's ``check`` catches them too. Every refusal names the file,
line and field, or the survey.toml key:

* ``[processing] reflector`` must be one of the picks' reflector labels
  (compared without regard to case; the picks' spelling is kept);
* the reflector to map must have at least :data:`MIN_GATHERS` usable gathers
  (``min_picks`` picks whose times change with offset): a surface needs three
  points, and a gather whose picks all have one time has no moveout to fit;
  for kriging, their shots must give a variogram at least three distance
  classes of pairs;
* a borehole's depth cannot exceed the deepest reflector the picks can show,
  ``velocity_max_m_s`` times the longest two-way time over two;
* ``cell_size_m`` lies between a tenth of the station spacing (finer resolves
  nothing the data hold) and the survey's extent, and the grid it gives over
  the mapped area has at most ``max_grid_cells`` cells;
* ``max_distance_m`` is at least the station spacing and
  ``contour_interval_m`` at least :data:`MIN_CONTOUR_INTERVAL_M`.

The station spacing is the median distance from each station to the nearest
other station of its line; the mapped area is that of
:func:`map_extent` (shots of the mapped reflector and boreholes, with the
buffer the run's grid uses).
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Callable, Optional

import numpy as np

from ..errors import InputFileError
from .csvfile import excerpt
from .model import Survey

__all__ = [
    "MIN_CONTOUR_INTERVAL_M",
    "MIN_GATHERS",
    "check_survey",
    "gather_table",
    "grid_buffer_m",
    "grid_gib",
    "map_extent",
    "station_spacing_m",
]

#: A surface needs at least this many reflector points (gathers).
MIN_GATHERS = 3
#: Smallest contour interval accepted (m): finer than any seismic depth map resolves (common practice
#: maps bedrock at 0.5 to 5 m intervals).
MIN_CONTOUR_INTERVAL_M = 0.1
#: Smallest cell as a fraction of the station spacing.
MIN_CELL_FRACTION = 0.1


def station_spacing_m(survey: Survey) -> float:
    """Median distance (m) from each station to the nearest other station of its line.

    Parameters
    ----------
    survey : Survey

    Returns
    -------
    float
        The spacing (m); NaN when no line has two distinct stations.
    """
    from scipy.spatial import cKDTree

    st = survey.stations
    lines = np.asarray(st.line).astype(str)
    xy = np.column_stack([st.x_m, st.y_m])
    d_all = []
    for ln in np.unique(lines):
        p = xy[lines == ln]
        if len(p) < 2:
            continue
        d, _ = cKDTree(p).query(p, k=2)
        d = d[:, 1]
        d_all.append(d[d > 0])
    d = np.concatenate(d_all) if d_all else np.zeros(0)
    return float(np.median(d)) if d.size else float("nan")


def gather_table(survey: Survey) -> dict:
    """Per gather (line, shot, reflector) of the picks: counts, time spread and the shot's position.

    Vectorised over the picks (no Python loop per pick or gather).

    Parameters
    ----------
    survey : Survey

    Returns
    -------
    dict
        ``reflector`` (str per gather), ``n_picks``, ``time_spread_s`` (max
        minus min time), ``median_time_s``, ``x_m``, ``y_m`` (the shot
        station), ``first_row`` (index of the gather's first pick).
    """
    p = survey.picks
    rows = np.flatnonzero(~survey.excluded_picks)  # picks the edits exclude do not count
    n = len(rows)
    if n == 0:
        return {
            k: np.zeros(0)
            for k in ("reflector", "n_picks", "time_spread_s", "median_time_s", "x_m", "y_m", "first_row")
        }
    codes = []
    for col in (p.line, p.shot, p.reflector):
        _, inv = np.unique(np.asarray(col)[rows].astype(str), return_inverse=True)
        codes.append(inv.astype(np.int64))
    key = (codes[0] * (codes[1].max() + 1) + codes[1]) * (codes[2].max() + 1) + codes[2]
    _, gid = np.unique(key, return_inverse=True)
    t_all = np.asarray(p.time_s, float)[rows]
    order = np.lexsort((t_all, gid))
    g_sorted = gid[order]
    starts = np.flatnonzero(np.r_[True, g_sorted[1:] != g_sorted[:-1]])
    ends = np.r_[starts[1:], n]
    t = t_all[order]
    first = rows[order[starts]]
    # the shot's station position
    st = survey.stations
    index = {
        (a, b): i for i, (a, b) in enumerate(zip(np.asarray(st.line).astype(str), np.asarray(st.station).astype(str)))
    }
    shot_rows = np.array([index.get((str(p.line[i]), str(p.shot[i])), -1) for i in first], dtype=int)
    x = np.where(shot_rows >= 0, np.asarray(st.x_m)[shot_rows], np.nan)
    y = np.where(shot_rows >= 0, np.asarray(st.y_m)[shot_rows], np.nan)
    return {
        "reflector": np.asarray(p.reflector).astype(str)[first],
        "n_picks": ends - starts,
        "time_spread_s": t[ends - 1] - t[starts],
        "median_time_s": t[(starts + ends - 1) // 2],
        "x_m": x,
        "y_m": y,
        "first_row": first,
    }


def map_extent(x_m: np.ndarray, y_m: np.ndarray, buffer_m: float) -> tuple[float, float, float, float]:
    """West, east, south, north (m) of the area a map of data at (x, y) covers: their box plus ``buffer_m``.

    Parameters
    ----------
    x_m, y_m : ndarray
        Positions of the data (reflector points, boreholes), finite.
    buffer_m : float
        Margin on every side (m), >= 0.

    Returns
    -------
    tuple of float

    Examples
    --------
    >>> map_extent(np.array([0.0, 100.0]), np.array([0.0, 50.0]), 10.0)
    (-10.0, 110.0, -10.0, 60.0)
    """
    return (
        float(np.min(x_m)) - buffer_m,
        float(np.max(x_m)) + buffer_m,
        float(np.min(y_m)) - buffer_m,
        float(np.max(y_m)) + buffer_m,
    )


def grid_buffer_m(extent_side_m: float, spread_m: float) -> float:
    """The margin of the map around its data (m): half the median spread plus 5 % of the larger side.

    A gather's picks reach about half its spread around its reflector point,
    so the map covers the stations that recorded them; 5 % more keeps the
    contours off the frame. Beyond the margin no cell can be estimated within
    the masking distance anyway.

    Parameters
    ----------
    extent_side_m : float
        Larger side of the data's bounding box (m).
    spread_m : float
        Median spread length of the mapped gathers (m).

    Returns
    -------
    float

    Examples
    --------
    >>> grid_buffer_m(400.0, 96.0)
    68.0
    """
    s = spread_m if math.isfinite(spread_m) else 0.0
    return 0.5 * s + 0.05 * max(extent_side_m, 0.0)


def _mapped_label(survey: Survey, gathers: dict, error: Callable) -> Optional[str]:
    """The reflector the run will map: the one asked for (spelled as in the picks), the only one, or the deepest."""
    labels = sorted(set(np.asarray(survey.picks.reflector).astype(str).tolist()))
    asked = survey.settings.reflector
    if asked is not None:
        match = [lab for lab in labels if lab.casefold() == str(asked).casefold()]
        if not match:
            shown = ", ".join(excerpt(lab) for lab in labels[:10]) + (", ..." if len(labels) > 10 else "")
            raise error(
                "processing",
                "reflector",
                f"reflector = {excerpt(str(asked))} is not a reflector of the picks (their reflector labels: "
                f"{shown}); give one of those, or leave the key out to map the deepest",
            )
        return match[0]
    if len(labels) == 1:
        return labels[0]
    # the deepest by median time: what the run maps by default (by median t0 of its fits)
    med = {lab: float(np.median(gathers["median_time_s"][gathers["reflector"] == lab])) for lab in labels}
    return max(labels, key=lambda lab: (med[lab], lab))


def _check_gathers(survey: Survey, gathers: dict, label: str) -> None:
    p = survey.picks
    path = survey.files.get("picks")
    sel = gathers["reflector"] == label
    enough = sel & (gathers["n_picks"] >= survey.settings.min_picks)
    moving = enough & (gathers["time_spread_s"] > 0)
    if int(moving.sum()) >= MIN_GATHERS:
        return
    if enough.any() and not moving.any():
        row = int(gathers["first_row"][np.flatnonzero(enough)[0]])
        t = float(p.time_s[row]) * 1e3
        raise InputFileError(
            path,
            int(p.file_line[row]),
            "time_ms",
            f"every gather of reflector {excerpt(label)} has one time at all its offsets ({t:g} ms here): a "
            "reflection's two-way time grows with offset, so no gather can be fitted; are the times copied down "
            "the column?",
        )
    rows = gathers["first_row"][np.flatnonzero(sel)]
    where = int(p.file_line[int(rows[0])]) if len(rows) else None
    raise InputFileError(
        path,
        where,
        None,
        f"only {int(moving.sum())} gather(s) of reflector {excerpt(label)} have at least min_picks = "
        f"{survey.settings.min_picks} picks whose times change with offset ({int(sel.sum())} gathers in all); a map "
        f"needs at least {MIN_GATHERS}: add picks, or lower [processing] min_picks",
    )


def _check_variogram(survey: Survey, gathers: dict, label: str) -> None:
    """Kriging needs a variogram, and a variogram at least 3 distance classes of point pairs.

    The reflector points are not known before the fits; the shots of the
    mapped reflector's gathers stand in for them (a zero-offset point lies
    within a fraction of the depth of its shot), with the experimental
    variogram the run computes (:func:`~..surface.variogram.experimental_variogram`).
    """
    if survey.settings.surface_method == "spline":
        return
    from ..surface.variogram import experimental_variogram

    sel = (gathers["reflector"] == label) & np.isfinite(gathers["x_m"])
    x, y = gathers["x_m"][sel], gathers["y_m"][sel]
    if len(x) < 2:
        return
    ev = experimental_variogram(x, y, np.arange(len(x), dtype=float))
    bins = int(np.sum((ev.n_pairs > 0) & np.isfinite(ev.semivariance) & (ev.lag_m > 0)))
    if bins < 3:
        raise InputFileError(
            survey.files.get("picks"),
            None,
            None,
            f"the {len(x)} gathers of reflector {excerpt(label)} give reflector points too few or too clustered "
            f"for a variogram ({bins} distance class(es) of point pairs, at least 3 needed for kriging): add shots, "
            'or set [processing] surface_method = "spline" in survey.toml',
        )


def _check_lines(survey: Survey) -> None:
    """Every line needs two distinct station positions for its direction (as the run's line frames do)."""
    st = survey.stations
    lines = np.asarray(st.line).astype(str)
    xy = np.column_stack([st.x_m, st.y_m])
    order = np.argsort(lines, kind="stable")
    bounds = np.flatnonzero(np.r_[True, lines[order][1:] != lines[order][:-1], True])
    for a, b in zip(bounds[:-1], bounds[1:]):
        idx = order[a:b]
        d = xy[idx] - xy[idx].mean(axis=0)
        if len(idx) < 2 or float(np.max(np.hypot(d[:, 0], d[:, 1]))) <= 1e-6:
            raise InputFileError(
                survey.files.get("stations"),
                int(st.file_line[idx[0]]),
                "x",
                f"line {excerpt(lines[idx[0]])} has {len(idx)} station(s) at a single position "
                f"({xy[idx[0], 0]:.3f}, {xy[idx[0], 1]:.3f}); a line needs at least two distinct stations to define "
                "its direction: check the coordinates or the line names",
            )


def _check_boreholes(survey: Survey) -> None:
    bh = survey.boreholes
    if bh is None or not len(bh):
        return
    t_max = float(np.max(survey.picks.time_s))
    deepest = survey.settings.velocity_max_m_s * t_max / 2.0
    bad = np.flatnonzero(bh.depth_m > deepest)
    if bad.size:
        i = int(bad[0])
        raise InputFileError(
            survey.files.get("boreholes"),
            int(bh.file_line[i]),
            "depth_m",
            f"depth {bh.depth_m[i]:g} m of borehole {excerpt(str(bh.name[i]))} is deeper than any reflector the "
            f"picks can show (velocity_max_m_s {survey.settings.velocity_max_m_s:g} m/s times the longest two-way "
            f"time {t_max * 1e3:g} ms, over two: {deepest:.0f} m); depth_m is the depth of the reflector below the "
            "collar, in metres",
        )


def _check_grid(survey: Survey, gathers: dict, label: str, spacing_m: float, error: Callable) -> None:
    s = survey.settings
    sel = (gathers["reflector"] == label) & np.isfinite(gathers["x_m"])
    x, y = gathers["x_m"][sel], gathers["y_m"][sel]
    bh = survey.boreholes
    if bh is not None and len(bh):
        x, y = np.concatenate([x, bh.x_m]), np.concatenate([y, bh.y_m])
    if not len(x):
        return
    st = survey.stations
    extent = max(float(np.ptp(st.x_m)), float(np.ptp(st.y_m)))
    if s.cell_size_m is not None:
        if math.isfinite(spacing_m) and s.cell_size_m < MIN_CELL_FRACTION * spacing_m:
            raise error(
                "processing",
                "cell_size_m",
                f"cell_size_m = {s.cell_size_m:g} m is below a tenth of the station spacing ({spacing_m:.3g} m): "
                f"finer cells resolve nothing the data hold; give at least {MIN_CELL_FRACTION * spacing_m:.3g} m, or "
                "leave the key out to choose it from the data",
            )
        if extent > 0 and s.cell_size_m > extent:
            raise error(
                "processing",
                "cell_size_m",
                f"cell_size_m = {s.cell_size_m:g} m is larger than the survey's extent ({extent:.4g} m): the map "
                "would be one cell; give a smaller cell, or leave the key out to choose it from the data",
            )
        buffer = grid_buffer_m(max(float(np.ptp(x)), float(np.ptp(y))), _median_spread(survey, label))
        w, e, so, n = map_extent(x, y, buffer)
        cells = math.ceil((e - w) / s.cell_size_m + 1) * math.ceil((n - so) / s.cell_size_m + 1)
        if cells > s.max_grid_cells:
            side = math.sqrt((e - w) * (n - so) / s.max_grid_cells)
            raise error(
                "processing",
                "cell_size_m",
                f"cell_size_m = {s.cell_size_m:g} m over the mapped area ({e - w:.0f} m x {n - so:.0f} m) needs about "
                f"{cells:,} cells ({grid_gib(cells):.1f} GiB for the grids), more than max_grid_cells = "
                f"{s.max_grid_cells:,}; give cell_size_m of at least {side:.3g} m, or raise max_grid_cells",
            )
    if s.max_distance_m is not None and math.isfinite(spacing_m) and s.max_distance_m < spacing_m:
        raise error(
            "processing",
            "max_distance_m",
            f"max_distance_m = {s.max_distance_m:g} m is below the station spacing ({spacing_m:.3g} m): no cell "
            "between the reflector points would be mapped; give at least the spacing, or leave the key out",
        )


def grid_gib(cells: float) -> float:
    """Memory (GiB) of the grids of a run with ``cells`` cells: about 12 arrays of 8-byte values."""
    return 12.0 * 8.0 * cells / 2**30


def _median_spread(survey: Survey, label: str) -> float:
    """Median spread length (m) of the gathers of ``label``: from the picks' shot-receiver offsets."""
    p = survey.picks
    st = survey.stations
    index = {
        (a, b): i for i, (a, b) in enumerate(zip(np.asarray(st.line).astype(str), np.asarray(st.station).astype(str)))
    }
    sel = np.flatnonzero(np.asarray(p.reflector).astype(str) == label)
    if not sel.size:
        return float("nan")
    if sel.size > 200_000:  # a seeded sample is plenty for a median
        sel = np.sort(np.random.default_rng(0).choice(sel, 200_000, replace=False))
    lines = np.asarray(p.line).astype(str)[sel]
    s_i = np.array([index.get((a, b), -1) for a, b in zip(lines, np.asarray(p.shot).astype(str)[sel])])
    r_i = np.array([index.get((a, b), -1) for a, b in zip(lines, np.asarray(p.receiver).astype(str)[sel])])
    ok = (s_i >= 0) & (r_i >= 0)
    off = np.hypot(st.x_m[s_i[ok]] - st.x_m[r_i[ok]], st.y_m[s_i[ok]] - st.y_m[r_i[ok]])
    return float(2.0 * np.median(off)) if off.size else float("nan")


def check_survey(survey: Survey, error: Callable) -> Survey:
    """Check the survey's files and settings together; return it with the reflector spelled as in the picks.

    Parameters
    ----------
    survey : Survey
        As read by the readers.
    error : callable
        ``error(table, key, message)`` returns the located survey.toml error to raise.

    Returns
    -------
    Survey
        ``survey``, with ``settings.reflector`` spelled as in picks.csv.

    Raises
    ------
    SurveyConfigError
        A setting the survey cannot honour (named with its line in survey.toml).
    InputFileError
        Picks or boreholes that no run could map (file, line and field).
    """
    _check_lines(survey)
    gathers = gather_table(survey)
    label = _mapped_label(survey, gathers, error)
    if label is None:
        return survey
    _check_gathers(survey, gathers, label)
    _check_variogram(survey, gathers, label)
    _check_boreholes(survey)
    s = survey.settings
    if s.contour_interval_m is not None and s.contour_interval_m < MIN_CONTOUR_INTERVAL_M:
        raise error(
            "processing",
            "contour_interval_m",
            f"contour_interval_m = {s.contour_interval_m:g} m is below {MIN_CONTOUR_INTERVAL_M:g} m, finer than a "
            "seismic depth map resolves (common practice: 0.5 to 5 m); give a larger interval, or leave the key out",
        )
    _check_grid(survey, gathers, label, station_spacing_m(survey), error)
    if s.reflector is not None and s.reflector != label:
        survey = replace(survey, settings=replace(s, reflector=label))
    return survey
