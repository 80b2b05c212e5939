"""Forward model of the layered overburden (core.tomography: nodes, velocity, raypath).

References checked against (named beside each check):
- Snell's law / Fermat's principle for flat layers: the ray parameter p from a
  1-D root solve (scipy.optimize.brentq) of x(p) = sum 2 h p v / sqrt(1 - p^2 v^2),
  t(p) = sum 2 h / (v sqrt(1 - p^2 v^2)) [Sheriff & Geldart 1995, ch. 4];
- the image-source time of a dipping plane under a constant layer, exact in 3D,
  S' = S + 2 h n, t = |R - S'| / V [Sheriff & Geldart 1995, ch. 4];
- Dix (1955): the small-offset moveout of flat layers is hyperbolic with the rms
  velocity V_rms^2 = sum v^2 dt / sum dt;
- a linear velocity v = v0 + G z: the ray integrals x(p), t(p) evaluated by
  scipy.integrate.quad (Slotnick 1959, linear velocity functions);
- Fermat's principle as a minimum: the same total time minimised by
  scipy.optimize.minimize over the path points;
- sensitivities against central finite differences of the forward model.
"""

import numpy as np
import pytest
from rockhead.core.errors import InversionError
from rockhead.core.grid import GridSpec
from rockhead.core.tomography import nodes, raypath, velocity
from rockhead.core.tomography.raypath import LayeredModel, path_layout, trace_reflections
from scipy.integrate import quad
from scipy.optimize import brentq, minimize

SPEC = GridSpec(x0=-100.0, y0=100.0, cell_size_m=5.0, nx=41, ny=41)
GROUND_Z = 100.0


def flat_model(depths_m, v_m_s, gradients=None):
    """Flat interfaces at the given depths below a flat ground at 100 m."""
    z = np.stack([np.full(SPEC.shape, GROUND_Z - d) for d in depths_m])
    g = np.zeros((len(v_m_s), 3)) if gradients is None else np.asarray(gradients, float)
    th = np.column_stack([v_m_s, g])
    tops = np.r_[GROUND_Z, GROUND_Z - np.asarray(depths_m[:-1], float)]
    centre = np.column_stack([np.zeros(len(v_m_s)), np.zeros(len(v_m_s)), tops])
    return LayeredModel(SPEC, z, th, centre, tuple(f"r{i}" for i in range(len(depths_m))))


def split_pairs(offsets_m, y_m=0.0):
    off = np.asarray(offsets_m, float)
    S = np.column_stack([-off / 2, np.full_like(off, y_m), np.full_like(off, GROUND_Z)])
    R = np.column_stack([off / 2, np.full_like(off, y_m), np.full_like(off, GROUND_Z)])
    return S, R


def snell_time(offset_m, thickness_m, v_m_s):
    """Two-way time of a flat stack by the ray parameter (Snell's law; 1-D root solve)."""
    h = np.asarray(thickness_m, float)
    v = np.asarray(v_m_s, float)
    if offset_m == 0:
        return float(np.sum(2 * h / v))

    def x_of(p):
        return float(np.sum(2 * h * p * v / np.sqrt(1 - (p * v) ** 2))) - offset_m

    p = brentq(x_of, 0.0, (1 - 1e-15) / v.max(), xtol=1e-18, rtol=1e-15)
    return float(np.sum(2 * h / (v * np.sqrt(1 - (p * v) ** 2)))), p


# --------------------------------------------------------------------------- surfaces


def test_interfaces_pass_through_nodes_and_follow_the_north_up_grid():
    # Catmull-Rom surfaces interpolate their nodes and reproduce planes [Catmull & Rom 1974];
    # row 0 is the northern row: a surface rising to the north has dz/dy > 0.
    X, Y = SPEC.coords()
    rng = np.random.default_rng(1)
    z = rng.normal(size=SPEC.shape)
    assert np.allclose(nodes.interface_values(z, SPEC, X, Y), z, atol=1e-12)
    plane = 50.0 + 0.03 * X + 0.07 * Y
    assert plane[0, 0] > plane[-1, 0]  # north row higher
    v = nodes.interface_values(plane, SPEC, 12.3, -41.7, derivatives=2)
    assert v[0] == pytest.approx(50.0 + 0.03 * 12.3 - 0.07 * 41.7, abs=1e-10)
    assert v[1] == pytest.approx(0.03, abs=1e-12) and v[2] == pytest.approx(0.07, abs=1e-12)
    assert np.allclose(v[3:], 0.0, atol=1e-12)
    node, w = nodes.node_weights(SPEC, [12.3], [-41.7])
    assert float(np.sum(w * plane.ravel()[node])) == pytest.approx(float(v[0]), abs=1e-10)


