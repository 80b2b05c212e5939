"""``run``: read a survey, compute, write every output (the command line's job)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

from .formats.atomic import check_output_dir
from .formats.gdalio import engine
from .handoff.steps import design_step
from .products import outputs
from .products.handoff import HANDOFF_NAMES
from .progress import NullProgress, SubProgress
from .results import RunResult
from .survey.config import load_survey
from .workflow import compute

OUTPUT_NAMES = ("survey.gpkg", "reflector_elevation.tif", "reflector_depth.tif", "depth_sigma.tif",
                "report.html", "contours_elevation.dxf", "contours_depth.dxf", *HANDOFF_NAMES)

__all__ = ["OUTPUT_NAMES", "run", "write_outputs"]


def write_outputs(result: RunResult, out_dir, progress=None) -> list:
    """Write every output of ``result`` into ``out_dir`` (atomically, as one set).

    With ``[design] elevation_m`` the design-level answers (probabilities,
    simulated rock volumes) are computed first, once, into ``result.design``.
    """
    progress = progress or NullProgress()
    if result.design is None and result.survey.handoff.design_elevation_m is not None:
        result.design = design_step(result, progress)
    return outputs.write_all(result, out_dir, progress)


def run(survey_path, out_dir, method: Optional[str] = None, progress=None) -> RunResult:
    """Read the survey, run the whole job and write every output into ``out_dir``."""
    progress = progress or NullProgress()
    survey = load_survey(survey_path)
    inputs = [Path(p) for p in survey.files.values() if p is not None] + [Path(survey_path)]
    check_output_dir(out_dir, inputs, OUTPUT_NAMES)
    engine(feature="writing the GeoPackage and the GeoTIFFs")  # a missing GDAL is said before the work
    result = compute(survey, method=method, progress=SubProgress(progress, 0, 85))
    result.outputs = write_outputs(result, Path(out_dir), SubProgress(progress, 85, 100))
    return result
