"""``run``: read a survey, compute, write every output (the command line's job)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import List, Optional

from .formats.atomic import check_output_dir
from .formats.gdalio import engine
from .handoff.steps import design_step
from .products import outputs
from .products.handoff import HANDOFF_NAMES
from .progress import NullProgress, SubProgress
from .results import RunResult
from .survey.config import load_survey
from .workflow import compute

OUTPUT_NAMES = (
    "survey.gpkg",
    "reflector_elevation.tif",
    "reflector_depth.tif",
    "depth_sigma.tif",
    "elevation_sigma.tif",
    "report.html",
    "contours_elevation.dxf",
    "contours_depth.dxf",
    *HANDOFF_NAMES,
)

__all__ = ["OUTPUT_NAMES", "run", "with_design", "write_outputs"]


def with_design(result: RunResult, progress=None) -> RunResult:
    """``result`` with its design-level answers (``[design] elevation_m``), computed once.

    The probabilities and simulated rock volumes of the design level; the
    result itself when the survey sets no level or they are already there.
    """
    if result.design is None and result.survey.handoff.design_elevation_m is not None:
        return replace(result, design=design_step(result, progress or NullProgress()))
    return result


def write_outputs(result: RunResult, out_dir, progress=None) -> List[Path]:
    """Write every output of ``result`` into ``out_dir`` (atomically, as one set).

    With ``[design] elevation_m`` and no design answers in ``result`` yet,
    they are computed first (:func:`with_design`).
    """
    progress = progress or NullProgress()
    return outputs.write_all(with_design(result, progress), out_dir, progress)


def run(survey_path, out_dir, method: Optional[str] = None, progress=None) -> RunResult:
    """Read the survey, run the whole job and write every output into ``out_dir``.

    Returns the :class:`~.results.RunResult` with its design answers and
    ``outputs``, the files written.
    """
    progress = progress or NullProgress()
    survey = load_survey(survey_path)
    inputs = [Path(p) for p in survey.files.values() if p is not None] + [Path(survey_path)]
    check_output_dir(out_dir, inputs, OUTPUT_NAMES)
    engine(feature="writing the GeoPackage and the GeoTIFFs")  # a missing GDAL is said before the work
    result = compute(survey, method=method, progress=SubProgress(progress, 0, 85))
    stage = SubProgress(progress, 85, 100)
    result = with_design(result, stage)
    written = write_outputs(result, Path(out_dir), stage)
    return replace(result, outputs=tuple(written))
