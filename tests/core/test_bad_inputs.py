"""Run every case of the bad-input corpus (tests/bad_inputs/, made by make_corpus.py).

* ``good_*``: the survey loads, with no RockheadWarning.
* ``warn_*``: the survey loads and a RockheadWarning matches expected.txt.
* every other folder: reading and checking the survey (what ``rockhead check``
  does: load_survey, then check_for_run) raises a RockheadError whose message is
  one line, matches the regular expression in expected.txt (anchored at the
  start, so it pins file, line and field) and, for file errors, names the
  file's basename, the line and the field it carries.

The command-line contract (README, Using it; DEVELOPERS.md, Errors and exit
codes: exit code 2 and a one-line message on stderr for bad input) is checked
on the same cases, in process and, for one case per kind of fault, in a child
process (slow tier).
"""

import os
import re
import warnings
from pathlib import Path

import pytest
from rockhead.core.errors import InputFileError, RockheadError, RockheadWarning
from rockhead.core.survey.config import check_for_run
from rockhead.core.survey.config import load_survey as _load
from rockhead.core.survey.model import Survey


def load_survey(path):
    """What ``rockhead check`` does: read the files, then check them together for a run."""
    return check_for_run(_load(path))


CORPUS = Path(__file__).resolve().parents[1] / "bad_inputs"
CASES = sorted(p.name for p in CORPUS.iterdir() if (p / "survey.toml").is_file())
GOOD = [c for c in CASES if c.startswith("good_")]
WARN = [c for c in CASES if c.startswith("warn_")]
BAD = [c for c in CASES if c not in GOOD and c not in WARN]


def _expected(case):
    return (CORPUS / case / "expected.txt").read_text(encoding="utf-8").strip()


