"""Sections along an alignment on synthetic grids: sampled values, projections, the drawn sheet.

References: at a cell centre bilinear interpolation returns the cell's value exactly, and along a
straight alignment the chainage and offset of a point are its coordinates in the alignment's
frame (plain geometry, checked with numpy here).
"""

import numpy as np
import pytest
from rockhead.core.grid import GridSpec
from rockhead.core.handoff.sections import Interface, build_section, locate_on_polyline
from rockhead.core.report.section_sheet import section_sheet, vertical_exaggeration
from rockhead.core.report.sheet import SheetInfo

SPEC = GridSpec(x0=2.5, y0=97.5, cell_size_m=5.0, nx=20, ny=20)
INFO = SheetInfo("synthetic", "2025-12-02", "Rockhead test", "EPSG:32633", None, None, "kriging", 5.0)


def _grids():
    gx, gy = SPEC.coords()
    z = 50.0 + 0.1 * gx - 0.05 * gy + np.sin(gx / 9.0)
    s = 0.2 + 0.001 * gx
    water = np.full(SPEC.shape, 58.0)
    return z, s, water


def test_values_at_cell_centres_are_the_grid():
    z, s, water = _grids()
    row = 7
    y = SPEC.y_centres[row]
    v = np.array([[SPEC.x_centres[0], y], [SPEC.x_centres[-1], y]])  # along a row of cell centres
    sec = build_section(
        "row",
        v,
        SPEC,
        [Interface("rock", z, s), Interface("water", water, 0 * water, "water_table")],
        ground=lambda x, yy: np.full(np.shape(x), 70.0),
        step_m=SPEC.cell_size_m,
    )
    np.testing.assert_allclose(sec.x_m, SPEC.x_centres)  # samples fall on the cell centres
    np.testing.assert_allclose(sec.elevation_m, z[row], atol=1e-12)  # bilinear at a node = node value
    np.testing.assert_allclose(sec.sigma_m, s[row], atol=1e-12)
    np.testing.assert_allclose(sec.depth_m, 70.0 - z[row], atol=1e-12)
    assert [i[1] for i in sec.interfaces] == ["reflector", "water_table"]


def test_corridor_projection_on_a_bent_alignment():
    v = np.array([[10.0, 10.0], [60.0, 10.0], [60.0, 80.0]])  # east 50 m, then north 70 m
    px = np.array([30.0, 30.0, 70.0, 50.0, 90.0])
    py = np.array([14.0, 30.0, 40.0, 40.0, 40.0])
    ch, off, dist = locate_on_polyline(v[:, 0], v[:, 1], px, py)
    np.testing.assert_allclose(dist, np.abs(off))  # inside the legs the distance is the offset
    # first leg runs east: a point 4 m north is 4 m LEFT (negative); second leg runs north: east is right
    np.testing.assert_allclose(ch[:1], [20.0])
    np.testing.assert_allclose(off[:1], [-4.0])
    np.testing.assert_allclose(ch[2:4], [50.0 + 30.0, 50.0 + 30.0])
    np.testing.assert_allclose(off[2:4], [10.0, -10.0])
    z, s, _ = _grids()
    sec = build_section(
        "bent",
        v,
        SPEC,
        [Interface("rock", z, s)],
        corridor_m=25.0,
        boreholes=(np.array(["A", "B", "C", "D", "E"]), px, py, np.full(5, 70.0), np.full(5, 55.0), np.full(5, 0.1)),
    )
    # within 12.5 m: A (4 m), C (10 m) and D (10 m); B is 20 m away and E 30 m
    assert list(sec.boreholes.label) == ["A", "C", "D"]
    np.testing.assert_allclose(sec.boreholes.chainage_m, [20.0, 80.0, 80.0])


@pytest.mark.parametrize("fmt", ["pdf", "svg"])
def test_sheet_is_drawn_and_reproducible(fmt):
    z, s, water = _grids()
    v = np.array([[5.0, 50.0], [95.0, 55.0]])
    itf = [Interface("rock", z, s), Interface("groundwater", water, np.full(SPEC.shape, 0.3), "water_table")]
    sec = build_section(
        "s",
        v,
        SPEC,
        itf,
        ground=lambda x, y: np.full(np.shape(x), 70.0),
        boreholes=(
            np.array(["BH9"]),
            np.array([50.0]),
            np.array([55.0]),
            np.array([70.0]),
            np.array([55.5]),
            np.array([0.1]),
        ),
    )
    a = section_sheet(sec, INFO, fmt=fmt)
    b = section_sheet(sec, INFO, fmt=fmt)
    assert a == b  # no date, fixed ids: the same section gives the same bytes
    if fmt == "svg":
        text = a.decode("utf-8")
        for part in (
            "groundwater (water table)",
            "BH9",
            "offset",
            "vertical exaggeration",
            "CAUTION",
            "vertical datum not stated",
        ):
            assert part in text, part
    else:
        assert a.startswith(b"%PDF")


def test_vertical_exaggeration_is_stated_and_fits():
    # 500 m on 380 mm needs 1:1316, so 1:2000 (steps 1, 1.25, 2, 2.5, 5 x 10^k); at VE 1 the 165 mm panel
    # holds 330 m, so the largest step keeping 30 m inside is 10 (330 / 10 = 33 m >= 30 m; 20 gives 16.5 m)
    assert vertical_exaggeration(500.0, 30.0, 380.0, 165.0) == (2000, 10.0)
