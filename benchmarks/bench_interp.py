"""Benchmark (e): the interpretation loop on the sample project.

Measures, on the sample survey (56 gathers, 2688 picks):

1. the command line end to end, ``rockhead run sample_project/survey.toml``,
   report included (child process: wall time, and its processor time, which
   other jobs on a shared machine disturb less);
2. a quick remap after one pick edit (``core.remap.remap``: read, refit, 3D
   relocation, kriging, map products written), in-process;
3. inside QGIS (headless, Debian's QGIS Python when present): the whole-survey
   Processing algorithm with its styled layers loaded, and one edit in the QC
   panel until the map layers are reloaded.

Targets (issue 14): 1 at most 3 s, 2 at most 1 s, 3 at most 5 s for the run.
Wall-clock and processor times (the command line's includes its child process
drawing the printed sheets; QGIS's counts every thread of the QGIS process
during the algorithm); the machine line says how loaded the machine was.

    python benchmarks/bench_interp.py [--repeat 3] [--no-append] [--no-qgis]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _common import ROOT, import_package, load_average, machine, package_env

HERE = Path(__file__).resolve().parent
SAMPLE = ROOT / "sample_project"
INPUTS = ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv")
EDIT = (
    "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\n"
    "B,1105,1102,,exclude,,benchmark,2026-12-02T08:00:00Z\n"
)
QGIS_PYTHON = ROOT / ".venv-qgis" / "bin" / "python"


def _site(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for name in INPUTS:
        shutil.copy(SAMPLE / name, folder / name)
    return folder / "survey.toml"


def cli_run(tmp: Path, repeat: int) -> list:
    """(wall s, child processor s) of each command-line run."""
    survey = _site(tmp / "cli")
    env = package_env()
    out = []
    for k in range(repeat):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-m", "rockhead.core.cli", "run", str(survey), "--out", str(tmp / f"cli_out{k}")],
            capture_output=True,
            text=True,
            env=env,
        )
        wall = time.perf_counter() - t
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        if proc.returncode != 0:
            raise SystemExit(proc.stderr)
        cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
        out.append((wall, cpu))
    return out


def remap_runs(tmp: Path, repeat: int) -> list:
    """(wall s, processor s) of each quick remap after one pick edit (edit and undo alternate)."""
    import_package()
    from rockhead.core import job
    from rockhead.core.remap import pinned_choices, remap

    survey = _site(tmp / "remap")
    results = tmp / "remap" / "results"
    pinned = pinned_choices(job.run(survey, results))
    edits = survey.parent / "pick_edits.csv"
    out = []
    for k in range(repeat):
        if k % 2 == 0:
            edits.write_text(EDIT)
        else:
            edits.unlink()
        t, c = time.perf_counter(), time.process_time()
        remap(survey, pinned, results)
        out.append((time.perf_counter() - t, time.process_time() - c))
    return out


QGIS_SCRIPT = r"""
import json, os, sys, time
from pathlib import Path
sys.path.insert(0, "/usr/share/qgis/python/plugins")
from qgis.core import QgsApplication, QgsProject, QgsCoordinateReferenceSystem
app = QgsApplication([], True)
app.initQgis()
from processing.core.Processing import Processing
Processing.initialize()
import processing
from qgis.core import QgsProcessingContext, QgsProcessingFeedback
from rockhead.plugin.provider import RockheadProvider
provider = RockheadProvider()
QgsApplication.processingRegistry().addProvider(provider)
survey, out = sys.argv[1], sys.argv[2]
project = QgsProject.instance()
project.setCrs(QgsCoordinateReferenceSystem("EPSG:32633"))
context = QgsProcessingContext()
context.setProject(project)
t, c = time.perf_counter(), time.process_time()
processing.run("rockhead:runsurvey", {"SURVEY": survey, "OUTPUT": out, "LOAD_RESULTS": True},
               context=context, feedback=QgsProcessingFeedback())
run_s, run_cpu_s = time.perf_counter() - t, time.process_time() - c
n_layers = len(project.mapLayers())
from rockhead.plugin.qc_dock import QcDock
t = time.perf_counter()
dock = QcDock(None, whole_run_after_edits=False)
opened_s = time.perf_counter() - t
dock.wait(600)
ready_s = time.perf_counter() - t
dock.show_shot("B", "1105")
n = dock.table.rowCount()
t = time.perf_counter()
dock.set_pick_used(n - 1, False)
dock.wait(600)
edit_s = time.perf_counter() - t
print(json.dumps({"run_s": run_s, "run_cpu_s": run_cpu_s,
                  "layers": n_layers, "panel_constructor_s": opened_s, "panel_ready_s": ready_s,
                  "edit_to_map_s": edit_s, "panel_remap_s": dock.last_remap_seconds, "error": dock.last_error}))