def test_path_layout():
    iface, layer = path_layout(2)
    assert iface.tolist() == [0, 1, 2, 1, 0]
    assert layer.tolist() == [0, 1, 2, 2, 1, 0]


# --------------------------------------------------------------------------- legs


def test_leg_time_is_the_least_time_of_any_path_in_a_linear_field():
    # Fermat: the circular-ray time (Slotnick 1959) is the minimum over paths; a
    # polyline of 31 straight pieces optimised by scipy comes within its discretisation error.
    th = np.array([600.0, 0.8, -0.4, -22.0])
    c = np.array([0.0, 0.0, 100.0])
    A = np.array([0.0, 0.0, 100.0])
    B = np.array([18.0, 4.0, 94.0])
    n = 30

    def t_poly(zi):
        s = np.linspace(0.0, 1.0, n + 2)[:, None]
        P = A + s * (B - A)
        P[1:-1, 2] = zi
        return float(np.sum(velocity.straight_leg_time(P[:-1], P[1:], th, c)))

    z0 = np.linspace(A[2], B[2], n + 2)[1:-1]
    res = minimize(t_poly, z0, method="L-BFGS-B", options={"ftol": 1e-16, "gtol": 1e-13, "maxiter": 10000})
    exact = float(velocity.leg_time(A, B, th, c))
    # the polyline only bends in z and has 31 pieces: it is slower by its discretisation
    # error (second order in the piece length: 2.5e-7 s with 81 pieces, ~2e-6 s with 31)
    assert exact <= res.fun + 1e-12
    assert res.fun - exact < 5e-6


def test_leg_derivatives_match_finite_differences():
    rng = np.random.default_rng(4)
    A = np.column_stack([rng.uniform(-20, 20, 6), rng.uniform(-20, 20, 6), rng.uniform(98, 101, 6)])
    B = np.column_stack([rng.uniform(-20, 20, 6), rng.uniform(-20, 20, 6), rng.uniform(90, 95, 6)])
    th = np.array([620.0, 0.9, -0.5, -22.0])
    c = np.array([0.0, 0.0, 97.0])
    o = velocity.leg_times(A, B, th, c)
    h = 1e-5
    e = np.eye(3)
    for i in range(3):
        dA = (velocity.leg_time(A + h * e[i], B, th, c) - velocity.leg_time(A - h * e[i], B, th, c)) / (2 * h)
        dB = (velocity.leg_time(A, B + h * e[i], th, c) - velocity.leg_time(A, B - h * e[i], th, c)) / (2 * h)
        # central differences: truncation ~h^2 t''' ~ 1e-13 s/m against values ~1e-3 s/m
        assert np.allclose(dA, o["gA"][:, i], rtol=1e-7, atol=1e-12)
        assert np.allclose(dB, o["gB"][:, i], rtol=1e-7, atol=1e-12)
        gA = lambda a: velocity.leg_times(a, B, th, c, hessian=False)["gA"]  # noqa: E731
        gB = lambda b: velocity.leg_times(A, b, th, c, hessian=False)["gB"]  # noqa: E731
        assert np.allclose((gA(A + h * e[i]) - gA(A - h * e[i])) / (2 * h), o["HAA"][:, :, i], rtol=1e-5, atol=1e-10)
        assert np.allclose((gB(B + h * e[i]) - gB(B - h * e[i])) / (2 * h), o["HBB"][:, :, i], rtol=1e-5, atol=1e-10)
        gAB = lambda b: velocity.leg_times(A, b, th, c, hessian=False)["gA"]  # noqa: E731
        assert np.allclose((gAB(B + h * e[i]) - gAB(B - h * e[i])) / (2 * h), o["HAB"][:, :, i], rtol=1e-5, atol=1e-10)
    steps = np.array([1e-3, 1e-6, 1e-6, 1e-6])
    for j in range(4):
        d = steps[j] * np.eye(4)[j]
        fd = (velocity.leg_time(A, B, th + d, c) - velocity.leg_time(A, B, th - d, c)) / (2 * steps[j])
        assert np.allclose(fd, o["dtheta"][:, j], rtol=1e-6, atol=1e-14)


