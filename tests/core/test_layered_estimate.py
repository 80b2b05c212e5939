"""The joint layered estimate (core.tomography: start, prior, covariance, system, layered).

References checked against (named beside each check):
- flat constant layers: two-way times from the ray parameter by a 1-D root
  solve (Snell's law, scipy.optimize.brentq) [Sheriff & Geldart 1995, ch. 4],
  independent of the project's ray tracer; Dix (1955) interval velocities;
- a dipping plane under one layer: the image-source time t = |R - S'| / V
  [Sheriff & Geldart 1995, ch. 4];
- the posterior standard deviation against a dense inverse of the same
  normal matrix (numpy.linalg.inv) [Tarantola 2005, s. 3.2];
- the Matern lattice prior against its continuum marginal variance
  1/(4 pi kappa^2 tau^2) and correlation [Lindgren, Rue & Lindstrom 2011];
- robust statistics against scipy.stats.median_abs_deviation;
- calibration: truths drawn from the prior itself must fall within 2 sigma about
  95 % of the time (simulation-based calibration, Cook, Gelman & Rubin 2006).
"""

import math

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse as sp
from rockhead.core.errors import InversionError
from rockhead.core.grid import GridSpec
from rockhead.core.tomography import covariance, prior, system
from rockhead.core.tomography.layered import BoreholeTies, estimate_layered, reflector_order
from rockhead.core.tomography.nodes import node_weights
from rockhead.core.tomography.raypath import LayeredModel, trace_reflections
from rockhead.core.tomography.start import (
    GatherPoints,
    StartModel,
    curvature_flags,
    robust_site_velocity,
    start_from_gathers,
)
from scipy import stats
from scipy.optimize import brentq

SPEC = GridSpec(x0=-80.0, y0=80.0, cell_size_m=4.0, nx=41, ny=41)  # output grid, local metres
GROUND = 100.0


def cross_lines(half=70.0, step=2.0, shot_every=4, max_offset=48.0):
    """Two crossing lines (E-W and N-S) on flat ground: sources, receivers of split spreads."""
    s = np.arange(-half, half + 0.01, step)
    lines = [np.column_stack([s, np.zeros_like(s)]), np.column_stack([np.zeros_like(s), s])]
    S, R = [], []
    for xy in lines:
        xyz = np.column_stack([xy, np.full(len(xy), GROUND)])
        for i in range(0, len(xy), shot_every):
            off = np.abs(s - s[i])
            idx = np.flatnonzero((off > 0) & (off <= max_offset))
            S.append(np.repeat(xyz[i][None], idx.size, 0))
            R.append(xyz[idx])
    return np.concatenate(S), np.concatenate(R)


def snell_time(offset_m, thickness_m, v_m_s):
    """Two-way time of a flat stack by the ray parameter (Snell's law; 1-D root solve)."""
    h = np.asarray(thickness_m, float)
    v = np.asarray(v_m_s, float)
    if offset_m == 0:
        return float(np.sum(2 * h / v))
    p = brentq(
        lambda q: float(np.sum(2 * h * q * v / np.sqrt(1 - (q * v) ** 2))) - offset_m,
        0.0,
        (1 - 1e-15) / v.max(),
        xtol=1e-18,
        rtol=1e-15,
    )
    return float(np.sum(2 * h / (v * np.sqrt(1 - (p * v) ** 2))))


def start_near(names, points_xy, elevations, velocities, sigma_m=0.5, rng=None):
    """A start model: points near the given elevations (noise sigma_m), the given velocities."""
    rng = rng or np.random.default_rng(0)
    pts = []
    for z in elevations:
        zz = np.asarray(z, float) + rng.normal(0.0, sigma_m, len(points_xy))
        pts.append((points_xy[:, 0], points_xy[:, 1], zz, np.full(len(zz), sigma_m)))
    k = len(names)
    return StartModel(
        tuple(names), tuple(pts), np.asarray(velocities, float), np.full(k, 10.0), np.full(k, 10), np.ones(k)
    )


