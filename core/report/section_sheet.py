"""A printed section (PDF or SVG, A3 landscape) from a :class:`~..handoff.sections.Section`.

The section is drawn at a round horizontal scale and a round vertical
exaggeration, both stated, against chainage: the ground, every interface with
its +-2 sigma band, the water table when one is mapped, the boreholes in the
corridor (collar to reflector, with their offset from the alignment), the shots
and the reflector points in the corridor; a key plan shows where the section
runs. Colours are those of the report's figures.
"""

from __future__ import annotations

import numpy as np

from .. import colours
from ..text import printable
from . import figures
from .drawing import drawn_with_frozen_heap
from .sheet import SheetBox, SheetInfo, draw_cautions, draw_title_block, mm_axes, new_sheet, nice_scale, save_figure

__all__ = ["GROUND", "OVERBURDEN", "ROCK", "WATER", "section_sheet", "vertical_exaggeration"]

GROUND = colours.GROUND  # as the report's line sections
OVERBURDEN = "#f3e9d2"
ROCK = "#d9d9d9"
WATER = "#2b7bba"
_SECTION_BOX_MM = (26.0, 112.0, 374.0, 165.0)  # left, bottom, width, height; 18 mm for the elevation labels
_VE_STEPS = (1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 25.0, 50.0, 100.0)


def vertical_exaggeration(length_m, z_range_m, width_mm, height_mm):
    """Horizontal scale denominator and the largest round vertical exaggeration that fits.

    The horizontal scale is the smallest round 1:n that puts ``length_m`` on
    ``width_mm``; the vertical exaggeration the largest of 1, 2, 2.5, 5, 10,
    20, 25, 50, 100 that keeps ``z_range_m`` within ``height_mm``.

    >>> vertical_exaggeration(380.0, 19.0, 380.0, 165.0)
    (1000, 5.0)
    """
    h_scale = nice_scale(length_m * 1000.0 / width_mm)
    span_at_1 = h_scale * height_mm / 1000.0  # metres of height the panel holds at VE 1
    ve = 1.0
    for v in _VE_STEPS:
        if span_at_1 / v >= z_range_m:
            ve = v
    return h_scale, ve


def _finite(*arrays):
    vals = np.concatenate([np.asarray(a, float).ravel() for a in arrays if a is not None and len(a)])
    return vals[np.isfinite(vals)]


