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


def test_report_map_contours_carry_their_depth(captured):
    """Index contours are labelled; with fewer than three index levels every contour is (as the QGIS style)."""
    gx, gy, depth, lines, _ = _site()

    def vertical(x):
        return np.array([[x, 0.0], [x, 145.0]])

    few = [(20.0, vertical(50.0), True), (25.0, vertical(75.0), False)]
    many = [(10.0 * k, vertical(20.0 * k), k % 2 == 0) for k in range(1, 9)]  # index levels 20, 40, 60, 80
    for contours, labelled in ((few, {"20", "25"}), (many, {"20", "40", "60", "80"})):
        captured.clear()
        figures.map_figure(gx, gy, depth, contours, lines, title="depth")
        (fig,) = captured
        texts = {t.get_text() for t in fig.axes[0].texts if not t.get_text().startswith(("line", "BH"))}
        assert texts == labelled


def test_map_sheet_labels_have_a_halo():
    from matplotlib.figure import Figure

    gx, gy, depth, lines, boreholes = _site()
    spec = GridSpec(x0=0.0, y0=0.0, cell_size_m=5.0, nx=len(gx), ny=len(gy))
    contours = (
        (20.0, np.array([[50.0, 0.0], [50.0, 145.0]]), True),
        (25.0, np.array([[75.0, 0.0], [75.0, 145.0]]), False),
    )
    page = map_sheet.MapPage(title="depth", values=depth[::-1], label="depth (m)", cmap="viridis", contours=contours)
    ov = map_sheet.MapOverlays(lines=lines, boreholes=boreholes)
    ax = Figure().add_subplot()
    map_sheet._draw_map(ax, spec, page, ov, symbol_m=3.0)
    labels = {t.get_text(): t for t in ax.texts}
    for name in ("line A", "line D", "BH-1"):
        assert _has_halo(labels[name]), name
    assert {"20", "25"} <= set(labels)  # one index level only: every contour labelled


def test_grid_figure_axes_name_their_units(captured):
    """The difference and probability maps say what their axes are, in metres."""
    gx, gy, depth, _, _ = _site()
    figures.raster_figure(gx, gy, depth - depth.mean(), "difference (m)", title="difference")
    (fig,) = captured
    ax = fig.axes[0]
    assert ax.get_xlabel() == "easting (m)"
    assert ax.get_ylabel() == "northing (m)"


def _report_html(sections, fmt="pdf"):
    from types import SimpleNamespace as S

    from rockhead.core.report.handoff_content import handoff_section
    from rockhead.core.report.html import Report

    result = S(surface=object(), design=None, survey=S(handoff=S(section_format=fmt)))
    rep = Report("t")
    handoff_section(rep, result, sections)
    return rep.render()


def _section(name, n_boreholes=0):
    from types import SimpleNamespace as S

    return S(
        name=name, title=name.replace("_", " ", 1), boreholes=[None] * n_boreholes, length_m=220.0, corridor_m=25.0
    )


def test_handoff_files_are_links_to_the_files_the_run_writes():
    import re

    from rockhead.core.products.handoff import drawn_sections, section_file_stems

    # 40 lines: every second one gets a sheet (20); "line_A B" makes a stem with a hash suffix
    sections = [_section(f"line_{k}") for k in range(39)] + [_section("line_A B", 1)]
    page = _report_html(sections)
    hrefs = re.findall(r'<a href="([^"]+)">', page)
    expected = {"map_sheet.pdf", "reflector_surface.xml"}
    for stem, drawn in zip(section_file_stems(sections), drawn_sections(sections)):
        expected |= {f"{stem}.csv"} | ({f"{stem}.pdf"} if drawn else set())
    assert set(hrefs) == expected
    assert sum(h.endswith(".pdf") for h in hrefs) == 1 + 20  # the map sheet and 20 section sheets
    assert "1 borehole within" in page and "0 boreholes within" in page


def test_wide_table_scrolls_on_its_own():
    from rockhead.core.report.html import Report

    rep = Report("t")
    rep.table({f"column_{k}": [1.0] for k in range(30)})
    page = rep.render()
    assert '<div class="wide"><table>' in page
    assert ".wide{overflow-x:auto" in page


def test_section_elevation_label_clears_the_sheet_border(monkeypatch):
    """The section's elevation label lay across the sheet's border line: it must sit inside the frame."""
    from rockhead.core.grid import GridSpec
    from rockhead.core.handoff.sections import Interface, build_section
    from rockhead.core.report import section_sheet as sheet_module
    from rockhead.core.report.sheet import SheetInfo

    kept = []
    monkeypatch.setattr(sheet_module, "save_figure", lambda fig, fmt="pdf": kept.append(fig) or b"")
    spec = GridSpec(x0=2.5, y0=97.5, cell_size_m=5.0, nx=20, ny=20)
    gx, gy = spec.coords()
    z = 1250.0 + 0.1 * gx - 0.05 * gy  # four-digit elevations: the widest tick labels of a site
    v = np.array([[spec.x_centres[0], gy[7, 0]], [spec.x_centres[-1], gy[7, 0]]])
    sec = build_section(
        "row", v, spec, [Interface("rock", z, 0.2 + 0 * z)], ground=lambda x, y: np.full(np.shape(x), 1270.0)
    )
    info = SheetInfo("synthetic", None, "Rockhead test", "EPSG:32633", None, None, "kriging", 5.0)
    sheet_module.section_sheet(sec, info)
    (fig,) = kept
    fig.canvas.draw()  # the axis label is placed at draw time, beside the tick labels
    renderer = fig.canvas.get_renderer()
    frame, section_ax = fig.artists[0], fig.axes[0]  # the border line, and the section's axes
    border_x = frame.get_window_extent(renderer).x0
    label = section_ax.yaxis.label
    assert "vertical datum not stated" in label.get_text()
    # at least 1 mm of paper between the border line and the label (1 mm at the figure's dpi)
    assert label.get_window_extent(renderer).x0 - border_x > fig.dpi / 25.4


def test_section_key_plan_names_every_line():
    """The key plan showed the lines unnamed: each now carries its name, readable over the others."""
    from types import SimpleNamespace

    from matplotlib.figure import Figure
    from rockhead.core.report.section_sheet import _key_plan

    section = SimpleNamespace(vertices_xy=np.array([[0.0, 50.0], [200.0, 50.0]]), corridor_m=25.0, length_m=200.0)
    plan = {"lines": {"A": np.array([[0.0, 50.0], [200.0, 50.0]]), "B": np.array([[100.0, 0.0], [100.0, 100.0]])}}
    ax = Figure().add_subplot()
    _key_plan(ax, section, plan)
    labels = {t.get_text(): t for t in ax.texts}
    for name in ("A", "B"):
        assert _has_halo(labels[name]), name
    assert {"0", "200 m"} <= set(labels)  # the chainage ends, as before