@pytest.fixture(scope="module")
def flat_two_layers():
    """Water table 5 m (600 m/s) over rock 30 m deep (1600 m/s below 5 m): Snell times, 0.2 ms noise."""
    rng = np.random.default_rng(11)
    S, R = cross_lines()
    off = np.linalg.norm(R[:, :2] - S[:, :2], axis=1)
    h, v = np.array([5.0, 25.0]), np.array([600.0, 1600.0])
    t_wt = np.array([snell_time(x, h[:1], v[:1]) for x in off])
    t_rock = np.array([snell_time(x, h, v) for x in off])
    keep_wt = off <= 20.0  # shallow reflection: short offsets only (common practice)
    SS = np.concatenate([S[keep_wt], S])
    RR = np.concatenate([R[keep_wt], R])
    t = np.concatenate([t_wt[keep_wt], t_rock]) + rng.normal(0.0, 0.2e-3, keep_wt.sum() + len(S))
    refl = np.array(["wt"] * int(keep_wt.sum()) + ["rock"] * len(S))
    mids = 0.5 * (S[::8, :2] + R[::8, :2])
    # start: rms-velocity depths and V_rms (what the gather fits give), within a few per cent
    start = start_near(
        ("wt", "rock"), mids, [np.full(len(mids), 95.5), np.full(len(mids), 68.0)], [620.0, 1550.0], rng=rng
    )
    res = estimate_layered(SS, RR, t, 0.2e-3, refl, start, SPEC)
    return res, h, v


@pytest.mark.slow  # slow tier: whole joint estimates
def test_flat_layers_give_snell_velocities_and_depths(flat_two_layers):
    res, h, v = flat_two_layers
    assert res.names == ("wt", "rock")
    # interval velocities: 0.5 % (issue requirement on the joint velocity; Dix 1955 for flat layers)
    assert res.layers[0].velocity.v0_m_s == pytest.approx(v[0], rel=0.005)
    assert res.layers[1].velocity.v0_m_s == pytest.approx(v[1], rel=0.005)
    # constant layers made the data: BIC keeps them constant
    assert [layer.complexity for layer in res.layers] == ["constant", "constant"]
    for k, z_true in enumerate([GROUND - h[0], GROUND - h.sum()]):
        z, s = res.elevation_m[k], res.sigma_m[k]
        ok = np.isfinite(z)
        err = z[ok] - z_true
        cover = np.mean(np.abs(err) <= 2 * s[ok])
        print(f"{res.names[k]}: rms {np.sqrt(np.mean(err**2)):.3f} m, within 2 sigma {cover:.3f}")
        # 0.2 ms picks: depth errors of a few cm along the lines; 0.25 m allows the cells far
        # from the lines, where the flat truth is interpolated (the prior allows relief there)
        assert np.sqrt(np.mean(err**2)) < 0.25
        assert np.mean(np.abs(err) <= 2 * s[ok]) > 0.9
    # V_rms is not the average velocity: the rms-velocity depth of the rock would be ~7 % too deep
    t0 = np.sum(2 * h / v)
    vrms = np.sqrt(np.sum(v**2 * 2 * h / v) / t0)  # Dix (1955): 1340 m/s
    avg = 2 * h.sum() / t0  # vertical average: 1252 m/s
    assert vrms / avg == pytest.approx(1.07, abs=0.001)  # ~7 % too deep with V_rms (Dix 1955, worked above)
    med = res.median_average_velocity_m_s("rock")
    assert np.isnan(med)  # no ground model given: no average velocity map


@pytest.mark.slow  # slow tier: whole joint estimates
def test_every_pick_keeps_its_residual_and_flag(flat_two_layers):
    res, *_ = flat_two_layers
    assert res.residual_s.shape == res.rejected.shape == res.status.shape
    assert np.all(np.isfinite(res.residual_s[res.status == 0]))
    # 0.2 ms Gaussian noise: no pick beyond 4 robust sigmas is expected (prob. 6e-5 each)
    assert np.sum(res.rejected) <= 2
    assert np.sqrt(np.mean(res.residual_s[res.used] ** 2)) == pytest.approx(0.2e-3, rel=0.15)


