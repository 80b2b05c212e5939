"""Parts shared by the printed hand-off sheets (map sheet, sections): page, title block, cautions.

Sheets are ISO A3 landscape (420 x 297 mm), drawn with matplotlib at a
stated scale. Files are deterministic (no creation date, fixed SVG ids), so
two runs on the same inputs give the same bytes.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from typing import Optional

from ..errors import MissingDependencyError
from . import figures

__all__ = [
    "A3_LANDSCAPE_MM",
    "CAUTION_LINES",
    "TITLE_VALUE_CHARS",
    "SheetBox",
    "SheetInfo",
    "draw_cautions",
    "draw_title_block",
    "mm_axes",
    "new_sheet",
    "nice_scale",
    "save_figure",
]

A3_LANDSCAPE_MM = (420.0, 297.0)
MM_PER_INCH = 25.4

CAUTION_LINES = (
    "CAUTION: a seismic depth map is an interpretation with stated uncertainty (sigma shown).",
    "It does not replace borings: check it against borings before relying on it.",
    "Designs that rely on it must be signed off under local codes by licensed professionals.",
)

#: Denominators of the printed scale, 1-1.25-2-2.5-5 x 10^k (common practice for site plans).
_SCALE_STEPS = (1.0, 1.25, 2.0, 2.5, 5.0)


@dataclass(frozen=True)
class SheetInfo:
    """What the title block states."""

    survey: str
    issued: str  # ISO date of issue
    software: str  # "Rockhead 0.1.0"
    crs: str  # "EPSG:32633 (WGS 84 / UTM zone 33N)"
    vertical_datum: Optional[str] = None  # None: "vertical datum not stated"
    survey_date: Optional[str] = None
    method: str = ""
    cell_size_m: Optional[float] = None
    extra: tuple = field(default_factory=tuple)  # (label, value) pairs


def _figure(width_in: float, height_in: float):
    """A new figure with an Agg canvas (no pyplot), the shared colour maps registered."""
    try:
        from .qc_figures import new_figure
    except ImportError as exc:  # pragma: no cover - depends on the machine
        raise MissingDependencyError("matplotlib", "the map sheet and sections") from exc
    from .figures import register_colour_maps

    register_colour_maps()
    return new_figure(width_in, height_in, 100)


def nice_scale(denominator: float) -> int:
    """Smallest round scale denominator (1, 1.25, 2, 2.5, 5 x 10^k) not below ``denominator``.

    >>> [nice_scale(v) for v in (180, 900, 1001, 2400, 4000)]
    [200, 1000, 1250, 2500, 5000]
    """
    if not denominator > 0:
        return 1
    e = math.floor(math.log10(denominator))
    for k in (e, e + 1):
        for m in _SCALE_STEPS:
            v = m * 10.0**k
            if v >= denominator * (1 - 1e-9):
                return round(v)
    return round(10.0 ** (e + 1))  # pragma: no cover


def new_sheet(size_mm=A3_LANDSCAPE_MM):
    """A blank sheet with a thin border 8 mm inside the paper edge."""
    w, h = size_mm
    import matplotlib

    fig = _figure(w / MM_PER_INCH, h / MM_PER_INCH)
    edge = matplotlib.rcParams["axes.edgecolor"]
    # the sheet's first artist (fig.artists[0]), drawn under every axes
    SheetBox(fig, (8, 8, w - 16, h - 16), size_mm).rectangle(
        0, 0, 1, 1, facecolor="none", edgecolor=edge, lw=0.8, zorder=-1
    )
    return fig


def mm_axes(fig, box_mm, size_mm=A3_LANDSCAPE_MM, **kwargs):
    """Axes at (left, bottom, width, height) in millimetres from the sheet's lower-left corner."""
    w, h = size_mm
    left, bottom, width, height = box_mm
    return fig.add_axes((left / w, bottom / h, width / w, height / h), **kwargs)


