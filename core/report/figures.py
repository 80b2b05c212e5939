"""Quality-control and map figures (matplotlib, imported lazily, Agg backend).

Every function returns PNG bytes, so the caller decides where they go (an
image embedded in ``report.html``, a page of a sheet); the per-gather QC
figures are SVG drawn by :mod:`.qc_svg` without matplotlib. matplotlib is
optional for the core: without it :class:`~.errors.MissingDependencyError`
names it.
"""

from __future__ import annotations

import io

import numpy as np

from .. import colours
from ..errors import MissingDependencyError
from ..text import printable

# The colour code is shared with QGIS (core/colours.py); these names are the figures' own view of it.
USED = colours.PICK_USED
REJECTED = colours.PICK_REJECTED
EXCLUDED = colours.PICK_EXCLUDED
FIT = colours.FIT_CURVE
LINE_COLOURS = list(colours.LINE_COLOURS)
MEASURED_DIP = colours.MEASURED_DIP  # strike-and-dip symbols measured at line crossings
SURFACE_DIP = colours.SURFACE_DIP  # and read off the mapped surface
#: matplotlib names of the shared ramps (registered by :func:`_plt`)
DEPTH_CMAP = "rockhead_depth"  # depth to the reflector (the report's map and the map sheet)
SIGMA_CMAP = "rockhead_sigma"  # its standard deviation
PROBABILITY_CMAP = "rockhead_probability"  # probability of rock above a design level
DIFFERENCE_CMAP = "rockhead_difference"  # a signed difference between two surfaces
_RAMPS = {
    DEPTH_CMAP: colours.DEPTH_RAMP,
    SIGMA_CMAP: colours.SIGMA_RAMP,
    PROBABILITY_CMAP: colours.PROBABILITY_RAMP,
    DIFFERENCE_CMAP: colours.DIFFERENCE_RAMP,
    "rockhead_elevation": colours.ELEVATION_RAMP,
}


def _plt():
    try:
        import matplotlib

        matplotlib.use("Agg", force=False)
        import matplotlib.pyplot as plt
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise MissingDependencyError("matplotlib", "QC figures and the report") from exc
    register_colour_maps()
    return plt


def register_colour_maps() -> None:
    """Register the shared ramps of :mod:`core.colours` as matplotlib colour maps (once).

    After this, ``DEPTH_CMAP``, ``SIGMA_CMAP``, ``PROBABILITY_CMAP`` and
    ``DIFFERENCE_CMAP`` name colour maps that run through the same stops as
    the QGIS styles.
    """
    import matplotlib
    from matplotlib.colors import LinearSegmentedColormap

    for name, ramp in _RAMPS.items():
        if name not in matplotlib.colormaps:
            matplotlib.colormaps.register(LinearSegmentedColormap.from_list(name, [(p, c) for p, c in ramp]))


def _texts(fig):
    """The figure's own text artists: figure texts, titles, axis labels, annotations, legends.

    Tick labels are left out: they are numbers, and walking every tick of every
    axis (``Artist.findobj``) costs a third of a second per figure.
    """
    texts = list(fig.texts)
    if getattr(fig, "_suptitle", None) is not None:
        texts.append(fig._suptitle)
    for ax in fig.axes:
        texts += [ax.title, getattr(ax, "_left_title", None), getattr(ax, "_right_title", None)]
        texts += [ax.xaxis.label, ax.yaxis.label, *ax.texts]
        legend = ax.get_legend()
        if legend is not None:
            texts += [*legend.get_texts(), legend.get_title()]
    for legend in getattr(fig, "legends", []):
        texts += [*legend.get_texts(), legend.get_title()]
    return [t for t in texts if t is not None]


def plain_text(fig) -> None:
    r"""Draw every text of ``fig`` as written: no mathtext parsing.

    Labels are data: a line called ``$\foo{$`` or ``x^$2$`` must print as
    such, not be parsed as mathtext (which crashes on the first and typesets
    the second). The project's figures use no mathtext of their own (units in
    Unicode: m², ±), so every text of the figure (titles, axis labels,
    annotations, legends) is set to plain text. Every figure and sheet is
    saved through a function that calls this; tick labels are numbers.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    """
    for t in _texts(fig):
        t.set_parse_math(False)


def _png(fig) -> bytes:
    plain_text(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi, metadata={"Software": None})
    _plt().close(fig)
    return buf.getvalue()


