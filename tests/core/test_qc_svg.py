"""QC figures drawn as SVG: well-formed, every pick drawn in its class, the fit where the physics puts it."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rockhead.core.report.qc_svg import gather_svg, nice_ticks

SVG = "{http://www.w3.org/2000/svg}"
XLINK = "{http://www.w3.org/1999/xlink}href"


def _flat_gather(v_m_s=1800.0, depth_m=20.0):
    """A split spread over a horizontal reflector: t = sqrt(x^2 + 4 h^2) / V (Green 1938)."""
    x = np.arange(-47.5, 50.0, 5.0)
    t = np.sqrt(x**2 + 4 * depth_m**2) / v_m_s
    return x, t


def test_well_formed_and_every_pick_in_its_class():
    x, t = _flat_gather()
    rejected = np.zeros(len(x), bool)
    excluded = np.zeros(len(x), bool)
    rejected[[2, 7]] = True
    excluded[[4, 11, 12]] = True
    picked = t + np.where(rejected, 0.004, 0.0)
    svg = gather_svg(x, picked, t, rejected, excluded, "line <A> & B", "V = 1800 m/s", ident="q")
    root = ET.fromstring(svg)  # raises on malformed XML (escaping of '<' and '&' included)
    assert root.tag == SVG + "svg"
    uses = [u.get(XLINK) for u in root.iter(SVG + "use")]
    # each panel draws each pick once; the key adds one of each of the three pick symbols
    n_used = int(np.sum(~rejected & ~excluded))
    assert uses.count("#qx") == 3 * 2 + 1
    assert uses.count("#qex") == 3 * 3 + 1
    assert uses.count("#qup") + uses.count("#qdn") == n_used  # t^2-x^2 panel: forward/reverse
    assert uses.count("#qo") == 2 * n_used + 1  # t-x and residual panels, and the key
    texts = "".join(el.text or "" for el in root.iter(SVG + "text"))
    assert "line <A> & B" in texts


def _fit_path(svg: bytes, panel: int):
    """Vertices (px) of the fitted curve(s) in a panel (the stroked paths in the fit colour)."""
    from rockhead.core import colours

    root = ET.fromstring(svg)
    groups = [g for g in root.iter(SVG + "g") if (g.get("id") or "").endswith(("p0", "p1", "p2"))]
    out = []
    for p in groups[panel].iter(SVG + "path"):
        if p.get("stroke") == colours.FIT_CURVE:
            out.append(np.array([[float(a) for a in pt.split()] for pt in p.get("d")[1:].split("L")]))
    return out


def test_horizontal_reflector_is_a_straight_line_in_t2_x2():
    """Green (1938): t^2 = x^2 / V^2 + t0^2 is a straight line of slope 1/V^2 in the t^2-x^2 plane."""
    x, t = _flat_gather()
    svg = gather_svg(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "")
    for branch in _fit_path(svg, 0):  # forward and reverse branches coincide on a flat reflector
        px, py = branch[:, 0], branch[:, 1]
        coef = np.polyfit(px, py, 1)
        # coordinates are written to 0.1 px: each vertex is off by up to 0.05 px in y and 0.05 px in x,
        # which the slope turns into 0.05 |slope| in y; 0.01 px more for the fit's own scatter
        assert np.max(np.abs(np.polyval(coef, px) - py)) < 0.05 * (1 + abs(coef[0])) + 0.01
    # and the hyperbola t(x) in the t-x panel is not a straight line (curvature well above rounding)
    (tx,) = _fit_path(svg, 1)
    coef = np.polyfit(tx[:, 0], tx[:, 1], 1)
    assert np.max(np.abs(np.polyval(coef, tx[:, 0]) - tx[:, 1])) > 5.0


def test_time_axis_points_down_in_t_x():
    """Common practice: a record's time axis increases downward."""
    x, t = _flat_gather()
    svg = gather_svg(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "")
    (tx,) = _fit_path(svg, 1)
    centre = np.argmin(np.abs(tx[:, 0] - np.mean(tx[:, 0])))
    # SVG y grows downward: the far-offset (late) ends lie below (larger y than) the apex
    assert tx[0, 1] > tx[centre, 1] and tx[-1, 1] > tx[centre, 1]


@pytest.mark.parametrize(
    "lo, hi, expected",
    [
        (0.0, 47.0, [0, 10, 20, 30, 40]),
        (-1.3, 1.3, [-1, -0.5, 0, 0.5, 1]),
        (20.1, 20.9, [20.2, 20.4, 20.6, 20.8]),
        (0.0, 9400.0, [0, 2000, 4000, 6000, 8000]),
    ],
    ids=["tens", "halves", "fifths", "thousands"],
)
def test_nice_ticks_are_1_2_5_steps(lo, hi, expected):
    ticks = nice_ticks(lo, hi)
    np.testing.assert_allclose(ticks, expected, atol=1e-12)
    step = np.diff(ticks)
    mantissa = step[0] / 10 ** np.floor(np.log10(step[0]))
    assert np.isclose(mantissa, [1, 2, 5]).any()  # common practice: 1-2-5 axis steps