@pytest.fixture(scope="module")
def dipping_plane():
    """A plane dipping 8 deg toward 200 deg under 1800 m/s; image-source times, 0.3 ms noise, 4 % mispicks."""
    rng = np.random.default_rng(5)
    S, R = cross_lines()
    dip, azi = math.radians(8.0), math.radians(200.0)
    n = np.array([math.sin(dip) * math.sin(azi), math.sin(dip) * math.cos(azi), -math.cos(dip)])
    d0 = n @ np.array([0.0, 0.0, 70.0])
    h = d0 - S @ n
    t = np.linalg.norm(R - (S + 2 * h[:, None] * n), axis=1) / 1800.0
    t += rng.normal(0.0, 0.3e-3, len(t))
    bad = rng.random(len(t)) < 0.04
    t[bad] += rng.choice([-1.0, 1.0], bad.sum()) * rng.uniform(3e-3, 8e-3, bad.sum())

    def plane(x, y):
        return (d0 - n[0] * x - n[1] * y) / n[2]

    mids = 0.5 * (S[::8, :2] + R[::8, :2])
    start = start_near(("rock",), mids, [plane(mids[:, 0], mids[:, 1]) - 1.0], [1850.0], rng=rng)
    res = estimate_layered(S, R, t, 0.3e-3, np.full(len(t), "rock"), start, SPEC)
    return res, plane, bad


@pytest.mark.slow  # slow tier: whole joint estimates
def test_dipping_plane_recovered_with_honest_sigma(dipping_plane):
    res, plane, _ = dipping_plane
    X, Y = SPEC.coords()
    err = res.elevation_m[0] - plane(X, Y)
    ok = np.isfinite(err)
    z = err[ok] / res.sigma_m[0][ok]
    print(f"dipping plane: rms {np.sqrt(np.mean(err[ok] ** 2)):.3f} m, within 2 sigma {np.mean(np.abs(z) <= 2):.3f}")
    assert res.layers[0].velocity.v0_m_s == pytest.approx(1800.0, rel=0.005)
    # image-source data, 0.3 ms picks: the plane comes back within decimetres everywhere mapped
    assert np.sqrt(np.mean(err[ok] ** 2)) < 0.2
    assert np.mean(np.abs(z) <= 2) > 0.9
    # the trend recovers the dip: slope (m per 100 m) of the plane z = ... (x east, y north)
    dzdx = (plane(100.0, 0.0) - plane(0.0, 0.0)) / 100.0
    dzdy = (plane(0.0, 100.0) - plane(0.0, 0.0)) / 100.0
    b_true = np.array([dzdx, dzdy]) * 100.0
    assert np.allclose(res.trend[0, 1:], b_true, atol=0.5)  # 0.5 m per 100 m: ~0.3 deg of dip


@pytest.mark.slow  # slow tier: whole joint estimates
def test_mispicks_are_flagged_not_dropped(dipping_plane):
    res, _, bad = dipping_plane
    # 3-8 ms mispicks against 0.3 ms noise are 10-27 sigma: all flagged, and few good picks
    assert np.all(res.rejected[bad])
    assert np.sum(res.rejected & ~bad) <= 0.01 * np.sum(~bad)
    assert np.all(np.isfinite(res.residual_s[bad]))  # they keep their residual for the QC


