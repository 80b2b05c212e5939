"""The whole job: survey files in, map layers, rasters and a report out.

Data flow (one way)::

    load_survey -> build_gathers -> fit_shot_gathers -> reflector_points
      -> combine_lines (true dip at crossings), line_misties
      -> surface (kriging or spline; 3D relocation loop) -> borehole check
      -> joint inversion of all picks (curved reflectors) where supported
      -> depth grid, contours, surface dips -> GeoPackage, GeoTIFF, DXF, CSV, report

:func:`compute` does the science and returns a :class:`RunResult`;
:func:`write_outputs` writes it, every file staged and renamed only at the end
(:class:`~.atomic.OutputSet`), so a failure leaves earlier outputs untouched;
:func:`run` does both. The step functions are public so that the QGIS
algorithms can call one step at a time.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Optional

import numpy as np

from .errors import InversionError
from .geometry import build_gathers, line_frames, reflector_points
from .inversion import fit_shot_gathers
from .progress import NullProgress, SubProgress, check_cancel
from .surface import GridSpec, interpolate_surface

NODE_CELLS = 2  # tomography node spacing in output cells
SURFACE_METHODS = ("auto", "kriging", "spline", "tomography")
OUTPUT_NAMES = ("survey.gpkg", "reflector_elevation.tif", "reflector_depth.tif", "depth_sigma.tif",
                "report.html", "contours_elevation.dxf", "contours_depth.dxf")

__all__ = ["FitStep", "RunResult", "compute", "fit_step", "run", "write_outputs"]


@dataclass
class FitStep:
    """Gathers, their fits and the georeferenced points of one survey."""

    frames: dict
    gathers: object
    fits: object
    points: object  # zero-offset reflector points (one per gather)
    receiver_points: object  # reflection point of every pick


@dataclass
class RunResult:
    """Everything :func:`compute` found; :func:`write_outputs` turns it into files.

    Grids are on ``spec`` (north-up, row 0 north). ``seismic_surface`` is the
    seismic-only surface after the 3D relocation loop (used for the
    independent borehole check), ``kriged_surface`` the same data plus the
    boreholes, ``surface`` the final one (``method_used`` says which method
    made it: "kriging", "spline" or "tomography").
    """

    survey: object
    fit: FitStep
    ground: object = None
    spec: object = None
    dips: object = None
    misties: object = None
    seismic_surface: object = None
    seismic_diag: dict = None
    kriged_surface: object = None
    kriged_diag: dict = None
    tomography: dict = None
    surface: object = None
    method_used: str = ""
    ground_grid_m: np.ndarray = None
    depth_m: np.ndarray = None
    contours: object = None
    surface_dips: object = None
    borehole_check: dict = None
    depth_ratio: dict = None
    dix: dict = None
    cmp: dict = None
    relocation_history_m: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    outputs: list = field(default_factory=list)

    def summary(self) -> str:
        f = self.fit.fits
        n_ok = int(np.sum(f.status == "ok"))
        lines = [
            f"{self.survey.name}: {len(f)} gathers fitted ({n_ok} ok, {len(f) - n_ok} flagged), "
            f"{int(f.picks_rejected.sum())} of {len(f.residual_s)} picks rejected",
        ]
        if self.surface is not None:
            est = int(np.sum(~self.surface.mask))
            lines.append(f"surface by {self.method_used}: {est} of {self.surface.mask.size} cells of "
                         f"{self.spec.cell_size_m:g} m estimated")
        if self.outputs:
            lines.append(f"wrote {len(self.outputs)} files to {Path(self.outputs[0]).parent}")
        return "\n".join(lines + self.notes)


def fit_step(survey, progress=None, exclude=None, cross_component=None, ground=None) -> FitStep:
    """Fit every gather of the survey and place its reflector points in 3D."""
    progress = progress or NullProgress()
    frames = line_frames(survey.stations, path=survey.files.get("stations"))
    gathers = build_gathers(survey, frames=frames)
    check_cancel(progress)
    fits = fit_shot_gathers(
        gathers, survey.settings, cross_component=cross_component, exclude=exclude, progress=progress
    )
    pts = reflector_points(gathers, fits, ground=ground)
    zero = pts.select(pts.kind == "zero_offset")
    recv = pts.select(pts.kind == "receiver")
    return FitStep(frames, gathers, fits, zero, recv)


def _bilinear(spec, grid, x_m, y_m):
    """Bilinear sample of a north-up grid (NaN outside or next to NaN cells)."""
    from scipy.ndimage import map_coordinates

    col = (np.asarray(x_m, float) - spec.x0) / spec.cell_size_m
    row = (spec.y0 - np.asarray(y_m, float)) / spec.cell_size_m
    return map_coordinates(np.asarray(grid, float), [row, col], order=1, mode="constant", cval=np.nan)


def surface_cross_components(spec, z_grid, gathers, x_m, y_m):
    """Cross-line normal component q = -w.n of the gridded surface at each gather.

    The downward normal of z = f(x, y) is n = (f_x, f_y, -1) / sqrt(1 + |grad f|^2);
    q is its component along -w, w the gather's cross-line unit vector.
    NaN where the surface is not defined.
    """
    zy, zx = np.gradient(np.asarray(z_grid, float), -spec.cell_size_m, spec.cell_size_m)
    gx = _bilinear(spec, zx, x_m, y_m)
    gy = _bilinear(spec, zy, x_m, y_m)
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


@dataclass(frozen=True)
class PlaneTrend:
    """A regional plane z = a + b (x - x0) + c (y - y0) fitted by weighted least squares.

    A dipping reflector is a trend, not a stationary random field: its
    experimental variogram grows like the square of the lag and no bounded
    model fits it. Kriging the residuals from the plane (residual kriging
    with a linear drift; Journel & Huijbregts 1978, ch. V) gives a variogram
    that levels off and an honest standard deviation. ``coef`` = (a, b, c),
    weights 1/sigma^2.
    """

    x0: float
    y0: float
    coef: tuple

    @classmethod
    def fit(cls, x, y, z, sigma):
        x0, y0 = float(np.mean(x)), float(np.mean(y))
        w = 1.0 / np.maximum(np.asarray(sigma, float), 1e-3)
        a = np.column_stack([np.ones_like(x), x - x0, y - y0]) * w[:, None]
        coef = np.linalg.lstsq(a, z * w, rcond=None)[0]
        return cls(x0, y0, tuple(float(c) for c in coef))

    def __call__(self, x, y):
        a, b, c = self.coef
        return a + b * (np.asarray(x, float) - self.x0) + c * (np.asarray(y, float) - self.y0)


class _NoTrend:
    coef = (0.0, 0.0, 0.0)

    def __call__(self, x, y):
        return np.zeros(np.broadcast(np.asarray(x), np.asarray(y)).shape)


def _trend(settings, x, y, z, s):
    return PlaneTrend.fit(x, y, z, s) if settings.trend == "linear" and len(x) >= 3 else _NoTrend()


def grid_with_trend(x, y, z, s, spec, settings, method="kriging", progress=None):
    """Interpolate (x, y, z) with sigma s onto ``spec``: trend removed, residuals gridded, trend added back.

    With ``variogram_model = "auto"`` the surface module fits each model and
    keeps the one with the best leave-one-out mean logarithmic score (a
    proper scoring rule: small residuals *and* honest standard deviations;
    Gneiting & Raftery 2007). Returns
    ``(SurfaceGrid, diagnostics)``; the diagnostics carry the ``trend``, the
    ``variogram_scores`` and a cross-validation expressed in elevations.
    """
    from .surface import SurfaceGrid

    trend = _trend(settings, x, y, z, s)
    surf, diag = interpolate_surface(
        x, y, z - trend(x, y), s, spec, method=method, neighbours=settings.neighbours,
        variogram_model=settings.variogram_model, max_distance_m=settings.max_distance_m, progress=progress,
    )
    cx, cy = np.meshgrid(spec.x_centres, spec.y_centres)
    z_grid = np.where(surf.mask, np.nan, surf.z + trend(cx, cy))
    diag["trend"] = trend
    cv = diag.get("cross_validation")
    if cv is not None:
        idx = np.asarray(cv.index)
        diag["cross_validation"] = replace(cv, estimate=cv.estimate + trend(x[idx], y[idx]))
    return SurfaceGrid(spec, z_grid, surf.std, surf.mask, surf.method, surf.n_data), diag


def predict_with_trend(x, y, z, s, diag, settings, x_new, y_new):
    """Estimate and standard deviation at points, with the model and trend of ``diag``."""
    from .surface import OrdinaryKriging, ThinPlateSpline

    trend = diag.get("trend") or _NoTrend()
    r = z - trend(x, y)
    if diag.get("variogram") is not None:
        model = OrdinaryKriging(diag["variogram"], neighbours=settings.neighbours).fit(x, y, r, s**2)
    else:
        model = ThinPlateSpline("auto", neighbours=settings.neighbours).fit(x, y, r, s**2)
    est, std = model.predict(x_new, y_new)
    return est + trend(x_new, y_new), std


def interpolate_step(points, spec, settings, method="kriging", boreholes=None, progress=None):
    """Grid the reflector points (and boreholes, as near-exact data)."""
    x, y, z, s = surface_data(points, settings.reflector, boreholes)
    return grid_with_trend(x, y, z, s, spec, settings, method, progress)


def relocate_step(survey, fit, ground, spec, method, progress=None, tolerance_m=0.05, max_iterations=6):
    """Move reflector points to their 3D positions with the surface's cross-line dip.

    A line sees only the along-line component of the reflector normal. The
    cross-line component q is read off the gridded surface at each gather,
    the gathers are refitted with it (the exact 3D model then moves their
    points off the line's vertical plane, up-dip), the surface is regridded,
    and so on until no cell changes by more than ``tolerance_m``.

    Returns ``(fit, surface, diagnostics, history)``; ``history`` lists the
    largest cell change of each iteration.
    """
    progress = progress or NullProgress()
    surf, diag = interpolate_step(fit.points, spec, survey.settings, method, progress=SubProgress(progress, 0, 30))
    history = []
    for it in range(max_iterations):
        check_cancel(progress)
        q = surface_cross_components(spec, surf.z, fit.gathers, fit.points.x_m, fit.points.y_m)
        mapped = np.asarray(fit.gathers.reflector).astype(str) == str(survey.settings.reflector)
        q = np.where(np.isfinite(q) & mapped, q, 0.0)
        fit = fit_step(survey, cross_component=q, ground=ground, exclude=fit.fits.excluded)
        new, diag = interpolate_step(fit.points, spec, survey.settings, method,
                                     progress=SubProgress(progress, 30 + 10 * it, 40 + 10 * it))
        change = np.nanmax(np.abs(new.z - surf.z)) if np.any(np.isfinite(new.z - surf.z)) else 0.0
        history.append(float(change))
        surf = new
        if change < tolerance_m:
            break
    return fit, surf, diag, history


def borehole_check(points, boreholes, settings, diag):
    """Seismic-only surface at each borehole: estimate, sigma, residual (borehole - seismic)."""
    x, y, z, s = surface_data(points, settings.reflector)
    est, std = predict_with_trend(x, y, z, s, diag, settings, boreholes.x_m, boreholes.y_m)
    resid = boreholes.elevation_m - est
    total = np.sqrt(std**2 + boreholes.sigma_m**2)
    return {
        "seismic_elevation_m": est,
        "seismic_sigma_m": std,
        "residual_m": resid,
        "standardised": resid / total,
    }


def grid_spec(survey, points):
    """Output grid: covers stations and reflector points; cell from the point spacing.

    The default cell is half the median nearest-neighbour distance of the
    reflector points rounded down to a 1-2-5 step (:meth:`GridSpec.from_data`),
    not of the geophone stations, which are far denser than the reflector
    sampling of one point per gather.
    """
    ok = np.isfinite(points.x_m) & np.isfinite(points.y_m)
    cell = survey.settings.cell_size_m
    if cell is None:
        cell = GridSpec.from_data(points.x_m[ok], points.y_m[ok]).cell_size_m
    xs = np.concatenate([survey.stations.x_m, points.x_m[ok]])
    ys = np.concatenate([survey.stations.y_m, points.y_m[ok]])
    return GridSpec.from_data(xs, ys, cell_size_m=cell)


def ground_model(survey):
    """Ground elevation callable: the DEM if the survey names one, else the stations."""
    from .ground import GroundModel

    if survey.settings.dem is not None:
        return GroundModel.from_raster(survey.settings.dem, survey.crs)
    st = survey.stations
    return GroundModel.from_stations(st.x_m, st.y_m, st.z_m)


def _fill_nearest(grid):
    """Fill NaN cells with the value of the nearest finite cell."""
    from scipy.ndimage import distance_transform_edt

    bad = ~np.isfinite(grid)
    if not bad.any():
        return grid
    idx = distance_transform_edt(bad, return_distances=False, return_indices=True)
    return grid[tuple(idx)]


def tomography_step(survey, fit, start, spec, forced=False, progress=None):
    """Joint inversion of every pick for the surface and the velocity (Bishop et al. 1985).

    Starts from the gridded surface ``start`` and the robust site velocity of
    the gather fits; nodes every ``NODE_CELLS`` output cells. Returns
    ``{"skipped": reason}`` (auto mode) when the picks do not support it;
    raises InversionError when the method was asked for explicitly.
    """
    from .surface import SurfaceGrid
    from .tomography import curvature_flags, invert_reflector, robust_site_velocity

    f, g = fit.fits, fit.gathers
    mapped = np.asarray(g.reflector).astype(str) == str(survey.settings.reflector)
    v_site, v_spread, n_v = robust_site_velocity(f.velocity_m_s, f.se_velocity_m_s, (f.status == "ok") & mapped)
    use = ~f.excluded & mapped[g.gather]
    why = None
    if use.sum() < 200:
        why = f"only {int(use.sum())} picks of the mapped reflector (at least 200 needed)"
    elif n_v < 5:
        why = f"only {n_v} usable gathers for a starting velocity (at least 5 needed)"
    if why:
        if forced:
            raise InversionError(f"the joint inversion is not supported by this survey: {why}")
        return {"skipped": why}
    bh = survey.boreholes
    boreholes = None if bh is None or not len(bh) else (bh.x_m, bh.y_m, bh.elevation_m, bh.sigma_m)
    # nodes every NODE_CELLS output cells (row 0 south, as the tomography wants), covering the grid
    step = spec.cell_size_m * NODE_CELLS
    x_w, x_e, y_s, y_n = spec.bounds
    nx = int(np.ceil((x_e - x_w) / step)) + 1
    ny = int(np.ceil((y_n - y_s) / step)) + 1
    grid = (x_w, y_s, step, nx, ny)
    gx, gy = np.meshgrid(x_w + step * np.arange(nx), y_s + step * np.arange(ny))
    start_nodes = _bilinear(spec, _fill_nearest(start.z), gx, gy)
    start_nodes = _fill_nearest(np.where(np.isfinite(start_nodes), start_nodes, np.nan))
    res = invert_reflector(
        g.source_xyz[use], g.receiver_xyz[use], g.time_s[use], g.sigma_s[use], grid,
        start_nodes, v_site, boreholes=boreholes,
        robust_scale=survey.settings.robust_scale, reject_sigma=survey.settings.reject_sigma, progress=progress,
    )
    # Between the lines no pick constrains the surface; there the inversion's
    # penalty-interpolated values carry no usable sigma. So the inverted surface
    # is read at the gathers' reflector points (elevation and the nodes' posterior
    # sigma, bilinear) and those points are kriged with the boreholes onto the
    # output grid: the joint inversion corrects the curvature bias of each
    # gather's point, kriging interpolates between the lines with a standard
    # deviation, on the same data layout as the gather-fit surface.
    from .tomography import surface_values

    pts = fit.points
    sel = mapped & (f.status == "ok") & pts.finite & np.asarray(res.grid.contains(pts.x_m, pts.y_m))
    x, y = pts.x_m[sel], pts.y_m[sel]
    zz = surface_values(np.asarray(res.elevation_unmasked_m), x, y, grid)
    node_spec = GridSpec(x_w, y_s + (ny - 1) * step, step, nx, ny)
    ss = _bilinear(node_spec, np.asarray(res.sigma_m)[::-1], x, y)
    keep = np.isfinite(zz) & np.isfinite(ss)
    x, y, zz, ss = x[keep], y[keep], zz[keep], ss[keep]
    if boreholes is not None:
        x, y = np.concatenate([x, bh.x_m]), np.concatenate([y, bh.y_m])
        zz, ss = np.concatenate([zz, bh.elevation_m]), np.concatenate([ss, bh.sigma_m])
    surface, diag = grid_with_trend(x, y, zz, ss, spec, survey.settings)
    mask = surface.mask | start.mask
    z = np.where(mask, np.nan, surface.z)
    surface = SurfaceGrid(spec, z, np.where(mask, np.nan, surface.std), mask, "tomography",
                          int(np.sum(res.used & ~res.rejected)))
    flag, reason = curvature_flags(f.velocity_m_s, f.se_velocity_m_s, v_site, v_spread)
    return {
        "surface": surface,
        "result": res,
        "site_velocity_m_s": (v_site, v_spread, n_v),
        "curvature_flag": flag & (f.status == "ok") & mapped,
        "curvature_reason": reason,
        "difference_m": z - start.z,
        "kriging_diag": diag,
        "used": use,
    }


def compute(survey, method: Optional[str] = None, progress=None) -> RunResult:
    """Run the science of the whole job (no files written)."""
    from .geometry import line_misties
    from .structure import combine_lines

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
        raise InversionError(
            f"only {n_ok} of {len(fit.fits)} gathers gave a usable fit; a surface needs at least 3 "
            "(see the status and reason of each gather in the shots layer)"
        )
    survey = replace(survey, settings=replace(settings, reflector=mapped_reflector(fit, settings)))
    settings = survey.settings
    r = RunResult(survey, fit, ground=ground)
    r.dix = dix_table(fit)
    if settings.gather == "cmp":
        progress.info("common-midpoint velocity analysis")
        r.cmp = cmp_step(survey, fit)
    if len(set(np.asarray(fit.gathers.reflector).tolist())) > 1:
        r.notes.append(
            f"several reflectors picked: mapping reflector '{settings.reflector}' (set [processing] reflector "
            "to choose); its depth comes from its own fit, whose velocity is the rms velocity of the layers "
            "above (Dix 1955), so it overstates the depth by about V_rms/V_average; the dix_intervals layer "
            "gives interval velocities and layered depths under each shot"
        )
    progress.info("combining crossing lines into true dip and strike")
    r.dips = combine_lines(
        fit.gathers, fit.fits, radius_m=settings.combine_radius_m, min_angle_deg=settings.min_line_angle_deg
    )
    check_cancel(progress)
    r.spec = grid_spec(survey, fit.points.select(np.asarray(fit.points.reflector).astype(str) == settings.reflector))
    interp = "spline" if method == "spline" else "kriging"
    progress.info(f"gridding the reflector ({interp}) with 3D relocation")
    r.fit, r.seismic_surface, r.seismic_diag, r.relocation_history_m = relocate_step(
        survey, fit, ground, r.spec, interp, SubProgress(progress, 10, 50)
    )
    r.misties = line_misties(r.fit.frames, r.fit.points)
    bh = survey.boreholes
    if bh is not None and len(bh):
        r.borehole_check = borehole_check(r.fit.points, bh, settings, r.seismic_diag)
        r.depth_ratio = borehole_depth_ratio(r, bh)
        if settings.calibrate_velocity:
            k = r.depth_ratio["factor"]
            r.fit = calibrate_fit(r.fit, k, ground)
            r.notes.append(
                f"velocities scaled by the borehole calibration factor {k:.4f} ± "
                f"{r.depth_ratio['sigma_factor']:.4f} (calibrate_velocity = true); the borehole check above "
                "is from the uncalibrated seismic surface"
            )
        r.kriged_surface, r.kriged_diag = interpolate_step(
            r.fit.points, r.spec, settings, interp, boreholes=bh, progress=SubProgress(progress, 50, 60)
        )
    else:
        r.kriged_surface, r.kriged_diag = r.seismic_surface, r.seismic_diag
    r.surface, r.method_used = r.kriged_surface, interp
    if method in ("auto", "tomography"):
        progress.info("joint inversion of all picks (reflection traveltime tomography)")
        r.tomography = tomography_step(survey, r.fit, r.kriged_surface, r.spec, method == "tomography",
                                       SubProgress(progress, 60, 95))
        t = r.tomography
        if "surface" not in t:
            r.notes.append(f"joint inversion skipped: {t['skipped']}; surface by {interp}")
        elif method == "tomography" or np.any(t["curvature_flag"]):
            r.surface, r.method_used = t["surface"], "tomography"
            if method == "auto":
                r.notes.append(
                    f"{int(np.sum(t['curvature_flag']))} gathers depart from the site velocity beyond their "
                    "error (reflector curvature): the surface comes from the joint inversion of all picks"
                )
        else:
            r.notes.append(
                "no gather departs from the site velocity beyond its error (the reflector is planar at the "
                f"scale of a spread): the surface is the {interp} of the gather fits; the joint inversion is "
                "reported as a cross-check"
            )
    products_step(r)
    progress.set_progress(100)
    return r


def mapped_reflector(fit, settings) -> str:
    """The reflector label to map: the one asked for, the only one, or the deepest (latest median t0)."""
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
    ok = fit.fits.status == "ok"
    t0 = {n: np.nanmedian(np.where(ok & (labels == n), fit.fits.t0_s, np.nan)) for n in names}
    return max(names, key=lambda n: (np.nan_to_num(t0[n], nan=-1.0), n))


def dix_table(fit):
    """Dix (1955) interval velocities and thicknesses under every shot with several reflectors.

    Per (line, shot), the ok gathers of its reflectors give (t0, V) pairs; with
    V taken as the rms velocity (near-horizontal layers), :func:`dix_intervals`
    gives the layers between them. Returns a dict of columns (empty when no
    shot has two reflectors).
    """
    from .inversion import dix_intervals

    g, f = fit.gathers, fit.fits
    ok = f.status == "ok"
    cols = {k: [] for k in ("line", "shot", "reflector_top", "reflector_base", "x_m", "y_m", "t0_top_ms",
                            "t0_base_ms", "interval_velocity_m_s", "se_interval_velocity_m_s", "thickness_m",
                            "se_thickness_m", "depth_base_m", "status", "reason")}
    keys = np.array([f"{a}\x1f{b}" for a, b in zip(g.line, g.shot)], dtype=object)
    for key in sorted(set(keys[ok].tolist())):
        idx = np.flatnonzero((keys == key) & ok)
        if len(idx) < 2:
            continue
        d = dix_intervals(f.t0_s[idx], f.velocity_m_s[idx], f.se_t0_s[idx], f.se_velocity_m_s[idx])
        names = ["surface"] + [str(g.reflector[idx[j]]) for j in d.order]
        for row in range(len(d.order)):
            k = idx[d.order[row]]
            cols["line"].append(str(g.line[k]))
            cols["shot"].append(str(g.shot[k]))
            cols["reflector_top"].append(names[row])
            cols["reflector_base"].append(names[row + 1])
            cols["x_m"].append(g.source_xyz_g[k, 0])
            cols["y_m"].append(g.source_xyz_g[k, 1])
            cols["t0_top_ms"].append(d.t0_top_s[row] * 1e3)
            cols["t0_base_ms"].append(d.t0_base_s[row] * 1e3)
            cols["interval_velocity_m_s"].append(d.interval_velocity_m_s[row])
            cols["se_interval_velocity_m_s"].append(d.se_interval_velocity_m_s[row])
            cols["thickness_m"].append(d.thickness_m[row])
            cols["se_thickness_m"].append(d.se_thickness_m[row])
            cols["depth_base_m"].append(d.depth_base_m[row])
            cols["status"].append(str(d.status[row]))
            cols["reason"].append(str(d.reason[row]))
    return {k: np.array(v, dtype=object if k in ("line", "shot", "reflector_top", "reflector_base", "status",
                                                 "reason") else float) for k, v in cols.items()}


def cmp_step(survey, fit):
    """Common-midpoint velocity analysis of all picks (``gather = "cmp"``).

    Picks are sorted into midpoint bins along each line (per reflector) and
    each bin is fitted with t^2 = t0^2 + x^2 / Vnmo^2 (Levin 1971; along dip
    Vnmo = V / cos(dip)). The bin length defaults to the median shot spacing.
    ``depth_m`` = Vnmo t0 / 2 below the bin centre is a vertical, small-dip
    estimate; the map itself always comes from the exact 3D shot-gather fits.
    Returns a dict of columns (with ``x_m``, ``y_m`` of the bin centres).
    """
    from .inversion import cmp_bins, fit_cmp_gathers

    g = fit.gathers
    bin_m = survey.settings.cmp_bin_m
    if bin_m is None:
        spacing = []
        for line in sorted(set(np.asarray(g.line).tolist())):
            src = np.unique(g.source_xyz_g[np.asarray(g.line) == line][:, :2], axis=0)
            if len(src) > 1:
                d = np.hypot(*np.diff(src[np.argsort(src @ g.line_unit[np.asarray(g.line) == line][0])], axis=0).T)
                spacing.extend(d[d > 0].tolist())
        bin_m = float(np.median(spacing)) if spacing else float(np.median(g.spread_length_m)) / 4
    pick_line = np.asarray(g.line)[g.gather].astype(str)
    pick_refl = np.asarray(g.reflector)[g.gather].astype(str)
    group = np.char.add(np.char.add(pick_line, "\x1f"), pick_refl)
    gid, centres, offset = cmp_bins(g.source_xyz[:, :2], g.receiver_xyz[:, :2], bin_m, group=group)
    fits = fit_cmp_gathers(gid, offset, g.time_s, g.sigma_s, survey.settings)
    first = np.zeros(len(centres), dtype=int)
    first[gid[::-1]] = np.arange(len(gid))[::-1]
    return {
        "x_m": centres[:, 0],
        "y_m": centres[:, 1],
        "line": pick_line[first].astype(object),
        "reflector": pick_refl[first].astype(object),
        "t0_ms": fits.t0_s * 1e3,
        "nmo_velocity_m_s": fits.nmo_velocity_m_s,
        "se_t0_ms": fits.se_t0_s * 1e3,
        "se_nmo_velocity_m_s": fits.se_nmo_velocity_m_s,
        "depth_m": fits.nmo_velocity_m_s * fits.t0_s / 2,
        "rms_residual_ms": fits.rms_residual_s * 1e3,
        "picks_used": fits.picks_used.astype(np.int64),
        "picks_rejected": fits.picks_rejected.astype(np.int64),
        "status": fits.status.astype(object),
        "reason": fits.reason.astype(object),
        "bin_m": np.full(len(centres), bin_m),
    }


def borehole_depth_ratio(result, boreholes):
    """Borehole depth / seismic depth at the boreholes: a velocity calibration factor.

    Seismic depths scale with the overburden velocity (h = V t0 / 2), so the
    ratio of borehole to seismic-only depth estimates the factor by which
    the velocities would have to change to honour the boreholes. Reported
    always; applied only when ``calibrate_velocity`` is set (then the
    surface is tied to the boreholes through the scaled depths). Returns the
    inverse-variance weighted mean factor and its standard error.
    """
    chk = result.borehole_check
    ground_bh = boreholes.z_m
    seismic_depth = ground_bh - chk["seismic_elevation_m"]
    ratio = boreholes.depth_m / seismic_depth
    sig = ratio * np.hypot(chk["seismic_sigma_m"] / seismic_depth, boreholes.sigma_m / boreholes.depth_m)
    w = 1.0 / sig**2
    factor = float(np.sum(w * ratio) / np.sum(w))
    se = float(np.sqrt(1.0 / np.sum(w)))
    if len(ratio) > 1:
        chi2 = float(np.sum(w * (ratio - factor) ** 2) / (len(ratio) - 1))
        se *= max(1.0, np.sqrt(chi2))
    return {"ratio": ratio, "sigma": sig, "factor": factor, "sigma_factor": se, "n": len(ratio)}


def calibrate_fit(fit: FitStep, factor: float, ground) -> FitStep:
    """Scale every gather's velocity and normal distance by ``factor`` (t0 and dip unchanged).

    With t0 = 2h/V fixed by the picks, a velocity error scales h, and so
    every depth, by the same factor; the borehole/seismic depth ratio
    (:func:`borehole_depth_ratio`) estimates it. Standard errors and the
    (V, h) rows of the covariance scale with it.
    """
    f = fit.fits
    scale = np.array([factor, factor, 1.0])
    scaled = replace(
        f,
        velocity_m_s=f.velocity_m_s * factor,
        normal_distance_m=f.normal_distance_m * factor,
        se_velocity_m_s=f.se_velocity_m_s * factor,
        se_normal_distance_m=f.se_normal_distance_m * factor,
        covariance=f.covariance * scale[None, :, None] * scale[None, None, :],
    )
    pts = reflector_points(fit.gathers, scaled, ground=ground)
    return FitStep(fit.frames, fit.gathers, scaled, pts.select(pts.kind == "zero_offset"),
                   pts.select(pts.kind == "receiver"))


def products_step(r: RunResult) -> None:
    """Depth below ground, contours and surface dip symbols of the final surface."""
    from .contours import contours_layer
    from .structure import surface_dips

    spec, st = r.spec, r.survey.settings
    cx, cy = np.meshgrid(spec.x_centres, spec.y_centres)
    r.ground_grid_m = np.asarray(r.ground(cx, cy), float)
    z = np.where(r.surface.mask, np.nan, r.surface.z)
    r.depth_m = r.ground_grid_m - z
    r.contours = contours_layer(
        spec.x_centres, spec.y_centres, elevation_m=z, depth_m=r.depth_m,
        elevation_interval_m=st.contour_interval_m, depth_interval_m=st.contour_interval_m,
        index_every=st.index_contour_every,
    )
    extent = max(spec.nx, spec.ny) * spec.cell_size_m
    spacing = max(spec.cell_size_m * 2, _nice_step(extent / 5.0))
    r.surface_dips = surface_dips(spec.x_centres, spec.y_centres, z, spacing, mask=~r.surface.mask)


def _nice_step(value):
    """Largest 1-2-5 step not above ``value``."""
    e = 10.0 ** np.floor(np.log10(value))
    return float(max(m * e for m in (1, 2, 5) if m * e <= value))


def write_outputs(result: RunResult, out_dir, progress=None) -> list:
    """Write every output of ``result`` into ``out_dir`` (atomically, as one set)."""
    from . import outputs

    return outputs.write_all(result, out_dir, progress or NullProgress())


def run(survey_path, out_dir, method: Optional[str] = None, progress=None) -> RunResult:
    """Read the survey, run the whole job and write every output into ``out_dir``."""
    from .atomic import check_output_dir
    from .inputs import load_survey

    progress = progress or NullProgress()
    survey = load_survey(survey_path)
    inputs = [Path(p) for p in survey.files.values() if p is not None] + [Path(survey_path)]
    check_output_dir(out_dir, inputs, OUTPUT_NAMES)
    result = compute(survey, method=method, progress=SubProgress(progress, 0, 85))
    result.outputs = write_outputs(result, Path(out_dir), SubProgress(progress, 85, 100))
    return result
