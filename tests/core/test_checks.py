"""Survey-wide checks and hostile input paths: what a run would refuse is refused by `check`.

The bad-input corpus (tests/bad_inputs/) holds one folder per fault; the cases
here need a file system object a repository cannot hold (a FIFO), a second
folder, or a look at the grid the run would make.
"""

import os
import shutil
import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from rockhead.core.errors import InputFileError, RockheadWarning, SurveyConfigError
from rockhead.core.survey.checks import grid_buffer_m, station_spacing_m
from rockhead.core.survey.config import check_for_run
from rockhead.core.survey.config import load_survey as _load
from rockhead.core.survey.csvfile import excerpt
from rockhead.core.workflow import grid_spec


def load_survey(path, **kwargs):
    """What ``rockhead check`` does: read the files, then check them together for a run."""
    return check_for_run(_load(path, **kwargs))


CORPUS = Path(__file__).resolve().parents[1] / "bad_inputs"


@pytest.fixture
def base(tmp_path):
    shutil.copytree(CORPUS / "good_base", tmp_path / "survey")
    return tmp_path / "survey" / "survey.toml"


def _set(toml: Path, old: str, new: str) -> None:
    text = toml.read_text()
    assert old in text
    toml.write_text(text.replace(old, new))


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are POSIX")
def test_a_named_pipe_is_said_to_be_one(base):
    os.mkfifo(base.parent / "pipe.csv")
    _set(base, 'stations = "stations.csv"', 'stations = "pipe.csv"')
    # reading a pipe would block until a writer comes: it is refused before any read
    with pytest.raises(SurveyConfigError, match=r"field 'files\.stations': 'pipe\.csv' .* is a named pipe \(FIFO\)"):
        load_survey(base)


def test_another_file_is_never_quoted(base):
    secret = "root:x:0:0:root:/root:/bin/bash"
    (base.parent / "accounts").write_text(secret + "\n")
    _set(base, 'stations = "stations.csv"', 'stations = "accounts"')
    with pytest.raises(InputFileError) as info:
        load_survey(base)
    assert "root" not in str(info.value) and "bash" not in str(info.value)


def test_a_csv_of_ours_is_quoted_short_and_printable(base):
    stations = base.parent / "stations.csv"
    lines = stations.read_text().splitlines()
    lines[3] = "L1,102,\x1b[31m" + "9" * 200 + "x,0,310"
    stations.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputFileError, match=r"line 4, field 'x': value '\\x1b\[31m9+…' is not a number") as info:
        load_survey(base)
    assert "\x1b" not in str(info.value) and len(str(info.value)) < 200


def test_excerpt_escapes_and_cuts():
    assert excerpt("L1") == "'L1'"
    assert excerpt("a\nb") == "'a\\nb'"
    assert len(excerpt("x" * 500)) == 42  # 40 characters (the last an ellipsis) and two quotes


def test_inputs_confined_to_the_survey_folder(base, tmp_path):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    shutil.move(str(base.parent / "picks.csv"), outside / "picks.csv")
    _set(base, 'picks = "picks.csv"', 'picks = "../elsewhere/picks.csv"')
    assert len(load_survey(base).picks) > 0  # by default any readable path
    with pytest.raises(SurveyConfigError, match=r"field 'files\.picks': .* outside the survey's folder"):
        load_survey(base, confine_inputs=True)


def test_few_shots_map_by_spline(base):
    """Four end-on gathers: too few distance classes for a variogram, fine for a spline."""
    picks = base.parent / "picks.csv"
    rows = picks.read_text().splitlines()
    picks.write_text("\n".join(r for r in rows if ",106," not in r and ",206," not in r) + "\n")
    with pytest.raises(InputFileError, match=r"too few or too clustered for a variogram .* surface_method = .spline."):
        load_survey(base)
    _set(base, "[processing]", '[processing]\nsurface_method = "spline"')
    assert load_survey(base).settings.surface_method == "spline"


def test_reflector_setting_takes_the_picks_spelling(base):
    _set(base, "[processing]", '[processing]\nreflector = "ONE"')
    picks = base.parent / "picks.csv"
    rows = picks.read_text().splitlines()
    picks.write_text("\n".join([rows[0] + ",reflector"] + [r + ",one" for r in rows[1:]]) + "\n")
    assert load_survey(base).settings.reflector == "one"


def test_station_spacing_of_the_corpus_site(base):
    # the corpus site: stations 5 m apart along each line (make_corpus.py)
    assert station_spacing_m(load_survey(base)) == pytest.approx(5.0)


def _points(x, y):
    return SimpleNamespace(x_m=np.asarray(x, float), y_m=np.asarray(y, float))


def test_grid_ignores_stations_far_away(base):
    """The grid covers the reflector points and boreholes plus the stated buffer, not every station."""
    survey = load_survey(base)
    far = SimpleNamespace(**{**survey.stations.__dict__})
    far.x_m = np.r_[survey.stations.x_m, 1e6]  # a station (or a line without picks) 1000 km away
    survey_far = SimpleNamespace(settings=survey.settings, boreholes=survey.boreholes, stations=far, path=survey.path)
    pts = _points(500000.0 + np.array([-20.0, 0.0, 20.0, 0.0]), 5500000.0 + np.array([0.0, 20.0, 0.0, -20.0]))
    spec = grid_spec(survey_far, pts, spread_m=50.0)
    w, e, s, n = spec.bounds
    buffer = grid_buffer_m(40.0, 50.0)  # 25 m + 2 m
    assert w <= 500000.0 - 20.0 - buffer + spec.cell_size_m and e >= 500000.0 + 20.0 + buffer - spec.cell_size_m
    assert e - w < 200.0 and n - s < 200.0


def test_grid_coarsens_the_automatic_cell_within_the_limit(base):
    survey = load_survey(base)
    settings = SimpleNamespace(**{**survey.settings.__dict__, "max_grid_cells": 50})
    s = SimpleNamespace(settings=settings, boreholes=None, path=survey.path)
    pts = _points(np.linspace(0, 100, 11), np.linspace(0, 100, 11) * 0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        spec = grid_spec(s, pts, spread_m=20.0)
    assert spec.size <= 50
    assert any(issubclass(w.category, RockheadWarning) and "max_grid_cells = 50" in str(w.message) for w in caught)


def test_grid_refuses_a_cell_beyond_the_limit_naming_the_key(base):
    survey = load_survey(base)
    settings = SimpleNamespace(**{**survey.settings.__dict__, "max_grid_cells": 50, "cell_size_m": 1.0})
    s = SimpleNamespace(settings=settings, boreholes=None, path=survey.path)
    pts = _points(np.linspace(0, 100, 11), np.zeros(11))
    with pytest.raises(SurveyConfigError, match=r"^survey\.toml, field 'processing\.cell_size_m': .* raise max_grid"):
        grid_spec(s, pts, spread_m=20.0)
