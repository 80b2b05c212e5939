"""Exit codes of the command line: 2 for bad input (any RockheadError), 1 only for a bug.

The contract (README, Using it; DEVELOPERS.md, Errors): bad input exits 2 with one line on
stderr naming the file, line and field, and no traceback; anything else that escapes is an
internal error, exit 1, one line, the traceback only with --debug.
"""

import numpy as np
import pytest
from rockhead.core import errors
from rockhead.core.cli import main
from rockhead.core.grid import GridSpec
from test_pipeline_layers import _write_survey  # a small two-line survey made by the forward models


def _stderr_line(capsys):
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_grid_error_is_a_rockhead_error_and_a_value_error():
    # every point at one place: no spacing to choose a cell size from
    with pytest.raises(errors.GridError, match="cannot choose a cell size") as info:
        GridSpec.from_data(np.zeros(5), np.zeros(5))
    assert isinstance(info.value, errors.RockheadError) and isinstance(info.value, ValueError)


def test_cell_size_needing_too_many_cells_is_refused():
    # 0.001 m cells over 100 m x 100 m (no margin): 10^10 cells, far above the 16 million limit
    with pytest.raises(errors.GridError, match=r"needs 10,000,000,000 cells, more than 16,000,000.*0\.05 m or more"):
        GridSpec.from_data([0.0, 100.0], [0.0, 100.0], cell_size_m=0.001, pad_m=0.0)


def test_grid_error_from_survey_settings_exits_2_naming_file_line_field(tmp_path, capsys):
    """A [processing] cell_size_m too small for the site: a grid error, reported as bad input."""
    path = _write_survey(tmp_path)
    path.write_text(path.read_text() + "[processing]\ncell_size_m = 0.001\n")
    line_no = path.read_text().splitlines().index("cell_size_m = 0.001") + 1
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out)])
    line = _stderr_line(capsys)
    assert code == 2, line
    where = f"rockhead: error: survey.toml, line {line_no}, field 'processing.cell_size_m'"
    # refused by the survey's checks before any work: below a tenth of the station spacing
    assert line.startswith(f"{where}: cell_size_m = 0.001 m is below a tenth of the station spacing")
    assert "give at least" in line
    assert not out.exists() or not any(out.iterdir())  # nothing written


def test_a_bug_exits_1_as_an_internal_error(tmp_path, capsys, monkeypatch):
    def broken(*args, **kwargs):
        return 1 / 0

    monkeypatch.setattr("rockhead.core.job.compute", broken)
    path = _write_survey(tmp_path)
    code = main(["run", str(path), "--out", str(tmp_path / "out")])
    line = _stderr_line(capsys)
    assert code == 1
    assert line.startswith("rockhead: internal error: ZeroDivisionError") and line.endswith("(rerun with --debug)")