def map_figure(
    grid_x_m,
    grid_y_m,
    depth_grid_m,
    contour_lines,
    station_lines,
    points_xy=None,
    dips=None,
    surface_dips=None,
    boreholes=None,
    title="",
    dpi=110,
) -> bytes:
    """Site map: depth raster, contours, lines, points, strike-and-dip symbols.

    ``contour_lines`` is a list of (level, (n,2) xy array, is_index);
    ``station_lines`` a dict line -> (n,2) xy; ``dips`` and ``surface_dips``
    tuples (x, y, strike_deg, dip_deg). The strike-and-dip symbol is the one
    of geologic maps (FGDC-STD-013-2006): a long bar along strike, a short
    tick from its middle toward the dip direction, the dip value beside it.
    """
    plt = _plt()
    fig, ax = plt.subplots(figsize=(8.0, 7.0), dpi=dpi)
    gx, gy = np.asarray(grid_x_m), np.asarray(grid_y_m)
    dx = gx[1] - gx[0] if len(gx) > 1 else 1.0
    dy = abs(gy[1] - gy[0]) if len(gy) > 1 else 1.0
    extent = (gx.min() - dx / 2, gx.max() + dx / 2, gy.min() - dy / 2, gy.max() + dy / 2)
    z = np.asarray(depth_grid_m, float)
    if gy[0] < gy[-1]:  # rows south to north: flip for imshow's top-down rows
        z = z[::-1]
    im = ax.imshow(z, extent=extent, cmap=DEPTH_CMAP, interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, shrink=0.75)
    cb.set_label("depth to reflector (m)")
    for _level, xy, is_index in contour_lines:
        ax.plot(xy[:, 0], xy[:, 1], color=colours.CONTOUR_DEPTH, lw=1.0 if is_index else 0.4)
    for line, xy in sorted(station_lines.items()):
        ax.plot(xy[:, 0], xy[:, 1], "-", color=colours.LINE, lw=2.0)
        ax.annotate(f"line {printable(line, 40)}", xy[0], fontsize=8, color=colours.LINE, ha="right", va="bottom")
    if points_xy is not None and len(points_xy):
        ax.plot(points_xy[:, 0], points_xy[:, 1], ".", color=colours.REFLECTOR_POINT, ms=3, mec="white", mew=0.3)
    span = max(extent[1] - extent[0], extent[3] - extent[2])
    for sym, colour in ((surface_dips, SURFACE_DIP), (dips, MEASURED_DIP)):
        if sym is None:
            continue
        for x, y, strike, dip in zip(*sym):
            if not np.isfinite(strike):
                continue
            strike_dip_symbol(ax, x, y, strike, dip, span * 0.03, colour)
    if boreholes is not None:
        bx, by, names = boreholes
        ax.plot(bx, by, "o", color="k", mfc=colours.BOREHOLE, ms=6)
        for x, y, n in zip(bx, by, names):
            ax.annotate(printable(n, 40), (x, y), xytext=(4, 4), textcoords="offset points", fontsize=8)
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_aspect("equal")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.set_title(title, fontsize=10)
    plain_text(fig)  # before the layout measures the texts
    fig.tight_layout()
    return _png(fig)


def strike_dip_symbol(ax, x, y, strike_deg, dip_deg, size, colour, fontsize=7):
    """The geologic map symbol (FGDC-STD-013-2006): bar along strike, tick toward dip, dip value.

    ``size`` is the half-length of the strike bar in data units (m).
    """
    s = np.radians(strike_deg)
    d = np.radians(strike_deg + 90.0)
    ux, uy = np.sin(s), np.cos(s)
    ax.plot([x - size * ux, x + size * ux], [y - size * uy, y + size * uy], color=colour, lw=1.8)
    ax.plot([x, x + 0.4 * size * np.sin(d)], [y, y + 0.4 * size * np.cos(d)], color=colour, lw=1.8)
    ax.annotate(
        f"{dip_deg:.0f}",
        (x + 0.75 * size * np.sin(d), y + 0.75 * size * np.cos(d)),
        fontsize=fontsize,
        color=colour,
        ha="center",
        va="center",
    )


def raster_figure(grid_x_m, grid_y_m, values, label, title="", cmap=DIFFERENCE_CMAP, symmetric=True, dpi=90) -> bytes:
    """A single grid as an image (e.g. the difference between two surfaces)."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6.0, 5.0), dpi=dpi)
    gx, gy = np.asarray(grid_x_m), np.asarray(grid_y_m)
    v = np.asarray(values, float)
    if gy[0] < gy[-1]:
        v = v[::-1]
    lim = np.nanmax(np.abs(v)) if symmetric and np.any(np.isfinite(v)) else None
    im = ax.imshow(
        v,
        extent=(gx.min(), gx.max(), gy.min(), gy.max()),
        cmap=cmap,
        vmin=-lim if lim else None,
        vmax=lim if lim else None,
        interpolation="nearest",
    )
    fig.colorbar(im, ax=ax, shrink=0.8).set_label(label)
    ax.set_aspect("equal")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    ax.set_title(title, fontsize=9)
    plain_text(fig)  # before the layout measures the texts
    fig.tight_layout()
    return _png(fig)
