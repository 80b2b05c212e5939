"""Faults and concurrency over whole runs: kill -9 at many moments, two runs at once.

A folder holds an earlier good run (survey "old"); a new run (survey "new",
another reflector depth, so every product differs) is killed with SIGKILL at
moments spread over it: during the reading and fitting (timer), and at every
kind of file-system step of the writing and the swap (the k-th rename, fsync,
folder creation, removal, exchange, file write). After each kill the folder
must hold either the complete old run or the complete new one, byte for byte,
and must be readable (SQLite integrity check of the GeoPackage, manifest
digests). The next run then cleans what the killed one left.

The runs are forked from this process after the survey has been computed
once, so that a dozen kills cost seconds, not a dozen whole computations.
"""

import hashlib
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from rockhead.core import job
from rockhead.core.formats import runfolder
from rockhead.core.survey.config import load_survey
from rockhead.core.workflow import compute
from small_survey import write_small_survey

# QC figures of the lines (two) and of flagged gathers only (none: a mispick is rejected, the fit stays ok):
# a figure is a file like any other, and a dozen forked runs stay at seconds
FIGURES = "flagged"
pytestmark = [pytest.mark.skipif(not hasattr(os, "fork"), reason="kill -9 tests need fork (POSIX)"), pytest.mark.slow]


def tree(folder: Path) -> dict:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def assert_readable(folder: Path, figures: int = 2) -> None:
    """Every file matches the manifest's SHA-256, nothing else is there, the GeoPackage is sound."""
    manifest = json.loads((folder / runfolder.MANIFEST).read_text())
    listed = {f["path"]: f["sha256"] for f in manifest["files"]}
    found = tree(folder)
    found.pop(runfolder.MANIFEST)
    assert found == listed
    with sqlite3.connect(f"file:{folder / 'survey.gpkg'}?mode=ro", uri=True) as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"  # SQLite's own check
        assert db.execute("SELECT count(*) FROM shots").fetchone()[0] == 12
    assert len(list((folder / "qc").glob("*.png"))) == figures


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("faults")
    # one mispick in each: one flagged gather, so one QC figure
    old = load_survey(write_small_survey(base / "old", "old", 15.0, mispick=("EW", 9)))
    new_path = write_small_survey(base / "new", "new", 18.0, mispick=("EW", 9))
    new = load_survey(new_path)
    old_result = compute(old)
    new_result = compute(new)
    ref_old, ref_new = base / "ref_old", base / "ref_new"
    job.write_outputs(old_result, ref_old, gather_figures=FIGURES)
    job.write_outputs(new_result, ref_new, gather_figures=FIGURES)
    return {
        "base": base,
        "old": old_result,
        "new": new_result,
        "new_path": new_path,
        "ref_old": ref_old,
        "tree_old": tree(ref_old),
        "tree_new": tree(ref_new),
    }


class _Killer:
    """Counts file-system steps of a run; SIGKILLs the process at the k-th (k=None: count only)."""

    NAMES = (
        (os, "replace"),
        (os, "rename"),
        (os, "fsync"),
        (os, "mkdir"),
        (os, "unlink"),
        (os, "chmod"),
        (os, "rmdir"),
        (Path, "write_bytes"),
        (Path, "write_text"),
        (Path, "mkdir"),
    )

    def __init__(self, kill_at=None):
        self.kill_at = kill_at
        self.count = 0

    def install(self, monkeypatch):
        for owner, name in self.NAMES:
            monkeypatch.setattr(owner, name, self._wrap(getattr(owner, name)))
        if runfolder._EXCHANGE is not None:
            monkeypatch.setattr(runfolder, "_EXCHANGE", self._wrap(runfolder._EXCHANGE))

    def _wrap(self, fn):
        def step(*args, **kwargs):
            self.count += 1
            if self.kill_at is not None and self.count == self.kill_at:
                os.kill(os.getpid(), signal.SIGKILL)
            return fn(*args, **kwargs)

        return step


def _in_child(action) -> int:
    """Run ``action`` in a forked child; return the signal that ended it (0 when it exited normally)."""
    pid = os.fork()
    if pid == 0:  # the child never returns into pytest
        code = 0
        try:
            action()
        except BaseException:  # reported through the exit code only
            import traceback

            traceback.print_exc()
            code = 3
        finally:
            os._exit(code)
    _, status = os.waitpid(pid, 0)
    if os.WIFSIGNALED(status):
        return os.WTERMSIG(status)
    assert os.WEXITSTATUS(status) == 0, "the child run failed"
    return 0