@pytest.mark.parametrize("gradient", [(0.9, -0.5, -22.0), (0.0, 0.0, 0.0)], ids=["full field", "constant"])
def test_leg_hessian_on_surfaces_matches_second_differences(gradient):
    # the ends move on planes z = z0 + s . (x, y): second central differences of leg_time itself
    # along those planes (independent of either Hessian formula) against leg_times_on_surfaces
    rng = np.random.default_rng(9)
    n = 6
    A0 = np.column_stack([rng.uniform(-20, 20, n), rng.uniform(-20, 20, n), rng.uniform(98, 101, n)])
    B0 = np.column_stack([rng.uniform(-20, 20, n), rng.uniform(-20, 20, n), rng.uniform(90, 95, n)])
    sa = rng.uniform(-0.3, 0.3, (n, 2))
    sb = rng.uniform(-0.3, 0.3, (n, 2))
    th = np.array([620.0, *gradient])
    c = np.array([0.0, 0.0, 97.0])
    o = velocity.leg_times_on_surfaces(A0, B0, th, c, sa, sb)
    full = velocity.leg_times(A0, B0, th, c, hessian=False)
    assert np.allclose(o["t"], full["t"], rtol=1e-14) and np.allclose(o["gA"], full["gA"], rtol=1e-14)

    def t_of(ua, ub):  # ua, ub: (n, 2) horizontal moves of the ends along their planes
        A = A0 + np.column_stack([ua, np.sum(sa * ua, axis=1)])
        B = B0 + np.column_stack([ub, np.sum(sb * ub, axis=1)])
        return velocity.leg_time(A, B, th, c)

    # central second differences, step 1 mm: truncation ~h^2 t'''' ~ 1e-12 s/m^2 and round-off
    # ~1e-18 s / 1e-6 m^2 ~ 1e-12 s/m^2, against entries ~1e-5 s/m^2
    h = 1e-3
    e = np.eye(2)
    z = np.zeros(2)
    moves = {"HAA": lambda i, j: (e[i], z, e[j], z), "HBB": lambda i, j: (z, e[i], z, e[j])}
    moves["HAB"] = lambda i, j: (e[i], z, z, e[j])
    for key, move in moves.items():
        for i in range(2):
            for j in range(2):
                ia, ib, ja, jb = (h * np.broadcast_to(w, (n, 2)) for w in move(i, j))
                fd = (
                    t_of(ia + ja, ib + jb) - t_of(ia - ja, ib - jb) - t_of(ja - ia, jb - ib) + t_of(-ia - ja, -ib - jb)
                ) / (4 * h * h)
                assert np.allclose(fd, o[key][:, i, j], rtol=1e-5, atol=1e-9), (key, i, j)


def _downgoing_legs(rng, n, max_x_m, drop_m):
    """``n`` legs from (0, 0, 100) to random azimuths, 1 to ``max_x_m`` away and ``drop_m`` (low, high) lower."""
    A = np.column_stack([np.zeros(n), np.zeros(n), np.full(n, 100.0)])
    az = rng.uniform(0.0, 2 * np.pi, n)
    X = rng.uniform(1.0, max_x_m, n)
    B = np.column_stack([X * np.cos(az), X * np.sin(az), 100.0 - rng.uniform(*drop_m, n)])
    return A, B, X


@pytest.mark.parametrize("gz", [-22.0, 15.0], ids=["velocity rising with depth", "falling with depth"])
def test_leg_turns_matches_the_circle_of_a_vertical_gradient(gz):
    # in v = v0 + gz (z - cz) rays are circles centred on the level where v = 0 [Slotnick 1959]:
    # with the ends at heights hA, hB from that level and X apart horizontally, the centre lies
    # xc = (X^2 + hB^2 - hA^2) / (2 X) from A; the arc turns inside the layer (has its lowest or
    # highest point between the ends) exactly when 0 < xc < X
    A, B, X = _downgoing_legs(np.random.default_rng(12), 400, 80.0, (0.5, 12.0))
    th = np.array([600.0, 0.0, 0.0, gz])
    c = np.array([0.0, 0.0, 97.0])
    zc = c[2] - th[0] / gz  # v = 0 here
    hA, hB = np.abs(zc - A[:, 2]), np.abs(zc - B[:, 2])
    xc = (X**2 + hB**2 - hA**2) / (2 * X)
    radius = np.hypot(xc, hA)
    # how far the extreme point passes the nearer end (m); the test samples the arc at 9 points,
    # so it is asked only about extremes that are clear of the ends (the middle 70 % of the leg,
    # more than 2 cm beyond the nearer end) and about arcs clearly monotonic
    low, high = np.minimum(A[:, 2], B[:, 2]), np.maximum(A[:, 2], B[:, 2])
    excess = np.where(gz < 0, low - (zc - radius), (zc + radius) - high)
    clear_turn = (xc > 0.15 * X) & (xc < 0.85 * X) & (excess > 0.02)
    clear_no = (xc < -0.5) | (xc > X + 0.5)
    assert clear_turn.sum() > 20 and clear_no.sum() > 20  # both kinds are exercised
    turns = velocity.leg_turns(A, B, th, c)
    assert np.all(turns[clear_turn]) and not np.any(turns[clear_no])


