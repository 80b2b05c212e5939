r"""Every interface of a layered overburden: order, maps with sigma, interval velocities, borehole depths.

The mapped reflector's surface is made by :func:`~.workflow.compute`; this
module adds the other interfaces and the layers between them, top down
(:func:`layer_order`), from the best estimate the run has:

* the **joint estimate** of the layered overburden (all picks of all
  reflectors and the boreholes at once; :mod:`.tomography.layered`): each
  interface is its posterior mean and standard deviation, each layer's
  interval velocity the vertical average of its velocity field,
  :math:`v_k = (d_k - d_{k-1}) / (t_k - t_{k-1})` with :math:`d` the depth and
  :math:`t = d / \bar v` the one-way vertical time of the estimate's average
  velocity :math:`\bar v` down to each interface;
* else the **gather fits**: each interface kriged from its own gather-fit
  points and the boreholes that logged it. A gather's velocity is the rms
  velocity of the layers above its reflector [Dix 1955], so below the first
  interface these depths run deep by about :math:`V_{rms}/\bar V`; the
  interval velocities are the Dix intervals under the shots, kriged layer
  by layer (the first layer's is the gather velocity itself).

At the boreholes (:class:`~.results.BoreholeDepths`) every logged depth is set
against three estimates: the seismic-only gather fits (rms velocity), the
seismic-only Dix depths under the shots (vertical, flat layers), and the
joint estimate (which includes the boreholes). The first two are independent
of the boreholes: they check the seismic velocities.

References
----------
[Dix 1955] Dix, C. H. (1955). Seismic velocities from surface measurements.
    Geophysics 20(1), 68-86.
[Schwarz 1978] Schwarz, G. (1978). Estimating the dimension of a model.
    Annals of Statistics 6(2), 461-464.
"""

from __future__ import annotations

import warnings
from typing import Any, Optional

import numpy as np

from .errors import InputFileError, InversionError, RockheadWarning
from .grid import GridSpec, bilinear
from .results import (
    BoreholeDepths,
    DixTable,
    FitStep,
    InterfaceMap,
    IntervalVelocityMap,
    MapProducts,
    Overburden,
    VelocityModelTable,
)
from .surface.base import SurfaceGrid
from .surface.trend import grid_with_trend, model_with_trend, predict_with_trend
from .survey.model import Boreholes
from .tomography.layered import BoreholeTies

__all__ = ["layer_order", "layered_ties", "mapped_boreholes", "overburden_step"]

JOINT = "joint estimate"
GATHERS = "gather fits"


def layer_order(fit: FitStep, settings: Any) -> tuple:
    """Reflector labels top down: ``[processing] layers``, else by the median t0 of their ok gathers.

    Labels without an ok gather come last (by name).

    Parameters
    ----------
    fit : FitStep
        The gather fits (reflector labels, status, t0).
    settings : Settings
        ``layers`` (None: the automatic order).

    Returns
    -------
    tuple of str
    """
    if settings.layers is not None:
        return tuple(str(x) for x in settings.layers)
    labels = np.asarray(fit.gathers.reflector).astype(str)
    ok = np.asarray(fit.fits.status) == "ok"
    t0 = np.asarray(fit.fits.t0_s, float)
    names = sorted(set(labels.tolist()))
    med = {n: float(np.median(t0[ok & (labels == n)])) if np.any(ok & (labels == n)) else np.inf for n in names}
    return tuple(sorted(names, key=lambda n: (med[n], n)))


def layered_ties(boreholes: Optional[Boreholes], order: tuple, mapped: str):
    """Every depth the boreholes logged of the reflectors of ``order``, as ties of the joint estimate.

    Parameters
    ----------
    boreholes : Boreholes or None
        As read (``depth_m`` the mapped reflector's, ``depth_<label>_m`` the others').
    order : tuple of str
        The layered reflectors.
    mapped : str
        The mapped reflector.

    Returns
    -------
    BoreholeTies or None
        Elevations (collar - depth) with their sigma and reflector; None when
        no borehole logged any of them.
    """
    if boreholes is None or not len(boreholes):
        return None
    parts = [boreholes.for_reflector(label, mapped) for label in order]
    labels = np.concatenate([np.full(len(p), label, dtype=object) for p, label in zip(parts, order)])
    if not len(labels):
        return None
    cat = lambda name: np.concatenate([np.asarray(getattr(p, name), float) for p in parts])  # noqa: E731
    return BoreholeTies(cat("x_m"), cat("y_m"), cat("elevation_m"), cat("sigma_m"), labels)