class SheetBox:
    """A box of the sheet at (left, bottom, width, height) mm, drawn into by figure-level artists.

    The legend, scale, cautions and title block are boxes of text and
    simple shapes; axes of their own would cost their construction (ticks,
    spines, clip paths) for nothing. Coordinates inside the box run from 0 to
    ``limits`` (1 x 1 by default: the axes fraction; the scale bar's box is
    laid out in millimetres), exactly as an axes with those limits maps them.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    box_mm : (float, float, float, float)
        Left, bottom, width, height (mm from the sheet's lower-left corner).
    size_mm : (float, float)
        The sheet's width and height (mm).
    limits : (float, float)
        The box's coordinate span along x and y.
    """

    def __init__(self, fig, box_mm, size_mm=A3_LANDSCAPE_MM, limits=(1.0, 1.0)):
        from matplotlib.transforms import Affine2D, Bbox, BboxTransformTo, TransformedBbox

        w, h = size_mm
        left, bottom, width, height = box_mm
        self.figure = fig
        self.bbox = Bbox.from_bounds(left / w, bottom / h, width / w, height / h)  # figure fraction
        to_figure = BboxTransformTo(TransformedBbox(self.bbox, fig.transFigure))
        self.transform = (
            to_figure if tuple(limits) == (1.0, 1.0) else Affine2D().scale(1.0 / limits[0], 1.0 / limits[1]) + to_figure
        )

    def text(self, x, y, s, **kwargs):
        """A text at (x, y) of the box (a figure text: :func:`~.figures.plain_text` finds it)."""
        return self.figure.text(x, y, s, transform=self.transform, **kwargs)

    def line(self, xs, ys, **kwargs):
        """A line through the points (xs, ys) of the box."""
        from matplotlib.lines import Line2D

        return self.figure.add_artist(Line2D(xs, ys, transform=self.transform, **kwargs))

    def rectangle(self, x, y, width, height, **kwargs):
        """A rectangle with its lower-left corner at (x, y) of the box."""
        from matplotlib.patches import Rectangle

        return self.figure.add_artist(Rectangle((x, y), width, height, transform=self.transform, **kwargs))

    def framed(self, facecolor="none") -> SheetBox:
        """Draw the box's outline (as an axes' spines: 0.8 pt, black) over a fill of ``facecolor``."""
        import matplotlib

        self.rectangle(0.0, 0.0, 1.0, 1.0, facecolor=facecolor, edgecolor="none", zorder=0.5)
        self.rectangle(
            0.0,
            0.0,
            1.0,
            1.0,
            facecolor="none",
            edgecolor=matplotlib.rcParams["axes.edgecolor"],
            lw=matplotlib.rcParams["axes.linewidth"],
            zorder=2.5,
        )
        return self

    def arrow(self, tip, tail, **arrowprops):
        """An arrow from ``tail`` to ``tip`` (points of the box), drawn as matplotlib annotates one."""
        from matplotlib.text import Annotation

        return self.figure.add_artist(
            Annotation(
                "", xy=tip, xytext=tail, xycoords=self.transform, textcoords=self.transform, arrowprops=arrowprops
            )
        )

    def legend(self, handles, **kwargs):
        """A legend placed in the box as an axes there would place it (``loc`` relative to the box)."""
        return self.figure.legend(
            handles=handles, bbox_to_anchor=self.bbox, bbox_transform=self.figure.transFigure, **kwargs
        )


#: Characters of a title-block value that fit beside its key; a longer value is shortened with "...".
TITLE_VALUE_CHARS = 52


def draw_title_block(box: SheetBox, info: SheetInfo, title: str, scale_text: str = "", title_chars: int = 44) -> None:
    """Fill the framed ``box`` with the title block: title, survey, dates, software, CRS, datum, method, cell."""
    import textwrap

    box.framed()
    title = "\n".join(textwrap.wrap(title, title_chars)[:2])
    rows = [
        ("survey", info.survey),
        ("surveyed", info.survey_date or "date not stated"),
        ("issued", info.issued),
        ("horizontal CRS", info.crs),
        ("vertical datum", info.vertical_datum or "vertical datum not stated"),
    ]
    if info.method:
        rows.append(("surface method", info.method))
    if info.cell_size_m is not None:
        rows.append(("grid cell", f"{info.cell_size_m:g} m"))
    if scale_text:
        rows.append(("scale", scale_text))
    rows += list(info.extra)
    rows.append(("software", info.software))
    box.text(0.03, 0.95, title, fontsize=10, fontweight="bold", va="top", ha="left")
    box.line([0.0, 1.0], [0.84, 0.84], color="k", lw=0.6)
    n = len(rows)
    top, bottom = 0.80, 0.03
    dy = (top - bottom) / max(n, 1)
    for i, (k, v) in enumerate(rows):
        y = top - (i + 0.5) * dy
        box.text(0.03, y, k, fontsize=7, va="center", ha="left", color="0.3")
        box.text(
            0.34, y, textwrap.shorten(str(v), TITLE_VALUE_CHARS, placeholder="..."), fontsize=7, va="center", ha="left"
        )


def draw_cautions(box: SheetBox, extra=(), width_chars=None) -> None:
    """The cautions every sheet carries, in the framed ``box`` (lines wrapped at ``width_chars``)."""
    import textwrap

    box.framed("#fff4d6")
    lines = list(CAUTION_LINES) + list(extra)
    if width_chars:
        lines = [part for line in lines for part in textwrap.wrap(line, width_chars)]
    dy = 0.9 / max(len(lines), 1)
    for i, text in enumerate(lines):
        box.text(
            0.02,
            0.95 - (i + 0.5) * dy,
            text,
            fontsize=7.2,
            va="center",
            ha="left",
            fontweight="bold" if i == 0 else "normal",
        )


def save_figure(fig, fmt: str = "pdf") -> bytes:
    """The sheet as PDF or SVG bytes, without a creation date (reproducible)."""
    import matplotlib

    buf = io.BytesIO()
    meta = {"CreationDate": None} if fmt == "pdf" else {"Date": None}
    # Type 3 fonts (matplotlib's default): text stays searchable and the file is written fast
    figures.plain_text(fig)  # labels are data, never mathtext
    with matplotlib.rc_context({"svg.hashsalt": "rockhead", "svg.fonttype": "none", "pdf.fonttype": 3}):
        fig.savefig(buf, format=fmt, metadata=meta)
    return buf.getvalue()
