"""The map sheet: an A3 PDF of the reflector map at a stated scale, ready to print and sign.

Each page holds one map (depth to the reflector; the standard deviation of the
mapped surface; with a design level, the probability of rock above it) at a
round scale (1:n, n in 1, 1.25, 2, 2.5, 5 x 10^k), with a coordinate grid,
contours, the seismic lines, boreholes, reflector points and the
strike-and-dip symbols of geologic maps (FGDC-STD-013-2006: long bar along
strike, short tick toward dip, dip value beside it), a legend with units, a
scale bar, a north arrow (grid north: the map is drawn in the projected CRS),
the cautions and a title block (survey, dates, software version, CRS, vertical
datum, method, cell size). Colours are the report's (:mod:`.figures`).
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from typing import Optional

import numpy as np

from .. import colours
from ..grid import nice_step
from ..text import printable
from . import figures
from .drawing import drawn_with_frozen_heap
from .sheet import (
    A3_LANDSCAPE_MM,
    CAUTION_LINES,
    SheetBox,
    SheetInfo,
    draw_cautions,
    draw_title_block,
    mm_axes,
    new_sheet,
    nice_scale,
)

__all__ = ["MapOverlays", "MapPage", "map_sheet"]

_MAP_BOX_MM = (24.0, 20.0, 280.0, 252.0)  # left, bottom, width, height
_PANEL_X_MM = 314.0
_PANEL_W_MM = 96.0


@dataclass(frozen=True)
class MapPage:
    """One map of the sheet: a grid on the run's GridSpec, its colours and its contours."""

    title: str
    values: np.ndarray  # (ny, nx), row 0 north; NaN where not mapped
    label: str  # colour bar label with units
    cmap: str
    vmin: Optional[float] = None
    vmax: Optional[float] = None
    contours: tuple = ()  # (level, (n, 2) xy, is_index) drawn as lines, index ones labelled
    contour_levels: tuple = ()  # levels to contour from ``values`` itself (e.g. probabilities)
    show_dips: bool = True


@dataclass(frozen=True)
class MapOverlays:
    """What is drawn over every map."""

    lines: dict = field(default_factory=dict)  # name -> (n, 2) xy
    points_xy: Optional[np.ndarray] = None  # reflector points
    boreholes: Optional[tuple] = None  # (x, y, names)
    dips: Optional[tuple] = None  # measured: (x, y, strike_deg, dip_deg)
    surface_dips: Optional[tuple] = None  # from the surface
    area: Optional[object] = None  # shapely polygon (design area)


def _grid_step(span_m: float) -> float:
    return nice_step(span_m / 5.0)


def _map_axes(fig, spec, page_scale):
    ax = mm_axes(fig, _MAP_BOX_MM)
    w, e, s, n = spec.bounds
    width_m = page_scale * _MAP_BOX_MM[2] / 1000.0
    height_m = page_scale * _MAP_BOX_MM[3] / 1000.0
    cx, cy = (w + e) / 2, (s + n) / 2
    ax.set_xlim(cx - width_m / 2, cx + width_m / 2)
    ax.set_ylim(cy - height_m / 2, cy + height_m / 2)
    ax.set_aspect("equal", adjustable="box")
    step = _grid_step(max(width_m, height_m))
    xt = np.arange(math.ceil((cx - width_m / 2) / step) * step, cx + width_m / 2, step)
    yt = np.arange(math.ceil((cy - height_m / 2) / step) * step, cy + height_m / 2, step)
    ax.set_xticks(xt)
    ax.set_yticks(yt)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7, top=True, right=True, labeltop=True, labelright=True)
    for lab in ax.get_yticklabels():
        lab.set_rotation(90)
        lab.set_va("center")
    ax.grid(True, color="0.55", lw=0.4, ls=":")
    ax.set_xlabel("easting (m)", fontsize=8)
    ax.set_ylabel("northing (m)", fontsize=8)
    return ax, step