def test_corpus_matches_its_generator(tmp_path):
    """The committed files are exactly what make_corpus.py writes (edit the script, not the files)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("make_corpus", CORPUS / "make_corpus.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.main(tmp_path)
    made = {p.relative_to(tmp_path): p.read_bytes() for p in tmp_path.rglob("*") if p.is_file()}
    committed = {
        p.relative_to(CORPUS): p.read_bytes()
        for p in CORPUS.rglob("*")
        if p.is_file() and p.parent != CORPUS and "__pycache__" not in p.parts
    }
    assert sorted(made) == sorted(committed)
    for rel, data in made.items():
        assert committed[rel] == data, rel


def test_corpus_size():
    # the brief asks for at least 40 distinct faults; the good cases are counted apart
    assert len(BAD) >= 40
    assert len(GOOD) >= 5
    for case in BAD + WARN:
        assert (CORPUS / case / "expected.txt").is_file(), case


@pytest.mark.parametrize("case", BAD, ids=BAD)
def test_bad_case_raises_named_error(case):
    pattern = _expected(case)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RockheadWarning)
        with pytest.raises(RockheadError) as info:
            load_survey(CORPUS / case / "survey.toml")
    err = info.value
    msg = str(err)
    assert "\n" not in msg, msg
    assert re.search(pattern, msg), f"{msg!r} does not match {pattern!r}"
    # the message must be actionable: no Python internals leak into it
    assert "Traceback" not in msg and "KeyError" not in msg
    if isinstance(err, InputFileError):
        assert err.path is not None
        assert msg.startswith(os.path.basename(err.path)), msg
        if err.line is not None:
            assert f"line {err.line}" in msg
            # the line number is real: that line exists in the named file
            n_lines = len(re.split(r"\r\n|\r|\n", Path(err.path).read_bytes().decode("utf-8", "replace")))
            assert 1 <= err.line <= n_lines
        if err.field is not None:
            assert f"field '{err.field}'" in msg


@pytest.mark.parametrize("case", GOOD, ids=GOOD)
def test_good_case_loads_without_warning(case):
    with warnings.catch_warnings():
        warnings.simplefilter("error", RockheadWarning)
        survey = load_survey(CORPUS / case / "survey.toml")
    assert isinstance(survey, Survey)
    base = load_survey(CORPUS / "good_base" / "survey.toml")
    # every good variant describes the same site: same number of stations
    assert len(survey.stations) == len(base.stations) == 24
    assert survey.crs.is_projected
    assert len(survey.picks) >= len(base.picks)
    assert (survey.picks.time_s > 0).all() and (survey.picks.sigma_s > 0).all()


def test_good_variants_equal_base():
    """BOM+CRLF, quoted fields, comments, header case, trailing commas, int CRS: same numbers as the base."""
    import numpy as np

    base = load_survey(CORPUS / "good_base" / "survey.toml")
    for case in (
        "good_bom_crlf",
        "good_quoted_fields",
        "good_comments_blank_lines",
        "good_crs_integer",
        "good_header_case_spaces",
        "good_trailing_commas",
    ):
        s = load_survey(CORPUS / case / "survey.toml")
        assert s.crs == base.crs, case
        np.testing.assert_array_equal(s.stations.xyz, base.stations.xyz, err_msg=case)
        np.testing.assert_array_equal(s.picks.time_s, base.picks.time_s, err_msg=case)
        assert list(s.picks.shot) == list(base.picks.shot), case
        if s.boreholes is not None:
            np.testing.assert_array_equal(s.boreholes.depth_m, base.boreholes.depth_m, err_msg=case)


@pytest.mark.parametrize("case", WARN, ids=WARN)
def test_warning_case_loads_and_warns(case):
    pattern = _expected(case)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        survey = load_survey(CORPUS / case / "survey.toml")
    assert isinstance(survey, Survey)
    messages = [str(w.message) for w in caught if issubclass(w.category, RockheadWarning)]
    assert any(re.search(pattern, m) for m in messages), messages


def _cli_main():
    from rockhead.core.cli import main

    return main


def _earlier_run(out: Path) -> dict:
    """An earlier run's output folder (written through RunFolder, as a run writes it); returns its digest."""
    from rockhead.core.formats.runfolder import RunFolder

    with RunFolder(out, {}) as folder:
        folder.path("report.html").write_text("<p>an earlier good run</p>", encoding="utf-8")
        folder.path("csv/shots.csv").write_text("line,shot\nL1,101\n", encoding="utf-8")
        folder.commit()
    return _digest(out)


def _digest(folder: Path) -> dict:
    import hashlib

    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _assert_one_error_line(err: str, pattern: str) -> None:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    # the error is one line, the last; warnings met before it are shown too, one line each
    assert lines and lines[-1].startswith("rockhead: error: "), err
    assert all(ln.startswith("rockhead: warning: ") for ln in lines[:-1]), err
    assert "Traceback" not in err
    assert re.search(pattern.lstrip("^"), lines[-1]), lines[-1]


