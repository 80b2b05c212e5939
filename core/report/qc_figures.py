"""QC figures of the gather fits, drawn by matplotlib: one per line, and one per gather on request.

A survey has dozens to thousands of gathers. Building a new matplotlib figure
for each was most of a run's time, so the figures here are built once and
their artists' data updated between gathers or lines (:class:`GatherFigure`,
:class:`LineFigure`); only drawing and encoding the image is paid per figure.
The figures are drawn with :class:`matplotlib.figure.Figure` directly (Agg
canvas for files, the Qt canvas in the QGIS panel), never through pyplot's
global state.

* The **line figure** (every line, by default): all picks of the line's
  gathers in the t–x plane with each gather's fitted curve (time increasing
  downward, as on a record), and each pick's residual, picked minus fitted
  time, coloured at its offset on the row of its shot, so a bad gather shows
  as a row and a bad receiver as a column.
* The **gather figure** (flagged gathers, or every gather on request, and the
  QGIS panel): t² against x², where a horizontal reflector plots as a straight
  line of slope 1/V² and intercept t0² (Green 1938) and the two sides of a
  split spread over a dipping reflector as two branches (▲ forward, ▼ reverse
  offsets); t against x with the fitted curve; the residuals.

Picks used by the fit (filled), rejected by it as mispicks (×) and excluded by
the interpreter (pick edits, ○) are told apart, in the colours of
:mod:`core.colours`.

References
----------
Green, C. H., 1938. Velocity determinations by means of reflection profiles.
Geophysics 3, 295-305.
"""

from __future__ import annotations

from typing import Optional, Sequence, Tuple

import numpy as np

from .. import colours
from ..errors import MissingDependencyError

__all__ = ["GatherFigure", "LineFigure", "data_range", "new_figure", "png_bytes"]

#: Marker of each pick class: (marker, size (pt), face colour, edge colour)
_USED = dict(marker="o", ms=3.6, color=colours.PICK_USED, ls="none")
_FWD = dict(marker="^", ms=4.2, color=colours.PICK_USED, ls="none")
_REV = dict(marker="v", ms=4.2, color=colours.PICK_USED, ls="none")
_REJ = dict(marker="x", ms=5.0, mew=1.4, color=colours.PICK_REJECTED, ls="none")
_EXC = dict(marker="o", ms=5.2, mew=1.1, mfc="none", mec=colours.PICK_EXCLUDED, ls="none")
_FONT = 8.0  # pt: ticks and labels of the small panels


def new_figure(width_in: float, height_in: float, dpi: float, layout: Optional[str] = None):
    """A matplotlib :class:`~matplotlib.figure.Figure` with an Agg canvas (no pyplot).

    Parameters
    ----------
    width_in, height_in : float
        Size (inches).
    dpi : float
        Dots per inch of the raster output.
    layout : str, optional
        matplotlib's layout engine (``"constrained"``), or None for fixed axes positions.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    MissingDependencyError
        Without matplotlib.
    """
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise MissingDependencyError("matplotlib", "QC figures and the report") from exc
    fig = Figure(figsize=(width_in, height_in), dpi=dpi, layout=layout)  # type: ignore[arg-type]
    FigureCanvasAgg(fig)
    return fig


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes at its own size and dpi, reproducible (:func:`~.drawing.figure_png`)."""
    from .drawing import figure_png

    return figure_png(fig)


def data_range(values, pad: float = 0.06) -> Tuple[float, float]:
    """(low, high) of the finite ``values``, widened by ``pad`` of the span on each side.

    A single value gets a span of its magnitude (at least 1); no finite value gives (0, 1).

    Examples
    --------
    >>> data_range([0.0, 10.0], pad=0.1)
    (-1.0, 11.0)
    >>> data_range([np.nan])
    (0.0, 1.0)
    """
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if not v.size:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return lo - pad * span, hi + pad * span


def _style(ax, title: str, xlabel: str, ylabel: str) -> None:
    ax.set_title(title, fontsize=_FONT + 1, loc="left")
    ax.set_xlabel(xlabel, fontsize=_FONT)
    ax.set_ylabel(ylabel, fontsize=_FONT)
    ax.tick_params(labelsize=_FONT - 1, length=3)
    ax.grid(True, color="#e4e4e4", lw=0.6)
    ax.set_axisbelow(True)
    for t in (ax.title, ax.xaxis.label, ax.yaxis.label):
        t.set_parse_math(False)  # labels are data: never mathtext


def _xy(x, y, keep=None):
    """Finite (x, y) pairs of ``keep`` (all when None), as two arrays."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    ok = np.isfinite(x) & np.isfinite(y)
    if keep is not None:
        ok &= np.asarray(keep, bool)
    return x[ok], y[ok]


