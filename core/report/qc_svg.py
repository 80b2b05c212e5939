"""The QC figure of one gather as a small SVG drawing (no plotting library).

A survey has one QC figure per gather, dozens to thousands of them; drawn
with a general plotting library they were most of a run's time. This module
writes the three panels directly as SVG text (vector, a few kilobytes each,
drawn by any browser, by QGIS and by office programs), in milliseconds:

* t² against x²: a horizontal reflector plots as a straight line of slope
  1/V² and intercept t0² (Green 1938); the two sides of a split spread over a
  dipping reflector plot as two branches (▲ forward, ▼ reverse offsets);
* t against x with the fitted curve (time increasing downward, as on a record);
* the residuals, picked minus fitted time.

Picks used by the fit, rejected by it (mispicks, ×) and excluded by the
interpreter (pick edits, ○) are told apart, in the colours of
:mod:`core.colours`.
"""

from __future__ import annotations

import html
import math

import numpy as np

from .. import colours

__all__ = ["gather_svg", "nice_ticks", "scatter_svg", "section_svg", "variogram_svg"]

#: The report's layout: drawing size (px of the SVG's own coordinates) and the (left, top, width,
#: height) of the three panels (t^2-x^2, t-x, residuals) side by side.
_ROW = ((1000.0, 350.0), ((62.0, 92.0, 262.0, 210.0), (395.0, 92.0, 262.0, 210.0), (728.0, 92.0, 252.0, 210.0)))
_PANEL_MARGINS = (64.0, 16.0, 20.0, 44.0)  # left (tick labels, y label), right, above (title), below (x label)


def _layout(layout: str, size, n_params: int) -> tuple:
    """(width, height, header height, panel boxes) of a layout; see :func:`gather_svg`."""
    if layout == "row":
        (w, h), boxes = _ROW
        return w, h, 0.0, boxes
    w, h = (520.0, 900.0) if layout == "column" else (560.0, 560.0)
    if size is not None:
        w, h = max(float(size[0]), 300.0), max(float(size[1]), 300.0)
    header = 28.0 + (13.0 * n_params + 6.0 if n_params else 0.0) + 22.0
    ml, mr, mt, mb = _PANEL_MARGINS
    avail = h - header
    if layout == "column":
        shares = (0.33, 0.40, 0.27)  # t^2-x^2, t-x, residuals
        stacked: list = []
        top = header
        for f in shares:
            stacked.append((ml, top + mt, w - ml - mr, avail * f - mt - mb))
            top += avail * f
        return w, h, header, tuple(stacked)
    if layout != "grid":
        raise ValueError(f"layout {layout!r}: expected 'row', 'column' or 'grid'")
    top_h = avail * 0.55  # t-x across the whole width; t^2-x^2 and residuals side by side below
    half = (w - 2 * ml - 2 * mr) / 2
    tx = (ml, header + mt, w - ml - mr, top_h - mt - mb)
    below = header + top_h
    t2 = (ml, below + mt, half, avail - top_h - mt - mb)
    res = (2 * ml + mr + half, below + mt, half, avail - top_h - mt - mb)
    return w, h, header, (t2, tx, res)


_FONT = "font-family:system-ui,'Segoe UI',Helvetica,Arial,sans-serif"


def nice_ticks(lo: float, hi: float, target: int = 5) -> np.ndarray:
    """Round tick values (steps of 1, 2 or 5 x 10^k) covering [lo, hi], about ``target`` of them.

    Parameters
    ----------
    lo, hi : float
        The axis range (any order; equal values give one tick).
    target : int
        About how many intervals.

    Returns
    -------
    ndarray
        Ticks within [lo, hi] (inclusive, to a rounding tolerance).

    Examples
    --------
    >>> nice_ticks(0.0, 47.0).tolist()
    [0.0, 10.0, 20.0, 30.0, 40.0]
    >>> nice_ticks(-1.3, 1.3).tolist()
    [-1.0, -0.5, 0.0, 0.5, 1.0]
    """
    lo, hi = (float(lo), float(hi)) if lo <= hi else (float(hi), float(lo))
    span = hi - lo
    if not math.isfinite(span) or span <= 0:
        return np.array([lo])
    raw = span / max(int(target), 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1.0, 2.0, 5.0, 10.0)), key=lambda c: abs(math.log(c / raw)))
    first = math.ceil(lo / step - 1e-9)
    last = math.floor(hi / step + 1e-9)
    return np.arange(first, last + 1) * step + 0.0  # + 0.0 turns -0.0 into 0.0