def _draw_map(ax, spec, page: MapPage, ov: MapOverlays, symbol_m: float):
    w, e, s, n = spec.bounds
    v = np.asarray(page.values, float)
    im = ax.imshow(
        v,
        extent=(w, e, s, n),
        origin="upper",
        cmap=page.cmap,
        vmin=page.vmin,
        vmax=page.vmax,
        interpolation="nearest",
        zorder=1,
    )
    figures.draw_contours(ax, page.contours, "0.15", widths=(0.9, 0.35), fontsize=6, zorder=2)
    levels = [lv for lv in page.contour_levels if np.any(v < lv) and np.any(v > lv)] if np.any(np.isfinite(v)) else []
    if levels:
        cs = ax.contour(spec.x_centres, spec.y_centres, v, levels=levels, colors="0.1", linewidths=0.8, zorder=2)
        ax.clabel(cs, fmt="%g", fontsize=6)
    if ov.area is not None:
        for poly in getattr(ov.area, "geoms", [ov.area]):
            xs, ys = poly.exterior.xy
            ax.plot(xs, ys, "-", color="k", lw=1.4, ls="--", zorder=3)
    figures.draw_lines(ax, ov.lines, fontsize=7, zorder=4)
    if ov.points_xy is not None and len(ov.points_xy):
        ax.plot(
            ov.points_xy[:, 0],
            ov.points_xy[:, 1],
            ".",
            color=colours.REFLECTOR_POINT,
            ms=3,
            mec="white",
            mew=0.3,
            zorder=5,
        )
    if page.show_dips:
        for sym, colour in ((ov.surface_dips, figures.SURFACE_DIP), (ov.dips, figures.MEASURED_DIP)):
            if sym is None:
                continue
            for x, y, strike, dip in zip(*sym):
                if np.isfinite(strike) and np.isfinite(dip):
                    figures.strike_dip_symbol(ax, x, y, strike, dip, symbol_m, colour, fontsize=6)
    if ov.boreholes is not None:
        bx, by, names = ov.boreholes
        ax.plot(bx, by, "o", color="k", mfc=colours.BOREHOLE, ms=5, zorder=6)
        for x, y, nm in zip(bx, by, names):
            ax.annotate(
                printable(nm, 40),
                (x, y),
                xytext=(4, 4),
                textcoords="offset points",
                fontsize=7,
                zorder=6,
                path_effects=figures.label_halo(),
            )
    return im


def _legend(fig, im, page: MapPage, ov: MapOverlays):
    from matplotlib.lines import Line2D

    top = 282.0
    SheetBox(fig, (_PANEL_X_MM, top - 8, _PANEL_W_MM, 8)).text(
        0, 0.5, "Legend", fontsize=10, fontweight="bold", va="center"
    )
    cax = mm_axes(fig, (_PANEL_X_MM + 4, top - 22, _PANEL_W_MM - 8, 5))
    cb = fig.colorbar(im, cax=cax, orientation="horizontal")
    cb.set_label(page.label, fontsize=7)
    cb.ax.tick_params(labelsize=6)
    handles = []
    if page.contours:
        handles += [
            Line2D([], [], color="0.15", lw=0.9, label="index contour (labelled, m)"),
            Line2D(
                [],
                [],
                color="0.15",
                lw=0.35,
                label="intermediate contour" + (" (labelled, m)" if figures.label_every_contour(page.contours) else ""),
            ),
        ]
    if page.contour_levels:
        handles.append(Line2D([], [], color="0.1", lw=0.8, label="probability contours"))
    if ov.lines:
        handles.append(Line2D([], [], color=colours.LINE, lw=2, label="seismic line (labelled)"))
    if ov.points_xy is not None and len(ov.points_xy):
        handles.append(
            Line2D([], [], marker=".", color=colours.REFLECTOR_POINT, mec="white", ls="none", label="reflector point")
        )
    if ov.boreholes is not None:
        handles.append(Line2D([], [], marker="o", color="k", mfc=colours.BOREHOLE, ls="none", label="borehole"))
    if page.show_dips:
        handles += [
            Line2D([], [], color=figures.MEASURED_DIP, lw=1.8, label="strike and dip (°), measured at line crossings"),
            Line2D([], [], color=figures.SURFACE_DIP, lw=1.8, label="strike and dip (°), from the surface"),
        ]
    if ov.area is not None:
        handles.append(Line2D([], [], color="k", ls="--", lw=1.4, label="design area"))
    box = SheetBox(fig, (_PANEL_X_MM, 150.0, _PANEL_W_MM, top - 36 - 150.0))
    box.legend(handles, loc="upper left", fontsize=7, frameon=False, handlelength=2.5)


