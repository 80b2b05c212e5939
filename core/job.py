"""``run``: read a survey, compute, write every output (the command line's job)."""

from __future__ import annotations

import warnings
from contextlib import nullcontext
from dataclasses import replace
from pathlib import Path
from typing import List, Optional

from .errors import RockheadWarning
from .formats.gdalio import check_engine
from .formats.runfolder import RunFolder
from .handoff.steps import design_step
from .products import outputs
from .products.handoff import HANDOFF_NAMES
from .progress import NullProgress, SubProgress
from .results import RunResult
from .survey.config import check_for_run, load_survey
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

__all__ = [
    "OUTPUT_NAMES",
    "figures_for",
    "open_output_folder",
    "run",
    "with_design",
    "write_outputs",
]


def with_design(result: RunResult, progress=None) -> RunResult:
    """``result`` with its design-level answers (``[design] elevation_m``), computed once.

    The probabilities and simulated rock volumes of the design level; the
    result itself when the survey sets no level or they are already there.
    """
    if result.design is None and result.survey.handoff.design_elevation_m is not None:
        return replace(result, design=design_step(result, progress or NullProgress()))
    return result


def write_outputs(
    result: RunResult, out_dir, progress=None, gather_figures: str = "flagged", workers=None
) -> List[Path]:
    """Write every output of ``result`` into ``out_dir`` (a folder path or an open RunFolder), as one set.

    With ``[design] elevation_m`` and no design answers in ``result`` yet,
    they are computed first (:func:`with_design`). Every line has its QC
    figure; ``gather_figures`` chooses the gathers with one of their own:
    ``all``, ``flagged`` (status not ok) or ``none``. ``workers``: the
    drawing processes forked for ``out_dir`` (an open RunFolder) before the
    computation (:func:`~.products.outputs.output_workers`), if any.
    """
    progress = progress or NullProgress()
    return outputs.write_all(with_design(result, progress), out_dir, progress, gather_figures, workers)


def open_output_folder(survey, out_dir) -> RunFolder:
    """Check, lock and prepare ``out_dir`` for a run of ``survey`` (see :class:`RunFolder`).

    Warns (:class:`~.errors.RockheadWarning`) when leftovers of a killed run
    were tidied away. The caller closes it (``with``).
    """
    folder = RunFolder(out_dir, survey.input_files()).open()
    if folder.stale_lock:
        warnings.warn(
            f"output folder '{folder.requested}': an earlier run ({folder.previous_owner}) was killed while "
            "writing it; its lock and leftovers were removed, its earlier complete outputs kept",
            RockheadWarning,
            stacklevel=2,
        )
    return folder


def run(
    survey_path,
    out_dir,
    method: Optional[str] = None,
    progress=None,
    *,
    gather_figures: Optional[str] = None,
    confine_inputs: bool = False,
) -> RunResult:
    """Read the survey, run the whole job and write every output into ``out_dir``.

    The output folder is checked and locked before the computation starts (a
    second run into it at the same time refuses at once) and replaced as a
    whole at the end (:class:`~.formats.runfolder.RunFolder`). Where a child
    process can be forked, the processes that write the map products, draw
    the QC figures and the report, and the printed sheets are started then
    and import what they need while the computation runs (:func:`~.products.outputs.output_workers`). Returns the
    :class:`~.results.RunResult` with its design answers and ``outputs``,
    the files written.

    Parameters
    ----------
    survey_path, out_dir : str or Path
        survey.toml and the output folder.
    method : str, optional
        Surface method; default the survey's ``surface_method``.
    progress : object, optional
        Progress sink.
    gather_figures : str, optional
        ``auto``, ``all``, ``flagged`` or ``none``; default the survey's ``gather_figures``
        (:func:`figures_for`).
    confine_inputs : bool
        Refuse input files outside the survey's folder (see :func:`~.survey.config.load_survey`).
    """
    progress = progress or NullProgress()
    survey = check_for_run(load_survey(survey_path, confine_inputs=confine_inputs))
    check_engine(feature="writing the GeoPackage and the GeoTIFFs")  # a missing GDAL is said before the work
    with open_output_folder(survey, out_dir) as folder, _optional(outputs.output_workers(folder)) as workers:
        result = compute(survey, method=method, progress=SubProgress(progress, 0, 85))
        stage = SubProgress(progress, 85, 100)
        result = with_design(result, stage)
        written = write_outputs(
            result, folder, stage, gather_figures=figures_for(result, gather_figures), workers=workers
        )
    return replace(result, outputs=tuple(written))


def _optional(context):
    """``context``, or a context manager giving None for None."""
    return context if context is not None else nullcontext()


def figures_for(result: RunResult, asked: Optional[str] = None) -> str:
    """The gathers that get a QC figure of their own: ``asked``, else the survey's setting; ``auto`` resolved.

    ``auto`` is ``flagged``: every pick of every gather, rejected ones marked,
    is in its line's QC figure, so a figure of its own is drawn where a fit
    was flagged (the gathers a reviewer asks about); ``all`` draws every
    gather's.
    """
    which = asked or getattr(result.survey.settings, "gather_figures", "auto")
    if which == "auto":
        return "flagged"
    return str(which)
