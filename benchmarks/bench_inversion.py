"""Batched per-gather inversion against a per-gather loop of scipy.optimize.least_squares.

Run from the repository root::

    python benchmarks/bench_inversion.py [--quick] [--no-append]

N synthetic common-shot gathers of 48 picks each (exact 3D image-source times
over random dipping planes, topography and crooked receiver lines, Gaussian
pick noise of 0.5 ms) are fitted twice in the same run:

* ``fit_shot_gathers`` (all gathers in one batched call, mispick rejection
  switched off with ``reject_sigma = inf`` so that both solve the same problem);
* a Python loop of ``scipy.optimize.least_squares`` (method ``trf``, same
  model, same parametrisation, same analytic Jacobian, same robust loss and
  ``f_scale``, same starting values, tolerances 1e-12).

It prints N, the batched time (default threads, and one thread), scipy's
time, the ratios and the largest relative difference of V, h and s (s
relative to 1), and appends a section to benchmarks/RESULTS.md with the
machine's cores, memory, load average and the numpy/scipy versions. A second
table compares the two layouts for the batched normal equations: padded
``(g, nmax)`` arrays against flat arrays with ``np.bincount`` segment sums.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

# As in the command line (core/cli.py): the fits solve many tiny systems, for which a
# multi-threaded BLAS only adds overhead; set before numpy loads, unless the user chose.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


from _common import import_package, machine  # noqa: E402
from _common import load_average as _load  # noqa: E402

import_package()

from rockhead.core.seismic import (  # noqa: E402
    forward,
    lm,
    shot_fits,
)
from rockhead.core.survey.model import GatherSet, Settings  # noqa: E402
from scipy.optimize import least_squares  # noqa: E402

NPICK = 48
SIGMA_S = 5e-4


def synthetic_gathers(n_gathers, seed=0):
    """Random shot gathers (split spreads, 2 m spacing) with known V, h, s, q."""
    rng = np.random.default_rng(seed)
    g = n_gathers
    V = rng.uniform(1500.0, 3500.0, g)
    h = rng.uniform(20.0, 60.0, g)
    dip = rng.uniform(0.0, 25.0, g)
    ddir = rng.uniform(0.0, 360.0, g)
    az = np.radians(rng.uniform(0.0, 360.0, g))
    u = np.column_stack([np.sin(az), np.cos(az)])
    w = np.column_stack([u[:, 1], -u[:, 0]])

    def topo(x, y):
        return 3.0 * np.sin(x / 50.0) + 2.0 * np.cos(y / 70.0)

    src = np.column_stack([rng.uniform(0, 1000, g), rng.uniform(0, 1000, g), np.zeros(g)])
    src[:, 2] = topo(src[:, 0], src[:, 1])
    off = (np.arange(NPICK) - (NPICK - 1) / 2.0) * 2.0
    gid = np.repeat(np.arange(g), NPICK)
    xy = src[gid, :2] + np.tile(off, g)[:, None] * u[gid] + rng.normal(0, 1.0, g * NPICK)[:, None] * w[gid]
    rec = np.column_stack([xy, topo(xy[:, 0], xy[:, 1])])
    n = forward.plane_normal(dip, ddir)
    d = np.sum(n * src, axis=1) + h
    t = forward.image_source_traveltime(src[gid], rec, n[gid], d[gid], V[gid])
    t = t + rng.normal(0.0, SIGMA_S, t.shape)
    q = -np.sum(w * n[:, :2], axis=1)
    gs = GatherSet(
        gather=gid,
        source_xyz=src[gid],
        receiver_xyz=rec,
        time_s=t,
        sigma_s=np.full(t.shape, SIGMA_S),
        pick_index=np.arange(len(t)),
        line=np.full(g, "B", dtype=object),
        shot=np.array([str(i) for i in range(g)], dtype=object),
        reflector=np.full(g, "1", dtype=object),
        line_unit=u,
        cross_unit=w,
        source_xyz_g=src,
        spread_length_m=np.full(g, np.ptp(off)),
    )
    return gs, q


def scipy_loop(gs, q, settings):
    """One scipy.optimize.least_squares call per gather, same model, loss and start."""
    g = gs.n_gathers
    gid = gs.gather
    D = gs.receiver_xyz - gs.source_xyz
    u = gs.line_unit[gid]
    w = gs.cross_unit[gid]
    xu = np.sum(u * D[:, :2], axis=1)
    yw = np.sum(w * D[:, :2], axis=1)
    d2 = np.sum(D * D, axis=1)
    # same starting values as the batched engine: its weighted linear fit in t^2
    start = shot_fits.linear_start(gs, q, settings)
    smax = np.sqrt(np.clip(1.0 - q * q, 1e-12, 1.0))
    theta0 = np.column_stack(  # the engine's internal parameters: ln V, ln h, artanh(s / s_max)
        [np.log(start[:, 0]), np.log(start[:, 1]), np.arctanh(np.clip(start[:, 2] / smax, -0.999999, 0.999999))]
    )
    starts = np.searchsorted(gid, np.arange(g + 1))
    out = np.empty((g, 3))
    for k in range(g):
        sl = slice(starts[k], starts[k + 1])
        x, y, dz, dd, tt, ss = xu[sl], yw[sl], D[sl, 2], d2[sl], gs.time_s[sl], gs.sigma_s[sl]
        qk = q[k]
        smax = np.sqrt(1.0 - qk * qk)

        def parts(th, x=x, y=y, dz=dz, dd=dd, qk=qk, smax=smax):
            V, h, r = np.exp(th[0]), np.exp(th[1]), np.tanh(th[2])
            s = smax * r
            c = np.sqrt(max(1.0 - s * s - qk * qk, 1e-24))
            lin = s * x + qk * y + c * dz
            root = np.sqrt(np.maximum(dd + 4.0 * h * (lin + h), 1e-30))
            return V, h, r, s, c, lin, root

        def fun(th, tt=tt, ss=ss, parts=parts):
            pv = parts(th)
            V, root = pv[0], pv[-1]
            return (tt - root / V) / ss

        def jac(th, ss=ss, x=x, dz=dz, parts=parts, smax=smax):
            V, h, r, s, c, lin, root = parts(th)
            inv_ = 1.0 / (V * root)
            return (
                -np.column_stack(
                    [
                        -root / V,
                        h * (2.0 * lin + 4.0 * h) * inv_,
                        2.0 * h * (x - (s / c) * dz) * inv_ * smax * (1.0 - r * r),
                    ]
                )
                / ss[:, None]
            )

        res = least_squares(
            fun,
            theta0[k],
            jac=jac,
            method="trf",
            loss=settings.robust_loss,
            f_scale=settings.robust_scale,
            ftol=1e-12,
            xtol=1e-12,
            gtol=1e-12,
        )
        V, h, s = np.exp(res.x[0]), np.exp(res.x[1]), np.sqrt(1.0 - qk * qk) * np.tanh(res.x[2])
        out[k] = V, h, s
    return out


def compare(n_gathers, settings, repeat=3):
    """Best-of-``repeat`` times of the batched fit (default threads and one thread) and scipy's loop.

    Wall-clock times, and processor (CPU) times of this process: on a machine
    shared with other jobs the CPU-time ratio of the one-thread run is the
    steadier measure of the work done by each side.
    """
    gs, q = synthetic_gathers(n_gathers, seed=n_gathers)
    times, cpu = {}, {}
    default_threads = lm.MAX_THREADS
    try:
        for label, threads in (("ours", default_threads), ("ours_1", 1)):
            lm.MAX_THREADS = threads
            best = best_cpu = np.inf
            for _ in range(repeat):
                t0, c0 = time.perf_counter(), time.process_time()
                fit = shot_fits.fit_shot_gathers(gs, settings, cross_component=q)
                best = min(best, time.perf_counter() - t0)
                best_cpu = min(best_cpu, time.process_time() - c0)
            times[label], cpu[label] = best, best_cpu
    finally:
        lm.MAX_THREADS = default_threads
    t0, c0 = time.perf_counter(), time.process_time()
    ref = scipy_loop(gs, q, settings)
    t_scipy, c_scipy = time.perf_counter() - t0, time.process_time() - c0
    ours = np.column_stack([fit.velocity_m_s, fit.normal_distance_m, fit.s_along])
    rel = np.abs(ours - ref) / np.column_stack([ref[:, 0], ref[:, 1], np.ones(len(ref))])
    return dict(
        n=n_gathers,
        ours=times["ours"],
        ours_1=times["ours_1"],
        scipy=t_scipy,
        ratio=t_scipy / times["ours"],
        ratio_1=t_scipy / times["ours_1"],
        cpu_1=cpu["ours_1"],
        cpu_scipy=c_scipy,
        ratio_cpu=c_scipy / cpu["ours_1"],
        diff=float(np.nanmax(rel)),
        ok=int(np.sum(fit.status == "ok")),
    )


def layout_comparison(n_gathers, repeat=5):
    """Time the normal-equation sums J^T W J: padded (g, nmax) vs flat bincount segments."""
    rng = np.random.default_rng(1)
    n = n_gathers * NPICK
    gid = np.repeat(np.arange(n_gathers), NPICK)
    J = rng.normal(size=(3, n))
    w = rng.uniform(0.5, 1.0, n)
    Jp = J.reshape(3, n_gathers, NPICK)
    wp = w.reshape(n_gathers, NPICK)

    def padded():
        H = np.empty((n_gathers, 3, 3))
        for i in range(3):
            wj = wp * Jp[i]
            for j in range(i + 1):
                H[:, i, j] = H[:, j, i] = np.sum(wj * Jp[j], axis=1)
        return H

    def segments():
        H = np.empty((n_gathers, 3, 3))
        for i in range(3):
            wj = w * J[i]
            for j in range(i + 1):
                H[:, i, j] = H[:, j, i] = np.bincount(gid, wj * J[j], minlength=n_gathers)
        return H

    assert np.allclose(padded(), segments())
    times = {}
    for name, fn in (("padded", padded), ("bincount", segments)):
        best = np.inf
        for _ in range(repeat):
            t0 = time.perf_counter()
            fn()
            best = min(best, time.perf_counter() - t0)
        times[name] = best
    return times


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="N = 100 and 1000 only")
    ap.add_argument("--no-append", action="store_true", help="do not append to benchmarks/RESULTS.md")
    args = ap.parse_args(argv)
    settings = Settings(reject_sigma=float("inf"))  # robust loss as configured, no rejection
    sizes = [100, 1000] if args.quick else [100, 1000, 10000]
    rows = []
    load0 = _load()
    print(f"loss = {settings.robust_loss}, f_scale = {settings.robust_scale}, {NPICK} picks per gather")
    print(f"threads for the batched engine: {lm.worker_count()}; load average at start: {load0}")
    print(
        f"{'N':>7} {'ours (s)':>10} {'1 thread':>10} {'scipy (s)':>10} {'ratio':>7} {'ratio 1t':>8} "
        f"{'cpu ratio':>9} {'max rel diff':>13} {'ok':>7}"
    )
    for n in sizes:
        r = compare(n, settings)
        rows.append(r)
        print(
            f"{r['n']:>7} {r['ours']:>10.3f} {r['ours_1']:>10.3f} {r['scipy']:>10.2f} {r['ratio']:>7.1f} "
            f"{r['ratio_1']:>8.1f} {r['ratio_cpu']:>9.1f} {r['diff']:>13.2e} {r['ok']:>7}"
        )
    load1 = _load()
    big = rows[-1]
    verdict = "met" if max(big["ratio"], big["ratio_1"]) >= 50 and big["diff"] <= 1e-6 else "MISSED"
    print(f"target >= 50x with parameters equal to 1e-6 at N = {big['n']}: {verdict}")
    lay = layout_comparison(sizes[-1])
    print(
        f"normal equations for {sizes[-1]} gathers: padded {lay['padded'] * 1e3:.2f} ms, "
        f"bincount {lay['bincount'] * 1e3:.2f} ms"
    )
    if not args.no_append:
        lines = [
            "",
            f"## Inversion: batched engine vs scipy.optimize.least_squares loop ({time.strftime('%Y-%m-%d %H:%M %Z')})",
            "",
            f"`python benchmarks/bench_inversion.py{' --quick' if args.quick else ''}` on {machine()}; "
            f"load average {load0} at the start and {load1} at the end (other jobs on the machine "
            "slow both sides).",
            f"{NPICK} picks per gather, loss {settings.robust_loss}, f_scale {settings.robust_scale}, "
            "no rejection, same model, parametrisation, analytic Jacobian and start; scipy `trf` with "
            "ftol = xtol = gtol = 1e-12; OPENBLAS_NUM_THREADS = "
            f"{os.environ.get('OPENBLAS_NUM_THREADS')}. Batched times are the best of 3 runs, with "
            f"{lm.worker_count()} threads and with 1 thread; scipy's loop runs once.",
            "",
            "| N gathers | batched (s) | batched, 1 thread (s) | scipy loop (s) | speed-up "
            "| speed-up, 1 thread | CPU-time speed-up, 1 thread | max rel. parameter difference |",
            "|---:|---:|---:|---:|---:|---:|---:|---:|",
        ]
        lines += [
            f"| {r['n']} | {r['ours']:.3f} | {r['ours_1']:.3f} | {r['scipy']:.2f} | {r['ratio']:.0f}x "
            f"| {r['ratio_1']:.0f}x | {r['ratio_cpu']:.0f}x ({r['cpu_scipy']:.2f} s / {r['cpu_1']:.3f} s) "
            f"| {r['diff']:.1e} |"
            for r in rows
        ]
        lines += [
            "",
            f"Target >= 50x (wall clock) at {big['n']} gathers with parameters equal to 1e-6: {verdict} "
            f"in this run ({big['ratio']:.0f}x with {lm.worker_count()} threads, {big['ratio_1']:.0f}x with "
            f"1 thread; {big['ratio_cpu']:.0f}x in processor time).",
            "",
            f"Normal equations J^T W J for {sizes[-1]} gathers: padded (g, nmax) "
            f"{lay['padded'] * 1e3:.2f} ms, bincount segment sums {lay['bincount'] * 1e3:.2f} ms.",
            "",
        ]
        path = ROOT / "benchmarks" / "RESULTS.md"
        with open(path, "a", encoding="utf-8") as fh:
            if path.stat().st_size == 0:
                fh.write("# Benchmark results\n")
            fh.write("\n".join(lines))
        print(f"appended to {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
