"""Typed results of a run: the fitted gathers and everything :func:`~.workflow.compute` finds."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

__all__ = ["FitStep", "RunResult"]


@dataclass
class FitStep:
    """Gathers, their fits and the georeferenced points of one survey."""

    frames: dict
    gathers: object
    fits: object
    points: object  # zero-offset reflector points (one per gather)
    receiver_points: object  # reflection point of every pick


@dataclass
class RunResult:
    """Everything :func:`compute` found; :func:`write_outputs` turns it into files.

    Grids are on ``spec`` (north-up, row 0 north). ``seismic_surface`` is the
    seismic-only surface after the 3D relocation loop (used for the
    independent borehole check), ``kriged_surface`` the same data plus the
    boreholes, ``surface`` the final one (``method_used`` says which method
    made it: "kriging", "spline" or "tomography").
    """

    survey: object
    fit: FitStep
    ground: object = None
    spec: object = None
    dips: object = None
    misties: object = None
    seismic_surface: object = None
    seismic_diag: dict = None
    kriged_surface: object = None
    kriged_diag: dict = None
    tomography: dict = None
    surface: object = None
    method_used: str = ""
    ground_grid_m: np.ndarray = None
    depth_m: np.ndarray = None
    contours: object = None
    surface_dips: object = None
    borehole_check: dict = None
    depth_ratio: dict = None
    dix: dict = None
    cmp: dict = None
    design: object = None  # handoff.steps.DesignResult with [design] elevation_m (filled by job.write_outputs)
    corridor: object = None  # surface.corridor.LineCorridor when the survey is a single line
    relocation_history_m: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    outputs: list = field(default_factory=list)

    def summary(self) -> str:
        f = self.fit.fits
        n_ok = int(np.sum(f.status == "ok"))
        lines = [
            f"{self.survey.name}: {len(f)} gathers fitted ({n_ok} ok, {len(f) - n_ok} flagged), "
            f"{int(f.picks_rejected.sum())} of {len(f.residual_s)} picks rejected",
        ]
        if self.surface is not None:
            est = int(np.sum(~self.surface.mask))
            lines.append(f"surface by {self.method_used}: {est} of {self.surface.mask.size} cells of "
                         f"{self.spec.cell_size_m:g} m estimated")
        if self.outputs:
            lines.append(f"wrote {len(self.outputs)} files to {Path(self.outputs[0]).parent}")
        return "\n".join(lines + self.notes)
