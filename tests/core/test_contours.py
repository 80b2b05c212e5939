"""Contours against analytic truths: a plane (straight lines), a cone and a paraboloid (circles)."""

import math

import numpy as np
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.surface.contours import contour_levels, contour_lines, contours_layer, nice_interval
from shapely.geometry import LineString, Point, box

CELL = 5.0
X = np.arange(0.0, 200.0 + CELL / 2, CELL)
Y = np.arange(0.0, 150.0 + CELL / 2, CELL)
XX, YY = np.meshgrid(X, Y)


def _plane(x, y):
    return 100.0 + 0.3 * x - 0.2 * y


def _analytic_plane_line(level):
    """The contour z = level of the plane, clipped to the grid's node rectangle."""
    # 0.3 x - 0.2 y = level - 100  ->  y = (0.3 x - level + 100) / 0.2
    xs = np.array([-1000.0, 1000.0])
    ys = (0.3 * xs - level + 100.0) / 0.2
    return LineString(np.column_stack([xs, ys])).intersection(box(X[0], Y[0], X[-1], Y[-1]))


def test_plane_contours_at_analytic_positions():
    z = _plane(XX, YY)
    levels = [80.0, 100.0, 125.0, 150.0]
    lines = contour_lines(X, Y, z, levels)
    assert sorted({lv for lv, _ in lines}) == levels
    grad = math.hypot(0.3, 0.2)
    for level, line in lines:
        xy = np.asarray(line.coords)
        # distance of each vertex from the analytic line = |z(v) - level| / |grad z|
        dist = np.abs(_plane(xy[:, 0], xy[:, 1]) - level) / grad
        # requirement: within half a cell; linear interpolation of a plane is in fact exact
        # (float rounding only, ~1e-12 m at these magnitudes)
        assert dist.max() < 0.5 * CELL
        assert dist.max() < 1e-9
        # and the line covers the analytic chord across the grid (Hausdorff distance, both ways)
        truth = _analytic_plane_line(level)
        assert line.hausdorff_distance(truth) < 1e-9
    assert len(lines) == len(levels)  # one unbroken line per level


def test_nan_hole_is_respected():
    z = _plane(XX, YY)
    centre, r_hole = (100.0, 75.0), 30.0
    hole = np.hypot(XX - centre[0], YY - centre[1]) < r_hole
    z[hole] = np.nan
    lines = contour_lines(X, Y, z, [115.0])
    # the level-115 line passes through the hole's centre (z(100, 75) = 115), so the hole cuts it in two
    assert len(lines) == 2
    for _, line in lines:
        d = np.hypot(*(np.asarray(line.coords) - centre).T)
        # vertices lie on edges between valid nodes (both >= r_hole from the centre); a chord of
        # such nodes dips inside the circle by at most CELL^2 / (8 r) ~ 0.1 m: half a cell is ample
        assert d.min() > r_hole - 0.5 * CELL
        xy = np.asarray(line.coords)
        assert np.abs(_plane(xy[:, 0], xy[:, 1]) - 115.0).max() < 1e-9
    # the two pieces end near the hole's rim (within one cell diagonal of it)
    ends = [Point(line.coords[i]) for _, line in lines for i in (0, -1)]
    near_rim = [abs(p.distance(Point(centre)) - r_hole) < CELL * math.sqrt(2) for p in ends]
    assert sum(near_rim) == 2


@pytest.mark.parametrize(
    ("surface", "radius_of"),
    [
        (lambda r: r, lambda level: level),  # cone z = r
        (lambda r: r**2 / 20.0, lambda level: math.sqrt(20.0 * level)),  # paraboloid z = r^2 / 20
    ],
    ids=["cone", "paraboloid"],
)
def test_circular_contours_have_analytic_radius(surface, radius_of):
    cx, cy = 101.0, 73.0  # off the grid nodes on purpose
    r = np.hypot(XX - cx, YY - cy)
    z = surface(r)
    levels = [10.0, 20.0, 40.0, 60.0]
    lines = contour_lines(X, Y, z, levels)
    for level in levels:
        radius = radius_of(level)
        found = [ln for lv, ln in lines if lv == level]
        assert len(found) == 1  # a single closed loop (all circles fit inside the grid)
        xy = np.asarray(found[0].coords)
        assert np.array_equal(xy[0], xy[-1])
        err = np.abs(np.hypot(xy[:, 0] - cx, xy[:, 1] - cy) - radius)
        assert err.max() < 0.5 * CELL  # requirement: half a cell
        # the loop goes all the way round: its enclosed area matches pi r^2 within the
        # band of half a cell around the circle
        area = 0.5 * abs(np.dot(xy[:-1, 0], xy[1:, 1]) - np.dot(xy[1:, 0], xy[:-1, 1]))
        assert abs(area - math.pi * radius**2) < 2 * math.pi * radius * 0.5 * CELL


