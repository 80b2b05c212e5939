"""QC figures drawn by matplotlib: every pick drawn in its class, the fit where the physics puts it, valid PNGs."""

from __future__ import annotations

import struct

import numpy as np
import pytest
from rockhead.core import colours
from rockhead.core.report import figures
from rockhead.core.report.qc_figures import GatherFigure, LineFigure, data_range, new_figure, png_bytes


def _flat_gather(v_m_s=1800.0, depth_m=20.0):
    """A split spread over a horizontal reflector: t = sqrt(x^2 + 4 h^2) / V (Green 1938)."""
    x = np.arange(-47.5, 50.0, 5.0)
    t = np.sqrt(x**2 + 4 * depth_m**2) / v_m_s
    return x, t


def _png_size(png: bytes):
    """(width, height) from the PNG signature and IHDR chunk (PNG specification, ISO/IEC 15948, s. 11.2.2)."""
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and png[12:16] == b"IHDR"
    return struct.unpack(">II", png[16:24])


def _classes():
    x, t = _flat_gather()
    rejected = np.zeros(len(x), bool)
    excluded = np.zeros(len(x), bool)
    rejected[[2, 7]] = True
    excluded[[4, 11, 12]] = True
    picked = t + np.where(rejected, 0.004, 0.0)
    return x, t, picked, rejected, excluded


def test_every_pick_is_drawn_once_in_its_class_in_each_panel():
    x, t, picked, rejected, excluded = _classes()
    fig = GatherFigure().draw(x, picked, t, rejected, excluded, "line <A> & B", "V = 1800 m/s")
    n_used = int(np.sum(~rejected & ~excluded))
    assert fig.panel_data("t2", "fwd")[0].size + fig.panel_data("t2", "rev")[0].size == n_used
    for panel in ("tx", "res"):
        assert fig.panel_data(panel, "rejected")[0].size == 2
        assert fig.panel_data(panel, "excluded")[0].size == 3
    assert fig.panel_data("tx", "used")[0].size == fig.panel_data("res", "used")[0].size == n_used
    assert fig.panel_data("t2", "rejected")[0].size == 2 and fig.panel_data("t2", "excluded")[0].size == 3
    # forward (x >= 0) and reverse picks are the two branches of t^2-x^2
    np.testing.assert_allclose(
        np.sort(fig.panel_data("t2", "fwd")[0]), np.sort(x[(x >= 0) & ~rejected & ~excluded] ** 2)
    )
    # the pick classes keep the shared colour code (core/colours.py)
    art = fig._art["tx"]
    assert art["used"].get_color() == colours.PICK_USED and art["rejected"].get_color() == colours.PICK_REJECTED
    assert (
        art["excluded"].get_markeredgecolor() == colours.PICK_EXCLUDED and art["fit"].get_color() == colours.FIT_CURVE
    )
    # labels are data: drawn as written, never parsed as mathtext
    assert fig.title.get_text() == "line <A> & B" and not fig.title.get_parse_math()


def test_horizontal_reflector_is_a_straight_line_in_t2_x2():
    """Green (1938): t^2 = x^2 / V^2 + t0^2, a straight line of slope 1/V^2 and intercept t0^2."""
    v, h = 1800.0, 20.0
    x, t = _flat_gather(v, h)
    fig = GatherFigure().draw(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "")
    for branch in ("fit_fwd", "fit_rev"):  # forward and reverse branches coincide on a flat reflector
        x2, t2 = fig.panel_data("t2", branch)
        slope, intercept = np.polyfit(x2, t2, 1)
        # ms^2 per m^2 and ms^2; float64 arithmetic only: a relative 1e-9 is far above rounding
        assert slope == pytest.approx(1e6 / v**2, rel=1e-9)
        assert intercept == pytest.approx((2 * h / v * 1e3) ** 2, rel=1e-9)
    # and the hyperbola t(x) of the t-x panel is not a straight line: its sag is t(47.5 m) - t0, some 8.6 ms
    xs, ts = fig.panel_data("tx", "fit")
    assert np.ptp(ts - np.polyval(np.polyfit(xs, ts, 1), xs)) > 5.0


