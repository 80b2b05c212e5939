"""Stated limits that keep a large survey's run bounded: QC figures, report, section sheets, joint inversion.

The limits themselves are measured in benchmarks/bench_survey_size.py (RESULTS.md); here each rule
is checked on small made-up inputs.
"""

from types import SimpleNamespace

import numpy as np
import pytest
from rockhead.core import job
from rockhead.core.products.handoff import MAX_LINE_SECTION_SHEETS, drawn_sections
from rockhead.core.products.outputs import figure_gathers
from rockhead.core.report import content
from rockhead.core.workflow import TOMOGRAPHY_MAX_CELLS, TOMOGRAPHY_MAX_PICKS, tomography_size_reason


def _result(n_gathers, flagged=(), lines=None, setting="auto"):
    status = np.array(["ok"] * n_gathers, dtype=object)
    status[list(flagged)] = "flagged"
    fits = type(
        "Fits", (), {"status": status, "picks_rejected": np.zeros(n_gathers, int), "__len__": lambda self: n_gathers}
    )()
    line = np.array(lines if lines is not None else ["L1"] * n_gathers, dtype=object)
    return SimpleNamespace(
        fit=SimpleNamespace(fits=fits, gathers=SimpleNamespace(line=line)),
        survey=SimpleNamespace(settings=SimpleNamespace(gather_figures=setting)),
    )


@pytest.mark.parametrize("n", [56, 5000], ids=["56-gathers", "5000-gathers"])
def test_auto_figures_are_the_flagged_gathers(n):
    # every gather's picks are in its line's figure: a figure of its own only where the fit was flagged
    assert job.figures_for(_result(n)) == "flagged"


def test_asked_figures_win_over_the_setting():
    assert job.figures_for(_result(5000, setting="all")) == "all"
    assert job.figures_for(_result(5, setting="all"), "none") == "none"


def test_flagged_figures_are_the_flagged_gathers():
    r = _result(10, flagged=(2, 7))
    assert figure_gathers(r, "flagged").tolist() == [2, 7]
    assert figure_gathers(r, "none").tolist() == []
    assert len(figure_gathers(r, "all")) == 10


def test_report_shows_the_lines_with_most_flagged_gathers():
    names = [f"L{i:03d}" for i in range(100)]
    lines = [n for n in names for _ in range(3)]
    flagged = [3 * 57, 3 * 57 + 1, 3 * 12]  # line L057 has two flagged gathers, L012 one
    r = _result(len(lines), flagged=flagged, lines=lines)
    shown = content._report_lines(r, names)
    assert len(shown) == content.REPORT_MAX_LINES
    assert "L057" in shown and "L012" in shown
    assert shown == sorted(shown)  # in the lines' order, not by count


def test_section_sheets_spread_over_the_lines():
    secs = [SimpleNamespace(title=f"line {i}") for i in range(1000)]
    flags = drawn_sections(secs)
    assert sum(flags) <= MAX_LINE_SECTION_SHEETS
    picked = np.flatnonzero(flags)
    assert picked[0] == 0 and picked[-1] >= 1000 - 1000 // MAX_LINE_SECTION_SHEETS - 1  # spread to the end


@pytest.mark.parametrize(
    "picks, nx, ny, fine",
    [
        (TOMOGRAPHY_MAX_PICKS, 100, 100, True),
        (TOMOGRAPHY_MAX_PICKS + 1, 100, 100, False),
        (1000, TOMOGRAPHY_MAX_CELLS // 400, 400, True),
        (1000, TOMOGRAPHY_MAX_CELLS // 400 + 1, 400, False),
    ],
    ids=["picks-at-limit", "picks-over", "cells-at-limit", "cells-over"],
)
def test_joint_inversion_size_limits(picks, nx, ny, fine):
    reason = tomography_size_reason(picks, nx, ny)
    assert (reason is None) == fine
    if not fine:
        assert "stated limit" in reason