def mapped_boreholes(boreholes: Optional[Boreholes], mapped: str, picked: tuple) -> Optional[Boreholes]:
    """The boreholes that logged the mapped reflector, its depth as ``depth_m`` (None when none did).

    Parameters
    ----------
    boreholes : Boreholes or None
        As read (``depth_m`` is the mapped reflector's; ``depth_<label>_m`` name theirs).
    mapped : str
        The mapped reflector.
    picked : tuple of str
        The reflector labels of the picks.

    Returns
    -------
    Boreholes or None

    Raises
    ------
    InputFileError
        The file gives the mapped reflector's depth twice (``depth_m`` and
        ``depth_<mapped>_m``), or a label two columns name alike.

    Warns
    -----
    RockheadWarning
        A ``depth_<label>_m`` column of a reflector no pick has (not used).
    """
    if boreholes is None or not len(boreholes):
        return None
    lower = [k.lower() for k in boreholes.interface_depth_m]
    for k in set(lower):
        if lower.count(k) > 1:
            raise InputFileError(
                boreholes.path,
                boreholes.header_line,
                f"depth_{k}_m",
                f"two columns give the depth of reflector {k!r} (labels differ only in case)",
            )
    label = boreholes.column_of(mapped)
    if label is not None and np.any(np.isfinite(boreholes.depth_m)):
        raise InputFileError(
            boreholes.path,
            boreholes.header_line,
            f"depth_{label}_m",
            f"depth_m is the depth of the mapped reflector {mapped!r}, which depth_{label}_m gives too: keep one",
        )
    known = {p.lower() for p in picked}
    for k in boreholes.interface_depth_m:
        if k.lower() not in known:
            warnings.warn(
                RockheadWarning(
                    f"{getattr(boreholes.path, 'name', 'boreholes.csv')}, line {boreholes.header_line}: column "
                    f"'depth_{k}_m' names reflector {k!r}, which no pick has ({', '.join(picked)}); not used"
                ),
                stacklevel=2,
            )
    view = boreholes.for_reflector(mapped, mapped)
    return view if len(view) else None


def _usable_points(fit: FitStep, reflector: str):
    """(x, y, elevation, sigma) of the ok, finite zero-offset points of one reflector."""
    p = fit.points
    ok = (p.status == "ok") & p.finite & np.isfinite(p.sigma_m) & (np.asarray(p.reflector).astype(str) == reflector)
    return p.x_m[ok], p.y_m[ok], p.elevation_m[ok], p.sigma_m[ok]


def _dix_points(fit: FitStep, dix: DixTable, ground, order: tuple, k: int):
    """(x, y, elevation, sigma) of the Dix depths of interface ``order[k]`` under the shots.

    The first interface: the gather's vertical depth V t0 / 2 under every shot
    (its velocity is the interval velocity of the first layer); deeper ones:
    the Dix depth of the base of each shot's layers, sigma the thicknesses'
    standard errors in quadrature.
    """
    label = order[k]
    if k == 0:
        g, f = fit.gathers, fit.fits
        ok = (f.status == "ok") & (np.asarray(g.reflector).astype(str) == label)
        x, y = g.source_xyz_g[ok, 0], g.source_xyz_g[ok, 1]
        depth = f.velocity_m_s[ok] * f.t0_s[ok] / 2.0
        sd = 0.5 * np.hypot(f.se_velocity_m_s[ok] * f.t0_s[ok], f.velocity_m_s[ok] * f.se_t0_s[ok])
    else:
        if not len(dix):
            return (np.zeros(0),) * 4
        key = np.char.add(np.asarray(dix.line).astype(str), np.char.add("\x1f", np.asarray(dix.shot).astype(str)))
        var = np.zeros(len(key))
        for kk in np.unique(key):  # cumulative variance of the thicknesses down each shot (rows top down)
            idx = np.flatnonzero(key == kk)
            var[idx] = np.cumsum(np.asarray(dix.se_thickness_m, float)[idx] ** 2)
        ok = (np.asarray(dix.reflector_base).astype(str) == label) & (np.asarray(dix.status).astype(str) == "ok")
        x, y = np.asarray(dix.x_m, float)[ok], np.asarray(dix.y_m, float)[ok]
        depth = np.asarray(dix.depth_base_m, float)[ok]
        sd = np.sqrt(var[ok])
    keep = np.isfinite(depth) & np.isfinite(sd) & (sd > 0)
    x, y, depth, sd = x[keep], y[keep], depth[keep], sd[keep]
    return x, y, np.asarray(ground(x, y), float) - depth, sd


