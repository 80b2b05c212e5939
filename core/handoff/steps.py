"""The hand-off steps of a run: sections, design-level answers, the LandXML surface, sheet facts.

Each step takes a finished :class:`~..results.RunResult` (and plain values)
and returns plain results; :mod:`..products.handoff` writes them to files.
"""

from __future__ import annotations

from typing import Optional

import numpy as np

from .. import __version__
from ..crs import crs_label
from ..formats.landxml import grid_tin, issue_date
from ..progress import NullProgress
from ..report.sheet import SheetInfo
from ..results import DesignResult
from ..text import printable
from ..workflow import surface_data
from .design import probability_above, rock_volume
from .sections import Interface, Section, build_section

__all__ = [
    "DesignResult",
    "design_step",
    "line_alignments",
    "section_along",
    "sections_step",
    "sheet_info",
    "surface_conditioning",
    "surface_interfaces",
    "surface_tin",
]


def surface_interfaces(result) -> list:
    """The mapped interfaces of a run as section :class:`Interface` objects (the final surface first)."""
    s = result.surface
    z = np.where(s.mask, np.nan, s.z)
    sd = np.where(s.mask, np.nan, s.std)
    return [Interface(f"reflector {result.survey.settings.reflector}", z, sd, "reflector")]


def surface_conditioning(result):
    """What the final surface was kriged from: ``(x, y, error_variance, variogram, neighbours)``.

    Returns ``(None, reason)`` when the surface has no kriging behind it (the
    thin-plate spline gives no variance to simulate from).
    """
    st = result.survey.settings
    tomo = result.tomography
    if result.method_used == "tomography" and tomo is not None:
        vario, data = tomo.variogram, tomo.kriged_data
        if data is None:
            return None, "the joint inversion's kriged data are not available"
        x, y, _, s = data
    else:
        vario = result.kriged_diagnostics.variogram
        bh = result.survey.boreholes
        x, y, _, s = surface_data(result.fit.points, st.reflector, bh if bh is not None and len(bh) else None)
    if vario is None:
        return None, f'the {result.method_used} surface has no variogram (choose surface_method = "kriging")'
    return (np.asarray(x, float), np.asarray(y, float), np.asarray(s, float) ** 2, vario, st.neighbours), ""


def design_step(result, progress=None) -> Optional[DesignResult]:
    """P(rock above the design level) per cell and the P10/P50/P90 rock volume (None without a level)."""
    h = result.survey.handoff
    if h.design_elevation_m is None or result.surface is None:
        return None
    return design_answers(
        result, h.design_elevation_m, area=h.design_area, n_simulations=h.simulations, seed=h.seed, progress=progress
    )


def design_answers(result, design_elevation_m, area=None, n_simulations=500, seed=1, progress=None) -> DesignResult:
    """:func:`design_step` for any level and area (the QGIS algorithm's entry)."""
    progress = progress or NullProgress()
    s = result.surface
    z = np.where(s.mask, np.nan, s.z)
    sd = np.where(s.mask, np.nan, s.std)
    if not np.any(np.isfinite(sd)):
        why = f"the {result.method_used} surface has no standard deviation"
        return DesignResult(float(design_elevation_m), None, None, area, f"no probability or volume: {why}")
    prob = probability_above(z, sd, design_elevation_m)
    cond, why = surface_conditioning(result)
    if cond is None:
        return DesignResult(float(design_elevation_m), prob, None, area, f"no volume: {why}")
    x, y, e, vario, k = cond
    vol = rock_volume(
        result.spec,
        z,
        design_elevation_m,
        vario,
        (x, y),
        e,
        area=area,
        neighbours=k,
        n_simulations=n_simulations,
        seed=seed,
        progress=progress,
    )
    note = ""
    if vol.mapped_fraction < 0.999:
        note = f"only {100 * vol.mapped_fraction:.0f} % of the design area is mapped: the volume covers that part only"
    return DesignResult(float(design_elevation_m), prob, vol, area, note)


