"""Pick edits (pick_edits.csv): reading with located errors, applying in order, and the fits after them.

The reference for "what an edit means" is the hand-edited input: excluding a
pick must fit exactly as if its row were deleted from picks.csv, and a retime
exactly as if its time were changed there (the edits file is only a record of
those changes that leaves picks.csv untouched).
"""

from __future__ import annotations

import shutil

import numpy as np
import pytest
from rockhead.core.errors import InputFileError, SurveyConfigError
from rockhead.core.survey import edits as ed
from rockhead.core.survey.config import load_survey
from rockhead.core.workflow import fit_step

HEADER = "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\n"


@pytest.fixture
def survey_dir(tmp_path, sample_dir):
    """A copy of the sample survey (picks.csv, stations.csv, boreholes.csv, survey.toml)."""
    out = tmp_path / "site"
    out.mkdir()
    for name in ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv"):
        shutil.copy(sample_dir / name, out / name)
    return out


def _pick_rows(folder):
    """The header's column names and the physical lines of picks.csv."""
    lines = (folder / "picks.csv").read_text().splitlines()
    header = next(ln for ln in lines if ln and not ln.startswith("#")).split(",")
    return header, lines


def test_write_read_round_trip(tmp_path, survey_dir):
    picks = load_survey(survey_dir / "survey.toml").picks
    line, shot, rec, refl = (str(picks.line[5]), str(picks.shot[5]), str(picks.receiver[5]), str(picks.reflector[5]))
    edits = ed.PickEdits(
        (
            ed.PickEdit(line, shot, rec, refl, "exclude", None, "=noisy, trace", "2026-12-02T07:30:12Z"),
            ed.PickEdit(line, shot, rec, refl, "retime", 23.456, 'cycle skip; "late"', ed.now_time_stamp()),
            ed.PickEdit(line, shot, rec, refl, "restore"),
        )
    )
    path = ed.write_pick_edits(tmp_path / "pick_edits.csv", edits)
    assert path.read_text().splitlines()[0] == HEADER.strip()
    back = ed.read_pick_edits(path, picks)
    # the same edits come back, text guarded against spreadsheet formulas on writing included
    assert [(e.key, e.action, e.new_time_ms, e.reason, e.time_stamp) for e in back] == [
        (e.key, e.action, e.new_time_ms, e.reason, e.time_stamp) for e in edits
    ]
    assert [e.file_line for e in back] == [2, 3, 4]


def test_header_only_file_holds_no_edits(tmp_path, survey_dir):
    picks = load_survey(survey_dir / "survey.toml").picks
    path = ed.write_pick_edits(tmp_path / "pick_edits.csv", ed.PickEdits())
    assert len(ed.read_pick_edits(path, picks)) == 0


def test_edits_apply_in_order_last_wins(survey_dir):
    picks = load_survey(survey_dir / "survey.toml").picks
    key = (str(picks.line[0]), str(picks.shot[0]), str(picks.receiver[0]), str(picks.reflector[0]))
    other = (str(picks.line[1]), str(picks.shot[1]), str(picks.receiver[1]), str(picks.reflector[1]))
    seq = ed.PickEdits(
        (
            ed.PickEdit(*key, "exclude"),
            ed.PickEdit(*other, "retime", 30.0),
            ed.PickEdit(*other, "exclude"),
            ed.PickEdit(*key, "restore"),
        )
    )
    a = ed.apply_pick_edits(picks, seq)
    assert not a.excluded[0] and a.excluded[1] and a.n_excluded == 1
    assert a.picks.time_s[1] == pytest.approx(0.030, abs=0)  # 30 ms, exactly as written
    assert a.picks.time_s[0] == picks.time_s[0]
    assert a.n_retimed == 1
    assert np.array_equal(a.original_time_s, picks.time_s)
    # a retime keeps the exclusion as it was; a restore undoes both
    b = ed.apply_pick_edits(picks, seq.appended(ed.PickEdit(*other, "restore")))
    assert b.n_excluded == 0 and b.n_retimed == 0 and not b.edited.any()