def _interval_points(fit: FitStep, dix: DixTable, order: tuple, k: int):
    """(x, y, interval velocity, sigma) of layer k (above ``order[k]``) under the shots."""
    if k == 0:
        g, f = fit.gathers, fit.fits
        ok = (f.status == "ok") & (np.asarray(g.reflector).astype(str) == order[0])
        ok &= np.isfinite(f.se_velocity_m_s) & (f.se_velocity_m_s > 0)
        return g.source_xyz_g[ok, 0], g.source_xyz_g[ok, 1], f.velocity_m_s[ok], f.se_velocity_m_s[ok]
    if not len(dix):
        return (np.zeros(0),) * 4
    ok = (np.asarray(dix.reflector_base).astype(str) == order[k]) & (np.asarray(dix.status).astype(str) == "ok")
    v = np.asarray(dix.interval_velocity_m_s, float)[ok]
    s = np.asarray(dix.se_interval_velocity_m_s, float)[ok]
    keep = np.isfinite(v) & np.isfinite(s) & (s > 0)
    return np.asarray(dix.x_m, float)[ok][keep], np.asarray(dix.y_m, float)[ok][keep], v[keep], s[keep]


def _grid(x, y, z, s, spec, settings, corridor):
    """Kriged surface and its diagnostics, or (None, None) with fewer than 3 data."""
    if len(x) < 3:
        return None, None
    try:
        return grid_with_trend(x, y, z, s, spec, settings, "kriging", corridor=corridor)
    except InversionError:
        return None, None


def _model(x, y, z, s, settings, corridor):
    """The trend and variogram of :func:`_grid`'s surface, without the grid; None with fewer than 3 data."""
    if len(x) < 3:
        return None
    try:
        return model_with_trend(x, y, z, s, settings, corridor)
    except InversionError:
        return None


def _at(x, y, z, s, diag, settings, bx, by):
    """Estimate and sigma of a kriged surface at points (NaN without one)."""
    if diag is None or not len(bx):
        return np.full(len(bx), np.nan), np.full(len(bx), np.nan)
    return predict_with_trend(x, y, z, s, diag, settings, bx, by)


def _interface(label, surface, maps: MapProducts, source) -> InterfaceMap:
    """An interface's depth and depth sigma from its surface and the run's ground (as the mapped one's)."""
    z = np.where(surface.mask, np.nan, surface.z)
    std = np.where(surface.mask, np.nan, surface.std)
    gs = maps.ground_sigma_m
    depth = np.where(np.isfinite(gs), maps.ground_grid_m - z, np.nan)
    depth_sigma = np.where(np.isfinite(depth), np.hypot(std, gs), np.nan)
    return InterfaceMap(
        label,
        SurfaceGrid(surface.spec, z, std, surface.mask, surface.method, surface.n_data),
        depth,
        depth_sigma,
        source,
    )


def _velocity_table(rows) -> VelocityModelTable:
    cols: list[Any] = list(zip(*rows)) if rows else [[] for _ in range(14)]
    f = lambda i: np.asarray(cols[i], dtype=float)  # noqa: E731
    o = lambda i: np.asarray(cols[i], dtype=object)  # noqa: E731
    return VelocityModelTable(
        layer=np.asarray(cols[0], dtype=np.int64),
        top=o(1),
        base=o(2),
        model=o(3),
        v0_m_s=f(4),
        se_v0_m_s=f(5),
        gradient_east_m_s_per_m=f(6),
        se_gradient_east_m_s_per_m=f(7),
        gradient_north_m_s_per_m=f(8),
        se_gradient_north_m_s_per_m=f(9),
        gradient_depth_m_s_per_m=f(10),
        se_gradient_depth_m_s_per_m=f(11),
        dix_velocity_m_s=f(12),
        reason=o(13),
    )


