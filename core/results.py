"""Typed results of a run: the fitted gathers and everything :func:`~.workflow.compute` finds.

Every result is a frozen dataclass with typed fields; nothing is a dict that
callers test by key. Optional parts of a run (boreholes, the joint inversion,
common-midpoint analysis) are ``None`` when absent, and a joint inversion that
was not run says why in :attr:`TomographyOutcome.skipped_reason`.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from pathlib import Path
from typing import TYPE_CHECKING, Any, Dict, Mapping, Optional, Tuple, Union

import numpy as np

from .text import printable

if TYPE_CHECKING:  # annotations only: the result types of the steps
    from shapely.geometry.base import BaseGeometry

    from .formats.layer import Layer
    from .grid import GridSpec
    from .handoff.design import DesignVolume
    from .seismic.geometry import LineFrame, ReflectorPoints
    from .seismic.misties import Misties
    from .seismic.shot_fits import ShotFits
    from .seismic.structure import DipMeasurements, SurfaceDips
    from .surface.base import CrossValidation, SurfaceGrid
    from .surface.corridor import LineCorridor
    from .surface.trend import NoTrend, PlaneTrend
    from .surface.variogram import ExperimentalVariogram, VariogramModel
    from .survey.ground import GroundModel
    from .survey.model import GatherSet, Survey
    from .tomography.layered import LayeredEstimate

__all__ = [
    "BoreholeCheck",
    "BoreholeDepths",
    "CmpTable",
    "DepthRatio",
    "DesignResult",
    "DixTable",
    "FitStep",
    "InterfaceMap",
    "IntervalVelocityMap",
    "MapProducts",
    "Overburden",
    "PointTable",
    "RunResult",
    "SiteVelocity",
    "SurfaceDiagnostics",
    "TomographyOutcome",
    "VelocityModelTable",
]


@dataclass(frozen=True)
class FitStep:
    """Gathers, their fits and the georeferenced points of one survey.

    Attributes
    ----------
    frames : Mapping[str, LineFrame]
        Line name -> geometry of the line (stations in order).
    gathers : GatherSet
        Picks grouped into gathers.
    fits : ShotFits
        Fit of every gather (per gather and per pick).
    points : ReflectorPoints
        Zero-offset reflector points, one per gather (the surface's data).
    receiver_points : ReflectorPoints
        Reflection point of every pick on its gather's plane (coverage).
    """

    frames: Mapping[str, LineFrame]
    gathers: GatherSet
    fits: ShotFits
    points: ReflectorPoints
    receiver_points: ReflectorPoints


@dataclass(frozen=True)
class SiteVelocity:
    """Robust overburden velocity of the site from the gather fits of the mapped reflector.

    The median of the usable gather velocities and the spread 1.4826 MAD (the
    normal-consistent median absolute deviation; Huber 1964). The same value
    starts the joint inversion, flags curved-reflector gathers and is the
    report's gather-fit velocity.

    Attributes
    ----------
    velocity_m_s : float
        Median velocity (m/s); NaN when no gather is usable.
    spread_m_s : float
        1.4826 times the median absolute deviation (m/s).
    n_gathers : int
        Number of gathers used (status ok, finite velocity and standard error).
    reflector : str
        The reflector whose gathers were used.
    """

    velocity_m_s: float
    spread_m_s: float
    n_gathers: int
    reflector: str


@dataclass(frozen=True)
class SurfaceDiagnostics:
    """How a surface was interpolated: the model, its trend and its cross-validation.

    Attributes
    ----------
    method : str
        "kriging" or "spline".
    n_data : int
        Number of data interpolated.
    max_distance_m : float
        Cells farther than this from any datum are masked (m).
    n_cells, n_cells_estimated : int
        Cells of the grid, and those not masked.
    trend : PlaneTrend or NoTrend
        The regional plane removed before interpolating (added back after).
    variogram : VariogramModel or None
        The model kriged with (kriging only).
    experimental_variogram : ExperimentalVariogram or None
        The experimental variogram of the residuals, when a model was fitted.
    variogram_fitted : tuple of (str, VariogramModel)
        Each candidate model as fitted, before the nugget split (empty when
        the model was given).
    variogram_scores : tuple of (str, float)
        Candidate model -> leave-one-out mean log score (lower is better);
        empty unless the model was chosen automatically.
    smoothing : float or None
        Smoothing of the thin-plate spline (spline only).
    cross_validation : CrossValidation or None
        Leave-one-out (kriging) or 5-fold (spline) cross-validation, in
        elevations (trend added back).
    """

    method: str
    n_data: int
    max_distance_m: float
    n_cells: int
    n_cells_estimated: int
    trend: Union[PlaneTrend, NoTrend]
    variogram: Optional[VariogramModel] = None
    experimental_variogram: Optional[ExperimentalVariogram] = None
    variogram_fitted: Tuple[Tuple[str, VariogramModel], ...] = ()
    variogram_scores: Tuple[Tuple[str, float], ...] = ()
    smoothing: Optional[float] = None
    cross_validation: Optional[CrossValidation] = None

    @classmethod
    def from_surface(cls, diagnostics: Mapping[str, Any]) -> SurfaceDiagnostics:
        """Type the diagnostics mapping of :func:`~.surface.trend.grid_with_trend`."""
        d = diagnostics
        smoothing = d.get("smoothing")
        return cls(
            method=str(d["method"]),
            n_data=int(d["n_data"]),
            max_distance_m=float(d["max_distance_m"]),
            n_cells=int(d["n_cells"]),
            n_cells_estimated=int(d["n_cells_estimated"]),
            trend=d["trend"],
            variogram=d.get("variogram"),
            experimental_variogram=d.get("experimental_variogram"),
            variogram_fitted=tuple((d.get("variogram_fitted") or {}).items()),
            variogram_scores=tuple((str(k), float(v)) for k, v in (d.get("variogram_scores") or {}).items()),
            smoothing=None if smoothing is None else float(smoothing),
            cross_validation=d.get("cross_validation"),
        )


@dataclass(frozen=True)
class TomographyOutcome:
    """The joint inversion of all picks (reflection traveltime tomography), or why it was not run.

    When ``skipped_reason`` is None every other field is set (``variogram``
    only where the joint estimate makes the map); when it holds the reason
    (too few picks or gathers) every other field is None.

    Attributes
    ----------
    skipped_reason : str or None
        Why the inversion was not run; None when it was.
    surface : SurfaceGrid or None
        The joint estimate of the mapped reflector: its posterior mean and
        standard deviation at every output cell, masked where not mapped.
    inversion : LayeredEstimate or None
        The joint estimate itself (all interfaces, layer velocities, residuals).
    curvature_flag : ndarray of bool (g,) or None
        Gathers of the mapped reflector whose velocity departs from the site
        velocity beyond their error (reflector curvature).
    curvature_reason : ndarray of str (g,) or None
        Why each gather was flagged ("" where not flagged).
    difference_m : ndarray (ny, nx) or None
        Inverted surface minus the kriged gather-fit surface (m).
    variogram : VariogramModel or None
        The kriging variogram of ``kriged_data`` after their trend (for
        conditional simulations of the surface); None where the joint
        estimate is only the cross-check of a kriged map (nothing simulates it).
    kriged_data : tuple of 4 ndarray or None
        ``(x_m, y_m, elevation_m, sigma_m)``: the joint estimate read at the
        gathers' reflector points, and the boreholes (for a conditional
        simulation of the surface).
    used : ndarray of bool (n,) or None
        Picks given to the estimate (reflectors of the layer order, not excluded).
    """

    skipped_reason: Optional[str] = None
    surface: Optional[SurfaceGrid] = None
    inversion: Optional[LayeredEstimate] = None
    curvature_flag: Optional[np.ndarray] = None
    curvature_reason: Optional[np.ndarray] = None
    difference_m: Optional[np.ndarray] = None
    variogram: Optional[VariogramModel] = None
    kriged_data: Optional[Tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = None
    used: Optional[np.ndarray] = None

    def __post_init__(self) -> None:
        parts = (
            self.surface,
            self.inversion,
            self.curvature_flag,
            self.curvature_reason,
            self.difference_m,
            self.kriged_data,
            self.used,
        )
        if self.skipped_reason is None and any(p is None for p in parts):
            raise ValueError("a joint inversion that ran must carry all its parts")
        if self.skipped_reason is not None and any(p is not None for p in (*parts, self.variogram)):
            raise ValueError("a skipped joint inversion carries only its reason")

    @property
    def ran(self) -> bool:
        """True when the inversion was run."""
        return self.skipped_reason is None

    @classmethod
    def skipped(cls, reason: str) -> TomographyOutcome:
        """The outcome of an inversion not run, with the reason."""
        return cls(skipped_reason=str(reason))


@dataclass(frozen=True)
class BoreholeCheck:
    """Each borehole against the seismic-only surface (boreholes not used: an independent check).

    Attributes
    ----------
    seismic_elevation_m, seismic_sigma_m : ndarray (b,)
        Estimate and standard deviation of the seismic-only surface at each borehole (m).
    residual_m : ndarray (b,)
        Borehole reflector elevation minus the seismic estimate (m).
    standardised : ndarray (b,)
        Residual over sqrt(seismic sigma^2 + borehole sigma^2).
    """

    seismic_elevation_m: np.ndarray
    seismic_sigma_m: np.ndarray
    residual_m: np.ndarray
    standardised: np.ndarray


@dataclass(frozen=True)
class DepthRatio:
    """Borehole depth over seismic-only depth at the boreholes: a velocity calibration factor.

    Attributes
    ----------
    ratio, sigma : ndarray (b,)
        Ratio at each borehole and its standard deviation.
    factor, sigma_factor : float
        Inverse-variance weighted mean ratio and its standard error (inflated
        by the scatter when that exceeds the stated errors).
    n : int
        Number of boreholes.
    """

    ratio: np.ndarray
    sigma: np.ndarray
    factor: float
    sigma_factor: float
    n: int


@dataclass(frozen=True)
class DesignResult:
    """Answers at one design level: the probability grid and the rock volume (or why not).

    Attributes
    ----------
    design_elevation_m : float
        The design level (pile toe, excavation grade), m in the survey's heights.
    probability : ndarray (ny, nx) or None
        P(reflector above the level) per cell; None when the surface has no
        standard deviation.
    volume : DesignVolume or None
        P10/P50/P90 rock volume above the level from conditional simulations;
        None when the surface cannot be simulated.
    area : shapely Polygon or None
        The design area; None for the whole mapped area.
    note : str
        Why a part is missing, or what to know.
    """

    design_elevation_m: float
    probability: Optional[np.ndarray]
    volume: Optional[DesignVolume]
    area: Optional[BaseGeometry]
    note: str = ""


@dataclass(frozen=True)
class PointTable:
    """A table of columns (equal length) located by ``x_m``, ``y_m``; field order = column order."""

    x_m: np.ndarray
    y_m: np.ndarray

    def __len__(self) -> int:
        return len(self.x_m)

    def columns(self) -> Dict[str, np.ndarray]:
        """Column name -> array, in field order (``x_m``, ``y_m`` first, then the layer's fields)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


@dataclass(frozen=True)
class DixTable(PointTable):
    """Dix (1955) interval velocities and thicknesses, one row per layer under each shot.

    ``x_m, y_m`` locate the shot; ``reflector_top``/``reflector_base`` bound
    the layer ("surface" for the first); times in ms, velocities in m/s,
    thicknesses and depths in m, with standard errors ``se_*``.
    """

    line: np.ndarray
    shot: np.ndarray
    reflector_top: np.ndarray
    reflector_base: np.ndarray
    t0_top_ms: np.ndarray
    t0_base_ms: np.ndarray
    interval_velocity_m_s: np.ndarray
    se_interval_velocity_m_s: np.ndarray
    thickness_m: np.ndarray
    se_thickness_m: np.ndarray
    depth_base_m: np.ndarray
    status: np.ndarray
    reason: np.ndarray


@dataclass(frozen=True)
class CmpTable(PointTable):
    """Common-midpoint fits t^2 = t0^2 + x^2 / Vnmo^2 (Levin 1971), one row per midpoint bin.

    ``x_m, y_m`` are the bin centres; ``depth_m`` = Vnmo t0 / 2 (a vertical,
    small-dip estimate); ``bin_m`` the bin length along the line.
    """

    line: np.ndarray
    reflector: np.ndarray
    t0_ms: np.ndarray
    nmo_velocity_m_s: np.ndarray
    se_t0_ms: np.ndarray
    se_nmo_velocity_m_s: np.ndarray
    depth_m: np.ndarray
    rms_residual_ms: np.ndarray
    picks_used: np.ndarray
    picks_rejected: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    bin_m: np.ndarray


@dataclass(frozen=True)
class BoreholeDepths(PointTable):
    """Depths at the boreholes, one row per borehole and reflector it logged (m below the collar).

    ``depth_m``, ``sigma_m``: the borehole's; ``rms_*``: the seismic-only
    surface of the gather fits, whose velocity is the rms velocity of the
    layers above (Dix 1955); ``dix_*``: the seismic-only surface of the depths
    under the shots from Dix interval velocities; ``joint_*``: the joint
    estimate, which includes the boreholes (NaN when it was not run).
    """

    borehole: np.ndarray
    reflector: np.ndarray
    collar_z_m: np.ndarray
    depth_m: np.ndarray
    sigma_m: np.ndarray
    rms_depth_m: np.ndarray
    rms_sigma_m: np.ndarray
    dix_depth_m: np.ndarray
    dix_sigma_m: np.ndarray
    joint_depth_m: np.ndarray
    joint_sigma_m: np.ndarray


@dataclass(frozen=True)
class InterfaceMap:
    """One interface of the overburden on the output grid.

    Attributes
    ----------
    reflector : str
        Its label.
    surface : SurfaceGrid
        Elevation (m) and its standard deviation (m), masked cells NaN.
    depth_m, depth_sigma_m : ndarray (ny, nx)
        Depth below ground and its standard deviation (surface and ground; m),
        NaN where the surface or the ground is unknown.
    source : str
        How it was made.
    """

    reflector: str
    surface: SurfaceGrid
    depth_m: np.ndarray
    depth_sigma_m: np.ndarray
    source: str


@dataclass(frozen=True)
class IntervalVelocityMap:
    """The vertical-average velocity of one layer on the output grid.

    ``top`` and ``base`` bound the layer ("ground" for the first top);
    ``velocity_m_s`` (ny, nx) is NaN where not estimated; ``sigma_m_s`` its
    standard deviation where known (else None); ``source`` how it was made.
    """

    top: str
    base: str
    velocity_m_s: np.ndarray
    sigma_m_s: Optional[np.ndarray]
    source: str


@dataclass(frozen=True)
class VelocityModelTable:
    """The velocity model of each layer: which model, its parameters with standard errors, and why.

    One row per layer (top down): ``layer`` (1-based), ``top``, ``base``,
    ``model`` (constant, lateral, vertical, full; or the Dix value),
    ``v0_m_s`` (at the layer's centre) and ``se_v0_m_s``, the gradients east,
    north and with depth ((m/s)/m, NaN where not in the model) and their
    ``se_*``, ``dix_velocity_m_s`` (median Dix interval velocity of the gather
    fits) and ``reason`` (why this model).
    """

    layer: np.ndarray
    top: np.ndarray
    base: np.ndarray
    model: np.ndarray
    v0_m_s: np.ndarray
    se_v0_m_s: np.ndarray
    gradient_east_m_s_per_m: np.ndarray
    se_gradient_east_m_s_per_m: np.ndarray
    gradient_north_m_s_per_m: np.ndarray
    se_gradient_north_m_s_per_m: np.ndarray
    gradient_depth_m_s_per_m: np.ndarray
    se_gradient_depth_m_s_per_m: np.ndarray
    dix_velocity_m_s: np.ndarray
    reason: np.ndarray

    def __len__(self) -> int:
        return len(self.layer)

    def columns(self) -> Dict[str, np.ndarray]:
        """Column name -> array, in field order."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


@dataclass(frozen=True)
class Overburden:
    """Every interface of the overburden, top down, and the velocities between them.

    Attributes
    ----------
    order : tuple of str
        Reflector labels top down.
    source : str
        "joint estimate" or "gather fits" (when the joint estimate did not run).
    interfaces : tuple of InterfaceMap
        One per label of ``order`` that could be mapped.
    intervals : tuple of IntervalVelocityMap
        One per layer that could be estimated.
    velocity_model : VelocityModelTable
        One row per layer.
    boreholes : BoreholeDepths or None
        The depth comparison at the boreholes (None without boreholes).
    notes : tuple of str
        What was done and why.
    """

    order: Tuple[str, ...]
    source: str
    interfaces: Tuple[InterfaceMap, ...]
    intervals: Tuple[IntervalVelocityMap, ...]
    velocity_model: VelocityModelTable
    boreholes: Optional[BoreholeDepths] = None
    notes: Tuple[str, ...] = ()

    def interface(self, reflector: str) -> InterfaceMap:
        """The map of one interface (KeyError when it has none)."""
        for m in self.interfaces:
            if m.reflector == str(reflector):
                return m
        raise KeyError(reflector)


@dataclass(frozen=True)
class MapProducts:
    """What the final surface gives on the grid besides its elevation (see :func:`~.workflow.products_step`).

    Attributes
    ----------
    ground_grid_m, ground_sigma_m : ndarray (ny, nx)
        Ground elevation and its standard deviation (m; NaN where unknown).
    ground_buffer_m : float
        How far beyond the stations' outline depth is given (m).
    depth_m, depth_sigma_m : ndarray (ny, nx)
        Depth below ground and its standard deviation (m; NaN where not given).
    contours : Layer
        Elevation and depth contours.
    surface_dips : SurfaceDips
        Dip and strike read off the surface.
    """

    ground_grid_m: np.ndarray
    ground_sigma_m: np.ndarray
    ground_buffer_m: float
    depth_m: np.ndarray
    depth_sigma_m: np.ndarray
    contours: Layer
    surface_dips: SurfaceDips


@dataclass(frozen=True)
class RunResult:
    """Everything :func:`~.workflow.compute` found; :func:`~.job.write_outputs` turns it into files.

    Grids are on ``spec`` (north-up, row 0 north, values at cell centres).
    ``seismic_surface`` is the seismic-only surface after the 3D relocation
    loop (used for the independent borehole check), ``kriged_surface`` the
    same data plus the boreholes, ``surface`` the final one (``method_used``
    says which method made it: "kriging", "spline" or "tomography").

    Attributes
    ----------
    survey : Survey
        The survey, its settings' ``reflector`` set to the mapped reflector.
    fit : FitStep
        The final gather fits (after relocation and any velocity calibration).
    ground : GroundModel
        Ground elevation (DEM or stations).
    spec : GridSpec
        The output grid.
    site_velocity : SiteVelocity
        Robust overburden velocity of the mapped reflector's gathers.
    dips : DipMeasurements
        True dip and strike at line crossings.
    misties : Misties
        Reflector elevation differences at line crossings.
    seismic_surface, kriged_surface, surface : SurfaceGrid
        See above.
    seismic_diagnostics, kriged_diagnostics : SurfaceDiagnostics
        How the first two surfaces were interpolated.
    method_used : str
        Method of ``surface``.
    ground_grid_m, depth_m : ndarray (ny, nx)
        Ground elevation and depth below ground of the final surface (m).
    contours : Layer
        Elevation and depth contours.
    surface_dips : SurfaceDips
        Dip and strike read off the final surface.
    dix : DixTable
        Interval velocities under shots with several reflectors (may be empty).
    relocation_history_m : tuple of float
        Largest cell change of each relocation iteration (m).
    borehole_check, depth_ratio : BoreholeCheck, DepthRatio or None
        With boreholes only.
    tomography : TomographyOutcome or None
        With ``surface_method`` auto or tomography only.
    cmp : CmpTable or None
        With ``gather = "cmp"`` only.
    design : DesignResult or None
        Answers at ``[design] elevation_m`` (probability grid, rock volume);
        filled by :func:`~.job.run` before the outputs are written.
    corridor : LineCorridor or None
        The corridor mapped along a single straight line (its cross-line dip
        unknown); None when lines cross.
    ground_sigma_m, depth_sigma_m : ndarray (ny, nx) or None
        Standard deviation of the ground (0 on a DEM or inside the stations'
        outline, growing beyond it, NaN where the ground is unknown) and of
        the depth (surface and ground combined; NaN where no depth is given) (m).
    ground_buffer_m : float or None
        How far beyond the stations' outline depth is given (m).
    overburden : Overburden or None
        Every interface, interval velocities, the velocity model and the
        borehole depths (:func:`~.overburden.overburden_step`).
    notes : tuple of str
        What the run decided and why (one sentence each).
    outputs : tuple of Path
        Files written (empty until :func:`~.job.run` writes them).
    """

    survey: Survey
    fit: FitStep
    ground: GroundModel
    spec: GridSpec
    site_velocity: SiteVelocity
    dips: DipMeasurements
    misties: Misties
    seismic_surface: SurfaceGrid
    seismic_diagnostics: SurfaceDiagnostics
    kriged_surface: SurfaceGrid
    kriged_diagnostics: SurfaceDiagnostics
    surface: SurfaceGrid
    method_used: str
    ground_grid_m: np.ndarray
    depth_m: np.ndarray
    contours: Layer
    surface_dips: SurfaceDips
    dix: DixTable
    relocation_history_m: Tuple[float, ...] = ()
    borehole_check: Optional[BoreholeCheck] = None
    depth_ratio: Optional[DepthRatio] = None
    tomography: Optional[TomographyOutcome] = None
    cmp: Optional[CmpTable] = None
    design: Optional[DesignResult] = None
    corridor: Optional[LineCorridor] = None
    ground_sigma_m: Optional[np.ndarray] = None
    depth_sigma_m: Optional[np.ndarray] = None
    ground_buffer_m: Optional[float] = None
    overburden: Optional[Overburden] = None
    notes: Tuple[str, ...] = ()
    outputs: Tuple[Path, ...] = ()

    def summary(self) -> str:
        """A few lines for the command line and the Processing log: gathers, surface, files written."""
        f = self.fit.fits
        n_ok = int(np.sum(f.status == "ok"))
        lines = [
            f"{printable(self.survey.name)}: {len(f)} gathers fitted ({n_ok} ok, {len(f) - n_ok} flagged), "
            f"{int(f.picks_rejected.sum())} of {len(f.residual_s)} picks rejected",
        ]
        est = int(np.sum(~self.surface.mask))
        lines.append(
            f"surface by {self.method_used}: {est} of {self.surface.mask.size} cells of "
            f"{self.spec.cell_size_m:g} m estimated"
        )
        if self.outputs:
            lines.append(f"wrote {len(self.outputs)} files to {Path(self.outputs[0]).parent}")
        return "\n".join(lines + list(self.notes))