@pytest.mark.slow  # slow tier: whole joint estimates
def test_boreholes_pull_the_surface_within_their_error(dipping_plane):
    res0, plane, _ = dipping_plane
    rng = np.random.default_rng(5)
    S, R = cross_lines()
    # same data as the fixture: rebuild it with the same seed
    dip, azi = math.radians(8.0), math.radians(200.0)
    n = np.array([math.sin(dip) * math.sin(azi), math.sin(dip) * math.cos(azi), -math.cos(dip)])
    d0 = n @ np.array([0.0, 0.0, 70.0])
    t = np.linalg.norm(R - (S + 2 * (d0 - S @ n)[:, None] * n), axis=1) / 1800.0
    t += rng.normal(0.0, 0.3e-3, len(t))
    bad = rng.random(len(t)) < 0.04
    t[bad] += rng.choice([-1.0, 1.0], bad.sum()) * rng.uniform(3e-3, 8e-3, bad.sum())
    mids = 0.5 * (S[::8, :2] + R[::8, :2])
    start = start_near(("rock",), mids, [plane(mids[:, 0], mids[:, 1]) - 1.0], [1850.0], rng=rng)
    # a borehole 40 m from both lines, its elevation deliberately 0.6 m above the plane
    bx, by = 40.0, 40.0
    ties = BoreholeTies(
        np.array([bx]),
        np.array([by]),
        np.array([plane(bx, by) + 0.6]),
        np.array([0.05]),
        np.array(["rock"], dtype=object),
    )
    res = estimate_layered(S, R, t, 0.3e-3, np.full(len(t), "rock"), start, SPEC, boreholes=ties)
    col = round((bx - SPEC.x0) / SPEC.cell_size_m)
    row = round((SPEC.y0 - by) / SPEC.cell_size_m)
    before, after = res0.elevation_unmasked_m[0, row, col], res.elevation_unmasked_m[0, row, col]
    # the map honours the borehole within a few of its sigmas (the data pull a little the other way)
    assert after == pytest.approx(plane(bx, by) + 0.6, abs=0.15)
    assert abs(before - plane(bx, by)) < 0.3
    # a Gaussian update leaves less uncertainty than the borehole alone (0.05 m) and than the picks alone
    # (Tarantola 2005, s. 3.2: posterior precision = prior precision + data precision). The priors are
    # tuned to the data of each run (the borehole's misfit to the plane loosens its own), so the bound is
    # on the borehole's sigma, not a fraction of the first run's
    sigma_at = res.sigma_unmasked_m[0, row, col]
    assert sigma_at < 0.05 and sigma_at < res0.sigma_unmasked_m[0, row, col], sigma_at


@pytest.mark.slow  # slow tier: whole joint estimates
def test_velocity_gradient_is_found_where_the_data_have_one():
    # dry sand: 560 m/s + 22 (m/s)/m with depth over a water table 5 m down; times by the
    # forward model (checked against the ray integrals in test_layered_forward)
    grid = GridSpec(x0=-90.0, y0=90.0, cell_size_m=5.0, nx=37, ny=37)
    truth = LayeredModel(grid, np.full((1, *grid.shape), 95.0), [[560.0, 0.0, 0.0, -22.0]], [[0.0, 0.0, 100.0]])
    S, R = cross_lines(max_offset=24.0)
    p = trace_reflections(truth, S, R, np.zeros(len(S), int))
    S, R = S[p.valid], R[p.valid]
    rng = np.random.default_rng(3)
    t = p.time_s[p.valid] + rng.normal(0.0, 0.2e-3, len(S))
    mids = 0.5 * (S[::8, :2] + R[::8, :2])
    start = start_near(("wt",), mids, [np.full(len(mids), 94.5)], [600.0], rng=rng)
    res = estimate_layered(S, R, t, 0.2e-3, np.full(len(t), "wt"), start, SPEC)
    layer = res.layers[0]
    print(res.choice.summary(res.names))
    assert layer.complexity in ("vertical", "full")
    assert layer.velocity.gradient_depth_m_s_per_m == pytest.approx(22.0, abs=3 * layer.sigma_parameters[3])
    ok = np.isfinite(res.elevation_m[0])
    assert np.sqrt(np.mean((res.elevation_m[0][ok] - 95.0) ** 2)) < 0.1


def test_reflector_order_and_bad_input():
    assert reflector_order(["b", "a", "b"], [0.05, 0.01, 0.06]) == ("a", "b")
    with pytest.raises(InversionError, match="the layer order names 'c', which no pick has"):
        reflector_order(["a", "b"], [0.01, 0.02], order=["a", "c"])
    S, R = cross_lines(half=20.0)
    start = start_near(("a",), np.zeros((5, 2)), [np.full(5, 90.0)], [600.0])
    with pytest.raises(InversionError, match="start model's reflectors"):
        estimate_layered(S, R, np.full(len(S), 0.03), 0.3e-3, np.full(len(S), "b"), start, SPEC)
    with pytest.raises(InversionError, match=r"sigma_s .* must be positive seconds"):
        estimate_layered(S, R, np.full(len(S), 0.03), 0.0, np.full(len(S), "a"), start, SPEC)