def _robust(values, sigmas):
    """Median and its standard error (1.4826 MAD / sqrt(n); the median sigma for one value)."""
    v = np.asarray(values, float)
    if not len(v):
        return np.nan, np.nan
    med = float(np.median(v))
    if len(v) == 1:
        return med, float(np.median(sigmas))
    return med, float(1.4826 * np.median(np.abs(v - med)) / np.sqrt(len(v)))


def _joint_parts(res, order, spec: GridSpec, maps: MapProducts, mapped, final_surface, corridor=None):
    """Interfaces, interval velocities and the velocity-model rows of a joint estimate."""
    interfaces, intervals, rows = [], [], []
    depth_prev, time_prev = np.zeros(spec.shape), np.zeros(spec.shape)
    for k, label in enumerate(res.names):
        if label == mapped and final_surface is not None:
            surface = final_surface
        else:  # a single line's other interfaces only in its corridor, as the mapped one
            mask = res.mask[k] if corridor is None else res.mask[k] | corridor.outside(spec)
            surface = SurfaceGrid(spec, res.elevation_m[k], res.sigma_m[k], mask, "tomography", int(np.sum(res.used)))
        interfaces.append(_interface(label, surface, maps, JOINT))
        depth = maps.ground_grid_m - np.asarray(res.elevation_m[k], float)
        avg = np.asarray(res.average_velocity_m_s[k], float)
        time = depth / avg
        with np.errstate(invalid="ignore", divide="ignore"):
            v = (depth - depth_prev) / (time - time_prev)
        v = np.where(np.isfinite(v) & (v > 0) & ~surface.mask, v, np.nan)  # where its base is mapped
        top = "ground" if k == 0 else res.names[k - 1]
        intervals.append(IntervalVelocityMap(top, label, v, None, JOINT))
        depth_prev, time_prev = depth, time
    choice = getattr(res, "choice", None)
    for k, layer in enumerate(res.layers):
        vel, sd = layer.velocity, np.asarray(layer.sigma_parameters, float)
        gx, gy, gz = (float(g) for g in vel.gradient_m_s_per_m)
        free = np.asarray(sd) > 0
        if choice is not None:
            why = _why_chosen(choice, k)
        else:
            why = f"set to {layer.complexity} (not chosen: the velocity model was fixed)"
        rows.append(
            (
                k + 1,
                layer.top,
                layer.base,
                layer.complexity,
                vel.v0_m_s,
                sd[0],
                gx if free[1] else np.nan,
                sd[1] if free[1] else np.nan,
                gy if free[2] else np.nan,
                sd[2] if free[2] else np.nan,
                -gz if free[3] else np.nan,
                sd[3] if free[3] else np.nan,
                layer.dix_velocity_m_s,
                why,
            )
        )
    return interfaces, intervals, rows


def _why_chosen(choice, k: int) -> str:
    """Why layer ``k``'s velocity model was chosen: its BIC against the other models of that layer.

    The Bayesian information criterion [Schwarz 1978] of the chosen
    combination against the best one that differs only in this layer's
    model, and the gradients the fit with every gradient free found.
    """
    best = tuple(choice.candidates[choice.chosen])
    bic = np.asarray(choice.bic, float)
    alt = [
        i
        for i, c in enumerate(choice.candidates)
        if c[k] != best[k] and tuple(c[:k]) + tuple(c[k + 1 :]) == best[:k] + best[k + 1 :]
    ]
    g, sg = choice.gradients[k], choice.sigma_gradients[k]
    text = f"{best[k]} by the Bayesian information criterion (Schwarz 1978): BIC {bic[choice.chosen]:.1f}"
    if alt:
        i = min(alt, key=lambda j: bic[j])
        text += f" against {bic[i]:.1f} for {choice.candidates[i][k]} (lower is better; n = {choice.n_picks} picks)"
    low = int(np.argmin(bic))
    if low != choice.chosen:
        text += f"; the lowest BIC, {bic[low]:.1f}, is not strong evidence for more parameters, so the simpler is kept"
    return text + (
        f"; with every gradient free the fit finds east {g[0]:+.3f} ± {sg[0]:.3f}, north {g[1]:+.3f} ± "
        f"{sg[1]:.3f}, with depth {-g[2]:+.2f} ± {sg[2]:.2f} (m/s)/m"
    )


