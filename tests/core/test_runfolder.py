"""The output folder is replaced as a whole, never over an input, one run at a time.

These tests use the folder alone (no survey computation); the whole-run and
kill -9 tests are in test_faults.py.
"""

import hashlib
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats import runfolder
from rockhead.core.formats.runfolder import MANIFEST, RunFolder, read_manifest


def _tree(folder):
    """Relative path -> bytes of every file under ``folder`` (hidden files included)."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _write_run(out, files, inputs=None):
    with RunFolder(out, inputs or {}) as run:
        for rel, text in files.items():
            run.path(rel).write_text(text)
        return run.commit()


def test_commit_writes_every_file_and_a_manifest(tmp_path):
    written = _write_run(tmp_path / "out", {"a.csv": "1", "csv/b.csv": "2"})
    assert [p.name for p in written] == ["a.csv", "b.csv"]
    manifest = read_manifest(tmp_path / "out")
    assert [f["path"] for f in manifest["files"]] == ["a.csv", "csv/b.csv"]
    # the digests are checked against hashlib itself (an independent SHA-256)
    assert manifest["files"][0]["sha256"] == hashlib.sha256(b"1").hexdigest()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no staging folder, no lock


def test_new_run_replaces_the_old_set_whole(tmp_path):
    out = tmp_path / "out"
    _write_run(out, {"a.csv": "old", "qc/gather_L1_S1.png": "fig"})
    _write_run(out, {"a.csv": "new"})
    # the figure of the earlier run (a removed line) does not linger as a stale output
    assert set(_tree(out)) == {"a.csv", MANIFEST}
    assert (out / "a.csv").read_text() == "new"


def test_a_failed_run_leaves_the_earlier_set_byte_identical(tmp_path):
    out = tmp_path / "out"
    _write_run(out, {"a.csv": "old", "b.csv": "old"})
    before = _tree(out)
    with pytest.raises(RuntimeError):
        with RunFolder(out, {}) as run:
            run.path("a.csv").write_text("new")
            raise RuntimeError("disk full half way")
    assert _tree(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


@pytest.mark.parametrize("exchange", [True, False], ids=["atomic-exchange", "two-renames"])
def test_both_swap_strategies_give_the_new_set(tmp_path, monkeypatch, exchange):
    if not exchange:
        monkeypatch.setattr(runfolder, "_EXCHANGE", None)
    elif runfolder._EXCHANGE is None:  # pragma: no cover
        pytest.skip("no atomic folder exchange on this platform")
    out = tmp_path / "out"
    _write_run(out, {"a.csv": "old"})
    _write_run(out, {"a.csv": "new"})
    assert (out / "a.csv").read_text() == "new"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_input_in_a_subfolder_of_the_output_is_refused(tmp_path):
    """An input at <out>/csv/stations.csv: the run would replace it (reported data loss)."""
    out = tmp_path / "out"
    (out / "csv").mkdir(parents=True)
    stations = out / "csv" / "stations.csv"
    stations.write_text("line,station,x,y,z\n")
    with pytest.raises(OutputError, match=r"csv/stations\.csv.*\[files\] stations"):
        RunFolder(out, {"[files] stations": stations}).open()
    assert stations.read_text() == "line,station,x,y,z\n"


def test_input_reached_through_a_linked_subfolder_is_refused(tmp_path):
    """<out>/csv is a link to the survey folder: an output csv/stations.csv would be the input."""
    survey = tmp_path / "survey"
    survey.mkdir()
    stations = survey / "stations.csv"
    stations.write_text("x")
    out = tmp_path / "out"
    out.mkdir()
    os.symlink(survey, out / "csv")
    with pytest.raises(OutputError, match=r"csv.*is a link to.*stations\.csv"):
        RunFolder(out, {"[files] stations": stations}).open()
    assert stations.read_text() == "x"


def test_output_path_resolved_through_links_before_writing(tmp_path):
    """check_path follows links the folder holds now (a linked file, not only folders)."""
    stations = tmp_path / "stations.csv"
    stations.write_text("x")
    run = RunFolder(tmp_path / "out", {"[files] stations": stations})
    (tmp_path / "out").mkdir()
    os.symlink(stations, tmp_path / "out" / "report.html")
    with pytest.raises(OutputError, match=r"report\.html.*would replace.*stations\.csv"):
        run.check_path("report.html")


def test_output_folder_holding_the_survey_is_refused(tmp_path):
    toml = tmp_path / "survey.toml"
    toml.write_text("")
    with pytest.raises(OutputError, match=r"holds the input file .*survey\.toml.*as a whole"):
        RunFolder(tmp_path, {"survey file": toml}).open()
    with pytest.raises(OutputError, match=r"survey\.toml"):
        RunFolder(tmp_path / "sub" / "..", {"survey file": toml}).open()  # another spelling


@pytest.mark.parametrize("text", ["", "   "], ids=["empty", "blank"])
def test_empty_output_folder_name_is_refused(text):
    # an empty --out would otherwise mean the current folder
    with pytest.raises(OutputError, match="empty"):
        RunFolder(text, {})


def test_foreign_files_are_never_swapped_away(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("field notes")
    with pytest.raises(OutputError, match=r"no Rockhead run wrote \(notes\.txt\)"):
        RunFolder(out, {}).open()
    assert (out / "notes.txt").read_text() == "field notes"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # lock released


def test_a_folder_of_an_earlier_version_is_recognised(tmp_path):
    """A run folder written before manifests (fixed product names) is replaced, with its temp files."""
    out = tmp_path / "out"
    (out / "csv").mkdir(parents=True)
    (out / "qc").mkdir()
    for rel in (
        "survey.gpkg",
        "report.html",
        "csv/shots.csv",
        "qc/gather_A_1_rock.png",
        ".survey.k2j3h4g5.tmp.gpkg",
        "survey.gpkg-wal",
        "depth_sigma.tif.aux.xml",
        "section_line_A.pdf",
        "map_sheet.pdf",
    ):
        (out / rel).write_text("old")
    _write_run(out, {"report.html": "new"})
    assert set(_tree(out)) == {"report.html", MANIFEST}


def test_names_differing_only_in_case_are_one_output(tmp_path):
    with RunFolder(tmp_path / "out", {}) as run:
        run.path("qc/gather_A_1_rock.png")
        with pytest.raises(OutputError, match="differing only in case"):
            run.path("qc/gather_A_1_Rock.png")


@pytest.mark.parametrize("rel", ["../x.csv", "/etc/x", "a/b/c.csv", ""], ids=["up", "absolute", "deep", "empty"])
def test_output_names_stay_in_the_folder(tmp_path, rel):
    with RunFolder(tmp_path / "out", {}) as run:
        with pytest.raises(OutputError, match="not a plain file name"):
            run.path(rel)


def test_second_run_into_a_locked_folder_refuses_with_the_pid(tmp_path):
    out = tmp_path / "out"
    with RunFolder(out, {}):
        with pytest.raises(OutputError, match=rf"being written by another Rockhead run \(PID {os.getpid()}\)"):
            RunFolder(out, {}).open()
    # released: the next run goes ahead
    _write_run(out, {"a.csv": "1"})


@pytest.mark.slow
def test_lock_held_by_another_process_refuses(tmp_path):
    """A live process holding the lock (a real second process, flock semantics)."""
    out = tmp_path / "out"
    code = textwrap.dedent(
        f"""
        import sys, time
        from rockhead.core.formats.runfolder import RunFolder
        with RunFolder({str(out)!r}, {{}}):
            print("locked", flush=True)
            sys.stdin.readline()
        """
    )
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    holder = subprocess.Popen(
        [sys.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE, env=env, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(OutputError, match=rf"PID {holder.pid}\b"):
            RunFolder(out, {}).open()
    finally:
        holder.communicate("\n", timeout=60)
    assert holder.returncode == 0
    _write_run(out, {"a.csv": "1"})


def test_stale_lock_and_leftovers_of_a_killed_run_are_cleaned(tmp_path):
    out = tmp_path / "out"
    _write_run(out, {"a.csv": "good"})
    before = _tree(out)
    # what a run killed mid-write leaves: its lock file (no OS lock held any more),
    # a half-written staging folder, an old set aside, a temporary file inside the folder
    (tmp_path / ".out.rockhead-lock").write_text(json.dumps({"pid": 999999, "host": "x"}))
    (tmp_path / ".out.rockhead-new-999999-abcd").mkdir()
    (tmp_path / ".out.rockhead-new-999999-abcd" / "survey.gpkg").write_bytes(b"\0" * 4096)
    (tmp_path / ".out.rockhead-old-999999-abcd").mkdir()
    (out / ".a.x1y2z3w4.tmp.csv").write_text("partial")
    with RunFolder(out, {}) as run:
        assert run.stale_lock and "999999" in run.previous_owner
        assert sorted(p.name for p in tmp_path.iterdir() if "rockhead-new" not in p.name or p == run.staging) == [
            ".out.rockhead-lock",
            run.staging.name,
            "out",
        ]
    assert _tree(out) == {k: v for k, v in before.items()}  # the earlier set intact, temp file gone
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


@pytest.mark.parametrize("complete_new", [True, False], ids=["new-set-complete", "only-old-set"])
def test_folder_missing_after_a_kill_between_two_renames_is_restored(tmp_path, complete_new):
    """Without an atomic exchange, a kill between 'old aside' and 'new in' leaves no folder."""
    out = tmp_path / "out"
    _write_run(out, {"a.csv": "old"})
    old_aside = tmp_path / ".out.rockhead-old-4242-0000"
    os.rename(out, old_aside)
    new = tmp_path / ".out.rockhead-new-4242-0001"
    new.mkdir()
    (new / "a.csv").write_text("new")
    if complete_new:
        (new / MANIFEST).write_text(
            json.dumps(
                {
                    "format": "rockhead-run-folder-1",
                    "files": [{"path": "a.csv", "bytes": 3, "sha256": hashlib.sha256(b"new").hexdigest()}],
                }
            )
        )
    with RunFolder(out, {}) as run:
        assert run.recovered
    assert (out / "a.csv").read_text() == ("new" if complete_new else "old")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_mount_point_is_refused(tmp_path, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    real = os.path.ismount
    monkeypatch.setattr(os.path, "ismount", lambda p: os.fspath(p) == str(out) or real(p))
    with pytest.raises(OutputError, match="mount point"):
        RunFolder(out, {}).open()


def test_linked_output_folder_keeps_its_link(tmp_path):
    real = tmp_path / "real"
    _write_run(real, {"a.csv": "old"})
    os.symlink(real, tmp_path / "link")
    _write_run(tmp_path / "link", {"a.csv": "new"})
    assert (tmp_path / "link").is_symlink() and (real / "a.csv").read_text() == "new"


def test_staged_files_have_normal_permissions(tmp_path):
    _write_run(tmp_path / "out", {"a.csv": "1"})
    mask = os.umask(0)
    os.umask(mask)
    assert (tmp_path / "out").stat().st_mode & 0o777 == 0o777 & ~mask


def test_carry_over_keeps_the_last_runs_other_files(tmp_path):
    """A partial update (the map after a pick edit) replaces what it writes and keeps the rest."""
    out = tmp_path / "out"
    _write_run(out, {"survey.gpkg": "map 1", "report.html": "report 1", "qc/gather_A_1_1.svg": "fig"})
    with RunFolder(out, {}) as run:
        run.path("survey.gpkg").write_text("map 2")
        assert sorted(run.carry_over()) == ["qc/gather_A_1_1.svg", "report.html"]
        run.commit()
    assert (out / "survey.gpkg").read_text() == "map 2"
    assert (out / "report.html").read_text() == "report 1"
    assert [f["path"] for f in read_manifest(out)["files"]] == ["survey.gpkg", "report.html", "qc/gather_A_1_1.svg"]


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="names an open file through /proc (Linux)")
def test_each_written_file_is_flushed_once_by_the_commit(tmp_path, monkeypatch):
    """Writers inside the staging folder leave the flush to the commit, which flushes each new file once.

    A file carried over is a hard link to the last run's (flushed by that run's commit) and is not
    flushed again; a file outside any staging folder is flushed by its writer, as before.
    """
    from rockhead.core.formats.atomic import atomic_path, flushed_later

    out = tmp_path / "out"
    _write_run(out, {"report.html": "report 1", "survey.gpkg": "map 1"})
    flushed = []
    real_fsync = os.fsync

    def recording_fsync(fd):
        flushed.append(os.path.basename(os.readlink(f"/proc/self/fd/{fd}")))
        return real_fsync(fd)

    monkeypatch.setattr(os, "fsync", recording_fsync)
    with RunFolder(out, {}) as run:
        staged = run.path("survey.gpkg")
        assert flushed_later(staged) and not flushed_later(tmp_path / "elsewhere.csv")
        with atomic_path(staged) as tmp:  # an atomic writer inside the staging folder
            tmp.write_text("map 2")
        run.path("csv/points.csv").write_text("x,y\r\n")
        assert run.carry_over() == ["report.html"]
        assert flushed == []  # nothing flushed before the commit
        run.commit()
    files = [n for n in flushed if n in ("points.csv", "survey.gpkg", "report.html")]
    assert sorted(files) == ["points.csv", "survey.gpkg"]  # once each; report.html is the last run's
    assert not flushed_later(staged)  # the staging folder is forgotten once swapped in
    flushed.clear()
    with atomic_path(tmp_path / "elsewhere.csv") as tmp:
        tmp.write_text("1")
    assert flushed[0].startswith(".elsewhere.")  # outside a run folder its writer flushes it
    assert (out / "survey.gpkg").read_text() == "map 2" and (out / "report.html").read_text() == "report 1"


def test_outputs_resolve_as_realpath_does(tmp_path):
    """The path check resolves an output's parts as os.path.realpath does (links, '..'), more cheaply."""
    out = tmp_path / "out"
    _write_run(out, {"csv/a.csv": "1", "b.csv": "2"})
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    os.symlink(elsewhere, out / "linked")
    os.symlink(tmp_path / "target.csv", out / "link.csv")
    run = RunFolder(tmp_path / "out", {})
    for rel in ("b.csv", "csv/a.csv", "csv/new.csv", "linked", "linked/x.csv", "link.csv", "../out/b.csv", "new.csv"):
        assert run._resolved(rel) == Path(os.path.realpath(out / rel)), rel
