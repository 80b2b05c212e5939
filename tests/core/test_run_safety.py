"""Nothing lost, nothing left half-written, same answer twice (a whole run).

Outputs are staged beside their targets and renamed at the end; a write
error half way (disk full, injected here) must leave earlier outputs
byte-identical and no temporary file; inputs are never modified; two runs
on the same inputs give identical files.
"""

import errno
import hashlib
from pathlib import Path

import pytest
from rockhead.core import errors, job
from test_pipeline_layers import _write_survey  # a small two-layer survey made by the forward models

pytestmark = pytest.mark.slow  # slow tier: whole runs with every output written (end to end)


def _digest(folder: Path) -> dict:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.fixture(scope="module")
def survey_path(tmp_path_factory):
    return _write_survey(tmp_path_factory.mktemp("in"))


def test_two_runs_give_identical_files(survey_path, tmp_path):
    before = _digest(survey_path.parent)
    job.run(survey_path, tmp_path / "a")
    job.run(survey_path, tmp_path / "b")
    a, b = _digest(tmp_path / "a"), _digest(tmp_path / "b")
    assert a.keys() == b.keys()
    differ = [k for k in a if a[k] != b[k]]
    assert not differ, differ
    assert _digest(survey_path.parent) == before  # inputs untouched (hash checked)


def test_drawing_processes_give_the_files_of_a_run_in_one_process(survey_path, tmp_path, monkeypatch):
    """The QC figures, report and sheets drawn by forked workers are byte-identical to those drawn in the run."""
    from rockhead.core.products.background import EarlyWorkers, fork_is_safe

    if not fork_is_safe():
        pytest.skip("no child process here (no fork, one core or ROCKHEAD_NO_FORK): nothing to compare")
    answers = []
    collect = EarlyWorkers.collect

    def recorded(self, index):
        answers.append(collect(self, index))
        return answers[-1]

    monkeypatch.setattr(EarlyWorkers, "collect", recorded)
    job.run(survey_path, tmp_path / "forked")
    assert len(answers) == 3 and all(answers), answers  # the workers wrote the files, not the run's fallback
    monkeypatch.setenv("ROCKHEAD_NO_FORK", "1")
    job.run(survey_path, tmp_path / "alone")
    a, b = _digest(tmp_path / "forked"), _digest(tmp_path / "alone")
    assert a.keys() == b.keys()
    assert [k for k in a if a[k] != b[k]] == []


def test_disk_full_mid_run_keeps_earlier_outputs(survey_path, tmp_path, monkeypatch):
    out = tmp_path / "out"
    job.run(survey_path, out, method="kriging")
    before = _digest(out)

    def full_disk(path, *args, **kwargs):
        Path(path).write_bytes(b"partial")
        raise OSError(errno.ENOSPC, "No space left on device", str(path))

    # the DXF is written after the GeoPackage, CSVs and rasters have been staged
    monkeypatch.setattr("rockhead.core.products.outputs.write_contours_dxf", full_disk)
    with pytest.raises(errors.OutputError, match=r"No space left on device.*earlier outputs there are unchanged"):
        job.run(survey_path, out, method="kriging")
    assert _digest(out) == before  # byte-identical, and no partial or temporary file


def test_output_folder_that_cannot_be_made(survey_path, tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    with pytest.raises(errors.OutputError):
        job.run(survey_path, blocker / "out", method="kriging")


def test_output_over_an_input_is_refused(survey_path, tmp_path):
    import shutil

    folder = tmp_path / "inplace"
    shutil.copytree(survey_path.parent, folder)
    (folder / "picks.csv").rename(folder / "report.html")
    toml = folder / "survey.toml"
    toml.write_text(toml.read_text().replace('picks = "picks.csv"', 'picks = "report.html"'))
    before = _digest(folder)
    with pytest.raises(errors.OutputError, match=r"report\.html"):
        job.run(toml, folder, method="kriging")
    assert _digest(folder) == before
