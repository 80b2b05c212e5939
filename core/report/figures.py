"""The report's figures (matplotlib, imported lazily, Agg canvas, no pyplot).

Every function returns PNG bytes, so the caller decides where they go (an
image embedded in ``report.html``, a page of a sheet): the site map, a raster,
a line's section, the variogram and the cross-validation scatter; the QC
figures of the gather fits are in :mod:`.qc_figures`. Figures are
:class:`matplotlib.figure.Figure` objects with their own canvas, never
pyplot's global state. matplotlib is optional for the core: without it
:class:`~.errors.MissingDependencyError` names it.
"""

from __future__ import annotations

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
#: matplotlib names of the shared ramps (registered by :func:`register_colour_maps`)
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


def label_halo():
    """A thin white outline for map labels, so a label stays readable on any colour of the map beneath it.

    Returns
    -------
    list
        matplotlib path effects, for a text's ``path_effects``.
    """
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=2.5, foreground="white")]


def label_every_contour(contour_lines) -> bool:
    """Whether every contour is labelled, not only the index ones: fewer than three index levels.

    The rule of the QGIS contour style (common practice: a reader must find a
    labelled contour near any point of the map).

    Parameters
    ----------
    contour_lines : sequence of (level, xy, is_index)
    """
    return len({float(level) for level, _xy, is_index in contour_lines if is_index}) < 3


def draw_lines(ax, lines, fontsize: float, zorder=None) -> None:
    """Draw the seismic lines ``{name: (n, 2) xy}`` on a map, each labelled at its first station.

    ``zorder``: drawing order of lines and labels (None: matplotlib's).
    """
    z = {} if zorder is None else {"zorder": zorder}
    for name, xy in sorted(lines.items()):
        ax.plot(xy[:, 0], xy[:, 1], "-", color=colours.LINE, lw=2.0, **z)
        ax.annotate(
            f"line {printable(name, 40)}",
            xy[0],
            fontsize=fontsize,
            color=colours.LINE,
            ha="right",
            va="bottom",
            path_effects=label_halo(),
            **z,
        )


def draw_contours(ax, contour_lines, colour, widths=(1.0, 0.4), fontsize: float = 7, zorder=None) -> None:
    """Draw contours on a map, each index contour (every contour, :func:`label_every_contour`) labelled.

    Parameters
    ----------
    ax : matplotlib Axes
    contour_lines : sequence of (level, xy, is_index)
        Levels (m) and (n, 2) vertices.
    colour : str
        Line colour.
    widths : (float, float)
        Line widths (points) of index and intermediate contours.
    fontsize : float
        Label size (points).
    zorder : float or None
        Drawing order of the lines; their labels one above (None: matplotlib's).
    """
    label_all = label_every_contour(contour_lines)
    label_z = {} if zorder is None else {"zorder": zorder + 1}
    line_z = {} if zorder is None else {"zorder": zorder}
    for level, xy, is_index in contour_lines:
        ax.plot(xy[:, 0], xy[:, 1], color=colour, lw=widths[0] if is_index else widths[1], **line_z)
        if (is_index or label_all) and len(xy) > 1:  # contours carry their value (m) on the map
            k = len(xy) // 2
            ax.text(
                xy[k, 0],
                xy[k, 1],
                f"{level:g}",
                fontsize=fontsize,
                ha="center",
                va="center",
                bbox={"boxstyle": "round,pad=0.1", "fc": "white", "ec": "none", "alpha": 0.8},
                **label_z,
            )


def _figure(width_in: float, height_in: float, dpi: float):
    """A new figure with an Agg canvas, the shared colour maps registered."""
    try:
        from .qc_figures import new_figure
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise MissingDependencyError("matplotlib", "QC figures and the report") from exc
    register_colour_maps()
    return new_figure(width_in, height_in, dpi)


