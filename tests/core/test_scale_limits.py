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


@pytest.mark.slow  # a whole run
def test_report_line_figures_stay_within_their_byte_limit(tmp_path, monkeypatch):
    # two crossing lines, each with a line QC figure of 1 MB: with a limit of 1.5 MB the first line's
    # figures are embedded, the second line's QC figure is linked to its file instead
    from plane_site import PlaneSite, write_site
    from rockhead.core.products.outputs import result_layers
    from rockhead.core.survey.config import load_survey
    from rockhead.core.workflow import compute

    site = PlaneSite(lines=[("A", (0.0, 0.0), 0.0, 49), ("B", (0.0, 0.0), 90.0, 49)])
    r = compute(load_survey(write_site(tmp_path, site)), method="kriging")
    big = b"\x89PNG\r\n\x1a\n" + bytes(2**20)
    line_figures = {line: (f"line_{line}.png", big) for line in ("A", "B")}
    monkeypatch.setattr(content, "REPORT_MAX_LINE_FIGURE_BYTES", int(1.5 * 2**20))
    text = content.build_report(r, result_layers(r), {}, line_figures=line_figures)
    assert text.count('alt="QC of the gathers of line A') == 1
    assert 'alt="QC of the gathers of line B' not in text
    assert 'href="qc/line_B.png"' in text
    # base64 makes 4 bytes of 3: the page holds one 1 MB figure, not two
    assert len(text) < 1.34 * 1.5 * 2**20 + 2**20
    # without the limit both are embedded (as the sample's report always is: 0.9 MB of figures)
    monkeypatch.setattr(content, "REPORT_MAX_LINE_FIGURE_BYTES", 4 * 2**20)
    text = content.build_report(r, result_layers(r), {}, line_figures=line_figures)
    assert text.count('alt="QC of the gathers of line ') == 2


def test_pick_rows_are_counted_without_parsing(tmp_path):
    from rockhead.core.survey.config import count_data_rows

    p = tmp_path / "picks.csv"
    p.write_bytes(b"line,shot,receiver,time_ms\n# a comment\nA,1,2,10\n\nA,1,3,11\nA,1,4,12")  # no last newline
    assert count_data_rows(p, limit=10) == 5  # under the limit: 6 lines less the header (an upper bound)
    assert count_data_rows(p, limit=2) == 3  # over it: counted row by row, comments and blank lines left out


@pytest.mark.slow  # a whole run
def test_skipped_joint_inversion_is_stated_in_summary_and_report(tmp_path, monkeypatch):
    # beyond its stated pick limit the joint inversion is skipped: the command line's summary and
    # the report both say so and why (here with the limit lowered to the size of a small survey)
    from plane_site import PlaneSite, write_site
    from rockhead.core import workflow
    from rockhead.core.products.outputs import result_layers
    from rockhead.core.survey.config import load_survey

    monkeypatch.setattr(workflow, "TOMOGRAPHY_MAX_PICKS", 100)
    site = PlaneSite(lines=[("A", (0.0, 0.0), 0.0, 49), ("B", (0.0, 0.0), 90.0, 49)])
    r = workflow.compute(load_survey(write_site(tmp_path, site)), method="auto")
    assert r.tomography.skipped_reason and "more than its stated limit of 100" in r.tomography.skipped_reason
    assert "joint inversion skipped" in r.summary() and "stated limit of 100" in r.summary()
    text = content.build_report(r, result_layers(r), {})
    assert "Joint inversion not run" in text and "stated limit of 100" in text


def test_refused_pick_count_states_the_run_time_in_words():
    """The max_picks refusal gave 'about 0 min' for a small file; small counts now read 'less than a minute'."""
    from rockhead.core.survey.config import RUN_SECONDS_PER_MILLION_PICKS, _processor_time

    million = RUN_SECONDS_PER_MILLION_PICKS / 60  # minutes per million picks (the benchmark's rate)
    assert _processor_time(1_000_000) == f"about {million:.0f} min"
    assert _processor_time(2_688) == "less than a minute"
    assert _processor_time(0) == "less than a minute"
