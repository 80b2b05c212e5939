"""Report section on the layered overburden: every interface, the velocity model, depths at the boreholes.

The borehole table shows first the two seismic-only depths (the gather fits'
rms velocity, and Dix interval velocities), which are independent checks of
the seismic velocities, then the joint estimate, which includes the
boreholes and so should agree with them within its sigma.
"""

from __future__ import annotations

import numpy as np

from ..results import RunResult
from .html import Report

__all__ = ["overburden_section"]


def _median(a) -> float:
    v = np.asarray(a, float)
    v = v[np.isfinite(v)]
    return float(np.median(v)) if v.size else float("nan")


def overburden_section(rep: Report, r: RunResult) -> None:
    """Every interface top down, the interval velocities, the velocity model and the borehole depths."""
    ob = r.overburden
    if ob is None:
        return
    st = r.survey.settings
    rep.heading("Layered overburden: every interface")
    how = "as set in [processing] layers" if st.layers else "by the median t0 of their gathers"
    rep.paragraph(
        f"Interfaces top down ({how}): {' over '.join(ob.order)}; mapped from the {ob.source}. The mapped reflector "
        f"'{st.reflector}' is the one of reflector_elevation.tif, reflector_depth.tif and depth_sigma.tif; every "
        "other interface has its own rasters (<label>_elevation.tif, <label>_depth.tif, <label>_depth_sigma.tif, "
        "<label>_elevation_sigma.tif) and every layer its interval velocity (interval_velocity_<top>_to_<base>.tif)."
    )
    for note in ob.notes:
        rep.paragraph(note, cls="small")
    rep.table(
        {
            "interface": [m.reflector for m in ob.interfaces],
            "made from": [m.source for m in ob.interfaces],
            "cells mapped": [int(np.sum(~m.surface.mask)) for m in ob.interfaces],
            "median depth_m": [_median(m.depth_m) for m in ob.interfaces],
            "median depth sigma_m": [_median(m.depth_sigma_m) for m in ob.interfaces],
            "median elevation sigma_m": [_median(m.surface.std) for m in ob.interfaces],
        }
    )
    if ob.intervals:
        rep.table(
            {
                "layer": [f"{v.top} to {v.base}" for v in ob.intervals],
                "median_velocity_m_s": [_median(v.velocity_m_s) for v in ob.intervals],
                "range_m_s": [
                    f"{np.nanmin(v.velocity_m_s):.0f} to {np.nanmax(v.velocity_m_s):.0f}"
                    if np.any(np.isfinite(v.velocity_m_s))
                    else ""
                    for v in ob.intervals
                ],
                "made from": [v.source for v in ob.intervals],
            },
            caption="Vertical-average velocity of each layer",
        )
    vm = ob.velocity_model
    if len(vm):
        rep.heading("Velocity model of each layer", level=3)
        rep.table(
            {
                "layer": [f"{t} to {b}" for t, b in zip(vm.top, vm.base)],
                "model": [str(m) for m in vm.model],
                "v0_m_s": list(vm.v0_m_s),
                "se_v0_m_s": list(vm.se_v0_m_s),
                "gradient_east_m_s_per_m": list(vm.gradient_east_m_s_per_m),
                "gradient_north_m_s_per_m": list(vm.gradient_north_m_s_per_m),
                "gradient_depth_m_s_per_m": list(vm.gradient_depth_m_s_per_m),
                "dix_velocity_m_s": list(vm.dix_velocity_m_s),
            }
        )
        for layer, why in zip(vm.layer, vm.reason):
            rep.paragraph(f"Layer {layer}: {why}", cls="small")
    b = ob.boreholes
    if b is None or not len(b):
        return
    rep.heading("Depths at the boreholes, every interface", level=3)
    rep.paragraph(
        "First the seismic-only depths, independent of the boreholes: from the gather fits, whose velocity is the "
        "rms velocity of the layers above (too deep below the first interface by about V_rms / V_average, Dix "
        "1955), and from Dix interval velocities under the shots (vertical, flat layers). Then the joint estimate, "
        "which includes the boreholes as data with their sigma: it should agree with them within its sigma. A "
        "standardised difference beyond 2 is flagged."
    )
    tot_rms = np.hypot(b.rms_sigma_m, b.sigma_m)
    tot_dix = np.hypot(b.dix_sigma_m, b.sigma_m)
    k_rms = (b.depth_m - b.rms_depth_m) / tot_rms
    k_dix = (b.depth_m - b.dix_depth_m) / tot_dix
    with np.errstate(invalid="ignore"):
        flag = (np.abs(k_rms) > 2) | (np.abs(k_dix) > 2)
    rep.table(
        {
            "borehole": [str(x) for x in b.borehole],
            "interface": [str(x) for x in b.reflector],
            "borehole depth_m": list(b.depth_m),
            "sigma_m": list(b.sigma_m),
            "rms-velocity depth_m": list(b.rms_depth_m),
            "rms sigma_m": list(b.rms_sigma_m),
            "(bh - rms)/sigma": list(k_rms),
            "Dix depth_m": list(b.dix_depth_m),
            "Dix sigma_m": list(b.dix_sigma_m),
            "(bh - Dix)/sigma": list(k_dix),
            "joint depth_m": list(b.joint_depth_m),
            "joint sigma_m": list(b.joint_sigma_m),
        },
        flag=list(flag),
    )