def _scale_and_north(fig, scale: int):
    ax = SheetBox(fig, (_PANEL_X_MM, 124.0, _PANEL_W_MM, 24.0), limits=(_PANEL_W_MM, 24.0))  # laid out in mm
    # scale bar: a round length of about half the panel
    length_m = nice_step(0.55 * _PANEL_W_MM * scale / 1000.0)
    bar_mm = length_m * 1000.0 / scale
    x0, y0, h = 4.0, 6.0, 2.0
    for k in range(4):
        colour = "k" if k % 2 == 0 else "white"
        ax.rectangle(x0 + k * bar_mm / 4, y0, bar_mm / 4, h, facecolor=colour, edgecolor="k", lw=0.6)
    for frac in (0.0, 0.5, 1.0):
        ax.text(x0 + frac * bar_mm, y0 + h + 1.2, f"{frac * length_m:g}", fontsize=6, ha="center", va="bottom")
    ax.text(x0 + bar_mm + 2, y0 + h / 2, "m", fontsize=7, va="center")
    ax.text(x0, 1.0, f"scale 1:{scale:,} on A3 (420 × 297 mm)", fontsize=7, va="bottom")
    # north arrow (grid north)
    nx = _PANEL_W_MM - 12
    ax.arrow((nx, 21), (nx, 7), arrowstyle="-|>", lw=1.6, color="k")
    ax.text(nx, 22.5, "N", fontsize=10, fontweight="bold", ha="center", va="bottom")
    ax.text(nx, 5.5, "grid north", fontsize=6, ha="center", va="top")


@drawn_with_frozen_heap
def map_sheet(spec, pages, overlays: MapOverlays, info: SheetInfo) -> bytes:
    """Draw the map sheet; returns the PDF bytes (one page per :class:`MapPage`).

    The scale is the smallest round 1:n that fits the grid's extent into the
    map frame (280 x 262 mm of an A3 landscape sheet).
    """
    import matplotlib
    from matplotlib.backends.backend_pdf import PdfPages

    w, e, s, n = spec.bounds
    scale = nice_scale(max((e - w) / _MAP_BOX_MM[2], (n - s) / _MAP_BOX_MM[3]) * 1000.0 * 1.02)
    symbol_m = 3.0 * scale / 1000.0  # strike bar half-length: 3 mm on paper
    buf = io.BytesIO()
    meta = {
        "CreationDate": None,
        "Title": f"Reflector map sheet: {info.survey}",
        "Subject": " ".join(CAUTION_LINES),
        "Creator": info.software,
    }
    with matplotlib.rc_context({"pdf.fonttype": 3}), PdfPages(buf, metadata=meta) as pdf:
        for k, page in enumerate(pages, start=1):
            fig = new_sheet(A3_LANDSCAPE_MM)
            ax, _ = _map_axes(fig, spec, scale)
            im = _draw_map(ax, spec, page, overlays, symbol_m)
            ax.set_title(page.title, fontsize=11, loc="left", pad=14)
            _legend(fig, im, page, overlays)
            _scale_and_north(fig, scale)
            draw_cautions(SheetBox(fig, (_PANEL_X_MM, 92.0, _PANEL_W_MM, 30.0)), width_chars=62)
            draw_title_block(
                SheetBox(fig, (_PANEL_X_MM, 14.0, _PANEL_W_MM, 76.0)),
                info,
                f"{page.title} (sheet {k} of {len(pages)})",
                f"1:{scale:,} (A3)",
            )
            figures.plain_text(fig)  # labels are data, never mathtext
            pdf.savefig(fig)
    return buf.getvalue()