def test_leg_turns_matches_a_densely_sampled_arc_in_any_linear_field():
    # in v = v0 + g.(x - c) the ray is a circle in the plane of B - A and g, centred where v = 0
    # [Slotnick 1959; Cerveny 2001, s. 3.8]; sampled here at 1001 points: a turn is z beyond the ends'
    # range by more than 2 cm in the middle 70 % of the arc (clear of the function's 1 mm tolerance and
    # of its 9 samples' spacing, as in the test above), no turn z within it. Legs of many slopes, so
    # that the quick test of steep chords (L^2 G < 2 max(vA, vB) |dz|, monotonic z) answers part of
    # them and the sampled arcs the rest.
    rng = np.random.default_rng(21)
    n = 2000
    A, B, _ = _downgoing_legs(rng, n, 60.0, (0.2, 30.0))
    th = np.column_stack([rng.uniform(400.0, 1800.0, n), rng.normal(0.0, 3.0, (n, 2)), rng.uniform(-30.0, 15.0, n)])
    c = np.array([0.0, 0.0, 90.0])
    g = th[:, 1:]
    G = np.linalg.norm(g, axis=1)
    v = lambda P: th[:, 0] + np.sum(g * (P - c), axis=1)  # noqa: E731
    e2 = g / G[:, None]
    d = B - A
    e1 = d - np.sum(d * e2, axis=1)[:, None] * e2
    e1 /= np.linalg.norm(e1, axis=1)[:, None]
    wA, wB, rB = v(A) / G, v(B) / G, np.sum(d * e1, axis=1)
    xc = (rB**2 + wB**2 - wA**2) / (2 * rB)
    radius = np.hypot(xc, wA)
    ang = np.linspace(0.0, 1.0, 1001)[None, :]
    a0, a1 = np.arctan2(wA, -xc)[:, None], np.arctan2(wB, rB - xc)[:, None]
    t = a0 + (a1 - a0) * ang
    z = (
        A[:, 2:3]
        + (xc[:, None] + radius[:, None] * np.cos(t)) * e1[:, 2:3]
        + (radius[:, None] * np.sin(t) - wA[:, None]) * e2[:, 2:3]
    )
    lo, hi = np.minimum(A[:, 2], B[:, 2]), np.maximum(A[:, 2], B[:, 2])
    excess = np.maximum(lo - z.min(axis=1), z.max(axis=1) - hi)
    # where along the arc the extreme lies: 9 samples see it clearly only away from the ends
    at = np.where(lo - z.min(axis=1) > z.max(axis=1) - hi, z.argmin(axis=1), z.argmax(axis=1)) / 1000.0
    physical = (v(A) > 0) & (v(B) > 0)
    clear_turn = physical & (excess > 0.02) & (at > 0.15) & (at < 0.85)
    clear_no = physical & (excess <= 0.0)
    steep = physical & (np.sum(d * d, axis=1) * G < 2 * np.maximum(v(A), v(B)) * np.abs(d[:, 2]))
    assert clear_turn.sum() > 100 and (clear_no & ~steep).sum() > 20 and steep.sum() > 100  # all kinds exercised
    assert not np.any(steep & clear_turn)  # the quick test's premise: a steep chord's arc never turns
    turns = velocity.leg_turns(A, B, th, c)
    assert np.all(turns[clear_turn]) and not np.any(turns[clear_no])


# --------------------------------------------------------------------------- paths: analytic cases