@pytest.mark.parametrize("case", BAD, ids=BAD)
def test_cli_run_returns_2_with_one_line(case, tmp_path, capsys):
    """Exit code 2 on bad input with a one-line message on stderr (README, Using it); the output
    folder, holding an earlier run, is left byte-identical and nothing is left beside it."""
    main = _cli_main()
    before = _earlier_run(tmp_path / "out")
    code = main(["run", str(CORPUS / case / "survey.toml"), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2, err
    _assert_one_error_line(err, _expected(case))
    assert _digest(tmp_path / "out") == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def _output_case(name: str, tmp_path: Path) -> tuple:
    """(argv, expected pattern, input files to keep intact) of the cases about the output folder."""
    import shutil

    src = tmp_path / "survey"
    shutil.copytree(CORPUS / "good_base", src)
    toml = src / "survey.toml"
    out = tmp_path / "out"
    if name == "stations_under_out_csv":
        # the stations file lives at <out>/csv/stations.csv, where a run writes its CSV layers
        (out / "csv").mkdir(parents=True)
        (src / "stations.csv").rename(out / "csv" / "stations.csv")
        toml.write_text(
            toml.read_text().replace(
                'stations = "stations.csv"', f'stations = "{(out / "csv" / "stations.csv").as_posix()}"'
            )
        )
        return (
            ["run", str(toml), "--out", str(out)],
            r"output '.*out/csv/stations\.csv' would replace the input "
            r"file .*stations\.csv' \(\[files\] stations\)",
            [out / "csv" / "stations.csv"],
        )
    if name == "linked_csv_folder":
        # an earlier run whose csv/ someone replaced by a link to the survey folder: the run's
        # csv/stations.csv would be the input itself
        _earlier_run(out)
        shutil.rmtree(out / "csv")
        os.symlink(src, out / "csv")
        return (
            ["run", str(toml), "--out", str(out)],
            r"output '.*out/csv' is a link to .*survey",
            [src / "stations.csv"],
        )
    if name == "empty_out":
        return (["run", str(toml), "--out", ""], r"the output folder is empty text", [])
    if name == "out_is_survey_folder":
        return (
            ["run", str(toml), "--out", str(src)],
            r"output folder '.*survey' is or holds the input file",
            [src / "stations.csv"],
        )
    raise AssertionError(name)


OUTPUT_CASES = ["stations_under_out_csv", "linked_csv_folder", "empty_out", "out_is_survey_folder"]


@pytest.mark.parametrize("name", OUTPUT_CASES, ids=OUTPUT_CASES)
def test_cli_run_refuses_outputs_over_inputs(name, tmp_path, capsys, monkeypatch):
    """Outputs never land on inputs: refused before anything is written, inputs byte-identical."""
    monkeypatch.chdir(tmp_path)  # an empty --out would otherwise mean this folder
    argv, pattern, keep = _output_case(name, tmp_path)
    before = {p: p.read_bytes() for p in keep}
    listing = sorted(str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*"))
    code = _cli_main()(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    _assert_one_error_line(err, pattern)
    assert {p: p.read_bytes() for p in keep} == before
    assert sorted(str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*")) == listing  # nothing written


@pytest.mark.parametrize("case", GOOD + WARN, ids=GOOD + WARN)
def test_cli_check_accepts_good_cases(case, capsys):
    main = _cli_main()
    code = main(["check", str(CORPUS / case / "survey.toml")])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "24 stations" in captured.out


PROCESSING_CASES = [c for c in BAD if c.startswith("processing_")]


@pytest.mark.parametrize("case", PROCESSING_CASES, ids=PROCESSING_CASES)
def test_cli_check_refuses_bad_processing_settings(case, capsys):
    """`rockhead check` refuses a bad [processing] key as a run would: exit 2, the file, line and key named."""
    main = _cli_main()
    code = main(["check", str(CORPUS / case / "survey.toml")])
    err = capsys.readouterr().err
    assert code == 2, err
    _assert_one_error_line(err, _expected(case))


# one case per file and kind of fault: the process-level contract (exit status, no traceback)
SUBPROCESS_CASES = [
    "toml_syntax_error",
    "crs_unknown_code",
    "stations_semicolon",
    "geographic_lat_lon_swapped",
    "picks_duplicate",
    "boreholes_negative_depth",
]


@pytest.mark.slow  # a child process per case (interpreter and library start-up)
@pytest.mark.parametrize("case", SUBPROCESS_CASES, ids=SUBPROCESS_CASES)
def test_cli_process_exit_code_2(case, tmp_path, run_cli):
    _cli_main()
    proc = run_cli("run", CORPUS / case / "survey.toml", "--out", tmp_path / "out", timeout_s=120)
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert lines[-1].startswith("rockhead: error: ") and len(lines) == 1 + sum(
        ln.startswith("rockhead: warning: ") for ln in lines[:-1]
    ), proc.stderr
    assert "Traceback" not in proc.stderr
    assert re.search(_expected(case).lstrip("^"), lines[-1]), lines[-1]
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())