@drawn_with_frozen_heap
def section_sheet(section, info: SheetInfo, plan=None, fmt: str = "pdf") -> bytes:
    """Draw one section sheet; returns PDF or SVG bytes.

    Parameters
    ----------
    section : Section
    info : SheetInfo
        Title block facts.
    plan : dict, optional
        Key plan content: ``lines`` (name -> (n, 2) xy), ``boreholes`` ((n, 2) xy).
    fmt : "pdf" or "svg"
    """
    s = section
    fig = new_sheet()
    _left, _bottom, width, height = _SECTION_BOX_MM
    ax = mm_axes(fig, _SECTION_BOX_MM)
    length = s.length_m
    itf_z = [np.concatenate([z - 2 * np.nan_to_num(sg), z + 2 * np.nan_to_num(sg)]) for _, _, z, sg in s.interfaces]
    zs = _finite(s.ground_m, *itf_z, s.boreholes.top_m, s.boreholes.elevation_m, s.shots.top_m, s.points.elevation_m)
    if not zs.size:
        zs = np.array([0.0, 1.0])
    zmin, zmax = float(zs.min()), float(zs.max())
    zr = max(zmax - zmin, 1.0) * 1.25
    h_scale, ve = vertical_exaggeration(length, zr, width, height)
    x_span = h_scale * width / 1000.0
    z_span = h_scale * height / 1000.0 / ve
    x0 = -(x_span - length) / 2
    zc = (zmin + zmax) / 2
    ax.set_xlim(x0, x0 + x_span)
    ax.set_ylim(zc - z_span / 2, zc + z_span / 2)
    ch, g = s.chainage_m, s.ground_m
    lo = ax.get_ylim()[0]
    if s.interfaces:
        z0 = s.interfaces[0][2]
        ax.fill_between(ch, z0, g, where=np.isfinite(z0) & np.isfinite(g), color=OVERBURDEN, lw=0, zorder=0)
        ax.fill_between(ch, lo, z0, where=np.isfinite(z0), color=ROCK, lw=0, zorder=0)
    ax.plot(ch, g, "-", color=GROUND, lw=1.6, label="ground", zorder=3)
    for i, (name, kind, z, sg) in enumerate(s.interfaces):
        if kind == "water_table":
            ax.plot(ch, z, "--", color=WATER, lw=1.2, label=f"{name} (water table)", zorder=4)
            ax.fill_between(ch, z - 2 * sg, z + 2 * sg, color=WATER, alpha=0.15, lw=0)
            ok = np.flatnonzero(np.isfinite(z))
            if ok.size:
                k = ok[len(ok) // 2]
                ax.plot(ch[k], z[k], "v", color=WATER, ms=7, zorder=5)
            continue
        colour = figures.FIT if i == 0 else figures.LINE_COLOURS[i % len(figures.LINE_COLOURS)]
        ax.plot(ch, z, "-", color=colour, lw=1.8, label=f"{name} (mapped surface)", zorder=4)
        ax.fill_between(ch, z - 2 * sg, z + 2 * sg, color=colour, alpha=0.25, lw=0, label="±2σ of the surface")
    p = s.points
    if len(p):
        ax.errorbar(
            p.chainage_m,
            p.elevation_m,
            yerr=2 * p.sigma_m,
            fmt="o",
            ms=2.5,
            color=figures.USED,
            lw=0.6,
            label="reflector points in the corridor (±2σ)",
            zorder=5,
        )
    sh = s.shots
    if len(sh):
        ax.plot(
            sh.chainage_m, sh.top_m, "v", color=figures.USED, mfc="white", ms=4, label="shots in the corridor", zorder=6
        )
    b = s.boreholes
    for i in range(len(b)):
        c, top, z, sg, off = b.chainage_m[i], b.top_m[i], b.elevation_m[i], b.sigma_m[i], b.offset_m[i]
        ax.plot(
            [c, c],
            [top, z],
            "-",
            color="k",
            lw=2.2,
            zorder=7,
            label="boreholes (collar to reflector)" if i == 0 else None,
        )
        ax.errorbar([c], [z], yerr=[2 * sg], fmt="s", ms=5, color="k", mfc="yellow", zorder=8)
        side = "R" if off >= 0 else "L"
        ax.annotate(
            f"{printable(b.label[i], 40)}\noffset {abs(off):.1f} m {side}",
            (c, top),
            xytext=(0, 6),
            textcoords="offset points",
            ha="center",
            va="bottom",
            fontsize=7,
        )
    ax.set_xlabel("chainage along the alignment (m)")
    datum = info.vertical_datum or "vertical datum not stated"
    ax.set_ylabel(f"elevation (m, {datum})", fontsize=8)
    ax.grid(True, color="0.85", lw=0.5)
    ax.tick_params(labelsize=7, right=True, labelright=True)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(0.0, -0.09), ncol=4, frameon=False)
    ax.set_title(
        f"{s.title} — horizontal 1:{h_scale:,}, vertical 1:{round(h_scale / ve):,}, vertical exaggeration ×{ve:g}",
        fontsize=10,
        loc="left",
    )
    if s.notes:
        ax.text(
            0.5, 0.5, "; ".join(s.notes), transform=ax.transAxes, ha="center", va="center", fontsize=12, color="0.3"
        )
    _key_plan(mm_axes(fig, (20.0, 14.0, 95.0, 64.0)), s, plan or {})
    draw_cautions(
        SheetBox(fig, (125.0, 54.0, 148.0, 30.0)),
        extra=(
            f"Boreholes, shots and reflector points within {s.corridor_m / 2:g} m of the alignment",
            "are projected onto it; offsets right (R) or left (L) looking up-chainage.",
        ),
    )
    draw_title_block(
        SheetBox(fig, (280.0, 14.0, 120.0, 72.0)),
        info,
        f"Section {s.title}",
        f"H 1:{h_scale:,}, V 1:{round(h_scale / ve):,} (A3)",
    )
    return save_figure(fig, fmt)


def _key_plan(ax, s, plan):
    v = s.vertices_xy
    for i, (name, xy) in enumerate(sorted((plan.get("lines") or {}).items())):
        colour = figures.LINE_COLOURS[i % len(figures.LINE_COLOURS)]
        ax.plot(xy[:, 0], xy[:, 1], "-", color=colour, lw=1.0)
        # each line named at its first station, so the section can be placed among the others
        ax.annotate(
            printable(name, 40),
            xy[0],
            fontsize=6,
            color=colour,
            ha="right",
            va="bottom",
            path_effects=figures.label_halo(),
        )
    bh = plan.get("boreholes")
    if bh is not None and len(bh):
        ax.plot(bh[:, 0], bh[:, 1], "s", color="k", mfc="yellow", ms=3)
    try:
        from shapely.geometry import LineString

        strip = LineString(v).buffer(s.corridor_m / 2, cap_style=2)
        xs, ys = strip.exterior.xy
        ax.fill(xs, ys, color=figures.FIT, alpha=0.2, lw=0)
    except (ImportError, ValueError):  # pragma: no cover - shapely is a core dependency
        pass
    ax.plot(v[:, 0], v[:, 1], "-", color="k", lw=1.6)
    ax.annotate("0", v[0], fontsize=7, ha="right", va="top")
    ax.annotate(f"{s.length_m:.0f} m", v[-1], fontsize=7, ha="left", va="bottom")
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_title("key plan (grid north up)", fontsize=8, loc="left")
    ax.tick_params(labelsize=5)
    ax.ticklabel_format(useOffset=False, style="plain")