def line_alignments(result) -> list:
    """(name, (n, 2) vertices) of every seismic line, stations in order."""
    return [
        (f"line_{name}", np.column_stack([f.x_m, f.y_m]))
        for name, f in sorted(result.fit.frames.items())
        if len(f.x_m) > 1
    ]


def section_along(result, name, vertices_xy, corridor_m, title="") -> Section:
    """One section of the run along any alignment (working CRS)."""
    bh = result.survey.boreholes
    boreholes = None
    if bh is not None and len(bh):
        boreholes = (bh.name, bh.x_m, bh.y_m, bh.z_m, bh.elevation_m, bh.sigma_m)
    g = result.fit.gathers
    keys = np.array([f"{a}\x1f{b}" for a, b in zip(g.line, g.shot)], dtype=object)
    _, first = np.unique(keys, return_index=True)
    src = g.source_xyz_g[first]
    shots = (np.asarray(g.shot)[first], src[:, 0], src[:, 1], src[:, 2])
    p = result.fit.points
    ok = (
        (np.asarray(p.status) == "ok")
        & np.asarray(p.finite)
        & (np.asarray(p.reflector).astype(str) == str(result.survey.settings.reflector))
    )
    points = (np.asarray(p.shot)[ok], p.x_m[ok], p.y_m[ok], p.elevation_m[ok], p.sigma_m[ok])
    return build_section(
        name,
        vertices_xy,
        result.spec,
        surface_interfaces(result),
        result.ground,
        corridor_m=corridor_m,
        boreholes=boreholes,
        shots=shots,
        points=points,
        title=title or name,
    )


def sections_step(result) -> list:
    """Sections along every seismic line and every alignment of survey.toml."""
    h = result.survey.handoff
    out = []
    for name, v in line_alignments(result):
        out.append(section_along(result, name, v, h.corridor_m, title=name.replace("_", " ", 1)))
    for a in h.alignments:
        out.append(
            section_along(result, a.name, np.column_stack([a.x_m, a.y_m]), h.corridor_m, title=f"alignment {a.name}")
        )
    return out


def surface_tin(result):
    """The TIN of the final surface (two triangles per fully mapped quad of cell centres)."""
    s = result.surface
    return grid_tin(result.spec.x_centres, result.spec.y_centres, np.where(s.mask, np.nan, s.z))


def sheet_info(result, timestamp=None) -> SheetInfo:
    """Title block facts of a run."""
    sv = result.survey
    extra = []
    conv = _grid_convergence_deg(result)
    if conv is not None:
        extra.append(("grid convergence", f"{conv:+.3f}° at the site centre (meridian convergence)"))
    return SheetInfo(
        survey=printable(sv.name),
        issued=issue_date(timestamp).isoformat(),
        software=f"Rockhead {__version__}",
        crs=crs_label(sv.crs),
        vertical_datum=sv.handoff.vertical_datum,
        survey_date=sv.handoff.survey_date,
        method=result.method_used,
        cell_size_m=None if result.spec is None else result.spec.cell_size_m,
        extra=tuple(extra),
    )


def _grid_convergence_deg(result):
    """Meridian convergence (degrees, grid north to true north) at the site centre, when pyproj gives it."""
    import pyproj
    from pyproj.exceptions import CRSError, ProjError

    from ..crs import to_lonlat
    from ..errors import GeoreferenceError

    st = result.survey.stations
    try:
        lon, lat = to_lonlat(np.array([np.mean(st.x_m)]), np.array([np.mean(st.y_m)]), result.survey.crs)
        factors = pyproj.Proj(result.survey.crs).get_factors(float(lon[0]), float(lat[0]))
        value = float(factors.meridian_convergence)
    except (CRSError, ProjError, GeoreferenceError, ValueError, AttributeError):  # an unusual CRS: line left out
        return None
    return value if np.isfinite(value) else None