def overburden_step(
    survey,
    fit: FitStep,
    spec: GridSpec,
    ground,
    maps: MapProducts,
    final_surface: SurfaceGrid,
    dix: DixTable,
    tomography=None,
    corridor=None,
    seismic_check=None,
) -> Overburden:
    """Every interface top down, the interval velocities, the velocity model and the borehole depths.

    Parameters
    ----------
    survey : Survey
        Its ``boreholes`` as read (all logged reflectors); its settings' ``reflector`` the mapped one.
    fit : FitStep
        The final gather fits.
    spec : GridSpec
        The output grid.
    ground : GroundModel
        Ground elevation (for the Dix depths under the shots).
    maps : MapProducts
        The run's ground grid and ground sigma (the depth of every interface follows the same rule).
    final_surface : SurfaceGrid
        The mapped reflector's final surface (kept as it is).
    dix : DixTable
        Dix intervals under the shots.
    tomography : TomographyOutcome, optional
        With the joint estimate when it ran (``inversion`` with ``names``).
    corridor : LineCorridor, optional
        A single line's corridor.
    seismic_check : BoreholeCheck, optional
        The mapped reflector's seismic-only surface at its boreholes.

    Returns
    -------
    Overburden
    """
    st = survey.settings
    mapped = str(st.reflector)
    picked = tuple(sorted(set(np.asarray(fit.gathers.reflector).astype(str).tolist())))
    inversion = getattr(tomography, "inversion", None) if tomography is not None else None
    res: Any = inversion if inversion is not None and hasattr(inversion, "names") else None
    joint = res is not None
    order = tuple(res.names) if res is not None else tuple(x for x in layer_order(fit, st) if x in picked)
    notes = []
    bh_all = survey.boreholes
    if joint:
        interfaces, intervals, rows = _joint_parts(res, order, spec, maps, mapped, final_surface, corridor)
        source = JOINT
    else:
        source = GATHERS
        why = getattr(tomography, "skipped_reason", None) if tomography is not None else None
        if len(order) > 1:
            notes.append(
                "the joint estimate of the layered overburden did not run"
                + (f" ({why})" if why else "")
                + ": each interface is kriged from its own gather fits and the boreholes that logged it; below "
                "the first, their velocity is the rms velocity of the layers above (Dix 1955), so they run deep by "
                "about V_rms / V_average; the interval velocities are the Dix intervals under the shots"
            )
        interfaces, intervals, rows = [], [], []
        for k, label in enumerate(order):
            if label == mapped:
                interfaces.append(_interface(label, final_surface, maps, f"{final_surface.method} of the gather fits"))
            else:
                x, y, z, s = _usable_points(fit, label)
                ties = None if bh_all is None else bh_all.for_reflector(label, mapped)
                if ties is not None and len(ties):
                    x, y = np.concatenate([x, ties.x_m]), np.concatenate([y, ties.y_m])
                    z, s = np.concatenate([z, ties.elevation_m]), np.concatenate([s, ties.sigma_m])
                surface, _ = _grid(x, y, z, s, spec, st, corridor)
                if surface is None:
                    notes.append(f"interface {label!r}: fewer than 3 usable points, not mapped")
                else:
                    interfaces.append(_interface(label, surface, maps, "kriging of the gather fits (rms velocity)"))
            x, y, v, sv = _interval_points(fit, dix, order, k)
            top = "ground" if k == 0 else order[k - 1]
            grid, _ = _grid(x, y, v, sv, spec, st, corridor)
            if grid is not None:
                src = "kriging of the gather velocities" if k == 0 else "kriging of the Dix intervals under the shots"
                intervals.append(
                    IntervalVelocityMap(
                        top, label, np.where(grid.mask, np.nan, grid.z), np.where(grid.mask, np.nan, grid.std), src
                    )
                )
            med, se = _robust(v, sv)
            rows.append(
                (
                    k + 1,
                    top,
                    label,
                    "Dix interval velocity" if k else "gather-fit velocity",
                    med,
                    se,
                    np.nan,
                    np.nan,
                    np.nan,
                    np.nan,
                    np.nan,
                    np.nan,
                    med,
                    "no joint estimate: one velocity per layer, the median over the shots "
                    + (
                        "of the gather fits (the first layer's rms velocity is its interval velocity)"
                        if k == 0
                        else "of the Dix (1955) intervals between successive reflectors"
                    ),
                )
            )
    table = _velocity_table(rows)
    # the joint estimate at the boreholes: every interface of a layered one, else the mapped reflector's
    # joint inversion when it ran
    if joint:
        joint_at = {label: (res.elevation_unmasked_m[j], res.sigma_unmasked_m[j]) for j, label in enumerate(res.names)}
    elif tomography is not None and getattr(tomography, "surface", None) is not None:
        joint_at = {mapped: (tomography.surface.z, tomography.surface.std)}
    else:
        joint_at = {}
    depths = _borehole_depths(survey, fit, dix, ground, order, mapped, spec, corridor, joint_at, seismic_check)
    return Overburden(
        order=order,
        source=source,
        interfaces=tuple(interfaces),
        intervals=tuple(intervals),
        velocity_model=table,
        boreholes=depths,
        notes=tuple(notes),
    )


