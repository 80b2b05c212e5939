"""Tests of the batched per-gather fits (core/seismic: shot_fits, cmp, dix, gather_fit, robust, lm).

Checks are against published relations (Green 1938, Sheriff & Geldart 1995,
Levin 1971, Dix 1955, Huber 1981), exact forward-model round trips through
core.forward, and statistics (coverage of the standard errors).
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rockhead.core.errors import CancelledError, InversionError, RockheadError
from rockhead.core.seismic import cmp, dix, forward, gather_fit, geometry, lm, robust, shot_fits
from rockhead.core.survey.model import GatherSet, Settings

SIGMA = 5e-4  # 0.5 ms pick error, the project default


def _topography(x, y):
    return 3.0 * np.sin(x / 50.0) + 2.0 * np.cos(y / 70.0)


def make_gathers(
    rng,
    g,
    npick=48,
    spacing=2.0,
    spread="split",
    depth=(20.0, 60.0),
    dip_max=30.0,
    velocity=(1500.0, 3500.0),
    crooked_m=1.0,
    topography=True,
    noise_s=0.0,
    sigma_s=SIGMA,
):
    """Shot gathers over random planes with exact image-source times (core.forward).

    Returns the GatherSet and the truth: V, h (normal distance from the
    source), s = -u.n, q = -w.n and the downward normal n of every gather.
    """
    V = rng.uniform(*velocity, g)
    h = rng.uniform(*depth, g)
    dip = rng.uniform(0.0, dip_max, g)
    ddir = rng.uniform(0.0, 360.0, g)
    az = np.radians(rng.uniform(0.0, 360.0, g))
    u = np.column_stack([np.sin(az), np.cos(az)])
    w = np.column_stack([u[:, 1], -u[:, 0]])  # u rotated 90 degrees clockwise (u x z)
    src = np.column_stack([rng.uniform(0, 1000, g), rng.uniform(0, 1000, g), np.zeros(g)])
    if topography:
        src[:, 2] = _topography(src[:, 0], src[:, 1])
    if spread == "split":
        off = (np.arange(npick) - (npick - 1) / 2.0) * spacing
    elif spread == "end_on":
        off = (np.arange(npick) + 1.0) * spacing
    elif spread == "end_on_reversed":
        off = -(np.arange(npick) + 1.0) * spacing
    else:
        raise ValueError(spread)
    gid = np.repeat(np.arange(g), npick)
    xy = src[gid, :2] + np.tile(off, g)[:, None] * u[gid]
    xy += rng.normal(0.0, 1.0, g * npick)[:, None] * crooked_m * w[gid]
    z = _topography(xy[:, 0], xy[:, 1]) if topography else np.zeros(len(xy))
    rec = np.column_stack([xy, z])
    n = forward.plane_normal(dip, ddir)
    d = np.sum(n * src, axis=1) + h
    t = forward.image_source_traveltime(src[gid], rec, n[gid], d[gid], V[gid])
    t = t + noise_s * rng.normal(size=t.shape)
    gs = gather_set(gid, src[gid], rec, t, np.full(t.shape, sigma_s), u, w, src)
    truth = dict(V=V, h=h, s=-np.sum(u * n[:, :2], axis=1), q=-np.sum(w * n[:, :2], axis=1), n=n)
    return gs, truth


def gather_set(gid, src, rec, t, sigma, u, w, src_g):
    g = len(u)
    return GatherSet(
        gather=np.asarray(gid),
        source_xyz=np.asarray(src, float),
        receiver_xyz=np.asarray(rec, float),
        time_s=np.asarray(t, float),
        sigma_s=np.asarray(sigma, float),
        pick_index=np.arange(len(t)),
        line=np.full(g, "A", dtype=object),
        shot=np.array([str(i) for i in range(g)], dtype=object),
        reflector=np.full(g, "1", dtype=object),
        line_unit=np.asarray(u, float),
        cross_unit=np.asarray(w, float),
        source_xyz_g=np.asarray(src_g, float),
        spread_length_m=np.full(g, 100.0),
    )


def straight_line_gather(x, t, sigma=SIGMA):
    """One flat gather along +x from a source at the origin."""
    n = len(x)
    rec = np.column_stack([x, np.zeros(n), np.zeros(n)])
    return gather_set(
        np.zeros(n, int),
        np.zeros((n, 3)),
        rec,
        t,
        np.full(n, sigma),
        [[1.0, 0.0]],
        [[0.0, -1.0]],
        np.zeros((1, 3)),
    )


def concat(*sets):
    """Concatenate GatherSets (gather indices shifted)."""
    off = np.cumsum([0] + [s.n_gathers for s in sets])
    return GatherSet(
        gather=np.concatenate([s.gather + o for s, o in zip(sets, off)]),
        source_xyz=np.concatenate([s.source_xyz for s in sets]),
        receiver_xyz=np.concatenate([s.receiver_xyz for s in sets]),
        time_s=np.concatenate([s.time_s for s in sets]),
        sigma_s=np.concatenate([s.sigma_s for s in sets]),
        pick_index=np.arange(sum(len(s.time_s) for s in sets)),
        line=np.concatenate([s.line for s in sets]),
        shot=np.concatenate([s.shot for s in sets]),
        reflector=np.concatenate([s.reflector for s in sets]),
        line_unit=np.concatenate([s.line_unit for s in sets]),
        cross_unit=np.concatenate([s.cross_unit for s in sets]),
        source_xyz_g=np.concatenate([s.source_xyz_g for s in sets]),
        spread_length_m=np.concatenate([s.spread_length_m for s in sets]),
    )


# --------------------------------------------------------------------------- exact round trips


@pytest.mark.parametrize("spread", ["split", "end_on", "end_on_reversed"])
def test_noise_free_round_trip_exact_3d(rng, spread):
    # Image source construction (Sheriff & Geldart 1995, ch. 4): forward-model exact 3D times over
    # random dipping planes with topography and crooked receiver lines, give the true cross-line
    # component q, and the fit must return V, h, s. Tolerance 1e-6: the data are exact, so only the
    # stopping rule (a kept step under 1e-6 in ln V, ln h; Gauss-Newton contracts quadratically on
    # exact data) limits the agreement.
    gs, tr = make_gathers(rng, 200, spread=spread)
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    assert np.all(fit.status == "ok"), fit.reason[fit.status != "ok"]
    np.testing.assert_allclose(fit.velocity_m_s, tr["V"], rtol=1e-6)
    np.testing.assert_allclose(fit.normal_distance_m, tr["h"], rtol=1e-6)
    np.testing.assert_allclose(fit.s_along, tr["s"], rtol=0, atol=1e-6)
    # the full downward normal is rebuilt from s, q and the line frame
    np.testing.assert_allclose(fit.normal(gs), tr["n"], atol=1e-6)
    np.testing.assert_allclose(geometry.gather_normals(gs, fit), tr["n"], atol=1e-6)
    # t0 = 2h/V by definition (Green 1938)
    np.testing.assert_allclose(fit.t0_s, 2 * tr["h"] / tr["V"], rtol=1e-6)
    # noise-free: residuals vanish (1e-9 s, a millionth of a millisecond), nothing rejected
    assert np.nanmax(np.abs(fit.residual_s)) < 1e-9
    assert not fit.rejected.any()


def test_picks_in_any_order(rng):
    # the per-pick outputs follow the input order, whatever the order of the gathers' picks
    gs, tr = make_gathers(rng, 30, noise_s=SIGMA)
    perm = rng.permutation(len(gs.time_s))
    shuffled = GatherSet(
        gs.gather[perm],
        gs.source_xyz[perm],
        gs.receiver_xyz[perm],
        gs.time_s[perm],
        gs.sigma_s[perm],
        gs.pick_index[perm],
        gs.line,
        gs.shot,
        gs.reflector,
        gs.line_unit,
        gs.cross_unit,
        gs.source_xyz_g,
        gs.spread_length_m,
    )
    a = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    b = shot_fits.fit_shot_gathers(shuffled, cross_component=tr["q"])
    # equal up to the iteration's stopping rule (steps < 1e-6 in ln V, kept only as the iteration
    # contracts, leaving ~1e-8; allow 5e-7): the sums run in another order. Residuals then agree
    # to t * 5e-7 with t < 0.1 s.
    np.testing.assert_allclose(b.velocity_m_s, a.velocity_m_s, rtol=5e-7)
    np.testing.assert_allclose(b.residual_s, a.residual_s[perm], atol=5e-8)
    assert np.all(b.rejected == a.rejected[perm])


def test_green_1938_horizontal_t2_x2():
    # Green (1938): over a horizontal reflector t^2 = t0^2 + x^2/V^2 exactly, so a straight-line fit
    # of t^2 against x^2 gives 1/V^2 and t0^2. Compare with numpy's polyfit of the same exact data.
    x = np.arange(-46.0, 47.0, 2.0)
    t = np.sqrt(x**2 + 4 * 25.0**2) / 1800.0
    slope, intercept = np.polyfit(x**2, t**2, 1)
    fit = shot_fits.fit_shot_gathers(straight_line_gather(x, t))
    assert fit.status[0] == "ok"
    assert fit.velocity_m_s[0] == pytest.approx(slope**-0.5, rel=1e-8)
    assert fit.t0_s[0] == pytest.approx(np.sqrt(intercept), rel=1e-8)
    assert abs(fit.s_along[0]) < 1e-8


@pytest.mark.parametrize("q", [0.0, 0.3, -0.5], ids=["q0", "q0.3", "q-0.5"])
@pytest.mark.parametrize("s", [-0.4, 0.0, 0.25], ids=["s-0.4", "s0", "s0.25"])
def test_sheriff_geldart_dipping_quadratic(s, q):
    # Sheriff & Geldart (1995, ch. 4): on a flat straight line t^2 V^2 = x^2 + 4hsx + 4h^2
    # (core.forward.line_traveltime). With receivers on the line (y_w = 0, dz = 0) the cross-line
    # component q drops out of the image-source model, so any q must recover the same (V, h, s).
    x = np.arange(2.0, 98.0, 2.0)  # end-on
    t = forward.line_traveltime(x, 35.0, s, 2400.0)
    fit = shot_fits.fit_shot_gathers(straight_line_gather(x, t), cross_component=q)
    assert fit.status[0] == "ok"
    assert fit.velocity_m_s[0] == pytest.approx(2400.0, rel=1e-7)
    assert fit.normal_distance_m[0] == pytest.approx(35.0, rel=1e-7)
    assert fit.s_along[0] == pytest.approx(s, abs=1e-7)
    assert fit.traveltime_dip_deg[0] == pytest.approx(np.degrees(np.arcsin(s)), abs=1e-5)


def test_common_practice_t0_of_40_m_at_3000_m_s():
    # Common practice (from memory): a reflector 40 m down at 3000 m/s comes back at 26.7 ms.
    x = np.arange(-47.0, 48.0, 2.0)
    t = forward.line_traveltime(x, 40.0, 0.0, 3000.0)
    fit = shot_fits.fit_shot_gathers(straight_line_gather(x, t))
    assert round(fit.t0_s[0] * 1e3, 1) == 26.7


# --------------------------------------------------------------------------- CMP, Dix


@pytest.mark.parametrize(
    "dip,beta",
    [(0.0, 0.0), (20.0, 0.0), (20.0, 60.0), (35.0, 30.0)],
    ids=["flat", "along-dip", "oblique", "steep"],
)
def test_levin_1971_cmp_velocity_exact(dip, beta):
    # Levin (1971): over a plane below a homogeneous layer the CMP moveout is exactly hyperbolic,
    # t^2 = t0^2 + x^2 (1 - sin^2 d cos^2 b)/V^2. Build CMP gathers from exact image-source times
    # (core.forward) for a line at angle beta to the dip direction, and compare Vnmo.
    V = 2200.0
    dip_dir = 90.0
    az = np.radians(dip_dir + beta)
    u = np.array([np.sin(az), np.cos(az), 0.0])
    mid = np.array([10.0, 20.0, 0.0])
    n, d = forward.plane_through_point(mid + np.array([0.0, 0.0, -30.0]), dip, dip_dir)
    x = np.arange(4.0, 100.0, 4.0)
    S = mid - 0.5 * x[:, None] * u
    R = mid + 0.5 * x[:, None] * u
    t = forward.image_source_traveltime(S, R, n, d, V)
    fit = cmp.fit_cmp_gathers(np.zeros(len(x), int), x, t, np.full(len(x), SIGMA))
    sd, cb = np.sin(np.radians(dip)), np.cos(np.radians(beta))
    assert fit.status[0] == "ok"
    assert fit.nmo_velocity_m_s[0] == pytest.approx(V / np.sqrt(1 - (sd * cb) ** 2), rel=1e-7)
    # zero-offset time at the midpoint: twice the normal distance over V
    h_mid = d - n @ mid
    assert fit.t0_s[0] == pytest.approx(2 * h_mid / V, rel=1e-7)
    # and forward.cmp_traveltime reproduces the data
    np.testing.assert_allclose(forward.cmp_traveltime(x, 2 * h_mid / V, V, dip, beta), t, rtol=1e-12)


def test_cmp_batch_with_rejection_and_status(rng):
    # several CMP gathers in one call: one with a mispick, one with too few picks
    x = np.arange(5.0, 100.0, 5.0)
    gid, off, tt = [], [], []
    t0s, vs = [0.03, 0.05, 0.04], [1800.0, 2500.0, 2000.0]
    for k, (t0, v) in enumerate(zip(t0s, vs)):
        xs = x if k != 2 else x[:3]
        t = forward.cmp_traveltime(xs, t0, v) + rng.normal(0, SIGMA, len(xs))
        gid += [k] * len(xs)
        off += list(xs)
        tt += list(t)
    tt = np.array(tt)
    tt[5] += 0.012  # mispick in gather 0
    fit = cmp.fit_cmp_gathers(np.array(gid), np.array(off), tt, np.full(len(tt), SIGMA))
    assert fit.status.tolist() == ["ok", "ok", "too_few_picks"]
    assert fit.rejected[5] and fit.picks_rejected[0] == 1
    assert fit.residual_s[5] == pytest.approx(0.012, abs=5 * SIGMA)  # reported, not dropped
    for k in range(2):  # within 4 standard errors of the truth
        assert abs(fit.nmo_velocity_m_s[k] - vs[k]) < 4 * fit.se_nmo_velocity_m_s[k]
        assert abs(fit.t0_s[k] - t0s[k]) < 4 * fit.se_t0_s[k]
    assert np.isnan(fit.t0_s[2]) and "3 usable picks" in fit.reason[2]


def test_dix_1955_three_layers_exact():
    # Dix (1955): interval velocities from rms velocities; round trip through
    # forward.layered_t0_vrms for three layers.
    z = np.array([12.0, 25.0, 40.0])
    v = np.array([800.0, 1900.0, 3200.0])
    t0, vrms = forward.layered_t0_vrms(z, v)
    r = dix.dix_intervals(t0[::-1], vrms[::-1])  # any input order
    np.testing.assert_allclose(r.interval_velocity_m_s, v, rtol=1e-12)
    np.testing.assert_allclose(r.thickness_m, z, rtol=1e-12)
    np.testing.assert_allclose(r.depth_base_m, np.cumsum(z), rtol=1e-12)
    assert r.order.tolist() == [2, 1, 0]
    assert list(r.status) == ["ok"] * 3


def test_dix_1955_from_fitted_short_spread_vrms():
    # Dix (1955): the small-offset NMO velocity of a flat layered stack is the rms velocity. Fit
    # hyperbolas to exact ray-traced times (forward.layered_reflection_traveltime) on short spreads:
    # the departure from Vrms is of order (x/z)^2 times the velocity contrast, so it must shrink as
    # the spread shortens; at x_max = 0.3 z it must be under 1 %.
    z = np.array([12.0, 25.0, 40.0])
    v = np.array([800.0, 1900.0, 3200.0])
    t0, vrms = forward.layered_t0_vrms(z, v)
    errs, fits = {}, {}
    for frac in (0.3, 0.15):
        gid, off, tt = [], [], []
        for k in range(3):
            depth = z[: k + 1].sum()
            x = np.linspace(0.0, frac * depth, 25)
            gid += [k] * len(x)
            off += list(x)
            tt += list(forward.layered_reflection_traveltime(x, z[: k + 1], v[: k + 1]))
        fit = cmp.fit_cmp_gathers(np.array(gid), np.array(off), np.array(tt), np.full(len(tt), 1e-5))
        errs[frac], fits[frac] = np.abs(fit.nmo_velocity_m_s / vrms - 1), fit
        np.testing.assert_allclose(fit.t0_s, t0, rtol=1e-4)
    # one homogeneous layer: the hyperbola is exact (Green 1938)
    assert errs[0.3][0] < 1e-9 and errs[0.15][0] < 1e-9
    # layered: within 1 %, and closer on the shorter spread
    assert np.all(errs[0.3] < 0.01)
    assert np.all(errs[0.15][1:] < errs[0.3][1:])
    # Dix on the fitted t0 and NMO velocities recovers the interval velocities within 3 %
    # (the 0.04 % velocity bias is amplified by the Dix differencing, 1/(1 - t_{k-1}/t_k))
    r = dix.dix_intervals(fits[0.15].t0_s, fits[0.15].nmo_velocity_m_s)
    np.testing.assert_allclose(r.interval_velocity_m_s, v, rtol=0.03)
    np.testing.assert_allclose(r.thickness_m, z, rtol=0.03)


@pytest.mark.slow  # Monte Carlo of the Dix errors
def test_dix_errors_match_monte_carlo(rng):
    # delta-method standard errors against a Monte Carlo of the same Dix relation (small errors,
    # 4000 draws: the sample SD is within ~2.2 % of the truth at 1 sigma, so 8 % is > 3 sigma)
    t0 = np.array([0.03, 0.05, 0.08])
    vr = np.array([1000.0, 1500.0, 2100.0])
    st_, sv = np.array([2e-4, 2e-4, 3e-4]), np.array([10.0, 12.0, 15.0])
    r = dix.dix_intervals(t0, vr, st_, sv)
    draws = [dix.dix_intervals(t0 + st_ * rng.normal(size=3), vr + sv * rng.normal(size=3)) for _ in range(4000)]
    vi = np.array([d.interval_velocity_m_s for d in draws])
    zz = np.array([d.thickness_m for d in draws])
    dd = np.array([d.depth_base_m for d in draws])
    np.testing.assert_allclose(r.se_interval_velocity_m_s, vi.std(axis=0), rtol=0.08)
    np.testing.assert_allclose(r.se_thickness_m, zz.std(axis=0), rtol=0.08)
    np.testing.assert_allclose(r.se_depth_base_m, dd.std(axis=0), rtol=0.08)


def test_dix_nonphysical_flagged_not_hidden():
    # V_rms^2 t0 must grow downward (Dix 1955); a sharp rms velocity drop gives a negative
    # interval velocity squared, which is flagged with a reason (NaN values, not clipped)
    r = dix.dix_intervals([0.02, 0.04, 0.06], [2000.0, 1000.0, 1500.0])
    assert list(r.status) == ["ok", "nonphysical", "ok"]
    assert np.isnan(r.interval_velocity_m_s[1]) and np.isnan(r.depth_base_m[2])
    assert "negative interval velocity squared" in r.reason[1]
    assert np.isfinite(r.interval_velocity_m_s[2])  # the layer below uses only its own reflectors


# --------------------------------------------------------------------------- statistics


@pytest.mark.parametrize("loss", ["huber", "linear", "soft_l1"])
def test_standard_error_coverage(loss):
    # With Gaussian pick noise of the stated sigma, |estimate - truth| < 1 SE should hold for 68.3 %
    # of gathers. 400 gathers in ONE batched call: the binomial SD of the fraction is
    # sqrt(0.683 * 0.317 / 400) = 0.023; accept +-3 SD = [0.61, 0.75]. (The a-posteriori factor
    # only inflates, which moves the expectation up by ~1-2 points.)
    rng = np.random.default_rng(7)
    gs, tr = make_gathers(rng, 400, noise_s=SIGMA)
    fit = shot_fits.fit_shot_gathers(gs, Settings(robust_loss=loss), cross_component=tr["q"])
    assert np.all(fit.status == "ok")
    for est, se, true in [
        (fit.velocity_m_s, fit.se_velocity_m_s, tr["V"]),
        (fit.normal_distance_m, fit.se_normal_distance_m, tr["h"]),
        (fit.s_along, fit.se_s_along, tr["s"]),
        (fit.t0_s, fit.se_t0_s, 2 * tr["h"] / tr["V"]),
    ]:
        cover = np.mean(np.abs(est - true) < se)
        assert 0.61 <= cover <= 0.75, cover
    # the a-posteriori variance factor averages 1 when sigma is right (chi2 / (n - 3), n = 48)
    assert np.mean(fit.variance_factor) == pytest.approx(1.0, abs=0.05)


def test_understated_pick_errors_widen_the_errors():
    # picks 3x noisier than stated: the a-posteriori factor (~9) widens the SEs, coverage stays honest
    rng = np.random.default_rng(11)
    gs, tr = make_gathers(rng, 400, noise_s=3 * SIGMA)
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    assert np.median(fit.variance_factor) == pytest.approx(9.0, rel=0.15)
    cover = np.mean(np.abs(fit.velocity_m_s - tr["V"]) < fit.se_velocity_m_s)
    assert 0.61 <= cover <= 0.78, cover
    # the MAD-based scale keeps the good picks: about as many rejections as 4 sigma of a Gaussian
    assert fit.rejected.mean() < 0.005


def test_huber_variance_inflation_matches_known_efficiency():
    # Huber (1981): with k = 1.345 the Huber M-estimator has 95 % efficiency at the normal
    # (common practice, from memory), i.e. a variance inflation of 1/0.95.
    assert robust.variance_inflation("huber", 1.345) == pytest.approx(1 / 0.95, abs=2e-3)
    assert robust.variance_inflation("linear", 1.0) == 1.0


# --------------------------------------------------------------------------- mispicks, exclusions


def test_mispicks_rejected_and_reported():
    # 3 % of the picks shifted by 5-20 ms (10-40 sigma): all must be flagged rejected, with their
    # residual reported (not dropped); parameters within 2 SE of the truth for >= 90 % of gathers
    # (95 % expected for a Gaussian estimate; 200 gathers: binomial SD 1.5 %, 0.90 is > 3 SD away).
    rng = np.random.default_rng(3)
    # t0 >= 24 ms here, so a pick moved 20 ms earlier is still a positive time
    gs, tr = make_gathers(rng, 200, depth=(30.0, 60.0), velocity=(1500.0, 2500.0), noise_s=SIGMA)
    n = len(gs.time_s)
    bad = rng.random(n) < 0.03
    shift = rng.uniform(0.005, 0.020, n) * rng.choice([-1, 1], n)
    t = gs.time_s + np.where(bad, shift, 0.0)
    gs = GatherSet(
        gs.gather,
        gs.source_xyz,
        gs.receiver_xyz,
        t,
        gs.sigma_s,
        gs.pick_index,
        gs.line,
        gs.shot,
        gs.reflector,
        gs.line_unit,
        gs.cross_unit,
        gs.source_xyz_g,
        gs.spread_length_m,
    )
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    assert np.all(fit.status == "ok")
    assert np.all(fit.rejected[bad])
    assert fit.rejected[~bad].mean() < 0.002  # false rejections: ~6e-5 expected at 4 sigma
    np.testing.assert_allclose(fit.residual_s[bad], shift[bad], atol=6 * SIGMA)
    assert np.all(fit.weight[fit.rejected] == 0)
    np.testing.assert_array_equal(fit.picks_rejected, np.bincount(gs.gather, fit.rejected, 200).astype(int))
    np.testing.assert_array_equal(fit.picks_used + fit.picks_rejected, np.bincount(gs.gather, minlength=200))
    for est, se, true in [
        (fit.velocity_m_s, fit.se_velocity_m_s, tr["V"]),
        (fit.normal_distance_m, fit.se_normal_distance_m, tr["h"]),
        (fit.s_along, fit.se_s_along, tr["s"]),
    ]:
        assert np.mean(np.abs(est - true) < 2 * se) >= 0.90


def test_user_exclusions_counted_apart(rng):
    gs, tr = make_gathers(rng, 10, npick=24, noise_s=SIGMA)
    exclude = np.zeros(len(gs.time_s), bool)
    exclude[[0, 1, 30]] = True
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"], exclude=exclude)
    assert fit.picks_excluded.tolist() == [2, 1] + [0] * 8
    assert not fit.rejected[exclude].any() and np.all(fit.excluded == exclude)
    assert np.all(fit.weight[exclude] == 0) and np.all(np.isfinite(fit.residual_s[exclude]))
    # the same as fitting without those picks
    keep = ~exclude
    sub = GatherSet(
        gs.gather[keep],
        gs.source_xyz[keep],
        gs.receiver_xyz[keep],
        gs.time_s[keep],
        gs.sigma_s[keep],
        gs.pick_index[keep],
        gs.line,
        gs.shot,
        gs.reflector,
        gs.line_unit,
        gs.cross_unit,
        gs.source_xyz_g,
        gs.spread_length_m,
    )
    ref = shot_fits.fit_shot_gathers(sub, cross_component=tr["q"])
    np.testing.assert_allclose(fit.velocity_m_s, ref.velocity_m_s, rtol=5e-7)  # stopping rule, as above
    with pytest.raises(InversionError, match="one flag per pick"):
        shot_fits.fit_shot_gathers(gs, exclude=exclude[:-1])


# --------------------------------------------------------------------------- status and reasons


def test_flagged_gathers_leave_the_batch_unaffected(rng):
    good, tr = make_gathers(rng, 3, noise_s=SIGMA)
    x = np.arange(-23.0, 24.0, 2.0)
    few = straight_line_gather(x[:5], forward.line_traveltime(x[:5], 30.0, 0.0, 2000.0))
    # times that fall with offset: no reflection hyperbola can do that
    falling = straight_line_gather(x, 0.05 - 1e-4 * np.abs(x))
    # a 12 000 m/s "overburden": outside the plausible range
    fast = straight_line_gather(x, forward.line_traveltime(x, 60.0, 0.1, 12000.0))
    # offsets of at most 0.3 m over a reflector 80 m down: V and h trade off
    tiny_x = np.linspace(-0.3, 0.3, 24)
    tiny = straight_line_gather(
        tiny_x, forward.line_traveltime(tiny_x, 80.0, 0.05, 2000.0) + rng.normal(0, 5e-5, 24), sigma=5e-5
    )
    same_x = straight_line_gather(np.full(10, 20.0), np.full(10, 0.03))  # one offset, ten picks
    batch = concat(good, few, falling, fast, tiny, same_x)
    q = np.concatenate([tr["q"], np.zeros(5)])
    fit = shot_fits.fit_shot_gathers(batch, cross_component=q)
    assert fit.status.tolist() == ["ok"] * 3 + [
        "too_few_picks",
        "nonphysical",
        "nonphysical",
        "ill_conditioned",
        "too_few_picks",
    ]
    assert all(isinstance(r, str) and len(r) > 10 for r in fit.reason)
    assert "5 usable picks" in fit.reason[3]
    assert "12" in fit.reason[5] and "m/s" in fit.reason[5]
    assert "trade off" in fit.reason[6]
    assert "1 distinct offsets" in fit.reason[7]
    assert np.isnan(fit.velocity_m_s[3]) and np.isnan(fit.velocity_m_s[7])
    assert np.isfinite(fit.velocity_m_s[5])  # flagged gathers keep their best values
    # the good gathers come out as when fitted alone: every gather is its own problem (row-wise
    # sums only); 1e-7 leaves room for rounding that differs with a row's place in a BLAS kernel
    alone = shot_fits.fit_shot_gathers(good, cross_component=tr["q"])
    np.testing.assert_allclose(fit.velocity_m_s[:3], alone.velocity_m_s, rtol=1e-7)
    np.testing.assert_allclose(fit.covariance[:3], alone.covariance, rtol=1e-6)
    assert list(fit.status[:3]) == list(alone.status)


def test_well_spread_gathers_are_well_conditioned(rng):
    # the condition limit must leave ordinary spreads far inside: end-on spreads of 96 m over
    # reflectors 20-80 m away (longest offset >= 1.2 h), the harder case as x and x^2 correlate.
    # The condition number grows like (h / x_max)^4, so a factor 30 below the limit still leaves
    # room for spreads more than twice as short.
    gs, tr = make_gathers(rng, 200, spread="end_on", depth=(20.0, 80.0), noise_s=SIGMA)
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    assert np.all(fit.status == "ok")
    assert np.all(fit.condition_number < gather_fit.CONDITION_LIMIT / 30)
    # and a split spread with offsets up to a fifteenth of h is flagged (geometry, no noise)
    x = np.linspace(-80.0 / 15, 80.0 / 15, 24)
    short = shot_fits.fit_shot_gathers(straight_line_gather(x, forward.line_traveltime(x, 80.0, 0.1, 2000.0)))
    assert short.status[0] == "ill_conditioned" and short.condition_number[0] > gather_fit.CONDITION_LIMIT


def test_bad_settings_and_inputs(rng):
    gs, _ = make_gathers(rng, 2, npick=10)
    with pytest.raises(InversionError, match="robust_loss = 'l3'"):
        shot_fits.fit_shot_gathers(gs, Settings(robust_loss="l3"))
    with pytest.raises(InversionError, match="robust_scale"):
        shot_fits.fit_shot_gathers(gs, Settings(robust_scale=0.0))
    with pytest.raises(InversionError, match=r"cross_component 1.2 .*\|q\| < 1"):
        shot_fits.fit_shot_gathers(gs, cross_component=1.2)
    # NaN = not resolved: fitted as level across the line, and reported as the 0 used
    fit = shot_fits.fit_shot_gathers(gs, cross_component=[np.nan, 0.2])
    assert fit.cross_component.tolist() == [0.0, 0.2]
    bad = GatherSet(
        gs.gather,
        gs.source_xyz,
        gs.receiver_xyz,
        gs.time_s,
        np.where(np.arange(20) == 4, -1.0, SIGMA),
        gs.pick_index,
        gs.line,
        gs.shot,
        gs.reflector,
        gs.line_unit,
        gs.cross_unit,
        gs.source_xyz_g,
        gs.spread_length_m,
    )
    with pytest.raises(InversionError, match=r"pick \(row in the picks table\) 4 has pick error -1.0"):
        shot_fits.fit_shot_gathers(bad)


def test_wrong_shapes_are_project_errors(rng):
    # every argument that does not fit the picks is refused with the project's error naming it,
    # never a bare numpy broadcasting error
    gs, _ = make_gathers(rng, 2, npick=10)
    with pytest.raises(InversionError, match=r"cross_component has shape \(3,\); expected one value or one per gather"):
        shot_fits.fit_shot_gathers(gs, cross_component=[0.0, 0.1, 0.2])
    with pytest.raises(InversionError, match=r"cross_component has shape \(3,\)"):
        shot_fits.linear_start(gs, [0.0, 0.1, 0.2])
    with pytest.raises(InversionError, match=r"se_vrms_m_s has shape \(3,\); expected one value or one per reflector"):
        dix.dix_intervals([0.02, 0.05], [1000.0, 1500.0], se_vrms_m_s=[1.0, 2.0, 3.0])
    xy = np.zeros((4, 2))
    with pytest.raises(InversionError, match=r"source_xy \(4,\) and receiver_xy \(4, 2\) must have the same shape"):
        cmp.cmp_bins(np.zeros(4), xy, 1.0)
    with pytest.raises(InversionError, match=r"line_unit has shape \(3,\); expected \(2,\) or \(4, 2\)"):
        cmp.cmp_bins(xy, xy + 1.0, 1.0, line_unit=[1.0, 0.0, 0.0])
    with pytest.raises(InversionError, match=r"group has shape \(2,\); expected one label per pick"):
        cmp.cmp_bins(xy, xy + 1.0, 1.0, group=["a", "b"])
    with pytest.raises(InversionError, match=r"bin_size_m = 'two' must be a positive distance"):
        cmp.cmp_bins(xy, xy + 1.0, "two")


def test_linear_start_is_the_t2_x2_line_of_a_dipping_layer():
    # flat straight split spread over a dipping plane: t^2 V^2 = x^2 + 4 h s x + 4 h^2 is exactly
    # linear in (x^2, x, 1), so the weighted linear fit returns V, h and s to rounding (Green 1938
    # for s = 0; the dipping-layer quadratic, Sheriff & Geldart 1995 ch. 4)
    x = np.arange(-47.5, 48.0, 2.5)
    gs = straight_line_gather(x, forward.line_traveltime(x, 30.0, 0.2, 1800.0))
    np.testing.assert_allclose(shot_fits.linear_start(gs)[0], [1800.0, 30.0, 0.2], rtol=1e-9)


def test_cancel_is_honoured(rng):
    gs, _ = make_gathers(rng, 5, npick=10)

    class Cancelled:
        def set_progress(self, p):
            pass

        def is_canceled(self):
            return True

        def info(self, m):
            pass

    with pytest.raises(CancelledError):
        shot_fits.fit_shot_gathers(gs, progress=Cancelled())


def test_progress_reaches_100(rng):
    gs, tr = make_gathers(rng, 5, npick=10)
    seen = []

    class Rec:
        def set_progress(self, p):
            seen.append(p)

        def is_canceled(self):
            return False

        def info(self, m):
            pass

    shot_fits.fit_shot_gathers(gs, cross_component=tr["q"], progress=Rec())
    assert seen[-1] == 100 and seen == sorted(seen)


@pytest.mark.slow  # fuzzing: 600 generated gathers
@settings(max_examples=600, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    npick=st.integers(0, 40),
    spacing=st.floats(0.01, 20.0),
    spread=st.sampled_from(["split", "end_on", "end_on_reversed"]),
    depth=st.floats(1.0, 300.0),
    dip=st.floats(0.0, 80.0),
    velocity=st.floats(100.0, 9000.0),
    noise=st.floats(0.0, 5e-3),
    crooked=st.floats(0.0, 20.0),
    seed=st.integers(0, 2**31),
    loss=st.sampled_from(["huber", "soft_l1", "cauchy", "linear"]),
)
def test_property_fit_or_flag(npick, spacing, spread, depth, dip, velocity, noise, crooked, seed, loss):
    # any geometry: a finite fit with status ok, or a flagged status with a reason; never an
    # exception other than the project's
    rng = np.random.default_rng(seed)
    if npick == 0:
        gs, tr = make_gathers(rng, 1, npick=1)
        gs = GatherSet(
            gs.gather[:0],
            gs.source_xyz[:0],
            gs.receiver_xyz[:0],
            gs.time_s[:0],
            gs.sigma_s[:0],
            gs.pick_index[:0],
            gs.line,
            gs.shot,
            gs.reflector,
            gs.line_unit,
            gs.cross_unit,
            gs.source_xyz_g,
            gs.spread_length_m,
        )
    else:
        gs, tr = make_gathers(
            rng,
            1,
            npick=npick,
            spacing=spacing,
            spread=spread,
            depth=(depth, depth),
            dip_max=dip,
            velocity=(velocity, velocity),
            crooked_m=crooked,
            noise_s=noise,
        )
    try:
        fit = shot_fits.fit_shot_gathers(gs, Settings(robust_loss=loss), cross_component=tr["q"])
    except RockheadError:
        return
    assert fit.status[0] in ("ok", "too_few_picks", "nonphysical", "ill_conditioned", "not_converged")
    assert isinstance(fit.reason[0], str) and fit.reason[0]
    if fit.status[0] == "ok":
        vals = [fit.velocity_m_s, fit.normal_distance_m, fit.s_along, fit.se_velocity_m_s, fit.se_s_along]
        assert all(np.isfinite(v[0]) for v in vals)
        assert 150.0 <= fit.velocity_m_s[0] <= 6500.0 and fit.normal_distance_m[0] > 0
    assert fit.residual_s.shape == gs.time_s.shape


# --------------------------------------------------------------------------- CMP bins


def test_cmp_bins_by_hand():
    # midpoints 5, 15, 15, 16.5, 17.5, 31: bins [5, 7), [15, 17), [17, 19), [31, 33)
    s = np.array([[0.0, 0.0], [0.0, 0.0], [10.0, 0.0], [13.0, 0.0], [15.0, 0.0], [30.0, 0.0]])
    r = np.array([[10.0, 0.0], [30.0, 0.0], [20.0, 0.0], [20.0, 0.0], [20.0, 0.0], [32.0, 0.0]])
    gid, centres, off = cmp.cmp_bins(s, r, 2.0)
    assert gid.tolist() == [0, 1, 1, 1, 2, 3]
    np.testing.assert_allclose(centres[:, 0], [5.0, (15.0 + 15.0 + 16.5) / 3, 17.5, 31.0])
    np.testing.assert_allclose(off, [10.0, 30.0, 10.0, 7.0, 5.0, 2.0])
    # separate lines never share a bin
    gid2, _, _ = cmp.cmp_bins(s, r, 100.0, group=["a", "a", "b", "b", "b", "b"])
    assert gid2.tolist() == [0, 0, 1, 1, 1, 1]


def test_cmp_bins_then_levin_fit(rng):
    # shot gathers along the dip direction over a dipping plane, sorted into 1 m CMP bins of
    # exact midpoints, fitted with the NMO hyperbola: Vnmo = V / cos(dip) (Levin 1971)
    V, dip = 2000.0, 10.0
    n, d = forward.plane_through_point([0.0, 0.0, -40.0], dip, 90.0)
    shots = np.arange(0.0, 200.0, 4.0)
    recs = np.arange(0.0, 300.0, 2.0)
    S = np.repeat(shots, len(recs))
    R = np.tile(recs, len(shots))
    keep = (np.abs(R - S) <= 60.0) & (np.abs(R - S) > 0)
    S, R = S[keep], R[keep]
    Sx = np.column_stack([S, np.zeros_like(S), np.zeros_like(S)])
    Rx = np.column_stack([R, np.zeros_like(R), np.zeros_like(R)])
    t = forward.image_source_traveltime(Sx, Rx, n, d, V)
    gid, _, off = cmp.cmp_bins(Sx[:, :2], Rx[:, :2], 1.0, line_unit=[1.0, 0.0])
    fit = cmp.fit_cmp_gathers(gid, off, t, np.full(len(t), SIGMA))
    ok = fit.status == "ok"
    assert ok.sum() > 50
    np.testing.assert_allclose(fit.nmo_velocity_m_s[ok], V / np.cos(np.radians(dip)), rtol=1e-7)


def test_not_converged_is_flagged(rng, monkeypatch):
    # an iteration budget of one step cannot reach the tolerance from the linear start
    monkeypatch.setattr(lm, "MAX_ITERATIONS", 1)
    gs, tr = make_gathers(rng, 3, noise_s=SIGMA)
    fit = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    assert list(fit.status) == ["not_converged"] * 3
    assert all("did not converge" in r for r in fit.reason)
    assert np.all(np.isfinite(fit.velocity_m_s))  # best values kept for inspection


def test_empty_inputs(rng):
    gs, _ = make_gathers(rng, 1, npick=1)
    empty = GatherSet(
        *(a[:0] for a in (gs.gather, gs.source_xyz, gs.receiver_xyz, gs.time_s, gs.sigma_s, gs.pick_index)),
        *(a[:0] for a in (gs.line, gs.shot, gs.reflector, gs.line_unit, gs.cross_unit, gs.source_xyz_g)),
        gs.spread_length_m[:0],
    )
    assert len(shot_fits.fit_shot_gathers(empty)) == 0
    assert len(cmp.fit_cmp_gathers(np.zeros(0, int), [], [], [])) == 0
    gid, centres, off = cmp.cmp_bins(np.zeros((0, 2)), np.zeros((0, 2)), 1.0)
    assert gid.shape == (0,) and centres.shape == (0, 2) and off.shape == (0,)


@pytest.mark.parametrize("loss", ["linear", "huber", "soft_l1", "cauchy"])
def test_same_minimum_as_scipy_least_squares(loss):
    # Reference library: scipy.optimize.least_squares with the same loss and f_scale minimises the
    # same robust objective; with mispicks in the data (rejection off) the robust minimum differs from
    # least squares, and both solvers must land on it. 1e-6: our stopping rule (steps < 1e-6 in
    # ln V, ln h, kept only when the iteration contracts) leaves errors far below that.
    from scipy.optimize import least_squares

    rng = np.random.default_rng(5)
    gs, tr = make_gathers(rng, 20, npick=36, depth=(30.0, 60.0), velocity=(1500.0, 2500.0), noise_s=SIGMA)
    t = gs.time_s + np.where(rng.random(len(gs.time_s)) < 0.05, 0.008, 0.0)
    gs = GatherSet(
        gs.gather,
        gs.source_xyz,
        gs.receiver_xyz,
        t,
        gs.sigma_s,
        gs.pick_index,
        gs.line,
        gs.shot,
        gs.reflector,
        gs.line_unit,
        gs.cross_unit,
        gs.source_xyz_g,
        gs.spread_length_m,
    )
    st = Settings(robust_loss=loss, reject_sigma=np.inf)
    fit = shot_fits.fit_shot_gathers(gs, st, cross_component=tr["q"])
    assert np.all(fit.status == "ok")
    for k in range(20):
        m = gs.gather == k
        D = gs.receiver_xyz[m] - gs.source_xyz[m]
        x = D[:, :2] @ gs.line_unit[k]
        y = D[:, :2] @ gs.cross_unit[k]
        q = tr["q"][k]

        def residual(p, x=x, y=y, D=D, q=q, m=m):
            V, h, s = p
            c = np.sqrt(1 - s * s - q * q)
            model = np.sqrt(np.sum(D * D, axis=1) + 4 * h * (s * x + q * y + c * D[:, 2]) + 4 * h * h) / V
            return (t[m] - model) / gs.sigma_s[m]

        p0 = [fit.velocity_m_s[k] * 1.02, fit.normal_distance_m[k] * 0.98, fit.s_along[k] * 0.9]
        ref = least_squares(
            residual,
            p0,
            loss=loss,
            f_scale=st.robust_scale,
            x_scale=[1000.0, 10.0, 0.1],
            ftol=1e-14,
            xtol=1e-14,
            gtol=1e-14,
        )
        assert fit.velocity_m_s[k] == pytest.approx(ref.x[0], rel=1e-6)
        assert fit.normal_distance_m[k] == pytest.approx(ref.x[1], rel=1e-6)
        assert fit.s_along[k] == pytest.approx(ref.x[2], abs=1e-6)


def test_cmp_standard_error_coverage():
    # the CMP fit shares the engine, so its errors must be honest too: 400 hyperbolas (Levin 1971)
    # with Gaussian noise of the stated sigma; |est - truth| < 1 SE for 68.3 % (binomial SD 0.023,
    # accept +-3 SD as in the shot-gather test)
    rng = np.random.default_rng(17)
    g, x = 400, np.arange(4.0, 100.0, 4.0)
    t0 = rng.uniform(0.02, 0.06, g)
    vn = rng.uniform(1500.0, 3500.0, g)
    gid = np.repeat(np.arange(g), len(x))
    off = np.tile(x, g)
    t = forward.cmp_traveltime(off, t0[gid], vn[gid]) + rng.normal(0.0, SIGMA, len(off))
    fit = cmp.fit_cmp_gathers(gid, off, t, np.full(len(t), SIGMA))
    assert np.all(fit.status == "ok")
    for est, se, true in [(fit.t0_s, fit.se_t0_s, t0), (fit.nmo_velocity_m_s, fit.se_nmo_velocity_m_s, vn)]:
        cover = np.mean(np.abs(est - true) < se)
        assert 0.61 <= cover <= 0.75, cover


def test_blocks_and_threads_give_the_same_answer(rng, monkeypatch):
    # the engine splits the gathers into cache-sized blocks run in threads: small blocks, one or
    # several threads, all must give the same results (each gather is its own problem)
    gs, tr = make_gathers(rng, 300, npick=24, noise_s=SIGMA)
    monkeypatch.setattr(lm, "MAX_THREADS", 1)
    ref = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    monkeypatch.setattr(lm, "BLOCK_ELEMENTS", 24 * 37)  # 37 gathers per block, uneven last block
    monkeypatch.setattr(lm, "worker_count", lambda: 3)
    alt = shot_fits.fit_shot_gathers(gs, cross_component=tr["q"])
    np.testing.assert_allclose(alt.velocity_m_s, ref.velocity_m_s, rtol=1e-7)  # BLAS row rounding only
    np.testing.assert_array_equal(alt.status, ref.status)
    np.testing.assert_array_equal(alt.rejected, ref.rejected)