dock.close_panel()
project.removeAllMapLayers()
os._exit(0)
"""


def qgis_runs(tmp: Path, repeat: int):
    """Dicts of timings inside headless QGIS, or None without Debian's QGIS Python."""
    python = QGIS_PYTHON if QGIS_PYTHON.exists() else Path("/usr/bin/python3")
    probe = subprocess.run([str(python), "-c", "import qgis.core"], capture_output=True)
    if probe.returncode != 0:
        return None
    env = package_env()
    env.update(QT_QPA_PLATFORM="offscreen", PROJ_DATA="/usr/share/proj")
    env.pop("DISPLAY", None)
    script = tmp / "qgis_bench.py"
    script.write_text(QGIS_SCRIPT)
    out = []
    for k in range(repeat):
        survey = _site(tmp / f"qgis{k}")
        proc = subprocess.run(
            [str(python), str(script), str(survey), str(survey.parent / "results")],
            capture_output=True,
            text=True,
            env=env,
        )
        lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
        if proc.returncode != 0 or not lines:
            raise SystemExit(f"QGIS benchmark failed:\n{proc.stdout}\n{proc.stderr}")
        out.append(json.loads(lines[-1]))
    return out


def _best_median(values):
    v = sorted(values)
    return v[0], v[len(v) // 2]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-append", action="store_true", help="print only, do not touch RESULTS.md")
    ap.add_argument("--no-qgis", action="store_true", help="skip the measurements inside QGIS")
    args = ap.parse_args(argv)
    start_load = load_average()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        cli = cli_run(tmp, args.repeat)
        quick = remap_runs(tmp, args.repeat + 1)[1:]  # the first remap warms the imports
        inside = None if args.no_qgis else qgis_runs(tmp, args.repeat)
    end_load = load_average()
    rows = []
    wall_best, wall_med = _best_median([w for w, _ in cli])
    cpu_best, cpu_med = _best_median([c for _, c in cli])
    rows.append(("command line, whole run with report (target <= 3 s)", wall_best, wall_med, cpu_best, cpu_med))
    wall_best, wall_med = _best_median([w for w, _ in quick])
    cpu_best, cpu_med = _best_median([c for _, c in quick])
    rows.append(
        (
            "quick remap after one pick edit, map products written (target <= 1 s)",
            wall_best,
            wall_med,
            cpu_best,
            cpu_med,
        )
    )
    if inside:
        for key, label in (
            ("run_s", "QGIS: whole-survey algorithm, styled layers loaded (target <= 5 s)"),
            ("panel_constructor_s", "QGIS: QC panel constructor (work goes to a task)"),
            ("panel_ready_s", "QGIS: QC panel filled (survey read and fitted in a task)"),
            ("edit_to_map_s", "QGIS: one edit in the panel until the map layers are reloaded"),
        ):
            best, med = _best_median([d[key] for d in inside])
            cpu = [d[key.replace("_s", "_cpu_s")] for d in inside if key.replace("_s", "_cpu_s") in d]
            cpu_best, cpu_med = _best_median(cpu) if cpu else (None, None)
            rows.append((label, best, med, cpu_best, cpu_med))
    table = (
        "| step | wall best (s) | wall median (s) | CPU best (s) | CPU median (s) |\n|---|---:|---:|---:|---:|\n"
        + "\n".join(
            f"| {a} | {b:.2f} | {c:.2f} | {'' if d is None else f'{d:.2f}'} | {'' if e is None else f'{e:.2f}'} |"
            for a, b, c, d, e in rows
        )
    )
    info = f"{machine()}; load average {start_load} at the start and {end_load} at the end; {args.repeat} runs of each"
    print(info)
    print(table)
    if not args.no_append:
        stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        with open(HERE / "RESULTS.md", "a", encoding="utf-8") as fh:
            fh.write(
                f"\n## Interpretation loop and end to end ({stamp})\n\n`python benchmarks/bench_interp.py` on "
                f"{info}.\n\n{table}\n"
            )


if __name__ == "__main__":
    main()