def warm_up() -> None:
    """Do once, ahead of the drawings, what the first figure of a process would: fonts, colour maps, backends.

    A process that forks the drawing processes calls this first, so that each
    of them starts with the fonts loaded (regular, bold and monospace, as the
    figures and sheets use them) and the shared colour maps registered,
    instead of loading them again.
    """
    import io

    fig = _figure(1.0, 1.0, 20.0)  # the colour maps registered
    fig.text(0.1, 0.1, "0.5 m ±σ", fontsize=7)
    fig.text(0.1, 0.5, "Legend", fontsize=10, fontweight="bold")
    fig.text(0.1, 0.8, "V = 1800 m/s", fontsize=7.5, family="monospace")
    for fmt in ("png", "pdf"):
        fig.savefig(io.BytesIO(), format=fmt)


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
    from .qc_figures import png_bytes

    plain_text(fig)
    return png_bytes(fig)


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
    """Site map: depth raster, contours (labelled in m), lines, points, strike-and-dip symbols.

    ``contour_lines`` is a list of (level, (n,2) xy array, is_index);
    ``station_lines`` a dict line -> (n,2) xy; ``dips`` and ``surface_dips``
    tuples (x, y, strike_deg, dip_deg). The strike-and-dip symbol is the one
    of geologic maps (FGDC-STD-013-2006): a long bar along strike, a short
    tick from its middle toward the dip direction, the dip value beside it.
    """
    fig = _figure(8.0, 7.0, dpi)
    ax = fig.add_subplot()
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
    draw_contours(ax, contour_lines, colours.CONTOUR_DEPTH)  # labelled as on the map sheet
    draw_lines(ax, station_lines, fontsize=8)
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
            ax.annotate(
                printable(n, 40),
                (x, y),
                xytext=(4, 4),
                textcoords="offset points",
                fontsize=8,
                path_effects=label_halo(),
            )
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
    fig = _figure(6.0, 5.0, dpi)
    ax = fig.add_subplot()
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
    ax.set_xlabel("easting (m)", fontsize=8)
    ax.set_ylabel("northing (m)", fontsize=8)
    ax.set_title(title, fontsize=9)
    plain_text(fig)  # before the layout measures the texts
    fig.tight_layout()
    return _png(fig)


def _small_axes(ax, xlabel: str, ylabel: str) -> None:
    ax.set_xlabel(xlabel, fontsize=8)
    ax.set_ylabel(ylabel, fontsize=8)
    ax.tick_params(labelsize=7, length=3)
    ax.grid(True, color="#e4e4e4", lw=0.6)
    ax.set_axisbelow(True)
    ax.ticklabel_format(useOffset=False, style="plain")


class SectionFigure:
    """A line's section, built once and redrawn per line with :meth:`draw`.

    The ground, the reflector points with ±2σ bars (flagged gathers as ×) and
    the mapped surface with its ±2σ band, against distance along the line.

    Parameters
    ----------
    dpi : float
        Dots per inch (1000 x 330 px at 100).

    Attributes
    ----------
    figure : matplotlib.figure.Figure
    ax : matplotlib.axes.Axes
    """

    def __init__(self, dpi: float = 100.0):
        fig = _figure(10.0, 3.3, dpi)
        self.figure = fig
        self.ax = ax = fig.add_axes((0.07, 0.16, 0.9, 0.64))
        _small_axes(ax, "distance along line (m)", "elevation (m)")
        self.band = None
        self.surface = ax.plot([], [], color=FIT, lw=1.6, label="mapped surface")[0]
        self.ground = ax.plot([], [], color=colours.GROUND, lw=1.6, label="ground")[0]
        self.points = ax.errorbar(
            [0.0], [0.0], yerr=[0.0], fmt="o", color=USED, ms=3.5, elinewidth=1.0, label="reflector points (±2σ)"
        )
        self.flagged = ax.plot([], [], "x", color=REJECTED, ms=5, mew=1.4, label="flagged gathers")[0]
        self.title = fig.text(0.01, 0.96, "", fontsize=11, fontweight="bold", va="top")

    def draw(self, distance_m, ground_m, points, surface=None, title: str = "") -> SectionFigure:
        """Show one line.

        Parameters
        ----------
        distance_m, ground_m : (m,) array_like
            Chainage along the line (m) and the ground elevation there (m).
        points : tuple
            (distance_m, elevation_m, sigma_m, ok) of the reflector points (m; ``ok`` bool).
        surface : tuple, optional
            (distance_m, elevation_m, sigma_m) of the mapped surface along the line (m).
        title : str
            Heading.

        Returns
        -------
        SectionFigure
            ``self``.
        """
        from .qc_figures import data_range

        ax = self.ax
        d, z, s, ok = (np.asarray(v) for v in points)
        d, z, s, ok = d.astype(float), z.astype(float), s.astype(float), ok.astype(bool)
        dist, ground = np.asarray(distance_m, float), np.asarray(ground_m, float)
        values = [ground, z + 2 * s, z - 2 * s]
        if self.band is not None:
            self.band.remove()
            self.band = None
        handles = [self.ground, self.points]
        if surface is not None:
            sd, sz, ss = (np.asarray(v, float) for v in surface)
            values += [sz + 2 * ss, sz - 2 * ss]
            good = np.isfinite(sz) & np.isfinite(ss)
            self.band = ax.fill_between(
                sd, sz - 2 * ss, sz + 2 * ss, where=good, color=FIT, alpha=0.2, lw=0, label="±2σ of the surface"
            )
            self.surface.set_data(sd, sz)
            handles += [self.surface, self.band]
        else:
            self.surface.set_data([], [])
        self.ground.set_data(dist, ground)
        _set_errorbar(self.points, d[ok], z[ok], 2 * s[ok])
        self.flagged.set_data(d[~ok], z[~ok])
        if np.any(~ok):
            handles.append(self.flagged)
        ax.set_xlim(*data_range(np.r_[dist, d]))
        ax.set_ylim(*data_range(np.concatenate(values)))
        legend = ax.legend(
            handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.01), ncol=len(handles), fontsize=8, frameon=False
        )
        for t in legend.get_texts():
            t.set_parse_math(False)
        self.title.set_text(title)
        self.title.set_parse_math(False)
        return self

    def png(self) -> bytes:
        """The figure as PNG bytes."""
        from .qc_figures import png_bytes

        return png_bytes(self.figure)