def _borehole_depths(survey, fit, dix, ground, order, mapped, spec, corridor, joint_at, seismic_check):
    """The depth comparison at every borehole and every reflector it logged (see the module notes)."""
    bh = survey.boreholes
    if bh is None or not len(bh):
        return None
    st = survey.settings
    cols: dict[str, list] = {
        k: []
        for k in (
            "x_m",
            "y_m",
            "borehole",
            "reflector",
            "collar_z_m",
            "depth_m",
            "sigma_m",
            "rms_depth_m",
            "rms_sigma_m",
            "dix_depth_m",
            "dix_sigma_m",
            "joint_depth_m",
            "joint_sigma_m",
        )
    }
    for k, label in enumerate(order):
        view = bh.for_reflector(label, mapped)
        if not len(view):
            continue
        bx, by, collar = view.x_m, view.y_m, view.z_m
        if label == mapped and seismic_check is not None and len(seismic_check.seismic_elevation_m) == len(view):
            rms_z, rms_s = seismic_check.seismic_elevation_m, seismic_check.seismic_sigma_m
        else:
            x, y, z, s = _usable_points(fit, label)
            diag = _model(x, y, z, s, st, corridor)  # estimates at the boreholes only: no grid
            rms_z, rms_s = _at(x, y, z, s, diag, st, bx, by)
        x, y, z, s = _dix_points(fit, dix, ground, order, k)
        diag = _model(x, y, z, s, st, corridor)
        dix_z, dix_s = _at(x, y, z, s, diag, st, bx, by)
        if label in joint_at:
            joint_z = bilinear(spec, joint_at[label][0], bx, by)
            joint_s = bilinear(spec, joint_at[label][1], bx, by)
        else:
            joint_z = joint_s = np.full(len(view), np.nan)
        for key, values in (
            ("x_m", bx),
            ("y_m", by),
            ("borehole", view.name.astype(str)),
            ("reflector", np.full(len(view), label, dtype=object)),
            ("collar_z_m", collar),
            ("depth_m", view.depth_m),
            ("sigma_m", view.sigma_m),
            ("rms_depth_m", collar - rms_z),
            ("rms_sigma_m", rms_s),
            ("dix_depth_m", collar - dix_z),
            ("dix_sigma_m", dix_s),
            ("joint_depth_m", collar - joint_z),
            ("joint_sigma_m", joint_s),
        ):
            cols[key].extend(np.asarray(values).tolist())
    if not cols["x_m"]:
        return None
    text = ("borehole", "reflector")
    return BoreholeDepths(**{k: np.asarray(v, dtype=object if k in text else float) for k, v in cols.items()})
