"""Ordinary kriging: core.surface against PyKrige (and GSTools) on the same data and model.

Cases (N scattered points onto a square grid):

* local neighbourhood, k = 32: ours (batched solves) vs PyKrige
  ``OrdinaryKriging.execute("grid"/"points", backend="loop", n_closest_points=32)``.
  PyKrige's moving window solves one system per cell in a Python loop, so it
  is timed on a random subset of cells and its time scaled to the whole grid
  (the table says so); ours always runs on the whole grid. Differences are
  measured on that subset.
* global neighbourhood (small N): ours (neighbours=None, one LU factorisation)
  vs PyKrige's ``backend="vectorized"`` and GSTools ``krige.Ordinary``
  (``exact=True, pseudo_inv=False``), on the whole grid.

The variogram is spherical with nugget 0.01, partial sill 1 and range 300 m
(in PyKrige's and GSTools' own conventions: same range for the spherical
model; GSTools' ``len_scale`` is the spherical range). The result is appended
to benchmarks/RESULTS.md.

Usage: python benchmarks/bench_kriging.py [--quick] [--no-append]
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import platform
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


from _common import load_average as _load  # noqa: E402
from _common import memory_gib as _meminfo_gib  # noqa: E402


def _import_package():
    from _common import import_package

    import_package()
    from rockhead.core.grid import GridSpec
    from rockhead.core.surface.kriging import OrdinaryKriging
    from rockhead.core.surface.variogram import VariogramModel

    return GridSpec, OrdinaryKriging, VariogramModel


def _data(n, seed=1, size=1000.0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, size, n)
    y = rng.uniform(0.0, size, n)
    z = 30.0 + np.sin(x / 150.0) + np.cos(y / 200.0) + 0.1 * rng.standard_normal(n)
    return x, y, z


def _best(fn, repeat):
    best = np.inf
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def run(quick=False, append=True):
    GridSpec, OrdinaryKriging, VariogramModel = _import_package()
    import pykrige
    from pykrige.ok import OrdinaryKriging as PyKrigeOK

    try:
        import gstools as gs
    except ImportError:
        gs = None

    vario = VariogramModel("spherical", nugget=0.01, sill=1.0, range_m=300.0)
    pk_params = {"psill": vario.sill, "range": vario.range_m, "nugget": vario.nugget}
    k = 32
    if quick:
        local_cases = [(1000, 100, 1000)]
        global_cases = [(300, 60)]
    else:
        # (N points, grid side, PyKrige subset of cells)
        local_cases = [(1000, 250, 4000), (5000, 250, 4000), (10000, 250, 4000)]
        global_cases = [(500, 100), (2000, 100)]
    rows = []
    start_load = _load()
    for n, side, subset in local_cases:
        x, y, z = _data(n)
        spec = GridSpec(x0=2.0, y0=998.0, cell_size_m=996.0 / (side - 1), nx=side, ny=side)
        gx, gy = spec.coords()
        ours = OrdinaryKriging(vario, neighbours=k)

        def our_run(ours=ours, x=x, y=y, z=z, spec=spec):
            ours.fit(x, y, z)
            return ours.grid(spec)

        t_ours, grid = _best(our_run, 2)
        rng = np.random.default_rng(5)
        pick = rng.choice(spec.size, min(subset, spec.size), replace=False)
        pk = PyKrigeOK(x, y, z, variogram_model="spherical", variogram_parameters=pk_params)
        t0 = time.perf_counter()
        pe, pv = pk.execute("points", gx.ravel()[pick], gy.ravel()[pick], backend="loop", n_closest_points=k)
        t_sub = time.perf_counter() - t0
        t_pk = t_sub * spec.size / pick.size
        de = np.max(np.abs(grid.z.ravel()[pick] - np.asarray(pe)))
        dv = np.max(np.abs(grid.std.ravel()[pick] ** 2 - np.asarray(pv)))
        rows.append(
            (
                n,
                spec.size,
                f"PyKrige loop, n_closest_points={k}",
                f"{t_ours:.2f}",
                f"{t_pk:.1f} (scaled from {pick.size} cells)",
                t_pk / t_ours,
                de,
                dv,
            )
        )
        print(rows[-1], flush=True)
    for n, side in global_cases:
        x, y, z = _data(n)
        spec = GridSpec(x0=2.0, y0=998.0, cell_size_m=996.0 / (side - 1), nx=side, ny=side)
        gx, gy = spec.coords()
        ours = OrdinaryKriging(vario, neighbours=None)

        def our_run(ours=ours, x=x, y=y, z=z, spec=spec):
            ours.fit(x, y, z)
            return ours.grid(spec)

        t_ours, grid = _best(our_run, 2)
        pk = PyKrigeOK(x, y, z, variogram_model="spherical", variogram_parameters=pk_params)
        t_pk, (pe, pv) = _best(
            lambda pk=pk, spec=spec: pk.execute("grid", spec.x_centres, spec.y_centres[::-1], backend="vectorized"), 1
        )
        pe = np.asarray(pe)[::-1]  # PyKrige's grid rows go south to north
        pv = np.asarray(pv)[::-1]
        rows.append(
            (
                n,
                spec.size,
                "PyKrige vectorized (global)",
                f"{t_ours:.2f}",
                f"{t_pk:.2f}",
                t_pk / t_ours,
                np.max(np.abs(grid.z - pe)),
                np.max(np.abs(grid.std**2 - pv)),
            )
        )
        print(rows[-1], flush=True)
        if gs is not None:
            model = gs.Spherical(dim=2, var=vario.sill, len_scale=vario.range_m, nugget=vario.nugget)

            def gs_run(model=model, x=x, y=y, z=z, gx=gx, gy=gy):
                kr = gs.krige.Ordinary(model, (x, y), z, exact=True, pseudo_inv=False)
                return kr((gx.ravel(), gy.ravel()), return_var=True)

            t_gs, (ge, gv) = _best(gs_run, 1)
            rows.append(
                (
                    n,
                    spec.size,
                    "GSTools krige.Ordinary (global)",
                    f"{t_ours:.2f}",
                    f"{t_gs:.2f}",
                    t_gs / t_ours,
                    np.max(np.abs(grid.z.ravel() - ge)),
                    np.max(np.abs(grid.std.ravel() ** 2 - gv)),
                )
            )
            print(rows[-1], flush=True)
    end_load = _load()
    header = (
        "| N points | cells | peer | ours (s) | peer (s) | speed-up | max abs diff estimate (m) "
        "| max abs diff variance (m^2) |\n|---:|---:|---|---:|---:|---:|---:|---:|"
    )
    lines = [header]
    for n, cells, peer, t1, t2, ratio, de, dv in rows:
        lines.append(f"| {n} | {cells} | {peer} | {t1} | {t2} | {ratio:.0f}x | {de:.1e} | {dv:.1e} |")
    table = "\n".join(lines)
    import scipy

    versions = (
        f"Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"pykrige {pykrige.__version__}" + (f", gstools {gs.__version__}" if gs else "")
    )
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    text = (
        f"\n## Ordinary kriging vs PyKrige / GSTools ({now})\n\n"
        f"`python benchmarks/bench_kriging.py{' --quick' if quick else ''}` on {platform.machine()}, "
        f"{os.cpu_count()} cores, {_meminfo_gib():.1f} GiB RAM; {versions}; load average "
        f"{start_load} at the start and {end_load} at the end (other jobs share the machine).\n"
        "Spherical variogram (nugget 0.01, partial sill 1, range 300 m), N random points on 1 km^2, "
        "cell centres on a square grid. Ours: `OrdinaryKriging(...).fit().grid()` including the KD-tree, "
        "best of 2 runs, 2 worker threads with BLAS on one thread. PyKrige's moving window runs one "
        "Python-loop solve per cell, so it was timed on a random subset of cells and scaled to the "
        "whole grid (differences are over that subset); the global rows compare whole grids.\n\n"
        f"{table}\n"
    )
    print(text)
    if append:
        with open(HERE / "RESULTS.md", "a", encoding="utf-8") as f:
            f.write(text)
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small cases only (about 10 s)")
    ap.add_argument("--no-append", action="store_true", help="do not append to benchmarks/RESULTS.md")
    args = ap.parse_args(argv)
    run(quick=args.quick, append=not args.no_append)


if __name__ == "__main__":
    main()