@pytest.mark.parametrize(
    ("zmin", "zmax", "target", "expected"),
    [
        (203.7, 241.2, 10, 5.0),  # range 37.5 -> raw 3.75 -> 5
        (0.0, 100.0, 10, 10.0),  # exact fit
        (0.0, 101.0, 10, 20.0),  # just over -> next step
        (-3.2, 4.1, 5, 2.0),  # raw 1.46 -> 2
        (1500.0, 1500.3, 10, 0.05),  # raw 0.03 -> 0.05
    ],
    ids=["37.5", "100", "101", "negative", "small"],
)
def test_nice_interval_worked_examples(zmin, zmax, target, expected):
    # worked by hand from the 1-2-5 rule: smallest step >= range / target
    assert nice_interval(zmin, zmax, target) == expected


def test_nice_interval_properties(rng):
    for _ in range(300):
        zmin = rng.uniform(-1e3, 1e3)
        zmax = zmin + 10 ** rng.uniform(-2, 4)
        target = int(rng.integers(3, 20))
        step = nice_interval(zmin, zmax, target)
        mant = step / 10 ** math.floor(math.log10(step) + 1e-12)
        assert min(abs(mant - m) for m in (1.0, 2.0, 5.0)) < 1e-9
        n = (zmax - zmin) / step
        assert n <= target * (1 + 1e-9) and n > target / 2.5 - 1e-9


def _smallest_step_not_below(raw):
    """The 1-2-5 rule by enumeration: the smallest decimal 1, 2 or 5 x 10^k not below raw."""
    steps = sorted(float(f"{m}e{k}") for k in range(-30, 31) for m in (1, 2, 5))
    return next(s for s in steps if s >= raw * (1 - 1e-12))  # 1e-12: the documented rounding allowance


EDGES = [
    float(f"{m}e{k}") * f
    for k in range(-8, 9)
    for m in (1, 2, 5)
    for f in (1.0, 1 + 1e-12, 1 - 1e-12, 1 + 1.1e-12, 1 - 1.1e-12, 1.3, 0.8)
]


def test_nice_interval_is_the_enumerated_step(rng):
    # the definition, enumerated (contour intervals of 1, 2 or 5 x 10^k: common practice of
    # map making, from memory), over ranges from 1e-8 to 1e8 and at every step's rounding
    # edge, where a step computed as 5 * 10.0**-6 (one unit in the last place below 5e-06)
    # would tip the choice: exact equality, the interval is the step's decimal value
    spans = [*EDGES, *(10 ** rng.uniform(-8, 8, 3000))]
    targets = [1, 7, 10, 10]
    for i, span in enumerate(spans):
        target = targets[i % len(targets)]
        assert nice_interval(0.0, span * target, target) == _smallest_step_not_below(span * target / target)


def test_levels_are_clean_multiples():
    levels, k = contour_levels(0.05, 1.02, 0.1)
    assert levels.tolist() == [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0]  # no 0.30000000000000004
    assert k.tolist() == list(range(1, 11))


def test_contours_layer_fields():
    elevation = _plane(XX, YY)
    depth = 250.0 - elevation  # ground at 250 m
    layer = contours_layer(X, Y, elevation, depth, elevation_interval_m=5.0, depth_interval_m=10.0)
    kinds = layer.fields["kind"]
    elev = layer.fields["elevation_m"]
    dep = layer.fields["depth_m"]
    ix = layer.fields["index"]
    assert set(kinds) == {"elevation", "depth"}
    e = kinds == "elevation"
    assert np.all(np.isnan(dep[e])) and np.all(np.isnan(elev[~e]))
    # index contours every fifth multiple of the interval, counted from zero
    assert np.array_equal(ix[e], np.isclose(np.mod(elev[e], 25.0), 0.0))
    assert np.array_equal(ix[~e], np.isclose(np.mod(dep[~e], 50.0), 0.0))
    # elevation range of the plane: 100 - 30 .. 100 + 60 -> levels 70..160 step 5; 70 and 160
    # touch the grid in a single corner node, so no line: 17 lines
    assert np.count_nonzero(e) == 17
    for g, level in zip([g for g, keep in zip(layer.geometries, e) if keep], elev[e]):
        xy = np.asarray(g.coords)
        assert np.abs(_plane(xy[:, 0], xy[:, 1]) - level).max() < 1e-9


def test_flat_or_empty_grid_gives_empty_layer():
    layer = contours_layer(X, Y, np.full(XX.shape, 3.0), np.full(XX.shape, np.nan))
    assert len(layer) == 0 and layer.geometry_type == "LINESTRING"


def test_bad_grid_shapes():
    with pytest.raises(OutputError, match="grid shapes do not match"):
        contour_lines(X, Y, np.zeros((3, 3)), [1.0])
    with pytest.raises(OutputError, match="strictly increasing or decreasing"):
        contour_lines(np.array([0.0, 1.0, 1.0]), Y, np.zeros((len(Y), 3)), [1.0])
    with pytest.raises(OutputError, match="must be > 0"):
        nice_interval(5.0, 5.0)