@pytest.mark.parametrize("reflector", [0, 1], ids=["water table", "rock"])
def test_flat_constant_layers_obey_snell(reflector):
    model = flat_model([5.0, 30.0], [600.0, 1600.0])
    off = np.linspace(0.0, 70.0, 15)
    S, R = split_pairs(off)
    p = trace_reflections(model, S, R, np.full(len(off), reflector))
    assert np.all(p.valid)
    h = np.array([5.0, 25.0])[: reflector + 1]
    v = np.array([600.0, 1600.0])[: reflector + 1]
    exact = [snell_time(x, h, v) for x in off]
    exact_t = np.array([e if np.isscalar(e) else e[0] for e in exact])
    # the Newton iterations stop at 1e-6 m steps; times agree to round-off (measured 1e-14 s)
    assert np.allclose(p.time_s, exact_t, atol=1e-11, rtol=0)
    if reflector == 1:
        # Snell's law at the water-table crossing: sin(i1) / v1 = sin(i2) / v2 = p
        pts = p.point_xyz[:, :3]
        for row, (x, e) in enumerate(zip(off, exact)):
            if x == 0:
                continue
            d1 = pts[row, 0] - S[row]
            d2 = pts[row, 1] - pts[row, 0]
            s1 = np.hypot(d1[0], d1[1]) / np.linalg.norm(d1)
            s2 = np.hypot(d2[0], d2[1]) / np.linalg.norm(d2)
            assert s1 / 600.0 == pytest.approx(e[1], rel=1e-7)
            assert s2 / 1600.0 == pytest.approx(e[1], rel=1e-7)


def test_dipping_plane_matches_the_image_source_in_3d():
    # Sheriff & Geldart 1995, ch. 4: S' = S + 2 h n, t = |R - S'| / V (exact, any elevations)
    X, Y = SPEC.coords()
    dip, azi = np.radians(9.0), np.radians(200.0)
    n = np.array([np.sin(dip) * np.sin(azi), np.sin(dip) * np.cos(azi), -np.cos(dip)])  # downward normal
    d0 = n @ np.array([0.0, 0.0, 70.0])
    z = (d0 - n[0] * X - n[1] * Y) / n[2]
    model = LayeredModel(SPEC, z[None], [[1800.0, 0, 0, 0]], [[0.0, 0.0, 80.0]])
    rng = np.random.default_rng(2)
    S = np.column_stack([rng.uniform(-40, 40, 300), rng.uniform(-40, 40, 300), 100 + rng.uniform(-2, 2, 300)])
    R = S + np.column_stack([rng.uniform(-40, 40, 300), rng.uniform(-40, 40, 300), rng.uniform(-2, 2, 300)])
    p = trace_reflections(model, S, R, np.zeros(300, int))
    assert np.all(p.valid)
    h = d0 - S @ n
    image = S + 2 * h[:, None] * n
    assert np.allclose(p.time_s, np.linalg.norm(R - image, axis=1) / 1800.0, atol=1e-12, rtol=0)
    # dt/dz at the reflection point [Bishop et al. 1985]: ((P-S)_z/|P-S| + (P-R)_z/|P-R|)/V
    P = p.reflection_xyz
    ref = ((P - S)[:, 2] / np.linalg.norm(P - S, axis=1) + (P - R)[:, 2] / np.linalg.norm(P - R, axis=1)) / 1800.0
    assert np.allclose(p.dt_dz_s_m[:, 0], ref, rtol=1e-9)


def test_flat_layers_small_offset_moveout_gives_the_dix_rms_velocity():
    # Dix (1955): t^2 = t0^2 + x^2 / V_rms^2 + O(x^4), V_rms^2 = sum v^2 dt / sum dt
    thick = np.array([5.0, 12.0, 20.0])
    v = np.array([600.0, 1500.0, 2200.0])
    model = flat_model(np.cumsum(thick), v)
    off = np.linspace(0.0, 2.0, 9)  # x << depth: the quartic term is negligible
    S, R = split_pairs(off)
    p = trace_reflections(model, S, R, np.full(len(off), 2))
    dt = 2 * thick / v
    t0 = dt.sum()
    vrms = np.sqrt(np.sum(v**2 * dt) / t0)
    slope = np.polyfit(off**2, p.time_s**2, 1)
    assert p.time_s[0] == pytest.approx(t0, rel=1e-12)
    # the quartic term changes the fitted slope by ~(x/z)^2 ~ 1e-3 relative at 2 m over 37 m
    assert 1 / np.sqrt(slope[0]) == pytest.approx(vrms, rel=2e-3)


