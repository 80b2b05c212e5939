"""Reflection traveltime tomography (core.tomography.invert_reflector): time and memory.

Run from the repository root::

    python benchmarks/bench_tomography.py [--quick] [--no-append]

Cases (each in its own child process, so that the peak resident memory,
``ru_maxrss``, belongs to that case alone):

* ``small``: a buried valley under 4 crossing lines, ~2,700 picks, 45 x 45
  nodes (the test-suite survey);
* ``large``: 24 lines (12 east-west, 12 north-south) over an invented site
  with two buried valleys and a regional slope, ~100,000 picks, 200 x 200
  nodes at 5 m (``--quick``: 6 lines, ~9,000 picks, 100 x 100 nodes).

Times are Fermat times on the true surface plus 0.3 ms Gaussian noise and
2 % mispicks; the inversion starts from a flat surface and a velocity 5 % too
high. Printed and appended to benchmarks/RESULTS.md: picks, nodes, iterations,
wall time (total and posterior-sigma part), peak memory, velocity error and
rms elevation error over the constrained nodes, with cores, memory and versions.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


from _common import import_package, load_average, machine  # noqa: E402

import_package()

from rockhead.core.tomography import joint as tm  # noqa: E402

V_TRUE = 1800.0


def _site(kind: str, quick: bool):
    """Grid, true node elevations, ground function and station lines of a case."""
    if kind == "small":
        grid = tm.NodeGrid(-110.0, -110.0, 5.0, 45, 45)

        def reflector(x, y):
            return 72.0 - 0.01 * y - 8.0 * np.exp(-(x**2) / (2 * 20.0**2))

        s = np.arange(-100.0, 100.01, 2.0)
        lines = [
            np.column_stack([s, np.full_like(s, -25.0)]),
            np.column_stack([s, np.full_like(s, 30.0)]),
            np.column_stack([np.zeros_like(s), s]),
            np.column_stack([np.full_like(s, 45.0), s]),
        ]
        step = 4
    else:
        n = 100 if quick else 200
        grid = tm.NodeGrid(0.0, 0.0, 5.0, n, n)
        size = 5.0 * (n - 1)

        def reflector(x, y):
            valley1 = 9.0 * np.exp(-(((x - 0.35 * size) + 0.2 * (y - 0.5 * size)) ** 2) / (2 * 25.0**2))
            valley2 = 6.0 * np.exp(-((y - 0.7 * size) ** 2) / (2 * 30.0**2))
            return 70.0 - 0.01 * x + 0.005 * y - valley1 - valley2

        n_lines = 3 if quick else 12
        pos = np.linspace(0.08 * size, 0.92 * size, n_lines)
        s = np.arange(0.05 * size, 0.95 * size, 4.0)
        lines = [np.column_stack([s, np.full_like(s, p)]) for p in pos]
        lines += [np.column_stack([np.full_like(s, p), s]) for p in pos]
        step = 2
    return grid, reflector, lines, step


def _ground(x, y):
    return 100.0 + 0.01 * x + 1.5 * np.sin(y / 40.0)


def _survey(kind: str, quick: bool, rng):
    grid, reflector, lines, step = _site(kind, quick)
    X, Y = np.meshgrid(grid.x_m, grid.y_m)
    z_true = reflector(X, Y)
    src, rec = [], []
    for st in lines:
        xyz = np.column_stack([st, _ground(st[:, 0], st[:, 1])])
        for i in range(24, len(st) - 24, step):
            idx = np.r_[i - 24 : i, i + 1 : i + 25]
            src.append(np.repeat(xyz[i][None], 48, 0))
            rec.append(xyz[idx])
    S, R = np.concatenate(src), np.concatenate(rec)
    t = tm.fermat_traveltime(S, R, z_true, grid, V_TRUE).time_s
    t = t + rng.normal(0.0, 0.3e-3, len(t))
    bad = rng.random(len(t)) < 0.02
    t[bad] += rng.choice([-1.0, 1.0], bad.sum()) * rng.uniform(3e-3, 8e-3, bad.sum())
    return grid, z_true, S, R, t


class _Timer:
    """Progress sink that records when the posterior step starts."""

    def __init__(self):
        self.t_sigma = None

    def set_progress(self, percent):
        pass

    def is_canceled(self):
        return False

    def info(self, message):
        if "posterior" in message:
            self.t_sigma = time.perf_counter()


def run_case(kind: str, quick: bool) -> dict:
    rng = np.random.default_rng(2026)
    grid, z_true, S, R, t = _survey(kind, quick, rng)
    start = np.full(grid.shape, float(np.median(z_true)))
    timer = _Timer()
    t0 = time.perf_counter()
    res = tm.invert_reflector(S, R, t, np.full(len(t), 0.3e-3), grid, start, 1.05 * V_TRUE, progress=timer)
    t1 = time.perf_counter()
    m = res.mask
    rms = float(np.sqrt(np.mean((res.elevation_m[m] - z_true[m]) ** 2)))
    return {
        "case": kind,
        "picks": len(t),
        "nodes": f"{grid.nx} x {grid.ny}",
        "iterations": int(res.iterations),
        "converged": bool(res.converged),
        "seconds": round(t1 - t0, 1),
        "sigma_seconds": round(t1 - timer.t_sigma, 1) if timer.t_sigma else float("nan"),
        "peak_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0, 0),
        "velocity_error_pct": round(100 * (res.velocity_m_s / V_TRUE - 1), 3),
        "sigma_velocity_m_s": round(res.sigma_velocity_m_s, 2),
        "rms_elevation_error_m": round(rms, 3),
        "constrained_nodes": int(m.sum()),
    }


def _machine() -> str:
    threads = os.environ.get("OPENBLAS_NUM_THREADS") or os.environ.get("OMP_NUM_THREADS")
    extra = f", BLAS threads {threads}" if threads else ""
    return f"{machine()}; load average {load_average().split()[0]} at the start{extra}"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller large case (100 x 100 nodes)")
    ap.add_argument("--no-append", action="store_true", help="do not append to benchmarks/RESULTS.md")
    ap.add_argument("--case", choices=["small", "large"], help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_case(args.case, args.quick)))
        return 0
    machine = _machine()
    rows = []
    for kind in ("small", "large"):
        cmd = [sys.executable, str(Path(__file__).resolve()), "--case", kind]
        cmd += ["--quick"] if args.quick else []
        out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
        rows.append(json.loads(out.strip().splitlines()[-1]))
        print(rows[-1], flush=True)
    head = (
        "| case | picks | nodes | iterations | time (s) | of which sigma (s) | peak RSS (MiB) "
        "| V error (%) | sigma V (m/s) | rms elevation error (m) | constrained nodes |"
    )
    lines = [head, "|" + "---|" * 11]
    for r in rows:
        lines.append(
            f"| {r['case']} | {r['picks']} | {r['nodes']} "
            f"| {r['iterations']}{'' if r['converged'] else ' (max)'} "
            f"| {r['seconds']} | {r['sigma_seconds']} | {r['peak_rss_mib']:.0f} | {r['velocity_error_pct']} "
            f"| {r['sigma_velocity_m_s']} | {r['rms_elevation_error_m']} | {r['constrained_nodes']} |"
        )
    table = "\n".join(lines)
    print(machine)
    print(table)
    if not args.no_append:
        path = ROOT / "benchmarks" / "RESULTS.md"
        stamp = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
        text = (
            f"\n## Reflection traveltime tomography ({stamp}{', --quick' if args.quick else ''})\n\n"
            f"`python benchmarks/bench_tomography.py{' --quick' if args.quick else ''}` on {machine}.\n"
            "Joint inversion of all picks (core.tomography.invert_reflector) from a flat start "
            "and a velocity 5 % too high; 0.3 ms noise, 2 % mispicks; each case in its own process "
            "(peak RSS of that process).\n\n" + table + "\n"
        )
        with open(path, "a", encoding="utf-8") as fh:
            fh.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