def test_time_axis_points_down_in_t_x():
    """Common practice: a record's time axis increases downward."""
    x, t = _flat_gather()
    fig = GatherFigure().draw(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "")
    top, bottom = fig.axes[1].get_ylim()
    assert top > bottom  # the larger time at the bottom of the axes
    lo, hi = bottom, top
    assert lo <= t.min() * 1e3 and hi >= t.max() * 1e3  # every pick inside the panel


@pytest.mark.slow  # 1-2 s: in the full tier, not the quick one
def test_a_reused_figure_draws_what_a_new_one_draws():
    """One figure is redrawn for every gather: nothing of the gather before may remain."""
    x, t, picked, rejected, excluded = _classes()
    xb, tb = _flat_gather(1500.0, 30.0)
    none = np.zeros(len(xb), bool)
    reused = GatherFigure()
    reused.draw(x, picked, t, rejected, excluded, "first", "a\nb")
    again = reused.draw(xb, tb, tb, none, none, "second", "c").png()
    fresh = GatherFigure().draw(xb, tb, tb, none, none, "second", "c").png()
    assert again == fresh


@pytest.mark.parametrize("dpi, size", [(100, (1000, 360)), (72, (720, 259))], ids=["100-dpi", "72-dpi"])
def test_the_file_is_a_png_of_the_stated_size(dpi, size):
    x, t = _flat_gather()
    png = GatherFigure(dpi=dpi).draw(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "f", "").png()
    assert _png_size(png) == size  # 10 x 3.6 inches at the figure's dpi


def test_grid_layout_on_a_given_figure():
    """The QGIS panel's layout: the core's figure drawn into a figure the panel made (constrained layout)."""
    x, t = _flat_gather()
    fig = new_figure(5.2, 5.6, 100, layout="constrained")
    qc = GatherFigure(figure=fig, layout="grid").draw(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "g")
    assert qc.figure is fig and len(fig.axes) == 3
    assert _png_size(qc.png()) == (520, 560)
    boxes = [ax.get_position() for ax in fig.axes]
    for i, a in enumerate(boxes):  # no two panels overlap, all inside the figure
        assert 0 <= a.x0 < a.x1 <= 1 and 0 <= a.y0 < a.y1 <= 1
        for b in boxes[i + 1 :]:
            assert a.x1 <= b.x0 or b.x1 <= a.x0 or a.y1 <= b.y0 or b.y1 <= a.y0
    with pytest.raises(ValueError, match="layout 'column'"):
        GatherFigure(layout="column")


def test_line_figure_puts_each_pick_on_its_shot_row():
    """Every gather of a line: each pick's residual on its shot's row; rejected and excluded picks marked."""
    x, t = _flat_gather()
    n, k = len(x), 3
    xs, ts = np.tile(x, k), np.tile(t, k) + np.repeat([0.0, 0.002, 0.004], n)
    model = ts.copy()
    model[n : 2 * n] -= 0.0005  # the second gather fits 0.5 ms early: residual +0.5 ms on its row
    gather = np.repeat(np.arange(k), n)
    rejected = np.zeros(k * n, bool)
    rejected[5] = True
    excluded = np.zeros(k * n, bool)
    excluded[[n + 1, 2 * n + 2]] = True
    rows_m = np.array([0.0, 16.0, 32.0])
    fig = LineFigure().draw(xs, ts, model, rejected, excluded, gather, rows_m, ["1001", "1009", "1017"], "line A")
    offsets = np.asarray(fig.residual.get_offsets())
    values = np.asarray(fig.residual.get_array())
    assert len(offsets) == k * n - 1  # every pick but the rejected one (drawn as x)
    np.testing.assert_allclose(values[np.isclose(offsets[:, 1], 16.0)], 0.5, atol=1e-9)
    np.testing.assert_allclose(values[~np.isclose(offsets[:, 1], 16.0)], 0.0, atol=1e-9)
    assert len(fig.res_rejected.get_xdata()) == 1 and len(fig.res_excluded.get_xdata()) == 2
    assert len(fig.curves.get_segments()) == k  # one fitted curve per gather
    assert [t.get_text() for t in fig.axes[1].get_yticklabels()] == ["1001", "1009", "1017"]
    assert _png_size(fig.png()) == (1000, 400)
    # shot labels are data: one that would be broken mathtext is drawn as written
    hostile = [r"$\foo{$", "x^$2$", "1017"]
    fig.draw(xs, ts, model, rejected, excluded, gather, rows_m, hostile, "line A")
    assert _png_size(fig.png()) == (1000, 400)
    assert [t.get_text() for t in fig.axes[1].get_yticklabels()] == hostile