def test_velocity_rising_with_depth_matches_the_ray_integrals():
    # v = v0 + G d over a flat reflector 5 m down: x(p) = 2 int p v / sqrt(1 - p^2 v^2) dz,
    # t(p) = 2 int dz / (v sqrt(1 - p^2 v^2)) (Slotnick 1959), by quad and brentq
    v0, G, d = 560.0, 22.0, 5.0
    model = flat_model([d], [v0], gradients=[[0.0, 0.0, -G]])
    off = np.linspace(0.0, 16.0, 9)
    S, R = split_pairs(off)
    p = trace_reflections(model, S, R, np.zeros(len(off), int))
    assert np.all(p.valid)

    def exact(x):
        vel = lambda z: v0 + G * z  # noqa: E731
        if x == 0:
            return 2 * quad(lambda z: 1 / vel(z), 0, d, epsabs=1e-15)[0]
        f = lambda q: 2 * quad(lambda z: q * vel(z) / np.sqrt(1 - (q * vel(z)) ** 2), 0, d, epsabs=1e-15)[0] - x  # noqa: E731
        q = brentq(f, 0.0, (1 - 1e-12) / (v0 + G * d), xtol=1e-18)
        return 2 * quad(lambda z: 1 / (vel(z) * np.sqrt(1 - (q * vel(z)) ** 2)), 0, d, epsabs=1e-15)[0]

    ref = np.array([exact(x) for x in off])
    # quadrature accuracy ~1e-15 s; measured agreement 1e-17 s
    assert np.allclose(p.time_s, ref, atol=1e-12, rtol=0)


def test_straight_segments_err_by_second_order():
    """Straight legs in a gradient layer are slower than the circular rays, by O(G^2).

    Measured on the water-table reflection of a dry sand (560 m/s + 22 m/s per m, 5 m):
    the error of the straight chord at the stationary (symmetric) path.
    """
    d = 5.0
    S, R = split_pairs(np.array([8.0, 16.0, 24.0]))
    errors = {}
    for G in (22.0, 4.0, 2.0):
        model = flat_model([d], [560.0], gradients=[[0.0, 0.0, -G]])
        p = trace_reflections(model, S, R, np.zeros(3, int))
        P = p.reflection_xyz
        th = model.theta[0]
        c = model.centre_m[0]
        # by symmetry the straight-leg path also reflects at the midpoint
        straight = 2 * velocity.straight_leg_time(S, P, th, c)
        errors[G] = straight - p.time_s
    print("straight-segment error (ms) at 8, 16, 24 m, G = 22:", np.round(errors[22.0] * 1e3, 4))
    # Fermat: the circular ray is the least time, the chord is slower
    assert np.all(errors[22.0] > 0)
    # second order: halving a small gradient quarters the error; the O(G^3) remainder is a
    # few per cent at G d / v = 0.04 (at G = 22 it is larger: the ratio 22 -> 11 is 3.5)
    assert np.allclose(errors[4.0] / errors[2.0], 4.0, rtol=0.05)


def test_curved_interfaces_and_lateral_velocity_give_the_least_time_path():
    # Fermat's principle: the traced time equals the minimum of the same total time found
    # by a general-purpose optimiser over the (x, y) of the three path points
    X, Y = SPEC.coords()
    wt = 95.0 - 0.4 * np.sin(X / 25.0) * np.cos(Y / 30.0) + 0.01 * X
    rock = 70.0 - 0.1 * X + 3.0 * np.exp(-((X - 10) ** 2 + (Y + 5) ** 2) / (2 * 20.0**2))
    th = np.array([[620.0, 0.5, 0.9, -22.0], [1600.0, 0.3, -0.2, 0.0]])
    model = LayeredModel(SPEC, np.stack([wt, rock]), th, [[0, 0, 97.5], [0, 0, 82.5]])
    S = np.array([[-20.0, 5.0, 100.2], [3.0, -12.0, 99.8]])
    R = np.array([[25.0, -3.0, 100.0], [-30.0, 14.0, 100.3]])
    p = trace_reflections(model, S, R, np.ones(2, int))
    assert np.all(p.valid)
    iface, layer = path_layout(1)
    for i in range(2):

        def total(xy, i=i):
            xy = xy.reshape(3, 2)
            z, zx, zy = nodes.interface_values(model.elevation_m, SPEC, xy[:, 0], xy[:, 1], 1, surface=iface)
            E = np.vstack([S[i], np.column_stack([xy, z]), R[i]])
            o = velocity.leg_times(E[:-1], E[1:], th[layer], model.centre_m[layer], hessian=False)
            g = o["gB"][:-1] + o["gA"][1:]  # gradient at the three points (checked by finite differences above)
            return float(np.sum(o["t"])), np.column_stack([g[:, 0] + g[:, 2] * zx, g[:, 1] + g[:, 2] * zy]).ravel()

        x0 = p.point_xyz[i, :, :2].ravel() + np.array([1.5, -1.0, 2.0, 1.0, -1.0, 0.5])
        res = minimize(total, x0, jac=True, method="L-BFGS-B", options={"ftol": 1e-16, "gtol": 1e-14})
        # a quasi-Newton minimiser from a perturbed start stops within ~1e-12 s of the minimum;
        # Newton's stationary point must be that minimum
        assert p.time_s[i] <= res.fun + 1e-11
        assert p.time_s[i] == pytest.approx(res.fun, abs=1e-10)
        assert np.allclose(res.x, p.point_xyz[i, :, :2].ravel(), atol=1e-3)