@pytest.mark.parametrize(
    "row, field, message",
    [
        ("A,1001,1002,,remove,,,", "action", r"action 'remove' is not one of exclude, restore, retime"),
        ("A,1001,1002,,retime,,,", "new_time_ms", r"a retime needs the new two-way time"),
        ("A,1001,1002,,retime,-3,,", "new_time_ms", r"new time '-3' ms is outside 0.1 to 2000 ms"),
        ("A,1001,1002,,retime,2500,,", "new_time_ms", r"new time '2500' ms is outside"),
        ("A,1001,1002,,retime,abc,,", "new_time_ms", r"value 'abc' is not a number"),
        ("A,1001,1002,,exclude,25,,", "new_time_ms", r"new_time_ms .25. is given with action .exclude.: only a retime"),
        ("Q,1001,1002,,exclude,,,", "line", r"line 'Q' has no picks in picks.csv"),
        ("A,999,1002,,exclude,,,", "shot", r"shot '999' of line 'A' has no picks"),
        ("A,1001,9999,,exclude,,,", "receiver", r"receiver '9999' has no pick in shot '1001' of line 'A'"),
        ("A,1001,1002,7,exclude,,,", "reflector", r"no pick of reflector '7' at receiver '1002'"),
        ("A,1001,1002,,exclude,,,yesterday", "time_stamp", r"time stamp 'yesterday' is not an ISO 8601"),
        (",1001,1002,,exclude,,,", "line", r"empty label"),
    ],
    ids=[
        "unknown-action",
        "retime-no-time",
        "retime-negative",
        "retime-absurd",
        "retime-text",
        "time-on-exclude",
        "unknown-line",
        "unknown-shot",
        "unknown-receiver",
        "unknown-reflector",
        "bad-time-stamp",
        "empty-line",
    ],
)
def test_malformed_edits_name_file_line_field(survey_dir, row, field, message):
    picks = load_survey(survey_dir / "survey.toml").picks
    assert (picks.line[0], picks.shot[0], picks.receiver[0]) == ("A", "1001", "1002")  # the pick edited on line 3
    path = survey_dir / "pick_edits.csv"
    path.write_text(HEADER + "# a comment line is skipped\nA,1001,1002,,exclude,,,\n" + row + "\n")
    with pytest.raises(InputFileError, match=r"^pick_edits\.csv, line 4, field '" + field + "': " + message) as info:
        ed.read_pick_edits(path, picks)
    assert (info.value.line, info.value.field) == (4, field)
    # the survey does not load either: the edits file beside survey.toml is read by default
    with pytest.raises(InputFileError, match=r"^pick_edits\.csv, line 4"):
        load_survey(survey_dir / "survey.toml")


def test_ambiguous_reflector_must_be_named(tmp_path):
    from rockhead.core.survey.model import Picks

    s = lambda *v: np.array(v, dtype=object)  # noqa: E731
    picks = Picks(
        s("A", "A"),
        s("1", "1"),
        s("2", "2"),
        np.array([0.02, 0.04]),
        np.array([5e-4, 5e-4]),
        s("top", "rock"),
        np.array([2, 3]),
    )
    path = tmp_path / "pick_edits.csv"
    path.write_text(HEADER + "A,1,2,,exclude,,,\n")
    with pytest.raises(InputFileError, match=r"line 2, field 'reflector': .*reflectors 'top', 'rock': name"):
        ed.read_pick_edits(path, picks)
    path.write_text(HEADER + "A,1,2,rock,exclude,,,\n")
    a = ed.apply_pick_edits(picks, ed.read_pick_edits(path, picks))
    assert a.excluded.tolist() == [False, True]


def test_survey_reads_default_and_named_edits_file(survey_dir):
    base = load_survey(survey_dir / "survey.toml")
    assert base.edits is None and not base.excluded_picks.any()
    p = base.picks
    (survey_dir / "pick_edits.csv").write_text(HEADER + f"{p.line[3]},{p.shot[3]},{p.receiver[3]},,exclude,,,\n")
    s = load_survey(survey_dir / "survey.toml")
    assert s.excluded_picks.sum() == 1 and s.excluded_picks[3]
    assert s.files["pick_edits"] == (survey_dir / "pick_edits.csv").resolve()
    # named in [files]: another file name; a named file that is missing is an error of survey.toml
    (survey_dir / "pick_edits.csv").rename(survey_dir / "my_edits.csv")
    text = (survey_dir / "survey.toml").read_text()
    (survey_dir / "survey.toml").write_text(text.replace("[files]\n", '[files]\npick_edits = "my_edits.csv"\n'))
    assert load_survey(survey_dir / "survey.toml").excluded_picks[3]
    (survey_dir / "my_edits.csv").unlink()
    with pytest.raises(SurveyConfigError, match=r"field 'files\.pick_edits': file not found: 'my_edits\.csv'"):
        load_survey(survey_dir / "survey.toml")