def test_section_bars_are_four_sigma_long():
    """The ±2σ bars of the section: each spans z - 2σ to z + 2σ."""
    dist = np.linspace(0.0, 100.0, 21)
    ground = 240.0 + 0.02 * dist
    z = 220.0 - 0.05 * dist
    s = np.linspace(0.2, 1.0, len(dist))
    ok = np.ones(len(dist), bool)
    ok[4] = False
    fig = figures.SectionFigure().draw(dist, ground, (dist, z, s, ok), surface=(dist, z, s), title="line A")
    (bars,) = fig.points.lines[2]
    segs = np.array(bars.get_segments())
    assert len(segs) == ok.sum()
    np.testing.assert_allclose(segs[:, 1, 1] - segs[:, 0, 1], 4 * s[ok], rtol=1e-12)
    np.testing.assert_allclose(fig.flagged.get_xdata(), dist[~ok])
    assert _png_size(fig.png()) == (1000, 330)


def test_variogram_and_scatter_are_pngs():
    class Model:
        model = "spherical"

        def __call__(self, h):  # spherical model, range 50 m, sill 2 m² (Journel & Huijbregts 1978)
            h = np.minimum(np.asarray(h, float) / 50.0, 1.0)
            return 2.0 * (1.5 * h - 0.5 * h**3)

    lag = np.arange(5.0, 80.0, 5.0)
    assert _png_size(figures.variogram_figure(lag, Model()(lag), np.arange(len(lag)) + 10, Model(), "v")) == (520, 360)
    png = figures.scatter_figure(np.arange(10.0), np.arange(10.0) + 0.1, "estimate (m)", "datum (m)", "cv")
    assert _png_size(png) == (440, 420)


def test_data_range_pads_and_survives_empty_input():
    assert data_range([0.0, 10.0], pad=0.1) == (-1.0, 11.0)
    assert data_range([5.0, 5.0], pad=0.5) == (2.5, 7.5)  # one value: a span of its magnitude
    assert data_range([np.nan, np.inf]) == (0.0, 1.0)
    assert _png_size(png_bytes(new_figure(2.0, 1.0, 50))) == (100, 50)


@pytest.mark.slow
def test_line_figures_of_a_survey_with_two_reflectors(tmp_path, monkeypatch):
    """Every line of a run gets its figure; a shot's two reflectors are two rows, a little apart, each labelled."""
    from rockhead.core.products import outputs
    from rockhead.core.report import qc_figures
    from rockhead.core.survey.config import load_survey
    from rockhead.core.workflow import compute
    from test_pipeline_layers import _write_survey

    tmp_path.mkdir(exist_ok=True)
    result = compute(load_survey(_write_survey(tmp_path)))
    drawn = {}

    class Recording(qc_figures.LineFigure):
        def draw(self, *args, **kwargs):
            drawn[args[-1]] = (np.asarray(args[6], float), list(args[7]))
            return super().draw(*args, **kwargs)

    monkeypatch.setattr(qc_figures, "LineFigure", Recording)
    figures_made = list(outputs.line_qc_figures(result))
    assert [name for _, name, _ in figures_made] == [f"line_{line}.png" for line in sorted(result.fit.frames)]
    assert all(_png_size(png) == (1000, 400) for _, _, png in figures_made)
    for rows, labels in drawn.values():
        assert len(set(np.round(rows, 6))) == len(rows)  # every gather on its own row
        assert {label.split()[-1] for label in labels} == {"top", "rock"}


def test_gather_panels_name_the_offset_alike():
    """The t–x and residual panels share one abscissa, the offset along the line, and say so in metres."""
    x, t = _flat_gather()
    fig = GatherFigure().draw(x, t, t, np.zeros(len(x), bool), np.zeros(len(x), bool), "flat", "")
    _, ax_tx, ax_res = fig.axes
    assert ax_tx.get_xlabel() == ax_res.get_xlabel() == "offset along line x (m)"