def _picks(offset_m, time_s, model_time_s, rejected, excluded) -> tuple:
    """(offset m, time ms, fitted time ms, excluded, rejected, used) of picks, as drawn.

    An excluded pick is drawn as excluded even when the fit also rejected it.
    """
    exc = np.asarray(excluded, bool)
    rej = np.asarray(rejected, bool) & ~exc
    return (
        np.asarray(offset_m, float),
        np.asarray(time_s, float) * 1e3,
        np.asarray(model_time_s, float) * 1e3,
        exc,
        rej,
        ~(rej | exc),
    )


class GatherFigure:
    """The QC figure of one gather, built once and redrawn for each gather with :meth:`draw`.

    Parameters
    ----------
    figure : matplotlib.figure.Figure, optional
        Draw into this figure (e.g. one on the QGIS panel's Qt canvas, with a
        layout engine); by default a new 10 x 3.6 in figure with an Agg canvas.
    layout : str
        ``"row"``: the three panels side by side, the parameters at the top
        right (the report and ``qc/`` files); ``"grid"``: t–x across the top,
        t²–x² and the residuals below (a squarish panel), no parameters.
    dpi : float
        Dots per inch of the new figure (1000 x 360 px at 100).

    Attributes
    ----------
    figure : matplotlib.figure.Figure
    axes : tuple
        The t²–x², t–x and residual axes.

    Examples
    --------
    >>> x = np.array([-20.0, -10.0, 10.0, 20.0])
    >>> t = np.sqrt(x**2 + 40.0**2) / 1800.0
    >>> fig = GatherFigure().draw(x, t, t, np.zeros(4, bool), np.zeros(4, bool), "flat", "")
    >>> fig.panel_data("tx", "used")[0].tolist()
    [-20.0, -10.0, 10.0, 20.0]
    """

    def __init__(self, figure=None, layout: str = "row", dpi: float = 100.0):
        if layout not in ("row", "grid"):
            raise ValueError(f"layout {layout!r}: expected 'row' or 'grid'")
        fig = figure if figure is not None else new_figure(10.0, 3.6, dpi)
        self.figure = fig
        self.layout = layout
        if layout == "row":
            # fixed positions (figure fractions) for 10 x 3.6 in: no layout engine to run per figure
            boxes = ((0.065, 0.15, 0.25, 0.56), (0.395, 0.15, 0.25, 0.56), (0.725, 0.15, 0.255, 0.56))
            ax_t2, ax_tx, ax_res = (fig.add_axes(b) for b in boxes)
        else:
            gs = fig.add_gridspec(2, 2, height_ratios=(1.15, 1.0))
            ax_tx = fig.add_subplot(gs[0, :])
            ax_t2 = fig.add_subplot(gs[1, 0])
            ax_res = fig.add_subplot(gs[1, 1])
        self.axes = (ax_t2, ax_tx, ax_res)
        _style(ax_t2, "t²–x² (▲ forward, ▼ reverse)", "x² (m²)", "t² (ms²)")
        _style(ax_tx, "t–x", "offset along line x (m)", "two-way time t (ms)")
        _style(ax_res, "residuals", "offset along line x (m)", "residual (ms)")
        ax_t2.ticklabel_format(style="sci", scilimits=(-3, 4), useMathText=False)
        fit = dict(color=colours.FIT_CURVE, lw=1.6)
        self._art = {
            "t2": {
                "fit_fwd": ax_t2.plot([], [], **fit)[0],
                "fit_rev": ax_t2.plot([], [], **fit)[0],
                "fwd": ax_t2.plot([], [], **_FWD)[0],
                "rev": ax_t2.plot([], [], **_REV)[0],
                "excluded": ax_t2.plot([], [], **_EXC)[0],
                "rejected": ax_t2.plot([], [], **_REJ)[0],
            },
            "tx": {
                "fit": ax_tx.plot([], [], **fit)[0],
                "used": ax_tx.plot([], [], **_USED)[0],
                "excluded": ax_tx.plot([], [], **_EXC)[0],
                "rejected": ax_tx.plot([], [], **_REJ)[0],
            },
            "res": {
                "zero": ax_res.axhline(0.0, color="#888888", lw=1.0),
                "used": ax_res.plot([], [], **_USED)[0],
                "excluded": ax_res.plot([], [], **_EXC)[0],
                "rejected": ax_res.plot([], [], **_REJ)[0],
            },
        }
        tx = self._art["tx"]
        handles = (tx["used"], tx["rejected"], tx["excluded"], tx["fit"])
        labels = ("pick used", "rejected by the fit", "excluded (pick edit)", "fit")
        if layout == "row":
            self.title = fig.text(0.01, 0.955, "", fontsize=11, fontweight="bold", va="top")
            self.params = fig.text(0.99, 0.965, "", fontsize=7.5, family="monospace", va="top", ha="right")
            self.key = fig.legend(
                handles,
                labels,
                loc="center left",
                bbox_to_anchor=(0.01, 0.86),
                ncol=4,
                fontsize=_FONT,
                frameon=False,
                handlelength=1.6,
                columnspacing=1.2,
            )
        else:  # the key inside t-x, where it hides the fewest picks (one figure, redrawn on demand)
            self.title = ax_tx.set_title("", fontsize=_FONT + 1, fontweight="bold", loc="left")
            self.params = fig.text(0.0, 0.0, "", visible=False)
            self.key = ax_tx.legend(handles, labels, loc="best", ncol=2, fontsize=_FONT - 1, framealpha=0.85)
        for t in (self.title, self.params, *self.key.get_texts()):
            t.set_parse_math(False)

    def draw(
        self,
        offset_m,
        time_s,
        model_time_s,
        rejected,
        excluded,
        title: str,
        params_text: str = "",
    ) -> GatherFigure:
        """Show one gather: set every artist's data and the axes' limits (drawn when saved or shown).

        Parameters
        ----------
        offset_m : (n,) array_like
            Signed offset along the line, receiver minus shot (m).
        time_s : (n,) array_like
            Picked two-way times (s), after any pick edits.
        model_time_s : (n,) array_like
            Fitted times at the same receivers (s), from the real 3D geometry,
            so the curve honours topography and crooked lines.
        rejected, excluded : (n,) array_like of bool
            Picks the fit rejected as mispicks; picks the interpreter excluded
            (an excluded pick is drawn as excluded even when also rejected).
        title : str
            Heading (line, shot, reflector, status).
        params_text : str
            The fitted parameters, one per line (shown in the ``row`` layout).

        Returns
        -------
        GatherFigure
            ``self``.
        """
        x, t, tm, exc, rej, used = _picks(offset_m, time_s, model_time_s, rejected, excluded)
        order = np.argsort(x, kind="stable")
        a = self._art
        ax_t2, ax_tx, ax_res = self.axes

        # t^2 - x^2: forward and reverse branches apart (they differ over a dipping reflector)
        x2, t2, m2 = x**2, t**2, tm**2
        for key, side in (("fit_fwd", x >= 0), ("fit_rev", x < 0)):
            o = np.argsort(x2[side], kind="stable")
            a["t2"][key].set_data(*_xy(x2[side][o], m2[side][o]))
        a["t2"]["fwd"].set_data(*_xy(x2, t2, used & (x >= 0)))
        a["t2"]["rev"].set_data(*_xy(x2, t2, used & (x < 0)))
        a["t2"]["excluded"].set_data(*_xy(x2, t2, exc))
        a["t2"]["rejected"].set_data(*_xy(x2, t2, rej))
        ax_t2.set_xlim(*data_range(np.r_[x2, 0.0]))
        ax_t2.set_ylim(*data_range(np.r_[t2, m2]))

        # t - x, time down
        a["tx"]["fit"].set_data(*_xy(x[order], tm[order]))
        a["tx"]["used"].set_data(*_xy(x, t, used))
        a["tx"]["excluded"].set_data(*_xy(x, t, exc))
        a["tx"]["rejected"].set_data(*_xy(x, t, rej))
        ax_tx.set_xlim(*data_range(x))
        lo, hi = data_range(np.r_[t, tm])
        ax_tx.set_ylim(hi, lo)

        # residuals; rejected picks may lie far off: drawn at the edge of the scale
        r = t - tm
        shown = np.isfinite(r) & ~rej
        lim = max(1.0, 1.2 * float(np.max(np.abs(r[shown])))) if np.any(shown) else 1.0
        a["res"]["used"].set_data(*_xy(x, r, used))
        a["res"]["excluded"].set_data(*_xy(x, r, exc))
        a["res"]["rejected"].set_data(*_xy(x, np.clip(r, -0.97 * lim, 0.97 * lim), rej))
        ax_res.set_xlim(*data_range(x))
        ax_res.set_ylim(-lim, lim)
        ax_res.set_title(
            "residuals" + (" (rejected may lie off scale)" if self.layout == "row" else ""),
            fontsize=_FONT + 1,
            loc="left",
        )

        self.title.set_text(title)
        self.params.set_text(params_text if self.layout == "row" else "")
        return self

    def panel_data(self, panel: str, what: str) -> Tuple[np.ndarray, np.ndarray]:
        """The (x, y) data an artist shows, for checks.

        Parameters
        ----------
        panel : str
            ``"t2"`` (t²–x²: m², ms²), ``"tx"`` (m, ms) or ``"res"`` (m, ms).
        what : str
            ``t2``: fit_fwd, fit_rev, fwd, rev, excluded, rejected; ``tx``: fit,
            used, excluded, rejected; ``res``: used, excluded, rejected.

        Returns
        -------
        (ndarray, ndarray)
        """
        line = self._art[panel][what]
        return np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float)

    def png(self) -> bytes:
        """The figure as PNG bytes."""
        return png_bytes(self.figure)


