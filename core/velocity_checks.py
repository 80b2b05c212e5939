"""Velocity cross-checks of the gather fits: site velocity, Dix intervals, CMP analysis, borehole ratio.

These steps of :func:`.workflow.compute` do not make the map; they test the
overburden velocity that the map rests on, each in its own way, and the
report sets them side by side: the robust site velocity of the gather fits,
Dix (1955) interval velocities under shots with several reflectors, a
common-midpoint analysis (Levin 1971) of all picks, and the ratio of
borehole to seismic depths (with :func:`calibrate_fit`, which applies it
when ``calibrate_velocity`` is set).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Dict, Union

import numpy as np

from .results import BoreholeCheck, CmpTable, DepthRatio, DixTable, FitStep, SiteVelocity
from .seismic.cmp import cmp_bins, fit_cmp_gathers, midpoint_spacing
from .seismic.dix import dix_intervals
from .seismic.geometry import reflector_points
from .tomography.start import robust_site_velocity

__all__ = ["borehole_depth_ratio", "calibrate_fit", "cmp_step", "dix_table", "site_velocity"]


def site_velocity(fit: FitStep, reflector: str) -> SiteVelocity:
    """Robust overburden velocity of the site from the ok gather fits of ``reflector``.

    Median and 1.4826 MAD of the gather velocities (Huber 1964), only of the
    mapped reflector: a deeper or shallower reflector's fit velocity is the
    rms velocity down to it (Dix 1955), another quantity.
    """
    f = fit.fits
    mapped = np.asarray(fit.gathers.reflector).astype(str) == str(reflector)
    v, spread, n = robust_site_velocity(f.velocity_m_s, f.se_velocity_m_s, (f.status == "ok") & mapped)
    return SiteVelocity(velocity_m_s=float(v), spread_m_s=float(spread), n_gathers=int(n), reflector=str(reflector))


def dix_table(fit) -> DixTable:
    """Dix (1955) interval velocities and thicknesses under every shot with several reflectors.

    Per (line, shot), the ok gathers of its reflectors give (t0, V) pairs; with
    V taken as the rms velocity (near-horizontal layers), :func:`dix_intervals`
    gives the layers between them. The table is empty when no shot has two
    reflectors.
    """
    g, f = fit.gathers, fit.fits
    ok = f.status == "ok"
    columns = (
        "line",
        "shot",
        "reflector_top",
        "reflector_base",
        "x_m",
        "y_m",
        "t0_top_ms",
        "t0_base_ms",
        "interval_velocity_m_s",
        "se_interval_velocity_m_s",
        "thickness_m",
        "se_thickness_m",
        "depth_base_m",
        "status",
        "reason",
    )
    cols: Dict[str, list] = {k: [] for k in columns}
    keys = np.array([f"{a}\x1f{b}" for a, b in zip(g.line, g.shot)], dtype=object)
    # the ok gathers grouped by key (sorted keys, gathers in their order): one sort, not a pass per key
    ok_idx = np.flatnonzero(ok)
    uniq, inverse = np.unique(keys[ok_idx].astype(str), return_inverse=True)
    order = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[order], np.arange(len(uniq) + 1))
    for u in range(len(uniq)):
        idx = ok_idx[order[bounds[u] : bounds[u + 1]]]
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
    text = ("line", "shot", "reflector_top", "reflector_base", "status", "reason")
    return DixTable(**{k: np.array(v, dtype=object if k in text else float) for k, v in cols.items()})


def cmp_step(survey, fit) -> CmpTable:
    """Common-midpoint velocity analysis of all picks (``gather = "cmp"``).

    Picks are sorted into midpoint bins along each line (per reflector) and
    each bin is fitted with t^2 = t0^2 + x^2 / Vnmo^2 (Levin 1971; along dip
    Vnmo = V / cos(dip)). The bin length defaults to one midpoint spacing of
    the line (the median over its shot gathers, :func:`midpoint_spacing`:
    half the receiver spacing), bins centred on the midpoints, so that a bin
    holds one midpoint: a longer bin mixes midpoints whose t0 differ on a
    dipping reflector and biases Vnmo. ``depth_m`` = Vnmo t0 / 2 below the
    bin centre is a vertical, small-dip estimate; the map itself always comes
    from the exact 3D shot-gather fits. Returns one row per bin (``x_m``,
    ``y_m`` are the bin centres).
    """
    g = fit.gathers
    pick_line = np.asarray(g.line)[g.gather].astype(str)
    bin_m = survey.settings.cmp_bin_m
    bins: Union[float, np.ndarray]  # one length per pick (the line's), or the setting's one length
    if bin_m is None:
        per_gather = midpoint_spacing(g.source_xyz, g.receiver_xyz, g.gather, g.line_unit)
        lines = np.asarray(g.line).astype(str)
        per_line = {}
        for line in sorted(set(lines.tolist())):
            vals = per_gather[(lines == line) & np.isfinite(per_gather)]
            per_line[line] = float(np.median(vals)) if len(vals) else float(np.median(g.spread_length_m)) / 4
        bins = np.array([per_line[line] for line in pick_line], dtype=float)
        centred = True
    else:
        bins, centred = float(bin_m), False
    pick_refl = np.asarray(g.reflector)[g.gather].astype(str)
    group = np.char.add(np.char.add(pick_line, "\x1f"), pick_refl)
    gid, centres, offset = cmp_bins(g.source_xyz[:, :2], g.receiver_xyz[:, :2], bins, group=group, centred=centred)
    fits = fit_cmp_gathers(gid, offset, g.time_s, g.sigma_s, survey.settings)
    first = np.zeros(len(centres), dtype=int)
    first[gid[::-1]] = np.arange(len(gid))[::-1]
    return CmpTable(
        x_m=centres[:, 0],
        y_m=centres[:, 1],
        line=pick_line[first].astype(object),
        reflector=pick_refl[first].astype(object),
        t0_ms=fits.t0_s * 1e3,
        nmo_velocity_m_s=fits.nmo_velocity_m_s,
        se_t0_ms=fits.se_t0_s * 1e3,
        se_nmo_velocity_m_s=fits.se_nmo_velocity_m_s,
        depth_m=fits.nmo_velocity_m_s * fits.t0_s / 2,
        rms_residual_ms=fits.rms_residual_s * 1e3,
        picks_used=fits.picks_used.astype(np.int64),
        picks_rejected=fits.picks_rejected.astype(np.int64),
        status=fits.status.astype(object),
        reason=fits.reason.astype(object),
        bin_m=np.broadcast_to(bins, gid.shape)[first].astype(float),
    )


def borehole_depth_ratio(check: BoreholeCheck, boreholes) -> DepthRatio:
    """Borehole depth / seismic depth at the boreholes: a velocity calibration factor.

    Seismic depths scale with the overburden velocity (h = V t0 / 2), so the
    ratio of borehole to seismic-only depth estimates the factor by which
    the velocities would have to change to honour the boreholes. Reported
    always; applied only when ``calibrate_velocity`` is set (then the
    surface is tied to the boreholes through the scaled depths). ``check`` is
    the seismic-only surface at the boreholes (:func:`borehole_check`).
    Returns the inverse-variance weighted mean factor and its standard error.
    """
    ground_bh = boreholes.z_m
    seismic_depth = ground_bh - check.seismic_elevation_m
    ratio = boreholes.depth_m / seismic_depth
    sig = ratio * np.hypot(check.seismic_sigma_m / seismic_depth, boreholes.sigma_m / boreholes.depth_m)
    w = 1.0 / sig**2
    factor = float(np.sum(w * ratio) / np.sum(w))
    se = float(np.sqrt(1.0 / np.sum(w)))
    if len(ratio) > 1:
        chi2 = float(np.sum(w * (ratio - factor) ** 2) / (len(ratio) - 1))
        se *= max(1.0, np.sqrt(chi2))
    return DepthRatio(ratio=ratio, sigma=sig, factor=factor, sigma_factor=se, n=len(ratio))


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
    return replace(
        fit,
        fits=scaled,
        points=pts.select(pts.kind == "zero_offset"),
        receiver_points=pts.select(pts.kind == "receiver"),
    )