def _fits_equal(
    a,
    b,
    keys=(
        "velocity_m_s",
        "normal_distance_m",
        "t0_s",
        "traveltime_dip_deg",
        "rms_residual_s",
        "se_velocity_m_s",
        "picks_used",
        "picks_rejected",
    ),
):
    for k in keys:
        # The batched solver stops once a step is below its tolerance (1e-6 of the internal parameters,
        # lm.STEP_TOLERANCE) and converges quadratically, so the error left is far below it; an excluded
        # pick is padding in the batch, a deleted one is absent, which changes the floating-point path.
        # 1e-7 relative is 10x under the tolerance and 1,000x under any number shown to a user.
        np.testing.assert_allclose(getattr(a, k), getattr(b, k), rtol=1e-7, atol=1e-12, err_msg=k)


def test_excluding_equals_deleting_the_rows(survey_dir, tmp_path):
    """Excluded picks fit as if deleted from picks.csv (to the solver's convergence)."""
    s0 = load_survey(survey_dir / "survey.toml")
    p = s0.picks
    rows = [10, 11, 400, 1500]  # picks of three gathers
    text = "".join(f"{p.line[i]},{p.shot[i]},{p.receiver[i]},{p.reflector[i]},exclude,,test,\n" for i in rows)
    (survey_dir / "pick_edits.csv").write_text(HEADER + text)
    edited = fit_step(load_survey(survey_dir / "survey.toml"))

    # the reference: the same survey with those rows deleted from picks.csv
    ref_dir = tmp_path / "deleted"
    shutil.copytree(survey_dir, ref_dir)
    (ref_dir / "pick_edits.csv").unlink()
    lines = (ref_dir / "picks.csv").read_text().splitlines(keepends=True)
    drop = {int(p.file_line[i]) for i in rows}
    (ref_dir / "picks.csv").write_text("".join(ln for k, ln in enumerate(lines, start=1) if k not in drop))
    ref = fit_step(load_survey(ref_dir / "survey.toml"))

    assert len(edited.fits) == len(ref.fits)
    _fits_equal(edited.fits, ref.fits)
    assert int(edited.fits.picks_excluded.sum()) == len(rows)
    assert int(ref.fits.picks_excluded.sum()) == 0
    # the excluded picks are reported, flagged, not dropped
    assert int(edited.fits.excluded.sum()) == len(rows)


def test_retime_equals_editing_the_time(survey_dir, tmp_path):
    s0 = load_survey(survey_dir / "survey.toml")
    p = s0.picks
    i, new_ms = 700, float(p.time_s[700] * 1e3 + 1.7)
    (survey_dir / "pick_edits.csv").write_text(
        HEADER + f"{p.line[i]},{p.shot[i]},{p.receiver[i]},,retime,{new_ms!r},,\n"
    )
    edited = fit_step(load_survey(survey_dir / "survey.toml"))
    ref_dir = tmp_path / "hand"
    shutil.copytree(survey_dir, ref_dir)
    (ref_dir / "pick_edits.csv").unlink()
    header, lines = _pick_rows(ref_dir)
    k = int(p.file_line[i]) - 1
    cells = lines[k].split(",")
    cells[header.index("time_ms")] = repr(new_ms)
    lines[k] = ",".join(cells)
    (ref_dir / "picks.csv").write_text("\n".join(lines) + "\n")
    ref = fit_step(load_survey(ref_dir / "survey.toml"))
    _fits_equal(edited.fits, ref.fits)
    g = int(np.flatnonzero(edited.gathers.pick_index == i)[0])
    assert edited.gathers.time_s[g] == pytest.approx(new_ms / 1e3, abs=1e-15)
