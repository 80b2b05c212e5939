"""How large a survey the whole job runs: time and peak memory of ``rockhead run`` by number of picks.

An invented site of parallel lines (east-west) and a few crossing lines
(north-south) over a gently dipping plane reflector 20-30 m deep, one
homogeneous overburden (1800 m/s), times from the exact image-source model
(``core.seismic.forward.image_source_traveltime``) plus 0.3 ms noise. Stations
2 m apart, a shot every 4 m, 48 receivers split about each shot. The survey is
written as CSV files and run by the command line in a child process, limited
to ``--memory-gib`` of address space (``ulimit -v``, the memory bound of the
brief) and ``--timeout-s`` of wall time; its processor time and peak resident
memory are that child's own (``os.wait4``), its wall time is printed beside
the machine's load average (other jobs share the cores).

Usage::

    python benchmarks/bench_survey_size.py [--picks 100000 500000 990000 2000000] [--memory-gib 8]
        [--timeout-s 600] [--no-append] [--keep DIR]

Each size appends a row to benchmarks/RESULTS.md (unless ``--no-append``).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from _common import import_package, load_average, machine  # noqa: E402

SPACING_M = 2.0
SHOT_EVERY = 2  # stations
HALF_SPREAD = 24  # receivers each side
VELOCITY_M_S = 1800.0


def layout(n_picks: int):
    """Lines for about ``n_picks`` picks: (line names, start xy, direction, stations per line)."""
    picks_per_shot = 2 * HALF_SPREAD
    n_shots = max(n_picks // picks_per_shot, 20)
    stations = 200  # 400 m lines
    shots_per_line = (stations - 2 * HALF_SPREAD) // SHOT_EVERY
    n_lines = max(int(np.ceil(n_shots / shots_per_line)), 2)
    n_cross = max(n_lines // 8, 1)
    n_par = n_lines - n_cross
    lines = []
    for i in range(n_par):  # east-west, 20 m apart
        lines.append((f"E{i:04d}", np.array([0.0, 20.0 * i]), np.array([1.0, 0.0])))
    span = 20.0 * max(n_par - 1, 1)
    for j in range(n_cross):  # north-south, spread over the east-west lines' length
        x0 = 40.0 + (stations * SPACING_M - 80.0) * (j + 0.5) / n_cross
        lines.append((f"N{j:03d}", np.array([x0, -0.1 * span]), np.array([0.0, 1.0])))
    return lines, stations


def write_survey(folder: Path, n_picks: int, seed: int = 1) -> tuple[Path, int]:
    """Write the invented survey; returns (survey.toml, number of picks written)."""
    import_package()
    from rockhead.core.seismic import forward

    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    lines, n_st = layout(n_picks)
    normal = forward.plane_normal(3.0, 120.0)
    offset = forward.plane_through_point(np.array([200.0, 200.0, 75.0]), 3.0, 120.0)[1]
    st_rows, pk = [], []
    for name, start, u in lines:
        xy = start[None, :] + SPACING_M * np.arange(n_st)[:, None] * u[None, :]
        z = 100.0 + 0.01 * xy[:, 0] - 0.005 * xy[:, 1]
        st_rows.append((np.full(n_st, name), np.arange(1000, 1000 + n_st), xy, z))
        shots = np.arange(HALF_SPREAD, n_st - HALF_SPREAD, SHOT_EVERY)
        rec = shots[:, None] + np.r_[np.arange(-HALF_SPREAD, 0), np.arange(1, HALF_SPREAD + 1)][None, :]
        s_idx = np.repeat(shots, rec.shape[1])
        r_idx = rec.ravel()
        src = np.column_stack([xy[s_idx], z[s_idx]])
        rcv = np.column_stack([xy[r_idx], z[r_idx]])
        t = forward.image_source_traveltime(src, rcv, normal, offset, VELOCITY_M_S)
        t = t + rng.normal(0.0, 0.0003, len(t))
        pk.append((np.full(len(t), name), 1000 + s_idx, 1000 + r_idx, t * 1e3))
    with open(folder / "stations.csv", "w", encoding="utf-8") as fh:
        fh.write("line,station,x,y,z\n")
        for name, lab, xy, z in st_rows:
            fh.writelines(
                f"{a},{b},{500000 + x:.3f},{5500000 + y:.3f},{h:.3f}\n" for a, b, (x, y), h in zip(name, lab, xy, z)
            )
    n = 0
    with open(folder / "picks.csv", "w", encoding="utf-8") as fh:
        fh.write("line,shot,receiver,time_ms\n")
        for name, s, r, t in pk:
            fh.writelines(f"{a},{b},{c},{d:.3f}\n" for a, b, c, d in zip(name, s, r, t))
            n += len(t)
    (folder / "survey.toml").write_text(
        '[survey]\nname = "Invented size benchmark site"\ncrs = "EPSG:32633"\n'
        '[files]\nstations = "stations.csv"\npicks = "picks.csv"\n',
        encoding="utf-8",
    )
    return folder / "survey.toml", n


def run_one(toml: Path, out: Path, memory_gib: float, timeout_s: float) -> dict:
    """Run ``rockhead run`` in a child process; its own wall time, processor time and peak memory.

    The child's resource usage comes from ``os.wait4`` (that child alone,
    not every child so far); the load average is read before and after.
    """
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    link = Path(tempfile.mkdtemp(prefix="rh-size-"))
    os.symlink(ROOT, link / "rockhead")
    env["PYTHONPATH"] = str(link)
    limit = int(memory_gib * 2**30)

    def limit_memory():
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))

    load0 = load_average()
    t0 = time.perf_counter()
    with tempfile.TemporaryFile() as err_file:
        proc = subprocess.Popen(
            [sys.executable, "-m", "rockhead.core.cli", "run", str(toml), "--out", str(out)],
            stdout=subprocess.DEVNULL,
            stderr=err_file,
            env=env,
            preexec_fn=limit_memory,
        )
        code: object = None
        usage = None
        while code is None:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                code = os.waitstatus_to_exitcode(status)
                break
            if time.perf_counter() - t0 > timeout_s:
                proc.kill()
                _, _, usage = os.wait4(proc.pid, 0)
                code = "timeout"
                break
            time.sleep(0.2)
        proc.returncode = -1  # reaped above: keep Popen from waiting again
        wall = time.perf_counter() - t0
        err_file.seek(0)
        err = err_file.read().decode("utf-8", errors="replace")
    report = out / "report.html"
    files = sum(1 for p in out.rglob("*") if p.is_file()) if out.is_dir() else 0
    last = [ln for ln in err.splitlines() if ln.strip()][-1:] if err else []
    return {
        "code": code,
        "wall_s": wall,
        "cpu_s": (usage.ru_utime + usage.ru_stime) if usage is not None else float("nan"),
        "rss_gib": (usage.ru_maxrss / 2**20) if usage is not None else float("nan"),  # KiB -> GiB
        "files": files,
        "report_mib": report.stat().st_size / 2**20 if report.is_file() else float("nan"),
        "out_mib": sum(p.stat().st_size for p in out.rglob("*") if p.is_file()) / 2**20 if out.is_dir() else 0.0,
        "last": last[0] if last else "",
        "load": f"{load0} / {load_average()}",
        "stderr": err,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    # 990,000: the largest size under the default max_picks (1,000,000) once rounded up to whole lines
    ap.add_argument("--picks", type=int, nargs="+", default=[100_000, 500_000, 990_000, 2_000_000])
    ap.add_argument("--memory-gib", type=float, default=8.0)
    ap.add_argument("--timeout-s", type=float, default=600.0)
    ap.add_argument("--no-append", action="store_true")
    ap.add_argument("--keep", type=Path, default=None, help="write the surveys and outputs here (kept)")
    args = ap.parse_args()
    base = args.keep or Path(tempfile.mkdtemp(prefix="rh-size-"))
    rows = []
    for n in args.picks:
        t0 = time.perf_counter()
        toml, written = write_survey(base / f"survey_{n}", n)
        gen = time.perf_counter() - t0
        r = run_one(toml, base / f"out_{n}", args.memory_gib, args.timeout_s)
        rows.append((written, gen, r))
        print(
            f"{written:>9} picks: exit {r['code']}, wall {r['wall_s']:.0f} s, CPU {r['cpu_s']:.0f} s, peak "
            f"{r['rss_gib']:.2f} GiB, {r['files']} files ({r['out_mib']:.0f} MiB), report {r['report_mib']:.2f} MiB, "
            f"load {r['load']}; {r['last'][:160]}",
            flush=True,
        )
        (base / f"stderr_{n}.txt").write_text(r["stderr"], encoding="utf-8")
    if args.no_append:
        return
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    lines = [
        f"\n## Survey size: the whole job by number of picks ({stamp})\n",
        f"`python benchmarks/bench_survey_size.py` on {machine()}; load average {load_average()} at the end "
        f"(other jobs share the machine). `rockhead run` in a child process limited to {args.memory_gib:g} GiB of "
        f"address space and {args.timeout_s:g} s; parallel 400 m lines 20 m apart and one crossing line in eight, a "
        "shot every 4 m into 48 receivers, plane reflector 20-30 m deep.\n",
        "| picks | exit | wall time (s) | CPU time (s) | load average (start / end) | peak RSS (GiB) | files | "
        "outputs (MiB) | report.html (MiB) | last message |",
        "|---:|---|---:|---:|---|---:|---:|---:|---:|---|",
    ]
    for written, _gen, r in rows:
        msg = r["last"].replace("|", "/")[:140]
        lines.append(
            f"| {written:,} | {r['code']} | {r['wall_s']:.0f} | {r['cpu_s']:.0f} | {r['load']} | {r['rss_gib']:.2f} | "
            f"{r['files']} | {r['out_mib']:.0f} | {r['report_mib']:.2f} | {msg} |"
        )
    with open(HERE / "RESULTS.md", "a", encoding="utf-8") as fh:
        fh.write("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
