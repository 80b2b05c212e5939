"""The survey model: plain, frozen containers that flow between the core modules.

Data flow (one way)::

    files --survey readers--> Survey --geometry--> GatherSet --shot_fits--> ShotFits
          --geometry--> reflector points --structure/surface--> map products

All arrays of one container have the same length; text columns are numpy
object arrays of ``str``; coordinates are in the survey's *working* CRS
(projected, metres). ``file_line`` keeps the 1-based line number in the input
file of each row, so that later checks can still point at the file.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Optional

import numpy as np

if TYPE_CHECKING:
    from pyproj import CRS

__all__ = ["Alignment", "Boreholes", "GatherSet", "Handoff", "Picks", "Settings", "Stations", "Survey"]


@dataclass(frozen=True)
class Stations:
    """Surveyed points (geophone stations and shot points), one row each.

    Attributes
    ----------
    line, station : (n,) object ndarray of str
        Line and station labels.
    x_m, y_m : (n,) ndarray
        Easting and northing in the working CRS (m).
    z_m : (n,) ndarray
        Ground elevation (m).
    file_line : (n,) int ndarray
        1-based line of each row in stations.csv.
    """

    line: np.ndarray  # str
    station: np.ndarray  # str
    x_m: np.ndarray  # easting in the working CRS
    y_m: np.ndarray  # northing in the working CRS
    z_m: np.ndarray  # ground elevation
    file_line: np.ndarray  # int, 1-based line in stations.csv

    def __len__(self) -> int:
        """Return the number of stations."""
        return len(self.x_m)

    @property
    def xyz(self) -> np.ndarray:
        """(n, 3) array of x, y, z."""
        return np.column_stack([self.x_m, self.y_m, self.z_m])


@dataclass(frozen=True)
class Picks:
    """Picked reflection arrivals, one row per (line, shot, receiver, reflector).

    Attributes
    ----------
    line, shot, receiver : (n,) object ndarray of str
        Line, and the station labels of the shot and the receiver on it.
    time_s : (n,) ndarray
        Two-way time (s).
    sigma_s : (n,) ndarray
        Pick standard error (s).
    reflector : (n,) object ndarray of str
        Reflector label (``"1"`` when the file has none).
    file_line : (n,) int ndarray
        1-based line of each row in picks.csv.
    """

    line: np.ndarray  # str
    shot: np.ndarray  # str, station label of the shot on that line
    receiver: np.ndarray  # str, station label of the receiver on that line
    time_s: np.ndarray  # two-way time, seconds
    sigma_s: np.ndarray  # pick standard error, seconds
    reflector: np.ndarray  # str, reflector label ("1" when the file has none)
    file_line: np.ndarray  # int, 1-based line in picks.csv

    def __len__(self) -> int:
        """Return the number of picks."""
        return len(self.time_s)


@dataclass(frozen=True)
class Boreholes:
    """Boreholes and the depths of the reflectors they logged.

    Attributes
    ----------
    name : (n,) object ndarray of str
        Borehole names.
    x_m, y_m : (n,) ndarray
        Collar easting and northing in the working CRS (m).
    z_m : (n,) ndarray
        Collar elevation (m).
    depth_m : (n,) ndarray
        Depth of the mapped reflector below the collar (m; the ``depth_m``
        column, NaN without one).
    sigma_m : (n,) ndarray
        Standard error of that depth (m).
    file_line : (n,) int ndarray
        1-based line of each row in boreholes.csv.
    interface_depth_m, interface_sigma_m : dict of str to (n,) ndarray
        Depths of named reflectors (columns ``depth_<label>_m``; NaN where a
        borehole did not log it) and their standard errors
        (``sigma_<label>_m``, else the default), by lower-case label.
    path : Path or None
        boreholes.csv, and ``header_line`` its header's line (for messages).
    """

    name: np.ndarray  # str
    x_m: np.ndarray
    y_m: np.ndarray
    z_m: np.ndarray  # collar elevation
    depth_m: np.ndarray  # depth of the mapped reflector below the collar
    sigma_m: np.ndarray  # standard error of that depth
    file_line: np.ndarray
    interface_depth_m: dict = field(default_factory=dict)
    interface_sigma_m: dict = field(default_factory=dict)
    path: Optional[Path] = None
    header_line: Optional[int] = None

    def __len__(self) -> int:
        """Return the number of boreholes."""
        return len(self.x_m)

    @property
    def elevation_m(self) -> np.ndarray:
        """Reflector elevation at each borehole (collar - depth)."""
        return self.z_m - self.depth_m

    def column_of(self, reflector: str) -> Optional[str]:
        """The ``depth_<label>_m`` label that names ``reflector`` (case-insensitively), or None."""
        want = str(reflector).lower()
        found = [k for k in self.interface_depth_m if k.lower() == want]
        return found[0] if found else None

    def depths(self, reflector: str, mapped: str) -> tuple[np.ndarray, np.ndarray]:
        """Depth below the collar (m, NaN where not logged) and its sigma (m) of one reflector.

        The plain ``depth_m`` column is the mapped reflector's; ``depth_<label>_m``
        columns name theirs.
        """
        label = self.column_of(reflector)
        if label is not None:
            return self.interface_depth_m[label], self.interface_sigma_m[label]
        if str(reflector) == str(mapped):
            return self.depth_m, self.sigma_m
        return np.full(len(self), np.nan), np.full(len(self), np.nan)

    def for_reflector(self, reflector: str, mapped: str) -> Boreholes:
        """The boreholes that logged ``reflector``, its depth and sigma as ``depth_m``, ``sigma_m``."""
        d, s = self.depths(reflector, mapped)
        keep = np.isfinite(d)
        return Boreholes(
            self.name[keep],
            self.x_m[keep],
            self.y_m[keep],
            self.z_m[keep],
            d[keep],
            s[keep],
            self.file_line[keep],
            path=self.path,
            header_line=self.header_line,
        )


@dataclass(frozen=True)
class Settings:
    """Processing settings from survey.toml ``[processing]`` (all optional).

    Defaults are those a practising engineer would start from; each is
    documented in README.md.
    """

    default_sigma_ms: float = 0.5  # pick error when picks.csv has no sigma_ms
    gather: str = "shot"  # "shot"; "cmp" adds common-midpoint velocity analysis (layer cmp_fits)
    cmp_bin_m: Optional[float] = None  # CMP bin length along the line; None: one midpoint spacing
    min_picks: int = 6  # fewer usable picks: gather flagged, not fitted
    velocity_min_m_s: float = 150.0  # plausible overburden velocity range
    velocity_max_m_s: float = 6500.0
    robust_loss: str = "huber"  # "huber", "soft_l1", "cauchy" or "linear"
    robust_scale: float = 1.5  # loss threshold in units of the pick sigma
    reject_sigma: float = 4.0  # |residual| / sigma above this: pick rejected (flagged)
    combine_radius_m: Optional[float] = None  # None: half the median spread length
    line_corridor_m: Optional[float] = None  # full width mapped along a single line; None: the reflector depth
    line_cross_dip_deg: float = 10.0  # cross-line dip a single line's sigma allows for (assumed, degrees)
    reflector: Optional[str] = None  # reflector to map; None: the only one, or the deepest picked
    layers: Optional[tuple] = None  # reflector labels top down; None: ordered by median t0
    min_line_angle_deg: float = 30.0  # least angle between line directions to combine
    cell_size_m: Optional[float] = None  # None: chosen from the data spacing
    max_grid_cells: int = 25_000_000  # largest output grid; beyond it a run refuses (or, cell chosen, coarsens)
    max_picks: int = 1_000_000  # most picks a run takes (10 min, 6.5 GiB measured at 1e6); beyond it: refused
    max_distance_m: Optional[float] = None  # None: from the data spacing; farther = nodata
    max_sigma_m: Optional[float] = None  # joint estimate: map beyond the lines' hull where sigma <= this (m)
    surface_method: str = "auto"  # "auto", "kriging", "spline", "tomography"
    variogram_model: str = "auto"  # "auto" (best cross-validation score), "spherical", "exponential", "gaussian"
    trend: str = "linear"  # "linear": krige the residuals from a fitted plane (regional dip); "none"
    neighbours: int = 32  # kriging neighbourhood size
    contour_interval_m: Optional[float] = None  # None: a round value from the range
    index_contour_every: int = 5
    gather_figures: str = (
        "auto"  # QC figure per gather (besides each line's): "all", "flagged", "none"; "auto": flagged
    )
    borehole_sigma_m: float = 0.1  # depth error of a borehole when boreholes.csv has none
    calibrate_velocity: bool = False  # scale velocities to fit the boreholes
    ground_buffer_m: Optional[float] = None  # depth given this far beyond the stations; None: half the depth
    dem: Optional[Path] = None  # ground model raster; None: interpolate stations
    work_crs: Optional[str] = None  # projected CRS to work in when the input is geographic


@dataclass(frozen=True)
class Alignment:
    """A polyline along which a section is drawn (vertices in order, working CRS)."""

    name: str  # used in the section's file name
    x_m: np.ndarray
    y_m: np.ndarray
    path: Optional[Path] = None  # the vertex file it came from


@dataclass(frozen=True)
class Handoff:
    """What survey.toml asks of the hand-off products (``[design]``, ``[sections]``, title block).

    ``design_area`` is a shapely (Multi)Polygon in the working CRS, or None for
    the whole mapped area. ``corridor_m`` is the full width of the strip centred
    on an alignment inside which boreholes and shots are projected onto it.
    """

    design_elevation_m: Optional[float] = None  # pile toe or excavation grade (m, the survey's heights)
    design_area: Optional[object] = None
    design_area_path: Optional[Path] = None
    simulations: int = 500  # conditional simulations for the rock volume
    seed: int = 1  # random seed of those simulations (same inputs, same volumes)
    alignments: tuple = ()  # Alignment, besides the seismic lines
    corridor_m: float = 25.0
    section_format: str = "pdf"  # "pdf" or "svg"
    survey_date: Optional[str] = None  # ISO date of the field survey, when stated
    vertical_datum: Optional[str] = None  # name of the vertical datum of the heights, when stated
    vertical_crs: Optional[object] = None  # pyproj.CRS of the heights (metres), when stated


@dataclass(frozen=True)
class Survey:
    """Everything read from one survey.toml and the files it names."""

    name: str
    path: Path  # the survey.toml
    input_crs: CRS  # of x/y in the CSV files
    crs: CRS  # projected working CRS (equal to input_crs when that is projected)
    stations: Stations
    picks: Picks
    boreholes: Optional[Boreholes]
    settings: Settings = field(default_factory=Settings)
    files: dict = field(default_factory=dict)  # role -> Path of each input file
    handoff: Handoff = field(default_factory=Handoff)
    edits: Optional[Any] = None  # edits.AppliedEdits of the pick edits file; picks above are after them

    @property
    def excluded_picks(self) -> np.ndarray:
        """(n,) bool: picks excluded by the pick edits (per row of ``picks``)."""
        if self.edits is None:
            return np.zeros(len(self.picks), dtype=bool)
        return np.asarray(self.edits.excluded, dtype=bool)

    def input_files(self) -> dict:
        """Every input file of the survey by where it is named (``"[files] picks"``, ...)."""
        names = {"design_area": "[design] area"}
        out = {"survey file": self.path}
        for role, path in self.files.items():
            if path is None:
                continue
            if role.startswith("alignment_"):
                out[f"[sections] alignment {role[len('alignment_') :]}"] = path
            else:
                out[names.get(role, f"[files] {role}")] = path
        return out


@dataclass(frozen=True)
class GatherSet:
    """Picks grouped into gathers, flat arrays ready for the batched fits.

    Per pick (length n): ``gather`` (int index into the per-gather arrays),
    ``source_xyz`` and ``receiver_xyz`` (n, 3), ``time_s``, ``sigma_s``,
    ``pick_index`` (row in :class:`Picks`).
    Per gather (length g): ``line``, ``shot``, ``reflector`` (str),
    ``line_unit`` (g, 2) horizontal unit vector u along the line (the principal
    axis of the spread, oriented toward increasing station order),
    ``cross_unit`` (g, 2) = u rotated 90 degrees clockwise (u x z),
    ``source_xyz_g`` (g, 3) and ``spread_length_m``.
    Positions are in the working CRS (m), times and errors in seconds.
    """

    gather: np.ndarray
    source_xyz: np.ndarray
    receiver_xyz: np.ndarray
    time_s: np.ndarray
    sigma_s: np.ndarray
    pick_index: np.ndarray
    line: np.ndarray
    shot: np.ndarray
    reflector: np.ndarray
    line_unit: np.ndarray
    cross_unit: np.ndarray
    source_xyz_g: np.ndarray
    spread_length_m: np.ndarray

    @property
    def n_gathers(self) -> int:
        """Number of gathers g."""
        return len(self.line)
