"""The steps of the whole job and :func:`compute`, which runs them (no files written).

Data flow (one way)::

    Survey -> build_gathers -> fit_shot_gathers -> reflector_points
      -> combine_lines (true dip at crossings), line_misties
      -> surface (kriging or spline; 3D relocation loop) -> borehole check
      -> joint inversion of all picks (curved reflectors) where supported
      -> depth grid, contours, surface dips  ==> RunResult

:mod:`.job` writes a :class:`~.results.RunResult` to files. The step
functions are public so that the QGIS algorithms can call one step at a time.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import replace
from pathlib import Path
from typing import Optional

import numpy as np

from .errors import GridError, InputFileError, InversionError, OutputError, RockheadWarning, SurveyConfigError
from .grid import GridSpec, bilinear, next_nice_step, nice_step
from .overburden import layer_order, layered_ties, mapped_boreholes, overburden_step
from .progress import NullProgress, SubProgress, check_cancel
from .results import (
    BoreholeCheck,
    FitStep,
    MapProducts,
    RunResult,
    SurfaceDiagnostics,
    TomographyOutcome,
)
from .seismic.geometry import build_gathers, line_frames, reflector_points
from .seismic.misties import line_crossings, line_misties
from .seismic.shot_fits import fit_shot_gathers
from .seismic.structure import resolve_cross_dips, surface_dips
from .surface.base import SurfaceGrid
from .surface.contours import contours_layer
from .surface.corridor import line_corridor
from .surface.trend import grid_with_trend, model_with_trend, predict_with_trend
from .survey.checks import grid_buffer_m
from .survey.ground import GroundModel
from .text import printable
from .tomography.layered import LayeredSettings, estimate_layered, reflector_order
from .tomography.start import GatherPoints, curvature_flags, start_from_gathers
from .velocity_checks import borehole_depth_ratio, calibrate_fit, cmp_step, dix_table, site_velocity

#: Stated limits of the joint estimate, beyond which the workflow skips it (auto) or refuses it
#: (surface_method = "tomography") before calling it. The benchmark of the single-reflector joint
#: inversion (benchmarks/RESULTS.md) ran 100 k picks on 200 x 200 nodes in 31 s and 0.6 GiB; the layered
#: estimate on the output grid is held to the same picks and to that many cells at four per node.
TOMOGRAPHY_MAX_PICKS = 100_000
TOMOGRAPHY_MAX_CELLS = 4 * 200 * 200
SURFACE_METHODS = ("auto", "kriging", "spline", "tomography")

__all__ = ["SURFACE_METHODS", "compute", "fit_step"]


def fit_step(survey, progress=None, exclude=None, cross_component=None, ground=None, previous=None) -> FitStep:
    """Fit every gather of the survey and place its reflector points in 3D.

    Picks excluded by the survey's pick edits are left out (and reported as
    excluded), besides those of ``exclude`` (per gather-set pick). A refit of
    the same survey (``previous``, a :class:`FitStep` of it) reuses its line
    frames and gathers, which depend on the survey alone.
    """
    progress = progress or NullProgress()
    if previous is not None:
        frames, gathers = previous.frames, previous.gathers
    else:
        frames = line_frames(survey.stations, path=survey.files.get("stations"))
        gathers = build_gathers(survey, frames=frames)
    check_cancel(progress)
    edited = survey.excluded_picks[gathers.pick_index]
    if np.any(edited):
        exclude = edited if exclude is None else (np.asarray(exclude, bool) | edited)
    fits = fit_shot_gathers(
        gathers, survey.settings, cross_component=cross_component, exclude=exclude, progress=progress
    )
    pts = reflector_points(gathers, fits, ground=ground)
    zero = pts.select(pts.kind == "zero_offset")
    recv = pts.select(pts.kind == "receiver")
    return FitStep(frames=frames, gathers=gathers, fits=fits, points=zero, receiver_points=recv)


def dips_step(survey, fit: FitStep, progress=None):
    """True dip and strike where lines cross, from the gathers near each crossing.

    Per crossing of two lines (:func:`~.seismic.misties.line_crossings`,
    near misses within the radius included) the ok gathers whose zero-offset
    points lie within ``combine_radius_m`` of it (default half the median
    spread length) give the horizontal normal by weighted least squares
    (:func:`~.seismic.structure.combine_lines`). A gather fitted with the
    cross-line dip assumed zero has a biased along-line component where the
    receivers are not level with the shot (sloping ground), so the members
    are refitted with the cross-line component the crossing resolves and the
    crossing is measured again, until it settles
    (:func:`~.seismic.structure.resolve_cross_dips`).

    Returns ``(dips, fits)``: the measurements and the fits made with the
    resolved cross-line components (q = 0 for gathers near no crossing).
    """
    st = survey.settings
    g = fit.gathers
    radius = st.combine_radius_m
    if radius is None:
        ok = fit.fits.status == "ok"
        spread = np.asarray(g.spread_length_m, float)[ok]
        radius = 0.5 * float(np.median(spread)) if len(spread) else 0.0
    crossings = line_crossings(fit.frames, max_gap_m=radius)
    exclude = fit.fits.excluded

    def refit(q):
        check_cancel(progress or NullProgress())
        return fit_shot_gathers(g, st, cross_component=q, exclude=exclude)

    fits, dips, _, _ = resolve_cross_dips(
        g,
        refit,
        fit.fits,
        radius_m=radius,
        min_angle_deg=st.min_line_angle_deg,
        crossings=crossings,
        tol=1e-6,
    )
    return dips, fits


def surface_cross_components(spec, z_grid, gathers, x_m, y_m):
    """Cross-line normal component q = -w.n of the gridded surface at each gather.

    The downward normal of z = f(x, y) is n = (f_x, f_y, -1) / sqrt(1 + |grad f|^2);
    q is its component along -w, w the gather's cross-line unit vector.
    NaN where the surface is not defined.
    """
    if spec.nx < 2 or spec.ny < 2:  # a one-row or one-column grid has no gradient across it
        return np.zeros(len(np.atleast_1d(x_m)))
    zy, zx = np.gradient(np.asarray(z_grid, float), -spec.cell_size_m, spec.cell_size_m)
    gx = bilinear(spec, zx, x_m, y_m)
    gy = bilinear(spec, zy, x_m, y_m)
    norm = np.sqrt(1.0 + gx * gx + gy * gy)
    w = gathers.cross_unit
    return -(w[:, 0] * gx + w[:, 1] * gy) / norm


def surface_data(points, reflector, boreholes=None):
    """Data of the surface: ok, finite points of the mapped reflector (+ boreholes, near-exact)."""
    ok = (points.status == "ok") & points.finite & np.isfinite(points.sigma_m)
    ok &= np.asarray(points.reflector).astype(str) == str(reflector)
    x, y, z, s = points.x_m[ok], points.y_m[ok], points.elevation_m[ok], points.sigma_m[ok]
    if boreholes is not None and len(boreholes):
        x = np.concatenate([x, boreholes.x_m])
        y = np.concatenate([y, boreholes.y_m])
        z = np.concatenate([z, boreholes.elevation_m])
        s = np.concatenate([s, boreholes.sigma_m])
    return x, y, z, s


def interpolate_step(
    points, spec, settings, method="kriging", boreholes=None, progress=None, corridor=None, variogram_starts=None
):
    """Grid the reflector points (and boreholes, as near-exact data); a single line's within its corridor.

    ``variogram_starts`` (the ``variogram_fitted`` of an earlier surface of
    nearly the same points) refits each candidate variogram from there.
    Returns ``(SurfaceGrid, SurfaceDiagnostics)``.
    """
    x, y, z, s = surface_data(points, settings.reflector, boreholes)
    surface, diagnostics = grid_with_trend(
        x, y, z, s, spec, settings, method, progress, corridor=corridor, variogram_starts=variogram_starts
    )
    return surface, SurfaceDiagnostics.from_surface(diagnostics)


def single_line_corridor(fit: FitStep, settings):
    """The corridor of the mapped reflector's points when they lie along one straight line, else None.

    See :func:`~.surface.corridor.line_corridor`: a single line cannot tell
    its cross-line dip, so it maps a corridor of ``line_corridor_m`` (full
    width; default the median depth of its points) along the line.
    """
    pts = fit.points
    ok = (pts.status == "ok") & pts.finite & (np.asarray(pts.reflector).astype(str) == str(settings.reflector))
    return line_corridor(
        pts.x_m[ok],
        pts.y_m[ok],
        settings.line_corridor_m,
        pts.depth_m[ok],
        settings.line_cross_dip_deg,
        line=np.asarray(pts.line)[ok],
    )


def relocate_step(survey, fit, ground, spec, method, progress=None, tolerance_m=0.05, max_iterations=6, corridor=None):
    """Move reflector points to their 3D positions with the surface's cross-line dip.

    A line sees only the along-line component of the reflector normal. The
    cross-line component q is read off the gridded surface at each gather,
    the gathers are refitted with it (the exact 3D model then moves their
    points off the line's vertical plane, up-dip), the surface is regridded,
    and so on until no cell changes by more than ``tolerance_m``. A single
    line (``corridor`` given) has no cross-line dip to read: its points stay
    in the line's vertical plane and the surface is gridded once.

    The points move by centimetres from one iteration to the next, so after
    the first surface each candidate variogram model is refitted from its fit
    of the iteration before (one start, not the cold starts of the first
    surface; :func:`~.surface.variogram.fit_variogram`); the model is still
    chosen by cross-validation each time.

    Returns ``(fit, surface, diagnostics, history)``; ``history`` is a tuple of
    the largest cell change of each iteration (m).
    """
    progress = progress or NullProgress()
    if corridor is not None:
        surf, diag = interpolate_step(
            fit.points, spec, survey.settings, method, progress=SubProgress(progress, 0, 30), corridor=corridor
        )
        return fit, surf, diag, ()
    # the loop needs the surface's slope at the gathers, not every cell: a large grid is iterated on
    # at a coarser cell and gridded at full resolution once, from the relocated points
    work = relocation_grid(spec)
    surf, diag = interpolate_step(fit.points, work, survey.settings, method, progress=SubProgress(progress, 0, 30))
    history = []
    for it in range(max_iterations):
        check_cancel(progress)
        q = surface_cross_components(work, surf.z, fit.gathers, fit.points.x_m, fit.points.y_m)
        mapped = np.asarray(fit.gathers.reflector).astype(str) == str(survey.settings.reflector)
        q = np.where(np.isfinite(q) & mapped, q, 0.0)
        fit = fit_step(survey, cross_component=q, ground=ground, exclude=fit.fits.excluded, previous=fit)
        new, diag = interpolate_step(
            fit.points,
            work,
            survey.settings,
            method,
            progress=SubProgress(progress, 30 + 10 * it, 40 + 10 * it),
            variogram_starts=dict(diag.variogram_fitted) or None,
        )
        change = np.nanmax(np.abs(new.z - surf.z)) if np.any(np.isfinite(new.z - surf.z)) else 0.0
        history.append(float(change))
        surf = new
        if change < tolerance_m:
            break
    if work is not spec:
        surf, diag = interpolate_step(
            fit.points,
            spec,
            survey.settings,
            method,
            progress=SubProgress(progress, 95, 100),
            variogram_starts=dict(diag.variogram_fitted) or None,
        )
    return fit, surf, diag, tuple(history)


#: Largest grid the 3D relocation loop iterates on; a larger output grid is iterated on a coarser one.
RELOCATION_MAX_CELLS = 250_000


def relocation_grid(spec: GridSpec) -> GridSpec:
    """The grid the relocation loop iterates on: ``spec``, or one over its extent with cells k times larger.

    k is the smallest whole factor that brings the cells within
    :data:`RELOCATION_MAX_CELLS`; the output grid itself is interpolated once,
    after the loop.

    >>> relocation_grid(GridSpec(0.5, 99.5, 1.0, 100, 100)).cell_size_m  # 10,000 cells: itself
    1.0
    >>> g = relocation_grid(GridSpec(0.5, 999.5, 1.0, 1000, 1000))  # a million cells: k = 2
    >>> g.cell_size_m, g.shape, g.bounds == (0.0, 1000.0, 0.0, 1000.0)
    (2.0, (500, 500), True)
    """
    if spec.size <= RELOCATION_MAX_CELLS:
        return spec
    k = int(np.ceil(np.sqrt(spec.size / RELOCATION_MAX_CELLS)))
    cell = spec.cell_size_m * k
    w, _, _, n = spec.bounds
    nx, ny = -(-spec.nx // k), -(-spec.ny // k)
    return GridSpec(w + cell / 2, n - cell / 2, cell, nx, ny)


def borehole_check(points, boreholes, settings, diagnostics: SurfaceDiagnostics) -> BoreholeCheck:
    """Seismic-only surface at each borehole: estimate, sigma, residual (borehole - seismic).

    The surface is re-estimated at the boreholes with the trend and variogram
    of ``diagnostics`` (those of the seismic-only surface).
    """
    x, y, z, s = surface_data(points, settings.reflector)
    model = {"trend": diagnostics.trend, "variogram": diagnostics.variogram}  # what predict_with_trend reads
    est, std = predict_with_trend(x, y, z, s, model, settings, boreholes.x_m, boreholes.y_m)
    resid = boreholes.elevation_m - est
    total = np.sqrt(std**2 + boreholes.sigma_m**2)
    return BoreholeCheck(seismic_elevation_m=est, seismic_sigma_m=std, residual_m=resid, standardised=resid / total)


def grid_spec(survey, points, spread_m: float = float("nan")) -> GridSpec:
    """Output grid: covers the data the map is made from, plus a stated margin; never every station.

    The grid's extent is the bounding box of the mapped reflector's points and
    the boreholes, widened by :func:`~.survey.checks.grid_buffer_m` (half the
    median spread ``spread_m``, which a gather's picks reach around its point,
    plus 5 % of the larger side). Stations play no part: a station moved far
    away, or a line with no picks, cannot inflate the grid. The default cell is
    half the median nearest-neighbour distance of the reflector points rounded
    down to a 1-2-5 step (:meth:`GridSpec.from_data`), coarsened to the next
    step, with a warning, while the grid would exceed ``max_grid_cells``; a
    ``cell_size_m`` that would exceed it is refused before any array is made.

    Raises
    ------
    SurveyConfigError
        A ``[processing] cell_size_m`` that needs more than ``max_grid_cells``
        cells (naming the survey file, the line and the key).
    GridError
        No cell size can be had from the reflector points.
    """
    s = survey.settings
    ok = np.isfinite(points.x_m) & np.isfinite(points.y_m)
    xs, ys = points.x_m[ok], points.y_m[ok]
    bh = survey.boreholes
    if bh is not None and len(bh):
        xs, ys = np.concatenate([xs, bh.x_m]), np.concatenate([ys, bh.y_m])
    buffer_m = grid_buffer_m(max(float(np.ptp(xs)), float(np.ptp(ys))), spread_m)
    cell = s.cell_size_m
    if cell is None:
        cell = GridSpec.from_data(points.x_m[ok], points.y_m[ok]).cell_size_m  # from the points' spacing
        spec = GridSpec.from_data(xs, ys, cell_size_m=cell, pad_m=buffer_m, max_cells=2**62)
        while spec.size > s.max_grid_cells:  # only arithmetic so far: no array of that size is made
            new = next_nice_step(cell)
            warnings.warn(
                f"a {cell:g} m cell would need {spec.size:,} cells (> max_grid_cells = {s.max_grid_cells:,}); "
                f"using {new:g} m cells. Give [processing] cell_size_m to choose yourself.",
                RockheadWarning,
                stacklevel=2,
            )
            cell = new
            spec = GridSpec.from_data(xs, ys, cell_size_m=cell, pad_m=buffer_m, max_cells=2**62)
        return spec
    try:
        return GridSpec.from_data(xs, ys, cell_size_m=cell, pad_m=buffer_m, max_cells=s.max_grid_cells)
    except GridError as err:
        raise settings_error(survey, "cell_size_m", f"{err}, or raise max_grid_cells") from err


def settings_error(survey, key: str, message: str) -> SurveyConfigError:
    """A :class:`SurveyConfigError` naming survey.toml, the line of ``[processing] key`` and the key."""
    return SurveyConfigError(survey.path, _key_line(survey.path, "processing", key), f"processing.{key}", message)


def _key_line(path, table: str, key: str) -> Optional[int]:
    """1-based line of ``key = ...`` inside ``[table]`` of a TOML file (None when not found)."""
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError):
        return None
    current = None
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if line.startswith("[") and "]" in line:
            current = line[1 : line.index("]")].strip().strip("\"'")
        elif current == table and re.match(rf"([\"']?){re.escape(key)}\1\s*=", line):
            return number
    return None


def ground_model(survey):
    """Ground elevation callable: the DEM if the survey names one, else the stations."""
    if survey.settings.dem is not None:
        return GroundModel.from_raster(survey.settings.dem, survey.crs)
    st = survey.stations
    return GroundModel.from_stations(st.x_m, st.y_m, st.z_m)


def tomography_step(
    survey,
    fit,
    start,
    spec,
    forced=False,
    progress=None,
    corridor=None,
    site=None,
    ground=None,
    boreholes_all=None,
    conditioning=True,
) -> TomographyOutcome:
    """Joint estimate from every pick of every reflector: layered overburden, interfaces, velocities.

    The reflectors are layered top down (``[processing] layers``, else by the
    median t0 of their gathers, :func:`~.overburden.layer_order`); every depth
    the boreholes logged (``boreholes_all``, all reflectors; else those of the
    mapped reflector in ``survey``) is a datum with its sigma; the gather fits start the model through Dix interval
    velocities (:mod:`.tomography.start`) and :func:`~.tomography.layered.estimate_layered`
    does the rest. The surface of the mapped reflector is the posterior mean
    at every output cell, its std the posterior standard deviation (not
    re-kriged). ``start`` (the kriged gather fits) is only compared with it;
    ``site`` (:func:`site_velocity`) flags curved-reflector gathers. Returns an
    outcome with its ``skipped_reason`` (auto mode) when the picks do not
    support it; raises InversionError when the method was asked for explicitly.
    With ``conditioning`` false the outcome's ``variogram`` (what a conditional
    simulation of the joint estimate needs, :func:`tomography_conditioning`)
    is left out: :func:`compute` adds it only where the joint estimate makes the map.
    """
    f, g = fit.fits, fit.gathers
    st = survey.settings
    labels = np.asarray(g.reflector).astype(str)
    mapped = labels == str(st.reflector)
    if site is None:
        site = site_velocity(fit, st.reflector)
    v_site, v_spread, n_v = site.velocity_m_s, site.spread_m_s, site.n_gathers
    use = ~f.excluded
    why = None
    if np.sum(use & mapped[g.gather]) < 200:
        why = f"only {int(np.sum(use & mapped[g.gather]))} picks of the mapped reflector (at least 200 needed)"
    elif n_v < 5:
        why = f"only {n_v} usable gathers for a starting velocity (at least 5 needed)"
    if why is None:
        why = tomography_size_reason(int(np.sum(use)), spec.nx, spec.ny)
    if why:
        if forced:
            raise settings_error(
                survey,
                "surface_method",
                f'the joint estimate cannot run on this survey: {why}; use surface_method = "kriging" or "auto"',
            )
        return TomographyOutcome.skipped(why)
    pick_labels = labels[g.gather]
    present = set(pick_labels[use].tolist())
    order = reflector_order(pick_labels[use], g.time_s[use], [x for x in layer_order(fit, st) if x in present])
    use &= np.isin(pick_labels, order)
    start_model = start_from_gathers(GatherPoints.from_fit(g, f, fit.points), order)
    bh = survey.boreholes
    ties = layered_ties(boreholes_all if boreholes_all is not None else bh, order, str(st.reflector))
    res = estimate_layered(
        g.source_xyz[use],
        g.receiver_xyz[use],
        g.time_s[use],
        g.sigma_s[use],
        pick_labels[use],
        start_model,
        spec,
        order=order,
        boreholes=ties,
        settings=LayeredSettings.from_settings(st),
        ground=ground,
        progress=progress,
        line=np.asarray(g.line)[g.gather][use],
    )
    k = res.index(st.reflector)
    z, std, mask = res.elevation_m[k], res.sigma_m[k], res.mask[k]
    if corridor is not None:  # a single line: only its corridor (its cross-line dip is unknown)
        mask = mask | corridor.outside(spec)
        z, std = np.where(mask, np.nan, z), np.where(mask, np.nan, std)
    surface = SurfaceGrid(spec, z, std, mask, "tomography", int(np.sum(res.used)))
    # the hand-off's conditional simulations krige points: the joint estimate read at the gathers'
    # reflector points with its posterior sigma, and the boreholes (the map itself is not re-kriged)
    pts = fit.points
    sel = mapped & (f.status == "ok") & pts.finite
    x, y = pts.x_m[sel], pts.y_m[sel]
    zz = bilinear(spec, res.elevation_unmasked_m[k], x, y)
    ss = bilinear(spec, res.sigma_unmasked_m[k], x, y)
    keep = np.isfinite(zz) & np.isfinite(ss)
    if int(keep.sum()) < 3:  # the inversion left no usable value or sigma at the points: degrade, do not fail
        why = (
            f"the joint inversion gave a usable elevation and sigma at only {int(keep.sum())} of {len(keep)} "
            "reflector points"
        )
        if forced:
            raise InversionError(f'{why}; use surface_method = "kriging" or "auto"')
        return TomographyOutcome.skipped(why)
    x, y, zz, ss = x[keep], y[keep], zz[keep], ss[keep]
    if bh is not None and len(bh):
        x, y = np.concatenate([x, bh.x_m]), np.concatenate([y, bh.y_m])
        zz, ss = np.concatenate([zz, bh.elevation_m]), np.concatenate([ss, bh.sigma_m])
    flag, reason = curvature_flags(f.velocity_m_s, f.se_velocity_m_s, v_site, v_spread)
    return TomographyOutcome(
        surface=surface,
        inversion=res,
        curvature_flag=flag & (f.status == "ok") & mapped,
        curvature_reason=reason,
        difference_m=surface.z - start.z,
        variogram=model_with_trend(x, y, zz, ss, st, corridor=corridor)["variogram"] if conditioning else None,
        kriged_data=(x, y, zz, ss),  # the joint estimate at the points (for conditional simulation)
        used=use,
    )


def tomography_conditioning(outcome: TomographyOutcome, settings, corridor=None) -> TomographyOutcome:
    """The outcome with the variogram of its ``kriged_data`` (after their trend), for conditional simulations.

    The same model :func:`tomography_step` gives with ``conditioning`` (no grid
    is made: :func:`~.surface.trend.model_with_trend`); an outcome that has one,
    or was skipped, is returned as it is.
    """
    if outcome.kriged_data is None or outcome.variogram is not None:
        return outcome
    x, y, zz, ss = outcome.kriged_data
    return replace(outcome, variogram=model_with_trend(x, y, zz, ss, settings, corridor=corridor)["variogram"])


def tomography_size_reason(n_picks: int, nx: int, ny: int) -> Optional[str]:
    """Why the joint estimate is too large to run (None when it is within its stated limits).

    Parameters
    ----------
    n_picks : int
        Picks it would invert.
    nx, ny : int
        Its grid (the output grid).

    Returns
    -------
    str or None
        The reason, naming the limit (:data:`TOMOGRAPHY_MAX_PICKS`,
        :data:`TOMOGRAPHY_MAX_CELLS`).

    Examples
    --------
    >>> tomography_size_reason(5000, 300, 300) is None
    True
    >>> tomography_size_reason(500_000, 100, 100)
    '500,000 picks of the mapped reflector, more than its stated limit of 100,000'
    """
    if n_picks > TOMOGRAPHY_MAX_PICKS:
        return f"{n_picks:,} picks of the mapped reflector, more than its stated limit of {TOMOGRAPHY_MAX_PICKS:,}"
    if nx * ny > TOMOGRAPHY_MAX_CELLS:
        return (
            f"a grid of {nx} x {ny} = {nx * ny:,} cells, more than its stated limit of {TOMOGRAPHY_MAX_CELLS:,} "
            "(a larger cell_size_m gives fewer)"
        )
    return None


def compute(survey, method: Optional[str] = None, progress=None) -> RunResult:
    """Run the science of the whole job (no files written).

    Parameters
    ----------
    survey : Survey
        As read by :func:`~.survey.config.load_survey`.
    method : str, optional
        Surface method, one of :data:`SURFACE_METHODS`; default the survey's
        ``surface_method``.
    progress : object, optional
        Progress sink (``set_progress``, ``is_canceled``, ``info``).

    Returns
    -------
    RunResult
        Built once, at the end, from the steps' results.

    Raises
    ------
    InversionError
        Unknown method, fewer than 3 usable gathers, an unknown reflector, or a
        joint inversion asked for that the survey cannot support.
    CancelledError
        When ``progress`` asks to cancel.
    """
    progress = progress or NullProgress()
    settings = survey.settings
    method = method or settings.surface_method
    if method not in SURFACE_METHODS:
        raise InversionError(f"surface method {method!r} is unknown; choose one of {', '.join(SURFACE_METHODS)}")
    ground = ground_model(survey)
    progress.info("fitting gathers")
    fit = fit_step(survey, SubProgress(progress, 0, 10), ground=ground)
    n_ok = int(np.sum(fit.fits.status == "ok"))
    if n_ok < 3:
        reasons, counts = np.unique(
            np.asarray(fit.fits.reason)[fit.fits.status != "ok"].astype(str), return_counts=True
        )
        top = ", ".join(f"{printable(r, 80)} ({c})" for r, c in sorted(zip(reasons, counts), key=lambda rc: -rc[1])[:3])
        raise InputFileError(
            survey.files.get("picks"),
            None,
            None,
            f"only {n_ok} of {len(fit.fits)} gathers gave a usable fit; a surface needs at least 3. Reasons of the "
            f"others: {top}",
        )
    survey_all = replace(survey, settings=replace(settings, reflector=mapped_reflector(fit, settings)))
    settings = survey_all.settings
    picked = tuple(sorted(set(np.asarray(fit.gathers.reflector).astype(str).tolist())))
    # the mapped reflector's boreholes (depth_m, or its depth_<label>_m column) feed the map's steps;
    # survey_all keeps every reflector the boreholes logged, for the other interfaces
    survey = replace(survey_all, boreholes=mapped_boreholes(survey_all.boreholes, settings.reflector, picked))
    notes = []
    dix = dix_table(fit)
    cmp = None
    if settings.gather == "cmp":
        progress.info("common-midpoint velocity analysis")
        cmp = cmp_step(survey, fit)
    if len(set(np.asarray(fit.gathers.reflector).tolist())) > 1:
        notes.append(
            f"several reflectors picked: mapping reflector '{settings.reflector}' (set [processing] reflector "
            "to choose); its depth comes from its own fit, whose velocity is the rms velocity of the layers "
            "above (Dix 1955), so it overstates the depth by about V_rms/V_average; the dix_intervals layer "
            "gives interval velocities and layered depths under each shot"
        )
    progress.info("combining crossing lines into true dip and strike")
    dips, _ = dips_step(survey, fit)
    check_cancel(progress)
    mapped = np.asarray(fit.gathers.reflector).astype(str) == settings.reflector
    spread = float(np.median(fit.gathers.spread_length_m[mapped])) if mapped.any() else float("nan")
    spec = grid_spec(
        survey, fit.points.select(np.asarray(fit.points.reflector).astype(str) == settings.reflector), spread
    )
    corridor = single_line_corridor(fit, settings)
    if corridor is not None:
        text = (
            f"the points of reflector '{settings.reflector}' lie along one straight line: its cross-line dip is "
            f"unknown. The map covers a corridor {corridor.width_m:.1f} m wide along the line ([processing] "
            "line_corridor_m), level across the line, its sigma allowing for a cross-line dip of up to "
            f"{corridor.cross_dip_deg:g} degrees ([processing] line_cross_dip_deg, an assumption: check it "
            "against the geology and borings); the reflector points are placed in the line's vertical plane, "
            "where the true reflection points may lie to one side by up to the depth times the sine of the "
            "cross-line dip"
        )
        warnings.warn(text, RockheadWarning, stacklevel=2)
        notes.append(text)
    interp = "spline" if method == "spline" else "kriging"
    progress.info(f"gridding the reflector ({interp}) with 3D relocation")
    fit, seismic_surface, seismic_diag, history = relocate_step(
        survey, fit, ground, spec, interp, SubProgress(progress, 10, 50), corridor=corridor
    )
    misties = line_misties(fit.frames, fit.points)
    bh = survey.boreholes
    check = ratio = None
    if bh is not None and len(bh):
        check = borehole_check(fit.points, bh, settings, seismic_diag)
        ratio = borehole_depth_ratio(check, bh)
        if settings.calibrate_velocity:
            fit = calibrate_fit(fit, ratio.factor, ground)
            notes.append(
                f"velocities scaled by the borehole calibration factor {ratio.factor:.4f} ± "
                f"{ratio.sigma_factor:.4f} (calibrate_velocity = true); the borehole check above "
                "is from the uncalibrated seismic surface"
            )
        kriged_surface, kriged_diag = interpolate_step(
            fit.points,
            spec,
            settings,
            interp,
            boreholes=bh,
            progress=SubProgress(progress, 50, 60),
            corridor=corridor,
        )
    else:
        kriged_surface, kriged_diag = seismic_surface, seismic_diag
    site = site_velocity(fit, settings.reflector)  # once: the joint inversion's start and the report's value
    surface, method_used = kriged_surface, interp
    tomography = None
    if method in ("auto", "tomography"):
        progress.info("joint inversion of all picks (reflection traveltime tomography)")
        tomography = tomography_step(
            survey,
            fit,
            kriged_surface,
            spec,
            method == "tomography",
            SubProgress(progress, 60, 95),
            corridor=corridor,
            site=site,
            ground=ground,
            boreholes_all=survey_all.boreholes,
            conditioning=False,  # added below where the joint estimate makes the map
        )
        layers = tomography.inversion.names if tomography.inversion is not None else ()
        if tomography.surface is None or tomography.curvature_flag is None:  # skipped (see its reason)
            notes.append(f"joint inversion skipped: {tomography.skipped_reason}; surface by {interp}")
        elif method == "tomography" or np.any(tomography.curvature_flag) or len(layers) > 1:
            surface, method_used = tomography.surface, "tomography"
            if method == "auto" and len(layers) > 1:
                notes.append(
                    f"{len(layers)} reflectors picked ({', '.join(layers)}): the gather fits' velocities are rms "
                    "velocities of the layers above, so the surface comes from the joint estimate of the layered "
                    "overburden from all picks"
                )
            elif method == "auto":
                notes.append(
                    f"{int(np.sum(tomography.curvature_flag))} gathers depart from the site velocity beyond their "
                    "error (reflector curvature): the surface comes from the joint inversion of all picks"
                )
            tomography = tomography_conditioning(tomography, settings, corridor)
        else:
            notes.append(
                "no gather departs from the site velocity beyond its error (the reflector is planar at the "
                f"scale of a spread): the surface is the {interp} of the gather fits; the joint inversion is "
                "reported as a cross-check"
            )
    if not np.any(~surface.mask):
        message = (
            f"no cell of the {spec.nx} x {spec.ny} grid lies within the masking distance of a reflector "
            "point, so the map would be empty"
        )
        if settings.max_distance_m is not None:
            raise settings_error(survey, "max_distance_m", f"{message}: give a larger max_distance_m (m)")
        raise InversionError(f"{message}; set [processing] max_distance_m (m)")
    try:
        maps = products_step(spec, surface, ground, settings, fit.points)
    except OutputError as err:  # a contour interval giving more levels than a map can hold
        raise settings_error(survey, "contour_interval_m", str(err)) from err
    overburden = overburden_step(survey_all, fit, spec, ground, maps, surface, dix, tomography, corridor, check)
    notes.extend(overburden.notes if len(overburden.order) > 1 else ())
    progress.set_progress(100)
    return RunResult(
        survey=survey,
        fit=fit,
        ground=ground,
        spec=spec,
        site_velocity=site,
        dips=dips,
        misties=misties,
        seismic_surface=seismic_surface,
        seismic_diagnostics=seismic_diag,
        kriged_surface=kriged_surface,
        kriged_diagnostics=kriged_diag,
        surface=surface,
        method_used=method_used,
        ground_grid_m=maps.ground_grid_m,
        depth_m=maps.depth_m,
        contours=maps.contours,
        surface_dips=maps.surface_dips,
        ground_sigma_m=maps.ground_sigma_m,
        depth_sigma_m=maps.depth_sigma_m,
        ground_buffer_m=maps.ground_buffer_m,
        overburden=overburden,
        dix=dix,
        relocation_history_m=history,
        borehole_check=check,
        depth_ratio=ratio,
        tomography=tomography,
        cmp=cmp,
        corridor=corridor,
        notes=tuple(notes),
    )


def mapped_reflector(fit, settings) -> str:
    """The reflector label to map: the one asked for, the only one, the last of ``layers``, or the deepest.

    The deepest is the one with the latest median t0 of its ok gathers.
    """
    labels = np.asarray(fit.gathers.reflector).astype(str)
    names = sorted(set(labels.tolist()))
    if settings.reflector is not None:
        if str(settings.reflector) not in names:
            raise InversionError(
                f"[processing] reflector = {settings.reflector!r} has no picks; the picks name {', '.join(names)}"
            )
        return str(settings.reflector)
    if len(names) == 1:
        return names[0]
    if settings.layers:
        return str(settings.layers[-1])
    ok = fit.fits.status == "ok"
    t0 = {n: np.nanmedian(np.where(ok & (labels == n), fit.fits.t0_s, np.nan)) for n in names}
    return max(names, key=lambda n: (np.nan_to_num(t0[n], nan=-1.0), n))


def ground_buffer(settings, points) -> float:
    """How far beyond the stations depth is given (m): ``ground_buffer_m``, default half the median depth.

    The median is over the ok points of the mapped reflector; 0 when none has a depth.
    """
    if settings.ground_buffer_m is not None:
        return float(settings.ground_buffer_m)
    ok = (points.status == "ok") & (np.asarray(points.reflector).astype(str) == str(settings.reflector))
    d = points.depth_m[ok]
    d = d[np.isfinite(d) & (d > 0)]
    return 0.5 * float(np.median(d)) if len(d) else 0.0


def products_step(spec: GridSpec, surface: SurfaceGrid, ground, settings, points=None) -> MapProducts:
    """Depth below ground, its sigma, contours and surface dip symbols of the final surface.

    Depth is given only where the ground is known (:meth:`GroundModel.sigma_m`):
    on a DEM, or within the stations' outline plus a buffer (:func:`ground_buffer`
    of the reflector ``points``; none without them), where the flat extension
    of the stations' ground carries a standard deviation growing with the
    distance; the depth sigma combines it with the surface's.
    """
    cx, cy = np.meshgrid(spec.x_centres, spec.y_centres)
    ground_grid_m = np.asarray(ground(cx, cy), float)
    buffer_m = ground_buffer(settings, points) if points is not None else float(settings.ground_buffer_m or 0.0)
    ground_sigma_m = np.asarray(ground.sigma_m(cx, cy, buffer_m), float)
    z = np.where(surface.mask, np.nan, surface.z)
    depth_m = np.where(np.isfinite(ground_sigma_m), ground_grid_m - z, np.nan)
    depth_sigma_m = np.where(np.isfinite(depth_m), np.hypot(surface.std, ground_sigma_m), np.nan)
    contours = contours_layer(
        spec.x_centres,
        spec.y_centres,
        elevation_m=z,
        depth_m=depth_m,
        elevation_interval_m=settings.contour_interval_m,
        depth_interval_m=settings.contour_interval_m,
        index_every=settings.index_contour_every,
    )
    extent = max(spec.nx, spec.ny) * spec.cell_size_m
    spacing = max(spec.cell_size_m * 2, nice_step(extent / 5.0))
    sdips = surface_dips(spec.x_centres, spec.y_centres, z, spacing, mask=~surface.mask)
    return MapProducts(
        ground_grid_m=ground_grid_m,
        ground_sigma_m=ground_sigma_m,
        ground_buffer_m=buffer_m,
        depth_m=depth_m,
        depth_sigma_m=depth_sigma_m,
        contours=contours,
        surface_dips=sdips,
    )
