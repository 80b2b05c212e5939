"""The bad-input corpus through the whole-survey algorithm: reported, QGIS unharmed.

Every faulty survey of tests/bad_inputs/ must stop the algorithm with a
QgsProcessingException carrying the core's own one-line message (file, line,
field), write nothing into the output folder, and leave QGIS able to run the
next algorithm.
"""

from pathlib import Path

import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsProcessingException, QgsProcessingFeedback
from rockhead.core.errors import RockheadError
from rockhead.core.survey.config import check_for_run, load_survey

CORPUS = Path(__file__).resolve().parents[1] / "bad_inputs"
BAD = sorted(
    p.name for p in CORPUS.iterdir() if (p / "survey.toml").is_file() and not p.name.startswith(("good_", "warn_"))
)


def _core_message(case):
    """The message of the core's own reading and survey-wide checks (as `rockhead check` does)."""
    with pytest.raises(RockheadError) as info:
        check_for_run(load_survey(CORPUS / case / "survey.toml"))
    return str(info.value)


@pytest.mark.parametrize("case", BAD, ids=BAD)
def test_bad_survey_is_reported_through_processing(provider, case, tmp_path):
    import processing

    out = tmp_path / "out"
    feedback = QgsProcessingFeedback()
    with pytest.raises(QgsProcessingException) as info:
        processing.run(
            "rockhead:runsurvey",
            {"SURVEY": str(CORPUS / case / "survey.toml"), "METHOD": 2, "OUTPUT": str(out)},
            feedback=feedback,
        )
    assert _core_message(case) in str(info.value)
    assert not out.exists() or not any(out.iterdir())


def test_qgis_still_runs_after_the_faults(provider, sample_survey, tmp_path):
    import processing

    res = processing.run(
        "rockhead:fitgathers",
        {"SURVEY": str(sample_survey), "SHOTS": "TEMPORARY_OUTPUT", "REFLECTOR_POINTS": "TEMPORARY_OUTPUT"},
    )
    assert res["SHOTS"].featureCount() == 56