def test_kill_9_at_many_moments_leaves_a_complete_run(runs, monkeypatch):
    out = runs["base"] / "out"
    job.write_outputs(runs["old"], out, gather_figures=FIGURES)
    assert tree(out) == runs["tree_old"]

    # how many file-system steps the writing of the new run takes (counted, not killed)
    count = runs["base"] / "count"
    job.write_outputs(runs["old"], count, gather_figures=FIGURES)
    counter = _Killer()
    with monkeypatch.context() as m:
        counter.install(m)
        job.write_outputs(runs["new"], count, gather_figures=FIGURES)
    total = counter.count
    assert total > 40  # GeoPackage, CSVs, rasters, DXF, figures, report, manifest, swap

    def killed_while_writing(k):
        def action():
            mp = pytest.MonkeyPatch()
            _Killer(k).install(mp)
            job.write_outputs(runs["new"], out, gather_figures=FIGURES)

        return action

    def killed_after(seconds):
        def action():
            signal.signal(signal.SIGALRM, lambda *_: os.kill(os.getpid(), signal.SIGKILL))
            signal.setitimer(signal.ITIMER_REAL, seconds)
            job.run(runs["new_path"], out)
            signal.setitimer(signal.ITIMER_REAL, 0)

        return action

    # three moments in the reading/fitting, then steps spread over the writing, with the last
    # few (manifest, exchange, removal of the old set) each taken on its own
    moments = [("timer", s) for s in (0.05, 0.3, 1.0)]
    moments += [("step", int(k)) for k in np.unique(np.linspace(1, total - 6, 7).astype(int))]
    moments += [("step", k) for k in range(total - 5, total + 1)]
    seen = {"old": 0, "new": 0}
    for kind, at in moments:
        if tree(out) != runs["tree_old"]:  # put the old run back so every kill starts from it
            # (a copy of the reference: what a killed run left beside the folder stays for the next)
            shutil.rmtree(out)
            shutil.copytree(runs["ref_old"], out)
        sig = _in_child(killed_after(at) if kind == "timer" else killed_while_writing(at))
        state = tree(out)
        assert state in (runs["tree_old"], runs["tree_new"]), (kind, at, sig)
        assert_readable(out)
        seen["old" if state == runs["tree_old"] else "new"] += 1
        if kind == "step":
            assert sig == signal.SIGKILL, (kind, at)
    assert seen["old"] >= 8 and seen["new"] >= 1, seen  # both outcomes were reached
    # the next run takes over the killed run's lock and removes its leftovers
    job.write_outputs(runs["new"], out, gather_figures=FIGURES)
    assert tree(out) == runs["tree_new"]
    assert sorted(p.name for p in out.parent.iterdir() if p.name.startswith(".")) == []


def _cli(survey, out):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    return subprocess.Popen(
        [sys.executable, "-m", "rockhead.core.cli", "run", str(survey), "--out", str(out)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )


def test_two_runs_into_one_folder_never_mix(runs, tmp_path):
    old_path = runs["base"] / "old" / "survey.toml"
    out = tmp_path / "out"
    a = _cli(old_path, out)
    time.sleep(0.05)
    b = _cli(runs["new_path"], out)
    res = {}
    for name, proc in (("old", a), ("new", b)):
        _, stderr = proc.communicate(timeout=600)
        res[name] = (proc.returncode, stderr)
    codes = sorted(code for code, _ in res.values())
    assert codes in ([0, 0], [0, 2]), res
    for code, stderr in res.values():
        if code == 2:  # the loser says who holds the folder, on one line
            assert "being written by another Rockhead run (PID" in stderr, stderr
    # one run's manifest, every file matching it: nothing of the other run mixed in
    assert_readable(out, figures=2)
    with sqlite3.connect(f"file:{out / 'survey.gpkg'}?mode=ro", uri=True) as db:
        survey = db.execute("SELECT value FROM run_info WHERE key = 'survey'").fetchone()[0]
    winners = [name for name, (code, _) in res.items() if code == 0]
    assert survey in winners
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