def _set_errorbar(container, x, y, half) -> None:
    """Move an errorbar container's markers and vertical bars to (x, y ± half)."""
    line, _caps, (bars,) = container.lines[0], container.lines[1], container.lines[2]
    line.set_data(x, y)
    bars.set_segments([((a, b - c), (a, b + c)) for a, b, c in zip(x, y, half)])


def variogram_figure(lag_m, semivariance, n_pairs, model=None, title: str = "", dpi: float = 100.0) -> bytes:
    """Experimental semivariogram (points sized by their pair count) and the fitted model, as PNG.

    Parameters
    ----------
    lag_m, semivariance, n_pairs : (k,) array_like
        Lag (m), semivariance (m²) and number of pairs of each lag class.
    model : callable, optional
        The fitted model, ``model(h)`` in m² at lag ``h`` (m), with a ``model`` name attribute.
    title : str
        Heading.
    dpi : float
        Dots per inch (520 x 360 px at 100).

    Returns
    -------
    bytes
        PNG.
    """
    lag = np.asarray(lag_m, float)
    gam = np.asarray(semivariance, float)
    n = np.asarray(n_pairs, float)
    ok = np.isfinite(gam) & np.isfinite(lag) & (n > 0)
    h = np.linspace(0.0, (lag[ok].max() if ok.any() else 1.0) * 1.05, 120)
    curve = np.asarray(model(h), float) if model is not None else np.full(len(h), np.nan)
    top = np.nanmax(np.r_[gam[ok], curve, 0.0]) if ok.any() or np.isfinite(curve).any() else 1.0
    fig = _figure(5.2, 3.6, dpi)
    ax = fig.add_axes((0.14, 0.14, 0.82, 0.66))
    _small_axes(ax, "lag (m)", "semivariance (m²)")
    size = (2.0 + 5.0 * np.sqrt(n[ok] / max(n[ok].max(), 1.0))) ** 2 if ok.any() else 4.0
    ax.scatter(lag[ok], gam[ok], s=size, color=USED, label="experimental (size: pairs)", zorder=3)
    if model is not None:
        ax.plot(h, curve, color=FIT, lw=1.8, label=f"{getattr(model, 'model', '')} model".strip())
    ax.set_xlim(0.0, float(h[-1]) or 1.0)
    ax.set_ylim(0.0, 1.08 * top or 1.0)
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.01), ncol=2, fontsize=8, frameon=False)
    fig.text(0.01, 0.97, title, fontsize=10, fontweight="bold", va="top")
    return _png(fig)


def scatter_figure(x, y, xlabel: str, ylabel: str, title: str = "", one_to_one: bool = True, dpi=100.0) -> bytes:
    """A scatter plot with the 1:1 line (e.g. cross-validation: datum against its estimate from the others), as PNG.

    Parameters
    ----------
    x, y : (n,) array_like
        The values (same unit on both axes when ``one_to_one``).
    xlabel, ylabel, title : str
        Axis labels with units, and the heading.
    one_to_one : bool
        Draw the line y = x over the common range.
    dpi : float
        Dots per inch (440 x 420 px at 100).

    Returns
    -------
    bytes
        PNG.
    """
    from .qc_figures import data_range

    x, y = np.asarray(x, float), np.asarray(y, float)
    both = np.r_[x, y]
    fig = _figure(4.4, 4.2, dpi)
    ax = fig.add_axes((0.17, 0.13, 0.78, 0.76))
    _small_axes(ax, xlabel, ylabel)
    xlim = data_range(both if one_to_one else x)
    ylim = data_range(both if one_to_one else y)
    if one_to_one and np.isfinite(both).any():
        ax.plot(xlim, xlim, color="#888888", lw=1.0)
    ax.plot(x, y, "o", color=USED, ms=3.5)
    ax.set_xlim(*xlim)
    ax.set_ylim(*ylim)
    fig.text(0.01, 0.97, title, fontsize=10, fontweight="bold", va="top")
    return _png(fig)