def test_sensitivities_match_finite_differences():
    X, Y = SPEC.coords()
    wt = 95.0 - 0.4 * np.sin(X / 25.0) + 0.01 * X
    rock = 70.0 - 0.1 * X + 3.0 * np.exp(-((X - 10) ** 2 + Y**2) / (2 * 20.0**2))
    th = np.array([[620.0, 0.5, 0.9, -22.0], [1600.0, 0.3, -0.2, 0.0]])
    centre = np.array([[0, 0, 97.5], [0, 0, 82.5]])
    model = LayeredModel(SPEC, np.stack([wt, rock]), th, centre)
    S = np.array([[-20.0, 5.0, 100.2], [3.0, -12.0, 99.8], [-6.0, 1.0, 100.0]])
    R = np.array([[25.0, -3.0, 100.0], [-30.0, 14.0, 100.3], [6.0, 1.0, 100.0]])
    k = np.array([1, 1, 0])
    p = trace_reflections(model, S, R, k)
    # interface nodes: t changes by sum over path points of w_node(P) dt/dz_P (stationary path)
    for surf, node in [(1, (20, 22)), (0, (20, 18)), (0, (19, 22))]:
        h = 1e-3
        z = model.elevation_m.copy()
        z[surf][node] += h
        up = trace_reflections(LayeredModel(SPEC, z, th, centre), S, R, k, start_xy=p.point_xyz[..., :2])
        z[surf][node] -= 2 * h
        dn = trace_reflections(LayeredModel(SPEC, z, th, centre), S, R, k, start_xy=p.point_xyz[..., :2])
        fd = (up.time_s - dn.time_s) / (2 * h)
        flat = node[0] * SPEC.nx + node[1]
        pred = np.zeros(3)
        for i in range(3):
            for j in range(p.n_points[i]):
                if p.surface[i, j] != surf:
                    continue
                idx, w = nodes.node_weights(SPEC, p.point_xyz[i, j, :1], p.point_xyz[i, j, 1:2])
                pred[i] += np.sum(w[0][idx[0] == flat]) * p.dt_dz_s_m[i, j]
        # the path moves by O(h) and the time by O(h^2) (stationarity): agreement ~1e-9 s/m
        assert np.allclose(fd, pred, atol=1e-9, rtol=1e-5), (surf, fd, pred)
    steps = np.array([1e-2, 1e-5, 1e-5, 1e-4])
    for layer in range(2):
        for j in range(4):
            d = np.zeros((2, 4))
            d[layer, j] = steps[j]
            up = trace_reflections(LayeredModel(SPEC, model.elevation_m, th + d, centre), S, R, k)
            dn = trace_reflections(LayeredModel(SPEC, model.elevation_m, th - d, centre), S, R, k)
            fd = (up.time_s - dn.time_s) / (2 * steps[j])
            assert np.allclose(fd, p.dt_dtheta[:, layer, j], rtol=1e-5, atol=1e-12), (layer, j)


