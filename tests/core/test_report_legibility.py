"""What a reader sees on the report's maps and the map sheet: labels stay legible.

The checks measure the drawn figure itself (matplotlib's text extents after a draw),
not the code that made it. Common practice on maps (from memory): a label laid over
a colour ramp carries a light halo so it reads on the darkest and the lightest colour.
"""

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pytest
from rockhead.core.grid import GridSpec
from rockhead.core.report import figures, map_sheet


@pytest.fixture
def captured(monkeypatch):
    """The figures that ``figures`` would save, kept for inspection."""
    kept = []
    real = figures._png

    def keep(fig):
        kept.append(fig)
        return real(fig)

    monkeypatch.setattr(figures, "_png", keep)
    return kept


def _site():
    gx = np.arange(0.0, 200.0, 5.0)
    gy = np.arange(0.0, 150.0, 5.0)
    depth = 10.0 + 0.2 * gx[None, :] + 0.0 * gy[:, None]
    lines = {"A": np.array([[20.0, 75.0], [180.0, 75.0]]), "D": np.array([[190.0, 10.0], [190.0, 140.0]])}
    boreholes = (np.array([60.0]), np.array([80.0]), ["BH-1"])
    return gx, gy, depth, lines, boreholes


def _has_halo(text) -> bool:
    from matplotlib import patheffects

    return any(isinstance(e, patheffects.withStroke) for e in text.get_path_effects())


def test_report_map_labels_have_a_halo(captured):
    gx, gy, depth, lines, boreholes = _site()
    figures.map_figure(gx, gy, depth, [], lines, boreholes=boreholes, title="depth")
    (fig,) = captured
    labels = {t.get_text(): t for t in fig.axes[0].texts}
    # line D lies over the deepest (darkest) cells, where a plain line-coloured label vanished
    for name in ("line A", "line D", "BH-1"):
        assert _has_halo(labels[name]), name


def test_map_sheet_labels_have_a_halo():
    from matplotlib.figure import Figure

    gx, gy, depth, lines, boreholes = _site()
    spec = GridSpec(x0=0.0, y0=0.0, cell_size_m=5.0, nx=len(gx), ny=len(gy))
    page = map_sheet.MapPage(title="depth", values=depth[::-1], label="depth (m)", cmap="viridis")
    ov = map_sheet.MapOverlays(lines=lines, boreholes=boreholes)
    ax = Figure().add_subplot()
    map_sheet._draw_map(ax, spec, page, ov, symbol_m=3.0)
    labels = {t.get_text(): t for t in ax.texts}
    for name in ("line A", "line D", "BH-1"):
        assert _has_halo(labels[name]), name


def test_grid_figure_axes_name_their_units(captured):
    """The difference and probability maps say what their axes are, in metres."""
    gx, gy, depth, _, _ = _site()
    figures.raster_figure(gx, gy, depth - depth.mean(), "difference (m)", title="difference")
    (fig,) = captured
    ax = fig.axes[0]
    assert ax.get_xlabel() == "easting (m)"
    assert ax.get_ylabel() == "northing (m)"