# --------------------------------------------------------------------------- start model


def test_start_uses_dix_interval_velocities_and_site_layer_cake():
    # two shots over 5 m at 600 m/s and 25 m at 1600 m/s; the second shot's rock gather has a
    # velocity biased 30 % high (a curved reflector) but the same t0: its start depth must not move
    t_wt = 2 * 5 / 600
    t_rock = t_wt + 2 * 25 / 1600
    vrms = math.sqrt((600**2 * t_wt + 1600**2 * (t_rock - t_wt)) / t_rock)
    v = np.array([600.0, vrms, 600.0, vrms, 600.0, vrms * 1.3])
    t0 = np.array([t_wt, t_rock] * 3)
    g = GatherPoints(
        np.array(["s1", "s1", "s2", "s2", "s3", "s3"]),
        np.array(["wt", "rock"] * 3),
        np.zeros(6),
        np.zeros(6),
        np.full(6, 100.0),
        v * t0 / 2,
        np.full(6, 0.1),
        t0,
        v,
        np.full(6, 1e-5),
        np.full(6, 1.0),
        np.ones(6, bool),
    )
    s = start_from_gathers(g, ["wt", "rock"])
    assert s.interval_velocity_m_s == pytest.approx([600.0, 1600.0], rel=1e-6)  # Dix (1955), median of shots
    assert s.points[1][2] == pytest.approx([70.0, 70.0, 70.0], abs=1e-6)


def test_robust_site_velocity_against_scipy():
    rng = np.random.default_rng(2)
    v = rng.normal(1800.0, 15.0, 40)
    v[:3] = [2600.0, 2500.0, 1200.0]  # curved-reflector gathers
    med, spread, n = robust_site_velocity(v, np.full(40, 10.0), ["ok"] * 40)
    assert n == 40
    assert med == pytest.approx(np.median(v))
    # 1.4826 against scipy's exact 1/Phi^-1(3/4) = 1.482602...: 1.5e-6 relative
    assert spread == pytest.approx(stats.median_abs_deviation(v, scale="normal"), rel=1e-5)
    flag, _ = curvature_flags(v, np.full(40, 10.0), med, spread)
    assert flag[:3].all() and flag[3:].sum() <= 1


# --------------------------------------------------------------------------- prior and covariance


def test_matern_lattice_prior_has_the_stated_variance_and_correlation():
    # Lindgren, Rue & Lindstrom (2011): Matern nu = 1 <-> (kappa^2 - Delta) u = W / tau, variance
    # 1/(4 pi kappa^2 tau^2); the lattice scaling makes an interior node's variance sigma^2
    k = 0.002
    assert prior.lattice_variance(k, 1.0) * 4 * math.pi * k * k == pytest.approx(1.0, rel=1e-3)
    g = GridSpec(0.0, 0.0, 4.0, 81, 81)
    for nu in (1, 2):
        pr = prior.MaternPrior(2.0, 60.0, 0.0, "", nu)
        Q = prior.matern_precision(g, pr).tocsc()
        c = 40 * 81 + 40
        e = np.zeros(81 * 81)
        e[c] = 1.0
        col = sp.linalg.spsolve(Q, e)
        assert col[c] == pytest.approx(4.0, rel=0.01)  # the far edges add < 1 %
        # correlation 15 nodes (60 m = the range) east: the lattice approximates the continuum
        # Matern within a few hundredths at 15 nodes per range
        assert col[c + 15] / col[c] == pytest.approx(float(prior.matern_correlation(60.0, 60.0, nu)), abs=0.02)


