"""Joint estimate of a layered overburden (core.tomography.layered.estimate_layered): time and memory.

Run from the repository root::

    python benchmarks/bench_layered.py [--quick] [--no-append] [--case NAME]

Cases (each in its own child process, so that the peak resident memory,
``ru_maxrss``, belongs to that case alone):

* ``sample``: the sample project (one reflector, 2,688 picks): the joint
  estimate alone, and the whole computation (fits, relocation, kriging, the
  joint estimate as a cross-check, products);
* ``site``: the four-line layered test site (tests/data/layered_site, made by
  fast marching: water table and bedrock, 2,185 picks), the same two timings;
* ``large``: 100,000 picks on two interfaces: an invented 16-line site
  (8 east-west, 8 north-south, 400 m square) with dry sand rising in velocity
  with depth over a water table and saturated sediment over a dipping bedrock
  with a knoll; a shot every 2nd station, water-table picks to 30 m and bedrock
  picks to 72 m offset; times by the project's ray tracer plus 0.3/0.5 ms noise;
  the joint estimate alone from a start 2-3 % off, given each pick's line as a survey run gives
  it (so the sills' leave-one-line-out check runs) (``--quick``: 4 lines, ~26,000 picks).

Printed and appended to benchmarks/RESULTS.md with the machine's cores,
memory, load and library versions: picks, node grid, Gauss-Newton
iterations, wall time, peak memory and the bedrock error against the truth.
Targets of the issue: sample <= 2 s, layered site <= 10 s, 100,000 picks <= 60 s.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from _common import import_package, load_average, machine  # noqa: E402

import_package()


def _timed_compute(toml):
    from rockhead.core import workflow
    from rockhead.core.survey.config import load_survey

    captured = {}
    original = workflow.estimate_layered

    def timed(*a, **k):
        t0, c0 = time.perf_counter(), time.process_time()
        res = original(*a, **k)
        captured["estimate_s"] = time.perf_counter() - t0
        captured["cpu_s"] = time.process_time() - c0
        captured["result"] = res
        return res

    workflow.estimate_layered = timed
    survey = load_survey(toml)
    t0 = time.perf_counter()
    r = workflow.compute(survey, method="auto")
    total = time.perf_counter() - t0
    res = captured["result"]
    return r, res, (captured["estimate_s"], captured["cpu_s"]), total


def case_sample(quick):
    import importlib.util

    r, res, est, total = _timed_compute(ROOT / "sample_project" / "survey.toml")
    spec = importlib.util.spec_from_file_location("ms", ROOT / "sample_project" / "make_sample.py")
    ms = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(ms)
    X, Y = r.spec.coords()
    k = res.index(res.names[-1])
    err = res.elevation_m[k] - ms.reflector_elevation(X, Y)
    return _row("sample", res, est, total, err)


def case_site(quick):
    from scipy.interpolate import RegularGridInterpolator

    site = ROOT / "tests" / "data" / "layered_site"
    r, res, est, total = _timed_compute(site / "survey.toml")
    grid = json.loads((site / "truth.json").read_text(encoding="utf-8"))["truth_grid"]
    xs = grid["x_west_m"] + grid["cell_m"] * (np.arange(grid["ncols"]) + 0.5)
    ys = grid["y_north_m"] - grid["cell_m"] * (np.arange(grid["nrows"]) + 0.5)
    rock = np.load(site / "truth_grids.npz")["rock_mm"] / 1000.0
    f = RegularGridInterpolator((ys[::-1], xs), rock[::-1], bounds_error=False)
    X, Y = r.spec.coords()
    err = res.elevation_m[res.index("rock")] - f(np.column_stack([Y.ravel(), X.ravel()])).reshape(X.shape)
    return _row("site", res, est, total, err)


def case_large(quick):
    from rockhead.core.grid import GridSpec
    from rockhead.core.tomography.layered import estimate_layered
    from rockhead.core.tomography.raypath import LayeredModel, trace_reflections
    from rockhead.core.tomography.start import StartModel

    rng = np.random.default_rng(42)

    def ground(x, y):
        return 100.0 + 0.01 * x + 0.02 * y

    def wt(x, y):
        return ground(x, y) - 5.0 - 0.4 * np.sin(x / 60.0) * np.cos(y / 80.0)

    def rock(x, y):
        return 72.0 - 0.08 * x + 0.03 * y + 3.0 * np.exp(-((x - 40) ** 2 + (y + 30) ** 2) / 45.0**2)

    tg = GridSpec(-230.0, 230.0, 2.0, 231, 231)
    X, Y = tg.coords()
    # layer 1: 560 m/s + 22 (m/s)/m below the ground (a plane, so linear in x, y, z); layer 2: lateral
    theta = np.array([[560.0 + 22.0 * 100.0, 22.0 * 0.01, 22.0 * 0.02, -22.0], [1600.0, 0.2, -0.1, 0.0]])
    truth = LayeredModel(tg, np.stack([wt(X, Y), rock(X, Y)]), theta, np.zeros((2, 3)), ("wt", "rock"))
    n_lines = 4 if quick else 16
    pos = np.linspace(-180.0, 180.0, n_lines // 2)
    s = np.arange(-200.0, 200.01, 2.5)
    lines = [np.column_stack([s, np.full_like(s, p)]) for p in pos] + [
        np.column_stack([np.full_like(s, p), s]) for p in pos
    ]
    S, R, K, L = [], [], [], []
    for j, xy in enumerate(lines):
        xyz = np.column_stack([xy, ground(xy[:, 0], xy[:, 1])])
        for i in range(0, len(xy), 2):
            off = np.abs(s - s[i])
            for k, max_off in ((0, 30.0), (1, 72.0)):  # water table: short offsets only (rays bend up)
                idx = np.flatnonzero((off > 2.0) & (off <= max_off))
                S.append(np.repeat(xyz[i][None], idx.size, 0))
                R.append(xyz[idx])
                K.append(np.full(idx.size, k))
                L.append(np.full(idx.size, j))
    SS, RR, k, line = np.concatenate(S), np.concatenate(R), np.concatenate(K), np.concatenate(L)
    t0 = time.perf_counter()
    p = trace_reflections(truth, SS, RR, k)
    gen_s = time.perf_counter() - t0
    ok = p.valid
    SS, RR, k, line = SS[ok], RR[ok], k[ok], line[ok]
    sigma = np.where(k == 0, 0.3e-3, 0.5e-3)
    t = p.time_s[ok] + rng.normal(0.0, 1.0, ok.sum()) * sigma
    names = np.array(["wt", "rock"])[k]
    mids = 0.5 * (SS[::40, :2] + RR[::40, :2])
    pts = []
    for f, bias in ((wt, 0.1), (rock, -0.6)):
        z = f(mids[:, 0], mids[:, 1]) + bias + rng.normal(0.0, 0.3, len(mids))
        pts.append((mids[:, 0], mids[:, 1], z, np.full(len(mids), 0.3)))
    start = StartModel(
        ("wt", "rock"), tuple(pts), np.array([630.0, 1560.0]), np.full(2, 20.0), np.full(2, 30), np.ones(2)
    )
    spec = GridSpec(-210.0, 210.0, 5.0, 85, 85)
    t0, c0 = time.perf_counter(), time.process_time()
    # the lines given, as a survey run gives them: the sills' leave-one-line-out check runs
    res = estimate_layered(SS, RR, t, sigma, names, start, spec, line=line)
    est = (time.perf_counter() - t0, time.process_time() - c0)
    Xs, Ys = spec.coords()
    err = res.elevation_m[1] - rock(Xs, Ys)
    row = _row("large", res, est, float("nan"), err)
    row["generate_s"] = gen_s
    return row


def _row(name, res, est, total, err):
    ok = np.isfinite(err)
    return {
        "case": name,
        "picks": int(np.sum(res.interface >= 0)),
        "interfaces": len(res.names),
        "nodes": f"{res.node_spec.nx} x {res.node_spec.ny} at {res.node_spec.cell_size_m:g} m",
        "iterations": res.iterations,
        "estimate_s": est[0],
        "cpu_s": est[1],
        "compute_s": total,
        "rms_m": float(np.sqrt(np.mean(err[ok] ** 2))),
        "mean_m": float(np.mean(err[ok])),
        "models": ", ".join(layer.complexity for layer in res.layers),
    }


CASES = {"sample": case_sample, "site": case_site, "large": case_large}


def _child(name, quick):
    row = CASES[name](quick)
    row["peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print("RESULT " + json.dumps(row))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="a smaller large case (4 lines)")
    ap.add_argument("--no-append", action="store_true", help="print only, do not touch RESULTS.md")
    ap.add_argument("--case", choices=sorted(CASES), help="run one case only")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        _child(args.child, args.quick)
        return
    start_load = load_average()
    rows = []
    for name in [args.case] if args.case else list(CASES):
        cmd = [sys.executable, __file__, "--child", name] + (["--quick"] if args.quick else [])
        out = subprocess.run(cmd, capture_output=True, text=True, check=True, env=dict(os.environ))
        line = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")][-1]
        rows.append(json.loads(line[7:]))
    head = (
        "| case | picks | interfaces | nodes | iterations | joint estimate, wall (s) | its CPU time (s) | "
        "whole computation, wall (s) | peak RSS (MiB) | bedrock rms (m) | bedrock mean (m) | velocity models |\n"
        "|---|---:|---:|---|---:|---:|---:|---:|---:|---:|---:|---|\n"
    )
    body = "".join(
        f"| {r['case']} | {r['picks']} | {r['interfaces']} | {r['nodes']} | {r['iterations']} | "
        f"{r['estimate_s']:.1f} | {r['cpu_s']:.1f} | "
        f"{'' if math.isnan(r['compute_s']) else format(r['compute_s'], '.1f')} | "
        f"{r['peak_mib']:.0f} | {r['rms_m']:.3f} | {r['mean_m']:+.3f} | {r['models']} |\n"
        for r in rows
    )
    info = f"{machine()}; load average {start_load} at the start and {load_average()} at the end"
    print(info)
    print(head + body)
    if not args.no_append:
        stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        with open(HERE / "RESULTS.md", "a", encoding="utf-8") as fh:
            fh.write(
                f"\n## Joint estimate of a layered overburden ({stamp}{', --quick' if args.quick else ''})\n\n"
                f"`python benchmarks/bench_layered.py{' --quick' if args.quick else ''}` on {info}.\n"
                "Targets of the issue: sample <= 2 s, layered site <= 10 s, 100,000 picks on two interfaces "
                "<= 60 s (the joint estimate). Each case in its own process; BLAS on one thread. The CPU time "
                "of the estimate is what its wall time is on an otherwise idle machine (other jobs shared the "
                "two cores). The large case's data: the project's ray tracer through an invented 16-line site; "
                "it starts 2-3 % off in velocity.\n\n" + head + body
            )


if __name__ == "__main__":
    main()
