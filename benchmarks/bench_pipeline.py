"""Benchmark (d): the sample project end to end through the command line.

Runs ``rockhead run sample_project/survey.toml --out <tmp>`` in a child
process (wall time and the child's peak resident memory), then the same job
in-process with a timer around each step, so the table shows where the time
goes. Appends a section to benchmarks/RESULTS.md.

    python benchmarks/bench_pipeline.py [--no-append]
"""

from __future__ import annotations

import argparse
import datetime as dt
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _common import import_package, load_average, machine, package_env

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
SURVEY = REPO / "sample_project" / "survey.toml"


def machine_line() -> str:
    return f"{machine()}; load average {load_average()} at the start"


def cli_run(out: Path):
    env = package_env()
    t = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "rockhead.core.cli", "run", str(SURVEY), "--out", str(out)],
        capture_output=True,
        text=True,
        env=env,
    )
    wall = time.perf_counter() - t
    if proc.returncode != 0:
        raise SystemExit(proc.stderr)
    peak_mib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return wall, peak_mib


def step_times(out: Path):
    import_package()
    from rockhead.core import job, workflow
    from rockhead.core.survey.config import load_survey

    times = {}

    def timed(name, fn, *a, **k):
        t = time.perf_counter()
        value = fn(*a, **k)
        times[name] = time.perf_counter() - t
        return value

    survey = timed("read inputs", load_survey, SURVEY)
    ground = workflow.ground_model(survey)
    fit = timed("fit all gathers", workflow.fit_step, survey, ground=ground)
    result = timed("whole computation", workflow.compute, survey)
    timed("write outputs", job.write_outputs, result, out)
    times["picks"] = len(survey.picks)
    times["gathers"] = len(fit.fits)
    return times


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--no-append", action="store_true", help="print only, do not touch RESULTS.md")
    args = ap.parse_args(argv)
    info = machine_line()
    with tempfile.TemporaryDirectory() as tmp:
        wall, peak = cli_run(Path(tmp) / "cli")
        steps = step_times(Path(tmp) / "steps")
    rows = [
        ("command line, whole job (child process)", f"{wall:.1f}"),
        ("  peak memory of that process (MiB)", f"{peak:.0f}"),
        ("in-process: read inputs", f"{steps['read inputs']:.2f}"),
        (f"in-process: fit all {steps['gathers']} gathers ({steps['picks']} picks)", f"{steps['fit all gathers']:.2f}"),
        (
            "in-process: whole computation (fits, relocation, kriging, joint inversion, products)",
            f"{steps['whole computation']:.1f}",
        ),
        (
            "in-process: write outputs (GeoPackage, GeoTIFF, DXF, CSV, QC figures, report)",
            f"{steps['write outputs']:.1f}",
        ),
    ]
    table = "| step | seconds |\n|---|---:|\n" + "\n".join(f"| {a} | {b} |" for a, b in rows)
    print(info)
    print(table)
    if not args.no_append:
        stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        with open(HERE / "RESULTS.md", "a", encoding="utf-8") as fh:
            fh.write(
                f"\n## Sample project end to end ({stamp})\n\n`python benchmarks/bench_pipeline.py` on {info}.\n\n"
                f"{table}\n"
            )


if __name__ == "__main__":
    main()
