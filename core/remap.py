"""The interpretation loop: after a pick edit, the map again within a second, then the whole run.

An interpreter edits picks (``pick_edits.csv``, :mod:`.survey.edits`) and
wants to see what the edit does to the map at once. A whole run (:func:`.job.run`)
chooses the variogram model by cross-validating three models at every step of
the 3D relocation loop, runs the joint inversion of all picks as a
cross-check, and draws the report and the sheets: seconds to minutes. The
loop here has two steps:

1. :func:`remap` — read the survey again (with the edits file), refit every
   gather (the batched fits take milliseconds, so all of them, not only the
   edited ones), redo the 3D relocation and the surface with the variogram
   model and the surface method the last whole run chose (``pinned``), and
   write the map products (:func:`~.products.outputs.write_map`: GeoPackage
   and its styles, GeoTIFFs and theirs, CSV, DXF). With the same model and
   method the map is the one a whole run gives (the model choice is the only
   thing left out, and it changes only when the edit tips the
   cross-validation scores); the joint-inversion cross-check, the report and
   the sheets are not redone, and the result's notes say so.
2. the whole run (:func:`.job.run`), the same as ``rockhead run``, which
   replaces every product, the map included.

The QGIS panel runs step 1 after each edit and step 2 in the background.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Optional

from .progress import NullProgress, SubProgress
from .results import RunResult
from .survey.config import load_survey
from .workflow import compute

__all__ = ["Pinned", "RemapOutcome", "pinned_choices", "remap"]


@dataclass(frozen=True)
class Pinned:
    """What a whole run chose, kept for the quick remaps that follow it.

    Attributes
    ----------
    variogram_model : str or None
        The model the run's kriging used ("spherical", "exponential",
        "gaussian"); None when no variogram was fitted (spline).
    method : str
        The surface method that made the map ("kriging", "spline" or
        "tomography").
    """

    variogram_model: Optional[str]
    method: str


@dataclass(frozen=True)
class RemapOutcome:
    """A quick remap: its result, the files it wrote and how long it took.

    Attributes
    ----------
    result : RunResult
        The computation after the edits.
    written : list of Path
        The map products written (empty without an output folder).
    seconds : float
        Wall-clock time of the remap (s), reading and writing included.
    """

    result: RunResult
    written: list
    seconds: float


def pinned_choices(result: RunResult) -> Pinned:
    """The variogram model and surface method a run used (for :func:`remap`).

    Parameters
    ----------
    result : RunResult
        A whole run.

    Returns
    -------
    Pinned
    """
    vm = result.seismic_diagnostics.variogram
    return Pinned(variogram_model=None if vm is None else str(vm.model), method=result.method_used or "kriging")


def remap(survey_path, pinned: Pinned, out_dir=None, progress=None) -> RemapOutcome:
    """Read the survey (with its pick edits), compute the map with ``pinned`` choices, write the map.

    Parameters
    ----------
    survey_path : str or Path
        The survey.toml; its pick edits file is read as by every run.
    pinned : Pinned
        The choices of the last whole run (:func:`pinned_choices`).
    out_dir : str or Path, optional
        Results folder whose map products are replaced (as one set); None
        computes only.
    progress : Progress, optional
        Progress and cancellation.

    Returns
    -------
    RemapOutcome

    Raises
    ------
    RockheadError
        As :func:`.job.run` (bad input, a fit that cannot be set up, an
        output that cannot be written); CancelledError when cancelled.
    """
    from .products.outputs import write_map

    t0 = time.perf_counter()
    progress = progress or NullProgress()
    survey = load_survey(survey_path)
    settings = survey.settings
    if pinned.variogram_model is not None and settings.variogram_model == "auto":
        settings = replace(settings, variogram_model=pinned.variogram_model)
    survey = replace(survey, settings=settings)
    result = compute(survey, method=pinned.method, progress=SubProgress(progress, 0, 80))
    note = (
        f"quick remap after pick edits: the {pinned.method} surface"
        + (f" with the {pinned.variogram_model} variogram" if pinned.variogram_model else "")
        + " the last whole run chose; the whole run that follows redoes every product"
    )
    result = replace(result, notes=(*result.notes, note))
    written = []
    if out_dir is not None:
        written = write_map(result, Path(out_dir), SubProgress(progress, 80, 100))
    return RemapOutcome(result, written, time.perf_counter() - t0)
