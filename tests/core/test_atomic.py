"""Atomic outputs: a target is either its old bytes or the complete new file."""

import os
import stat

import pytest
from rockhead.core.errors import CancelledError, OutputError
from rockhead.core.formats.atomic import OutputSet, atomic_path, check_not_input, check_output_dir


def _visible(folder):
    return sorted(p.name for p in folder.iterdir())


def test_atomic_path_success_replaces_target(tmp_path):
    target = tmp_path / "grid.tif"
    target.write_bytes(b"old")
    with atomic_path(target) as tmp:
        # the temporary file sits beside the target, hidden, with the same suffix
        assert tmp.parent == tmp_path
        assert tmp.name.startswith(".")
        assert tmp.suffix == ".tif"
        tmp.write_bytes(b"new contents")
        assert target.read_bytes() == b"old"  # nothing visible changes before commit
    assert target.read_bytes() == b"new contents"
    assert _visible(tmp_path) == ["grid.tif"]


@pytest.mark.parametrize(
    "exc_type", [RuntimeError, KeyboardInterrupt, CancelledError], ids=["error", "interrupt", "cancel"]
)
def test_atomic_path_failure_keeps_old_target(tmp_path, exc_type):
    target = tmp_path / "survey.gpkg"
    old = bytes(range(256)) * 7
    target.write_bytes(old)
    with pytest.raises(exc_type):
        with atomic_path(target) as tmp:
            tmp.write_bytes(b"half a file")
            # sqlite leaves a journal beside a database it was writing
            (tmp.parent / (tmp.name + "-journal")).write_bytes(b"j")
            raise exc_type("stop")
    assert target.read_bytes() == old
    assert _visible(tmp_path) == ["survey.gpkg"]


def test_atomic_path_failure_without_earlier_target_leaves_nothing(tmp_path):
    with pytest.raises(ValueError, match="boom"):
        with atomic_path(tmp_path / "a.csv") as tmp:
            tmp.write_text("x")
            raise ValueError("boom")
    assert _visible(tmp_path) == []


def test_atomic_path_gives_normal_permissions(tmp_path):
    # mkstemp makes 0600 files; a new output should get the umask-derived mode like open() gives
    with atomic_path(tmp_path / "a.txt") as tmp:
        tmp.write_text("x")
    (tmp_path / "b.txt").write_text("x")
    mode_a = stat.S_IMODE((tmp_path / "a.txt").stat().st_mode)
    mode_b = stat.S_IMODE((tmp_path / "b.txt").stat().st_mode)
    assert mode_a == mode_b


def test_atomic_path_rejects_folder_target(tmp_path):
    with pytest.raises(OutputError, match="is a folder"):
        with atomic_path(tmp_path):
            pass


def test_output_set_commits_all_at_end(tmp_path):
    (tmp_path / "a.csv").write_text("old a")
    with OutputSet() as outputs:
        outputs.stage(tmp_path / "a.csv").write_text("new a")
        outputs.stage(tmp_path / "b.csv").write_text("new b")
        assert (tmp_path / "a.csv").read_text() == "old a"
        assert not (tmp_path / "b.csv").exists()
    assert (tmp_path / "a.csv").read_text() == "new a"
    assert (tmp_path / "b.csv").read_text() == "new b"
    assert _visible(tmp_path) == ["a.csv", "b.csv"]
    assert outputs.targets == [tmp_path / "a.csv", tmp_path / "b.csv"]


def test_output_set_failure_mid_run_leaves_earlier_outputs(tmp_path):
    (tmp_path / "a.csv").write_text("old a")
    (tmp_path / "b.tif").write_bytes(b"old b")
    with pytest.raises(CancelledError):
        with OutputSet() as outputs:
            outputs.stage(tmp_path / "a.csv").write_text("new a")
            with atomic_path(outputs.stage(tmp_path / "b.tif")) as tmp:  # writers nest atomic_path
                tmp.write_bytes(b"new b")
            raise CancelledError("user cancelled")
    assert (tmp_path / "a.csv").read_text() == "old a"
    assert (tmp_path / "b.tif").read_bytes() == b"old b"
    assert _visible(tmp_path) == ["a.csv", "b.tif"]


def test_output_set_missing_staged_file_commits_nothing(tmp_path):
    outputs = OutputSet()
    outputs.stage(tmp_path / "a.csv").write_text("a")
    outputs.stage(tmp_path / "b.csv").unlink()
    with pytest.raises(OutputError, match=r"b\.csv.*never written"):
        outputs.commit()
    assert _visible(tmp_path) == []


def test_output_set_rejects_double_stage(tmp_path):
    outputs = OutputSet()
    outputs.stage(tmp_path / "a.csv")
    with pytest.raises(OutputError, match="staged twice"):
        outputs.stage(tmp_path / "." / "a.csv")
    outputs.discard()
    assert _visible(tmp_path) == []


def test_check_output_dir_creates_nested_folder(tmp_path):
    out = check_output_dir(tmp_path / "x" / "y", [])
    assert out.is_dir() and out == (tmp_path / "x" / "y").resolve()
    assert _visible(out) == []  # the probe file is gone


def test_check_output_dir_refuses_a_file(tmp_path):
    f = tmp_path / "notes.txt"
    f.write_text("x")
    with pytest.raises(OutputError, match="is an existing file"):
        check_output_dir(f, [])
    with pytest.raises(OutputError, match="cannot create the output folder"):
        check_output_dir(f / "sub", [])


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root ignores folder permissions")
def test_check_output_dir_refuses_read_only(tmp_path):  # pragma: no cover - CI runs as root here
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        with pytest.raises(OutputError, match="cannot write"):
            check_output_dir(ro, [])
    finally:
        ro.chmod(0o700)


def test_check_output_dir_refuses_overwriting_an_input(tmp_path):
    picks = tmp_path / "picks.csv"
    picks.write_text("line,shot\n")
    with pytest.raises(OutputError, match=r"would overwrite the input file .*picks\.csv"):
        check_output_dir(tmp_path, [picks], ["survey.gpkg", "picks.csv"])
    # a different spelling of the same path
    with pytest.raises(OutputError, match="would overwrite"):
        check_output_dir(tmp_path / "sub" / "..", [picks], ["picks.csv"])
    # no clash
    assert check_output_dir(tmp_path, [picks, None], ["survey.gpkg"]) == tmp_path.resolve()


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="no symbolic links")
def test_check_not_input_sees_links(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    dem = data / "dem.tif"
    dem.write_bytes(b"dem")
    out = tmp_path / "out"
    out.mkdir()
    os.symlink(dem, out / "link.tif")
    os.link(dem, out / "hard.tif")
    with pytest.raises(OutputError, match="would overwrite"):
        check_not_input(out / "link.tif", [dem])
    with pytest.raises(OutputError, match="would overwrite"):
        check_not_input(out / "hard.tif", [dem])
    check_not_input(out / "other.tif", [dem])


def test_check_output_dir_refuses_input_as_folder(tmp_path):
    toml = tmp_path / "survey.toml"
    toml.write_text("")
    with pytest.raises(OutputError, match="is the input"):
        check_output_dir(toml, [toml])


def test_check_output_dir_reports_a_failed_probe(tmp_path, monkeypatch):
    # simulates a folder the user may not write to (running as root, permissions cannot show it)
    import tempfile

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(OutputError, match=r"cannot write in the output folder .*Permission denied"):
        check_output_dir(tmp_path, [])
    with pytest.raises(OutputError, match=r"cannot create a file in the output folder .*Permission denied"):
        with atomic_path(tmp_path / "a.txt"):
            pass