def test_many_figures_inline_without_id_clashes():
    x, t = _flat_gather()
    a = gather_svg(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "a", "", ident="g1")
    b = gather_svg(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "b", "", ident="g2")
    ids_a = set(re.findall(rb'id="([^"]+)"', a))
    ids_b = set(re.findall(rb'id="([^"]+)"', b))
    assert ids_a and not ids_a & ids_b


@pytest.mark.parametrize(
    "layout, size",
    [("row", None), ("column", (480, 900)), ("grid", (480, 480)), ("grid", (900, 700))],
    ids=["row", "column", "grid-small", "grid-large"],
)
def test_layouts_keep_panels_inside_the_drawing(layout, size):
    x, t = _flat_gather()
    svg = gather_svg(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "a\nb", layout=layout, size=size)
    root = ET.fromstring(svg)
    w, h = (float(v) for v in root.get("viewBox").split()[2:])
    if size is not None:
        assert (w, h) == size  # drawn at the widget's own size: text at its own size
    rects = [r for r in root.iter(SVG + "rect") if r.get("fill") == "none"]  # the three panel frames
    assert len(rects) == 3
    boxes = [tuple(float(r.get(k)) for k in ("x", "y", "width", "height")) for r in rects]
    for x0, y0, bw, bh in boxes:
        assert x0 >= 40 and y0 >= 40 and x0 + bw <= w and y0 + bh + 30 <= h and bw > 100 and bh > 60
    for i, a in enumerate(boxes):  # no two panels overlap
        for b in boxes[i + 1 :]:
            assert a[0] + a[2] <= b[0] or b[0] + b[2] <= a[0] or a[1] + a[3] <= b[1] or b[1] + b[3] <= a[1]


def test_section_band_and_bars_are_where_the_values_are():
    """The ±2σ band and bars of the section: their pixel extents map back to z ± 2σ (linear axes)."""
    from rockhead.core.report.qc_svg import section_svg

    dist = np.linspace(0.0, 100.0, 21)
    ground = 240.0 + 0.02 * dist
    z = 220.0 - 0.05 * dist
    s = np.full(len(dist), 0.5)
    ok = np.ones(len(dist), bool)
    ok[4] = False
    svg = section_svg(dist, ground, (dist, z, s, ok), surface=(dist, z, s), title="line A", ident="sA")
    root = ET.fromstring(svg)
    paths = list(root.iter(SVG + "path"))
    band = next(p for p in paths if p.get("fill-opacity") == "0.2")
    bars = next(p for p in paths if p.get("d", "").count("V") == int(ok.sum()))
    # the vertical span of each bar is 4 sigma; on a linear axis all spans are equal (0.1 px rounding)
    spans = [
        abs(float(seg.split("V")[1]) - float(seg.split()[1].split("V")[0])) for seg in bars.get("d").split("M")[1:]
    ]
    assert np.ptp(spans) <= 0.2 and spans[0] > 5
    assert band.get("d").endswith("Z")
    uses = [u.get(XLINK) for u in root.iter(SVG + "use")]
    assert uses.count("#sAx") == 1 + 1  # the flagged gather, and its key entry


def test_variogram_and_scatter_draw_their_data():
    from rockhead.core.report.qc_svg import scatter_svg, variogram_svg

    class Model:
        model = "spherical"

        def __call__(self, h):  # spherical model, range 50 m, sill 2 m² (Journel & Huijbregts 1978)
            h = np.minimum(np.asarray(h, float) / 50.0, 1.0)
            return 2.0 * (1.5 * h - 0.5 * h**3)

    lag = np.arange(5.0, 80.0, 5.0)
    svg = variogram_svg(lag, Model()(lag), np.arange(len(lag)) + 10, Model(), "v")
    root = ET.fromstring(svg)
    assert len(root.findall(f"./{SVG}circle")) == len(lag)  # the drawn ones (the symbol defs aside)
    assert "spherical model" in "".join(t.text or "" for t in root.iter(SVG + "text"))
    svg = scatter_svg(np.arange(10.0), np.arange(10.0) + 0.1, "estimate (m)", "datum (m)", "cv")
    uses = [u.get(XLINK) for u in ET.fromstring(svg).iter(SVG + "use")]
    assert uses.count("#co") == 10