def test_banded_selected_inverse_matches_dense_even_when_ill_conditioned():
    rng = np.random.default_rng(1)
    n = 400
    D = sp.diags([rng.normal(size=n - k) for k in range(1, 6)], list(range(1, 6)), shape=(n, n))
    A = (D + D.T + 12 * sp.eye(n)).tocsr()
    f = covariance.BandedCholesky(A, np.arange(n))
    Z = np.linalg.inv(A.toarray())
    i = rng.integers(0, n, 300)
    j = np.clip(i + rng.integers(-5, 6, 300), 0, n - 1)
    assert np.allclose(f.inverse_entries(i, j), Z[i, j], rtol=1e-10, atol=1e-14)
    # a very smooth prior (nu = 2, range 40 nodes) on a 30 x 30 grid: the recurrence loses
    # accuracy on such matrices; the checked result must still equal the dense inverse
    g = GridSpec(0.0, 0.0, 1.0, 30, 30)
    Q = prior.matern_precision(g, prior.MaternPrior(1.0, 40.0, 0.0, "", 2)) + 1e-2 * sp.eye(900)
    f = covariance.BandedCholesky(Q, np.arange(900))
    Zq = sla.inv(Q.toarray())
    ii = np.arange(900)
    assert np.allclose(f.inverse_entries(ii, ii), np.diag(Zq), rtol=1e-7)


def test_posterior_sigma_matches_a_dense_inverse():
    # a small two-interface joint problem: the cell sigma formula against a dense inverse
    grid = GridSpec(x0=-30.0, y0=30.0, cell_size_m=10.0, nx=7, ny=7)
    truth = LayeredModel(
        grid,
        np.stack([np.full(grid.shape, 95.0), np.full(grid.shape, 70.0)]),
        [[600.0, 0, 0, 0], [1600.0, 0, 0, 0]],
        [[0, 0, 97.5], [0, 0, 82.5]],
    )
    S, R = cross_lines(half=24.0, max_offset=20.0)
    k = np.r_[np.zeros(len(S), int), np.ones(len(S), int)]
    SS, RR = np.r_[S, S], np.r_[R, R]
    p = trace_reflections(truth, SS, RR, k)
    Q = tuple(prior.matern_precision(grid, prior.MaternPrior(1.0, 30.0, 0.0, "", 2)) for _ in range(2))
    data = system.JointData(
        SS,
        RR,
        p.time_s,
        np.full(len(k), 0.3e-3),
        k,
        Q,
        np.array([[95.0, 0, 0], [70.0, 0, 0]]),
        np.full(3, 50.0),
        np.array([[600.0, 0, 0, 0], [1600.0, 0, 0, 0]]),
        np.array([[300.0, 1, 1, 10], [800.0, 1, 1, 10]]),
    )
    layout = system.Layout(
        grid,
        2,
        np.array([[True, True, False, True], [True, False, False, False]]),
        np.zeros(2),
        np.array([[0, 0, 97.5], [0, 0, 82.5]]),
    )
    state = system.JointState(np.zeros((2, 49)), data.beta0.copy(), data.theta0.copy())
    state = system.forward(layout, data, state)
    state = system.reweight(data, state, 1.5, 4.0)
    post = system.posterior(layout, data, state)
    J, _, _ = system.jacobian(layout, data, state)
    A = (J.T @ J).toarray() + sp.block_diag([*Q, system.small_prior_precision(layout, data)]).toarray()
    C = np.linalg.inv(A)
    xs, ys = np.array([-12.0, 3.3, 17.0]), np.array([5.0, -21.0, 11.5])
    for s in range(2):
        a = np.zeros((3, layout.n_params))
        idx, w = node_weights(grid, xs, ys)
        for r in range(3):
            np.add.at(a[r], s * layout.nn + idx[r], w[r])
            a[r, layout.n_nodes + 3 * s : layout.n_nodes + 3 * s + 3] = system.trend_basis(
                xs[r : r + 1], ys[r : r + 1], layout.centre_xy
            )[0]
        dense = np.sqrt(np.einsum("ij,jk,ik->i", a, C, a))
        # exact formulas on both sides: agreement to the dense inverse's round-off
        assert np.allclose(post.elevation_sigma(s, xs, ys), dense, rtol=1e-8)
