"""How the kriging surface scales: 10^4 .. 10^6 points onto 10^4 .. 10^6 cells.

Each case runs in its own Python process (so its peak resident memory,
``resource.getrusage(RUSAGE_SELF).ru_maxrss``, is that case's alone) and times
the stages of ``core.surface.gridding.interpolate_surface``:

* variogram: experimental variogram (5000-point subsample), fit of three
  models, choice by leave-one-out log score on 2000 points;
* fit: ``OrdinaryKriging.fit`` (checks, KD-tree);
* cross-validation: leave-one-out on at most 20 000 data;
* grid: k = 32 kriging of every cell (no mask), estimate and std.

Points are uniform on a square whose side grows with sqrt(N) (constant
density, 1 point per 100 m^2), values a smooth surface plus 0.3 m noise with
sigma = 0.3 m. The growth exponent is the log-log slope of the grid time
against the number of cells (at fixed N) and against N (at fixed cells).

Usage: python benchmarks/bench_scale.py [--quick] [--no-append]
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


from _common import load_average  # noqa: E402


def _import_package():
    from _common import import_package

    import_package()
    from rockhead.core.grid import GridSpec
    from rockhead.core.surface.kriging import OrdinaryKriging, choose_variogram

    return GridSpec, OrdinaryKriging, choose_variogram


def _rss_mib():
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def child(n_points, n_cells):
    GridSpec, OrdinaryKriging, choose_variogram = _import_package()
    rng = np.random.default_rng(3)
    side_m = 10.0 * np.sqrt(n_points)
    x = rng.uniform(0.0, side_m, n_points)
    y = rng.uniform(0.0, side_m, n_points)
    z = (
        100.0
        + 8.0 * np.sin(x / (0.21 * side_m))
        + 5.0 * np.cos(y / (0.17 * side_m))
        + 0.3 * rng.standard_normal(n_points)
    )
    e = np.full(n_points, 0.09)
    nside = round(float(np.sqrt(n_cells)))
    cell = side_m / nside
    spec = GridSpec(x0=cell / 2, y0=side_m - cell / 2, cell_size_m=cell, nx=nside, ny=nside)
    base = _rss_mib()
    out = {"n_points": n_points, "n_cells": spec.size, "base_rss_mib": base}
    t = time.perf_counter()
    vario, _ = choose_variogram(x, y, z, e, "auto", neighbours=32)
    out["t_variogram"] = time.perf_counter() - t
    out["model"] = vario.model
    t = time.perf_counter()
    ok = OrdinaryKriging(vario, neighbours=32).fit(x, y, z, e)
    out["t_fit"] = time.perf_counter() - t
    t = time.perf_counter()
    cv = ok.cross_validate(max_points=20000)
    out["t_cv"] = time.perf_counter() - t
    out["msse"] = cv.mean_standardised_squared_error
    t = time.perf_counter()
    grid = ok.grid(spec)
    out["t_grid"] = time.perf_counter() - t
    out["finite"] = bool(np.all(np.isfinite(grid.z)))
    out["peak_rss_mib"] = _rss_mib()
    print(json.dumps(out))


def _slope(xs, ys):
    xs, ys = np.log(np.asarray(xs, float)), np.log(np.asarray(ys, float))
    if len(xs) < 2:
        return float("nan")
    return float(np.polyfit(xs, ys, 1)[0])


def run(quick=False, append=True):
    sizes = [10_000, 100_000] if quick else [10_000, 100_000, 1_000_000]
    cases = [(n, m) for n in sizes for m in sizes]
    load0 = load_average()
    results = []
    for n, m in cases:
        proc = subprocess.run(
            [sys.executable, __file__, "--child", str(n), str(m)], capture_output=True, text=True, check=False
        )
        if proc.returncode != 0:
            print(proc.stderr, file=sys.stderr)
            raise SystemExit(f"case N={n} cells={m} failed")
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        r["t_total"] = r["t_variogram"] + r["t_fit"] + r["t_cv"] + r["t_grid"]
        results.append(r)
        print(
            f"N={n:>8} cells={r['n_cells']:>8}  variogram {r['t_variogram']:.1f}s fit {r['t_fit']:.1f}s "
            f"cv {r['t_cv']:.1f}s grid {r['t_grid']:.1f}s  peak {r['peak_rss_mib']:.0f} MiB "
            f"({r['model']}, MSSE {r['msse']:.2f})",
            flush=True,
        )
    load1 = load_average()
    lines = [
        "| N points | cells | model chosen | variogram (s) | fit (s) | cross-val. (s) | grid (s) "
        "| grid us/cell | total (s) | RSS before (MiB) | peak RSS (MiB) | LOO MSSE |",
        "|---:|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in results:
        lines.append(
            f"| {r['n_points']} | {r['n_cells']} | {r['model']} | {r['t_variogram']:.2f} | {r['t_fit']:.2f} | "
            f"{r['t_cv']:.2f} | {r['t_grid']:.2f} | {1e6 * r['t_grid'] / r['n_cells']:.1f} | "
            f"{r['t_total']:.2f} | {r['base_rss_mib']:.0f} | {r['peak_rss_mib']:.0f} | {r['msse']:.2f} |"
        )
    slopes = []

    def col(rs, key):
        return [r[key] for r in rs]

    for n in sizes:
        rs = [r for r in results if r["n_points"] == n]
        slopes.append(f"grid time vs cells at N={n}: {_slope(col(rs, 'n_cells'), col(rs, 't_grid')):.2f}")
    for m in sizes:
        rs = [r for r in results if abs(r["n_cells"] - m) / m < 0.01]
        slopes.append(f"grid time vs N at {m} cells: {_slope(col(rs, 'n_points'), col(rs, 't_grid')):.2f}")
        slopes.append(f"total time vs N at {m} cells: {_slope(col(rs, 'n_points'), col(rs, 't_total')):.2f}")
    import scipy

    big = [r for r in results if r["n_points"] == 1_000_000 and r["n_cells"] >= 990_000]
    verdict = ""
    if big:
        b = big[0]
        ok = b["peak_rss_mib"] < 4096
        verdict = (
            f"Target (1e6 points onto 1e6 cells under 4 GiB peak): peak {b['peak_rss_mib']:.0f} MiB, "
            f"{'met' if ok else 'MISSED'}; total {b['t_total']:.0f} s.\n"
        )
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    text = (
        f"\n## Kriging scale, 10^4..10^6 points and cells ({now})\n\n"
        f"`python benchmarks/bench_scale.py{' --quick' if quick else ''}` on {platform.machine()}, "
        f"{os.cpu_count()} cores; Python {platform.python_version()}, numpy {np.__version__}, "
        f"scipy {scipy.__version__}; load average {load0} at the start and {load1} at the end "
        "(other jobs share the machine, so times are inflated and noisy).\n"
        "Each case in its own process; peak RSS of that process, and its RSS before the work (interpreter, "
        "numpy/scipy, the data and the grid spec). k = 32 neighbours, 2 worker threads with BLAS "
        "on one thread; variogram = experimental (5000-point subsample) + three fits + choice by "
        "leave-one-out log score on 2000 points; cross-validation on at most 20 000 points.\n\n"
        + "\n".join(lines)
        + "\n\nGrowth exponents (log-log slopes; 1 = linear): "
        + "; ".join(slopes)
        + ".\n"
        + verdict
    )
    print(text)
    if append:
        with open(HERE / "RESULTS.md", "a", encoding="utf-8") as f:
            f.write(text)
    return results


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        child(int(argv[1]), int(argv[2]))
        return
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="10^4 and 10^5 only")
    ap.add_argument("--no-append", action="store_true", help="do not append to benchmarks/RESULTS.md")
    args = ap.parse_args(argv)
    run(quick=args.quick, append=not args.no_append)


if __name__ == "__main__":
    main()