class LineFigure:
    """The QC figure of every gather of one line, built once and redrawn per line with :meth:`draw`.

    Left, the picks of every gather against offset with each gather's fitted
    curve (time down); right, every pick's residual (picked minus fitted time,
    ms) coloured at its offset on its shot's row (the shot's position along the
    line), so a poorly fitted gather shows as a row and a bad receiver as a
    column.

    Parameters
    ----------
    dpi : float
        Dots per inch (1000 x 400 px at 100).

    Attributes
    ----------
    figure : matplotlib.figure.Figure
    axes : tuple
        The t–x and residual axes.
    """

    def __init__(self, dpi: float = 100.0):
        from matplotlib.collections import LineCollection
        from matplotlib.colors import LinearSegmentedColormap

        fig = new_figure(10.0, 4.0, dpi)
        self.figure = fig
        ax_tx = fig.add_axes((0.065, 0.13, 0.39, 0.68))
        ax_res = fig.add_axes((0.56, 0.13, 0.35, 0.68))
        cax = fig.add_axes((0.925, 0.13, 0.012, 0.68))
        self.axes = (ax_tx, ax_res)
        _style(ax_tx, "t–x, every gather with its fit", "offset along line x (m)", "two-way time t (ms)")
        _style(ax_res, "residual of each pick, by shot", "offset along line x (m)", "shot (distance along line, m)")
        self.curves = LineCollection([], colors=colours.FIT_CURVE, linewidths=1.0, zorder=3)
        ax_tx.add_collection(self.curves)
        self.used = ax_tx.plot([], [], **dict(_USED, ms=2.0))[0]
        self.excluded = ax_tx.plot([], [], zorder=4, **_EXC)[0]
        self.rejected = ax_tx.plot([], [], zorder=4, **_REJ)[0]
        cmap = LinearSegmentedColormap.from_list("rockhead_residual", [(p, c) for p, c in colours.DIFFERENCE_RAMP])
        self.residual = ax_res.scatter([], [], c=[], s=9.0, cmap=cmap, marker="s", linewidths=0)
        self.res_excluded = ax_res.plot([], [], **_EXC)[0]
        self.res_rejected = ax_res.plot([], [], **_REJ)[0]
        bar = fig.colorbar(self.residual, cax=cax)
        bar.set_label("residual (ms)", fontsize=_FONT)
        bar.ax.tick_params(labelsize=_FONT - 1)
        self.title = fig.text(0.01, 0.965, "", fontsize=11, fontweight="bold", va="top")
        self.key = fig.legend(
            (self.used, self.rejected, self.excluded, self.curves),
            ("pick used", "rejected by the fit", "excluded (pick edit)", "fitted curve of each gather"),
            loc="center left",
            bbox_to_anchor=(0.01, 0.875),
            ncol=4,
            fontsize=_FONT,
            frameon=False,
            handlelength=1.6,
        )
        for t in (self.title, bar.ax.yaxis.label, *self.key.get_texts()):
            t.set_parse_math(False)

    def draw(
        self,
        offset_m,
        time_s,
        model_time_s,
        rejected,
        excluded,
        gather,
        shot_position_m,
        shot_labels: Sequence[str],
        title: str,
        residual_limit_ms: Optional[float] = None,
    ) -> LineFigure:
        """Show one line: every pick of its gathers, their fitted curves and residuals.

        Parameters
        ----------
        offset_m, time_s, model_time_s, rejected, excluded : (n,) array_like
            Per pick, as in :meth:`GatherFigure.draw` (m, s, s, bool, bool).
        gather : (n,) array_like of int
            The gather of each pick, 0 .. k-1.
        shot_position_m : (k,) array_like
            Each gather's shot position along the line (m): its row in the residual panel.
        shot_labels : sequence of str
            Each gather's shot label (tick labels of the rows when there are at most 30).
        title : str
            Heading.
        residual_limit_ms : float, optional
            Half-width of the residual colour scale (ms); default the largest
            residual of a pick not rejected, at least 0.5 ms.

        Returns
        -------
        LineFigure
            ``self``.
        """
        x, t, tm, exc, rej, used = _picks(offset_m, time_s, model_time_s, rejected, excluded)
        g = np.asarray(gather, int)
        row = np.asarray(shot_position_m, float)[g] if len(g) else np.zeros(0)
        ax_tx, ax_res = self.axes

        segments = []
        order = np.lexsort((x, g))
        bounds = np.flatnonzero(np.diff(np.r_[-1, g[order], -2]))
        for a, b in zip(bounds[:-1], bounds[1:]):
            sel = order[a:b]
            ok = np.isfinite(x[sel]) & np.isfinite(tm[sel])
            if ok.sum() >= 2:
                segments.append(np.column_stack([x[sel][ok], tm[sel][ok]]))
        self.curves.set_segments(segments)
        self.used.set_data(*_xy(x, t, used))
        self.excluded.set_data(*_xy(x, t, exc))
        self.rejected.set_data(*_xy(x, t, rej))
        ax_tx.set_xlim(*data_range(x))
        lo, hi = data_range(np.r_[t, tm])
        ax_tx.set_ylim(hi, lo)

        r = t - tm
        shown = np.isfinite(r) & np.isfinite(row) & ~rej
        if residual_limit_ms is None:
            residual_limit_ms = max(0.5, float(np.max(np.abs(r[shown])))) if shown.any() else 0.5
        lim = float(residual_limit_ms)
        self.residual.set_offsets(np.column_stack([x[shown], row[shown]]))
        self.residual.set_array(np.clip(r[shown], -lim, lim))
        self.residual.set_clim(-lim, lim)
        self.res_excluded.set_data(*_xy(x, row, exc))
        self.res_rejected.set_data(*_xy(x, row, rej))
        ax_res.set_xlim(*data_range(x))
        ax_res.set_ylim(*data_range(row, pad=0.05))
        labels = list(shot_labels)
        if 0 < len(labels) <= 30:
            ax_res.set_yticks(np.asarray(shot_position_m, float), labels)
            for text in ax_res.get_yticklabels():
                text.set_parse_math(False)  # shot labels are data: never mathtext
            ax_res.set_ylabel("shot", fontsize=_FONT)
        else:
            from matplotlib.ticker import AutoLocator, ScalarFormatter

            ax_res.yaxis.set_major_locator(AutoLocator())
            ax_res.yaxis.set_major_formatter(ScalarFormatter())
            ax_res.set_ylabel("shot (distance along line, m)", fontsize=_FONT)
        self.title.set_text(title)
        return self

    def png(self) -> bytes:
        """The figure as PNG bytes."""
        return png_bytes(self.figure)