def test_kept_hessian_steps_give_the_paths_of_full_newton_steps(monkeypatch):
    """The chord steps with a kept Hessian, and stopping where a path was evaluated (Kelley 1995, ch. 5),
    against the straightforward iteration: the exact Hessian at every step and a final evaluation, from
    the same warm starts (a previous model's paths, as the joint estimate traces them)."""
    X, Y = SPEC.coords()
    rng = np.random.default_rng(4)
    wt = 95.0 - 0.4 * np.sin(X / 25.0) * np.cos(Y / 30.0) + 0.01 * X
    rock = 70.0 - 0.1 * X + 3.0 * np.exp(-((X - 10) ** 2 + (Y + 5) ** 2) / (2 * 20.0**2))
    th = np.array([[620.0, 0.5, 0.9, -22.0], [1600.0, 0.3, -0.2, 0.0]])
    centre = np.array([[0, 0, 97.5], [0, 0, 82.5]])
    n = 400
    mid = rng.uniform(-50.0, 50.0, (n, 2))
    off = rng.uniform(3.0, 60.0, n)
    az = rng.uniform(0.0, np.pi, n)
    d = 0.5 * off[:, None] * np.column_stack([np.cos(az), np.sin(az)])
    S = np.column_stack([mid - d, np.full(n, 100.0)])
    R = np.column_stack([mid + d, np.full(n, 100.0)])
    k = (rng.uniform(size=n) < 0.6).astype(int)
    before = trace_reflections(LayeredModel(SPEC, np.stack([wt, rock]), th, centre), S, R, k)
    # a Gauss-Newton step's change: smooth relief of ~0.3 m and velocities 0.5 % off
    bump = 0.3 * np.cos(X / 40.0) * np.sin(Y / 35.0)
    after = LayeredModel(SPEC, np.stack([wt + bump, rock - bump]), th * [[1.005], [0.995]], centre)
    start = before.point_xyz[..., :2]
    fast = trace_reflections(after, S, R, k, start_xy=start)

    def full_only(model, S_, R_, X_, iface, layer, Hd, Ho):  # every step from the exact Hessian
        step, _, g, t, _, _ = raypath._full_step(model, S_, R_, X_, iface, layer)
        P, _ = raypath._points(model, X_, iface, 0)
        A, B, th_, c = raypath._legs(model, S_, R_, P, layer)
        return step, g, t, (P, velocity.leg_times(A, B, th_, c, hessian=False))

    monkeypatch.setattr(raypath, "_kept_step", full_only)
    slow = trace_reflections(after, S, R, k, start_xy=start, tolerance_m=1e-7)  # stops within 1e-7 m
    # the same paths modelled (the others: diving water-table rays at long offsets, flagged by both)
    assert np.array_equal(fast.status, slow.status) and fast.valid.mean() > 0.75
    ok = fast.valid
    # paths stop within the tolerance (1e-4 m) of stationary: the time, stationary there, within
    # ~H dx^2 / 2 ~ 1e-12 s; the sensitivities move by dx over the legs' length (~1e-5 relative)
    assert np.allclose(fast.time_s[ok], slow.time_s[ok], rtol=0.0, atol=1e-11)
    assert np.allclose(fast.point_xyz[ok], slow.point_xyz[ok], rtol=0.0, atol=5e-4, equal_nan=True)
    scale = np.nanmax(np.abs(slow.dt_dz_s_m[ok]))
    assert np.allclose(fast.dt_dz_s_m[ok], slow.dt_dz_s_m[ok], rtol=0.0, atol=1e-4 * scale, equal_nan=True)
    # each velocity parameter's sensitivities to 1e-5 of its largest (measured 6e-7; the small ones of the
    # gradients change sign along a path, so their relative differences say nothing)
    col = np.abs(slow.dt_dtheta[ok]).max(axis=0)
    assert np.all(np.abs(fast.dt_dtheta[ok] - slow.dt_dtheta[ok]) <= 1e-5 * col + 1e-15)


def test_diving_rays_and_points_off_the_grid_are_flagged():
    # velocity rising with depth: beyond a limiting offset the ray from the source turns
    # before it reaches the interface (common practice: no reflection there, a diving wave)
    model = flat_model([5.0], [560.0], gradients=[[0.0, 0.0, -22.0]])
    S, R = split_pairs(np.array([10.0, 60.0]))
    p = trace_reflections(model, S, R, np.zeros(2, int))
    assert p.status.tolist() == [0, 2]
    S2, R2 = split_pairs(np.array([10.0]), y_m=130.0)  # north of the node grid
    assert trace_reflections(model, S2, R2, [0]).status.tolist() == [1]


def test_bad_input_is_refused_with_a_message():
    model = flat_model([5.0], [600.0])
    S, R = split_pairs(np.array([10.0]))
    with pytest.raises(InversionError, match="interface index 1 out of range"):
        trace_reflections(model, S, R, [1])
    with pytest.raises(InversionError, match=r"interface elevations have shape"):
        LayeredModel(SPEC, np.zeros((1, 3, 3)), [[600.0, 0, 0, 0]], [[0, 0, 0]])
    with pytest.raises(InversionError, match="velocity model 'curved' is unknown"):
        velocity.free_parameters("curved")