def _fmt_tick(v: float, step: float) -> str:
    digits = max(0, -math.floor(math.log10(step)) if step > 0 else 0)
    text = f"{v:.{digits}f}"
    if abs(v) >= 1e5:  # squared offsets and times: thousands separators keep them readable
        text = f"{v:,.0f}".replace(",", "\u2009")
    return text


def _range(values, pad=0.06, include_zero=False):
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if not v.size:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    if include_zero:
        lo, hi = min(lo, 0.0), max(hi, 0.0)
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return lo - pad * span, hi + pad * span


class _Panel:
    """One plot panel: data limits mapped onto a box of the drawing."""

    def __init__(self, out, box, xlim, ylim, down=False):
        self.out = out
        self.left, self.top, self.width, self.height = box
        self.xlim, self.ylim, self.down = xlim, ylim, down

    def px(self, x):
        x0, x1 = self.xlim
        return self.left + (np.asarray(x, float) - x0) / (x1 - x0) * self.width

    def py(self, y):
        y0, y1 = self.ylim
        f = (np.asarray(y, float) - y0) / (y1 - y0)
        return self.top + (f if self.down else 1.0 - f) * self.height

    def frame(self, xlabel, ylabel, title):
        o, l, t, w, h = self.out, self.left, self.top, self.width, self.height
        (x0, x1), (y0, y1) = self.xlim, self.ylim
        xt = nice_ticks(x0, x1, target=max(3, min(5, int(w // 55))))  # tick labels need ~55 px each
        yt = nice_ticks(y0, y1, target=max(3, min(5, int(h // 40))))
        xs = float(xt[1] - xt[0]) if len(xt) > 1 else 1.0
        ys = float(yt[1] - yt[0]) if len(yt) > 1 else 1.0
        grid = "".join(f"M{float(self.px(v)):.1f} {t:.1f}V{t + h:.1f}" for v in xt)
        grid += "".join(f"M{l:.1f} {float(self.py(v)):.1f}H{l + w:.1f}" for v in yt)
        o.append(f'<path d="{grid}" stroke="#e3e3e3" stroke-width="0.8"/>')
        for v in xt:
            p = float(self.px(v))
            o.append(f'<text x="{p:.1f}" y="{t + h + 14:.1f}" text-anchor="middle">{_fmt_tick(v, xs)}</text>')
        for v in yt:
            p = float(self.py(v))
            o.append(f'<text x="{l - 5:.1f}" y="{p + 4:.1f}" text-anchor="end">{_fmt_tick(v, ys)}</text>')
        o.append(f'<rect x="{l:.1f}" y="{t:.1f}" width="{w:.1f}" height="{h:.1f}" fill="none" stroke="#777"/>')
        o.append(f'<text x="{l + w / 2:.1f}" y="{t + h + 34:.1f}" text-anchor="middle">{html.escape(xlabel)}</text>')
        o.append(
            f'<text transform="translate({l - 46:.1f} {t + h / 2:.1f}) rotate(-90)" text-anchor="middle">'
            f"{html.escape(ylabel)}</text>"
        )
        o.append(f'<text x="{l:.1f}" y="{t - 7:.1f}" font-weight="600">{html.escape(title)}</text>')

    def line(self, x, y, colour, width=1.6, dash=None):
        x, y = np.asarray(x, float), np.asarray(y, float)
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.sum() < 2:
            return
        px, py = self.px(x[ok]), self.py(y[ok])
        d = "M" + "L".join(f"{a:.1f} {b:.1f}" for a, b in zip(px, py))
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        self.out.append(f'<path d="{d}" fill="none" stroke="{colour}" stroke-width="{width}"{extra}/>')

    def band(self, x, lo, hi, colour, opacity=0.2):
        """A filled band between ``lo`` and ``hi`` along ``x`` (gaps where either is not finite)."""
        x, lo, hi = (np.asarray(v, float) for v in (x, lo, hi))
        ok = np.isfinite(x) & np.isfinite(lo) & np.isfinite(hi)
        # one polygon per run of finite values
        edges = np.flatnonzero(np.diff(np.r_[0, ok.astype(int), 0]))
        for a, b in zip(edges[::2], edges[1::2]):
            if b - a < 2:
                continue
            xs = np.r_[x[a:b], x[a:b][::-1]]
            ys = np.r_[hi[a:b], lo[a:b][::-1]]
            d = "M" + "L".join(f"{u:.1f} {v:.1f}" for u, v in zip(self.px(xs), self.py(ys))) + "Z"
            self.out.append(f'<path d="{d}" fill="{colour}" fill-opacity="{opacity}" stroke="none"/>')

    def errorbars(self, x, lo, hi, colour, width=1.0):
        """Vertical bars from ``lo`` to ``hi`` at ``x``."""
        x, lo, hi = (np.asarray(v, float) for v in (x, lo, hi))
        ok = np.isfinite(x) & np.isfinite(lo) & np.isfinite(hi)
        if not ok.any():
            return
        d = "".join(f"M{a:.1f} {b:.1f}V{c:.1f}" for a, b, c in zip(self.px(x[ok]), self.py(lo[ok]), self.py(hi[ok])))
        self.out.append(f'<path d="{d}" stroke="{colour}" stroke-width="{width}"/>')

    def circles(self, x, y, radius_px, colour):
        """Filled circles of the given radii (px)."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        r = np.broadcast_to(np.asarray(radius_px, float), x.shape)
        ok = np.isfinite(x) & np.isfinite(y)
        for a, b, c in zip(self.px(x[ok]), self.py(y[ok]), r[ok]):
            self.out.append(f'<circle cx="{a:.1f}" cy="{b:.1f}" r="{c:.1f}" fill="{colour}"/>')

    def marks(self, x, y, symbol):
        x, y = np.asarray(x, float), np.asarray(y, float)
        ok = np.isfinite(x) & np.isfinite(y)
        for a, b in zip(self.px(x[ok]), self.py(y[ok])):
            self.out.append(f'<use xlink:href="#{symbol}" x="{a:.1f}" y="{b:.1f}"/>')


def _symbols(prefix):
    u, r, e = colours.PICK_USED, colours.PICK_REJECTED, colours.PICK_EXCLUDED
    return (
        "<defs>"
        f'<circle id="{prefix}o" r="2.6" fill="{u}"/>'
        f'<path id="{prefix}up" d="M0 -3.6L3.2 2.2H-3.2Z" fill="{u}"/>'
        f'<path id="{prefix}dn" d="M0 3.6L3.2 -2.2H-3.2Z" fill="{u}"/>'
        f'<path id="{prefix}x" d="M-3.4 -3.4L3.4 3.4M-3.4 3.4L3.4 -3.4" stroke="{r}" stroke-width="1.6"/>'
        f'<circle id="{prefix}ex" r="3.2" fill="none" stroke="{e}" stroke-width="1.4"/>'
        "</defs>"
    )


def gather_svg(
    offset_m,
    time_s,
    model_time_s,
    rejected,
    excluded,
    title: str,
    params_text: str,
    ident: str = "g",
    layout: str = "row",
    size=None,
) -> bytes:
    """The QC figure of one gather as SVG: t²–x², t–x with the fit, residuals.

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
        Picks the fit rejected as mispicks; picks the interpreter excluded.
    title : str
        Heading (line, shot, reflector, status).
    params_text : str
        The fitted parameters, one per line.
    ident : str
        Prefix of the element ids, unique per figure when several are inlined
        in one page.
    layout : str
        "row" (the three panels side by side, 1000 x 350, for pages),
        "column" (stacked, for a tall panel) or "grid" (t-x across the top,
        t²-x² and the residuals below, for a squarish panel).
    size : (float, float), optional
        Width and height (px) of a "column" or "grid" drawing, e.g. the
        widget it is drawn into, so that its text is drawn at its own size.

    Returns
    -------
    bytes
        A standalone UTF-8 SVG document.
    """
    x = np.asarray(offset_m, float)
    t = np.asarray(time_s, float) * 1e3
    tm = np.asarray(model_time_s, float) * 1e3
    rej = np.asarray(rejected, bool)
    exc = np.asarray(excluded, bool) & ~rej
    used = ~(rej | exc)
    order = np.argsort(x, kind="stable")
    n_params = len(params_text.splitlines())
    _W, _H, header, boxes = _layout(layout, size, n_params)
    stacked = layout != "row"
    out = [
        '<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink" '
        f'viewBox="0 0 {_W:.0f} {_H:.0f}" width="{_W:.0f}" '
        f'height="{_H:.0f}" font-size="11" style="{_FONT}" fill="#222">',
        f'<rect x="0" y="0" width="{_W:.0f}" height="{_H:.0f}" fill="white"/>',
        _symbols(ident),
        f'<text x="10" y="20" font-size="14" font-weight="600">{html.escape(title)}</text>',
    ]
    for k, row in enumerate(params_text.splitlines()):
        x_text, y_text, anchor = (10, 40 + 13 * k, "start") if stacked else (_W - 10, 18 + 13 * k, "end")
        out.append(
            f'<text x="{x_text:.0f}" y="{y_text}" text-anchor="{anchor}" font-family="monospace" '
            f'font-size="11" xml:space="preserve">{html.escape(row)}</text>'
        )
    keyx, keyy = 10.0, (header - 14.0 if stacked else 41.0)
    for sym, label in (("o", "pick used"), ("x", "rejected by the fit"), ("ex", "excluded (pick edit)")):
        out.append(f'<use xlink:href="#{ident}{sym}" x="{keyx + 4:.0f}" y="{keyy:.0f}"/>')
        out.append(f'<text x="{keyx + 12:.0f}" y="{keyy + 4:.0f}">{label}</text>')
        keyx += 30 + 6.0 * len(label)
    out.append(f'<path d="M{keyx:.0f} {keyy:.0f}h18" stroke="{colours.FIT_CURVE}" stroke-width="2"/>')
    out.append(f'<text x="{keyx + 23:.0f}" y="{keyy + 4:.0f}">fit</text>')

    # t^2 - x^2
    x2, t2, m2 = x**2, t**2, tm**2
    p = _Panel(out, boxes[0], _range(np.r_[x2, 0.0]), _range(np.r_[t2[np.isfinite(t2)], m2[np.isfinite(m2)]]))
    p.frame("x² (m²)", "t² (ms²)", "t²–x² (▲ forward, ▼ reverse)")
    out.append(f'<g id="{ident}p0">')  # the data of each panel (its range covers them: no clipping needed)
    for side in (x < 0, x >= 0):
        o = np.argsort(x2[side], kind="stable")
        p.line(x2[side][o], m2[side][o], colours.FIT_CURVE)
    p.marks(x2[used & (x >= 0)], t2[used & (x >= 0)], f"{ident}up")
    p.marks(x2[used & (x < 0)], t2[used & (x < 0)], f"{ident}dn")
    p.marks(x2[exc], t2[exc], f"{ident}ex")
    p.marks(x2[rej], t2[rej], f"{ident}x")
    out.append("</g>")

    # t - x, time down
    p = _Panel(out, boxes[1], _range(x), _range(np.r_[t[np.isfinite(t)], tm[np.isfinite(tm)]]), down=True)
    p.frame("offset along line x (m)", "two-way time t (ms)", "t–x")
    out.append(f'<g id="{ident}p1">')
    p.line(x[order], tm[order], colours.FIT_CURVE)
    p.marks(x[used], t[used], f"{ident}o")
    p.marks(x[exc], t[exc], f"{ident}ex")
    p.marks(x[rej], t[rej], f"{ident}x")
    out.append("</g>")

    # residuals
    r = t - tm
    shown = np.isfinite(r) & ~rej
    lim = max(1.0, 1.2 * float(np.max(np.abs(r[shown])))) if np.any(shown) else 1.0
    p = _Panel(out, boxes[2], _range(x), (-lim, lim))
    p.frame("x (m)", "residual (ms)", "residuals" + ("" if stacked else " (rejected may lie off scale)"))
    out.append(f'<g id="{ident}p2">')
    p.line(p.xlim, (0.0, 0.0), "#888", width=1.0)
    p.marks(x[used], r[used], f"{ident}o")
    p.marks(x[exc], r[exc], f"{ident}ex")
    p.marks(x[rej], np.clip(r[rej], -0.97 * lim, 0.97 * lim), f"{ident}x")
    out.append("</g></svg>\n")
    return "\n".join(out).encode("utf-8")


# -- the report's other small figures -------------------------------------------------------------
def _start(w: float, h: float, title: str, ident: str) -> list:
    return [
        '<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink" '
        f'viewBox="0 0 {w:.0f} {h:.0f}" width="{w:.0f}" height="{h:.0f}" font-size="11" style="{_FONT}" '
        'fill="#222">',
        f'<rect x="0" y="0" width="{w:.0f}" height="{h:.0f}" fill="white"/>',
        _symbols(ident),
        f'<text x="10" y="18" font-size="13" font-weight="600">{html.escape(title)}</text>',
    ]


def _key(out: list, items, x: float, y: float) -> None:
    """A one-row key: items of (kind, colour or symbol id, label); kind "line", "band", "use"."""
    for kind, what, label in items:
        if kind == "line":
            out.append(f'<path d="M{x:.0f} {y:.0f}h18" stroke="{what}" stroke-width="2"/>')
        elif kind == "band":
            out.append(f'<rect x="{x:.0f}" y="{y - 5:.0f}" width="18" height="10" fill="{what}" fill-opacity="0.25"/>')
        else:
            out.append(f'<use xlink:href="#{what}" x="{x + 9:.0f}" y="{y:.0f}"/>')
        out.append(f'<text x="{x + 23:.0f}" y="{y + 4:.0f}">{html.escape(label)}</text>')
        x += 36 + 6.0 * len(label)


def section_svg(distance_m, ground_m, points, surface=None, title: str = "", ident: str = "s") -> bytes:
    """A line's section: ground, reflector points with ±2σ bars, the mapped surface with its ±2σ band.

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
    ident : str
        Prefix of the element ids (unique per figure in one page).

    Returns
    -------
    bytes
        A standalone SVG document (1000 x 330).
    """
    d, z, s, ok = (np.asarray(v) for v in points)
    d, z, s, ok = d.astype(float), z.astype(float), s.astype(float), ok.astype(bool)
    values = [np.asarray(ground_m, float), z + 2 * s, z - 2 * s]
    if surface is not None:
        sd, sz, ss = (np.asarray(v, float) for v in surface)
        values += [sz + 2 * ss, sz - 2 * ss]
    out = _start(1000.0, 330.0, title, ident)
    p = _Panel(
        out, (70.0, 58.0, 900.0, 222.0), _range(np.r_[np.asarray(distance_m, float), d]), _range(np.concatenate(values))
    )
    p.frame("distance along line (m)", "elevation (m)", "")
    if surface is not None:
        p.band(sd, sz - 2 * ss, sz + 2 * ss, colours.FIT_CURVE)
        p.line(sd, sz, colours.FIT_CURVE, width=1.6)
    p.line(distance_m, ground_m, colours.GROUND, width=1.6)
    p.errorbars(d[ok], (z - 2 * s)[ok], (z + 2 * s)[ok], colours.PICK_USED)
    p.marks(d[ok], z[ok], f"{ident}o")
    p.marks(d[~ok], z[~ok], f"{ident}x")
    items = [("line", colours.GROUND, "ground"), ("use", f"{ident}o", "reflector points (±2σ)")]
    if np.any(~ok):
        items.append(("use", f"{ident}x", "flagged gathers"))
    if surface is not None:
        items += [("line", colours.FIT_CURVE, "mapped surface"), ("band", colours.FIT_CURVE, "±2σ")]
    _key(out, items, 70.0, 38.0)
    out.append("</svg>\n")
    return "\n".join(out).encode("utf-8")


def variogram_svg(lag_m, semivariance, n_pairs, model=None, title: str = "", ident: str = "v") -> bytes:
    """Experimental semivariogram (points sized by their pair count) and the fitted model.

    Parameters
    ----------
    lag_m, semivariance, n_pairs : (k,) array_like
        Lag (m), semivariance (m²) and number of pairs of each lag class.
    model : callable, optional
        The fitted model, ``model(h)`` in m² at lag ``h`` (m), with a ``model`` name attribute.
    title : str
        Heading.
    ident : str
        Prefix of the element ids.

    Returns
    -------
    bytes
        A standalone SVG document (520 x 360).
    """
    lag = np.asarray(lag_m, float)
    gam = np.asarray(semivariance, float)
    n = np.asarray(n_pairs, float)
    ok = np.isfinite(gam) & np.isfinite(lag) & (n > 0)
    h = np.linspace(0.0, (lag[ok].max() if ok.any() else 1.0) * 1.05, 120)
    curve = np.asarray(model(h), float) if model is not None else np.full(len(h), np.nan)
    top = np.nanmax(np.r_[gam[ok], curve, 0.0]) if ok.any() or np.isfinite(curve).any() else 1.0
    out = _start(520.0, 360.0, title, ident)
    p = _Panel(out, (70.0, 60.0, 430.0, 240.0), (0.0, float(h[-1]) or 1.0), (0.0, 1.08 * top or 1.0))
    p.frame("lag (m)", "semivariance (m²)", "")
    p.circles(
        lag[ok], gam[ok], 2.0 + 5.0 * np.sqrt(n[ok] / max(n[ok].max(), 1.0)) if ok.any() else 2.0, colours.PICK_USED
    )
    items = [("use", f"{ident}o", "experimental (size: pairs)")]
    if model is not None:
        p.line(h, curve, colours.FIT_CURVE, width=1.8)
        items.append(("line", colours.FIT_CURVE, f"{getattr(model, 'model', '')} model".strip()))
    _key(out, items, 70.0, 38.0)
    out.append("</svg>\n")
    return "\n".join(out).encode("utf-8")


def scatter_svg(x, y, xlabel: str, ylabel: str, title: str = "", one_to_one: bool = True, ident: str = "c") -> bytes:
    """A scatter plot with the 1:1 line (e.g. cross-validation: datum against its estimate from the others).

    Parameters
    ----------
    x, y : (n,) array_like
        The values (same unit on both axes when ``one_to_one``).
    xlabel, ylabel, title : str
        Axis labels with units, and the heading.
    one_to_one : bool
        Draw the line y = x over the common range.
    ident : str
        Prefix of the element ids.

    Returns
    -------
    bytes
        A standalone SVG document (440 x 420).
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    both = np.r_[x, y]
    out = _start(440.0, 420.0, title, ident)
    p = _Panel(out, (70.0, 40.0, 340.0, 320.0), _range(both if one_to_one else x), _range(both if one_to_one else y))
    p.frame(xlabel, ylabel, "")
    if one_to_one and np.isfinite(both).any():
        lo, hi = p.xlim
        p.line((lo, hi), (lo, hi), "#888", width=1.0)
    p.marks(x, y, f"{ident}o")
    out.append("</svg>\n")
    return "\n".join(out).encode("utf-8")
