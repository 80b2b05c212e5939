"""Results as GIS layers: geometries plus typed attribute columns.

Each function turns one result object into a :class:`~rockhead.core.formats.layer.Layer` whose
field names are the project's fixed output names (README, outputs). The same
layers feed the GeoPackage, the CSV tables, the QGIS sinks and the report, so
the names are defined once, here.
"""

from __future__ import annotations

from typing import Optional

import numpy as np
from shapely.geometry import LineString, Point

from ..formats.layer import Layer
from ..results import BoreholeCheck, CmpTable, DixTable, PointTable, TomographyOutcome
from ..seismic.geometry import vector_azimuth_deg

__all__ = [
    "boreholes_layer",
    "cmp_layer",
    "cross_validation_layer",
    "dips_layer",
    "dix_layer",
    "lines_layer",
    "misties_layer",
    "reflection_points_layer",
    "reflector_points_layer",
    "run_info_layer",
    "shots_layer",
    "stations_layer",
    "surface_dips_layer",
]


def _points(x, y):
    """2D points (None where a coordinate is not finite); one vectorised call with shapely >= 2."""
    import shapely

    x = np.asarray(x, float)
    y = np.asarray(y, float)
    if hasattr(shapely, "points") and x.size:
        ok = np.isfinite(x) & np.isfinite(y)
        out = np.full(x.size, None, dtype=object)
        out[ok] = shapely.points(np.column_stack([x[ok], y[ok]]))
        return out.tolist()
    return [Point(float(a), float(b)) if np.isfinite(a) and np.isfinite(b) else None for a, b in zip(x, y)]


def _ms(seconds):
    return np.asarray(seconds, float) * 1e3


def stations_layer(stations) -> Layer:
    """Surveyed stations and shot points (working CRS)."""
    return Layer(
        _points(stations.x_m, stations.y_m),
        {
            "line": stations.line.astype(str),
            "station": stations.station.astype(str),
            "x_m": stations.x_m,
            "y_m": stations.y_m,
            "z_m": stations.z_m,
        },
        "POINT",
        "Surveyed geophone stations and shot points; z_m = ground elevation",
    )


def lines_layer(frames) -> Layer:
    """One polyline per seismic line, stations in order."""
    names = sorted(frames)
    geoms, az, length = [], [], []
    for name in names:
        f = frames[name]
        geoms.append(LineString(np.column_stack([f.x_m, f.y_m])) if len(f.x_m) > 1 else None)
        az.append(f.azimuth_deg)
        length.append(f.length_m)
    return Layer(
        geoms,
        {"line": np.array(names, dtype=object), "azimuth_deg": np.array(az), "length_m": np.array(length)},
        "LINESTRING",
        "Seismic lines (stations in order); azimuth of the principal axis",
    )


def shots_layer(gathers, fits, tomography: Optional[TomographyOutcome] = None) -> Layer:
    """Per-gather fit results at the shot positions (fixed fields first).

    With a joint inversion, ``site_velocity_flag`` marks gathers whose
    velocity departs from the robust site velocity beyond its error (reflector
    curvature, focusing or defocusing, is the likely cause) and ``note`` says so.
    """
    src = gathers.source_xyz_g
    g = len(fits)
    if tomography is not None and tomography.curvature_flag is not None:
        flag = np.asarray(tomography.curvature_flag, bool)
        note = np.where(flag, np.asarray(tomography.curvature_reason, dtype=object), "")
    else:
        flag, note = np.zeros(g, bool), np.full(g, "", dtype=object)
    return Layer(
        _points(src[:, 0], src[:, 1]),
        {
            "line": gathers.line.astype(str),
            "shot": gathers.shot.astype(str),
            "reflector": gathers.reflector.astype(str),
            "velocity_m_s": fits.velocity_m_s,
            "t0_ms": _ms(fits.t0_s),
            "normal_distance_m": fits.normal_distance_m,
            "traveltime_dip_deg": fits.traveltime_dip_deg,
            "rms_residual_ms": _ms(fits.rms_residual_s),
            "picks_used": fits.picks_used.astype(np.int64),
            "picks_rejected": fits.picks_rejected.astype(np.int64),
            "status": fits.status.astype(str),
            "reason": fits.reason.astype(str),
            "se_velocity_m_s": fits.se_velocity_m_s,
            "se_t0_ms": _ms(fits.se_t0_s),
            "se_normal_distance_m": fits.se_normal_distance_m,
            "se_traveltime_dip_deg": fits.se_traveltime_dip_deg,
            "cross_component": fits.cross_component,
            "picks_excluded": fits.picks_excluded.astype(np.int64),
            "variance_factor": fits.variance_factor,
            "source_z_m": src[:, 2],
            "line_azimuth_deg": vector_azimuth_deg(gathers.line_unit[:, 0], gathers.line_unit[:, 1]),
            "spread_length_m": gathers.spread_length_m,
            "site_velocity_flag": flag,
            "note": note.astype(str),
        },
        "POINT",
        "Per-gather fits: V, t0 = 2h/V, normal distance h, traveltime dip asin(s) (not the section's apparent dip)",
    )


def reflector_points_layer(points) -> Layer:
    """Zero-offset reflector points (one per gather), used for the surface."""
    return Layer(
        _points(points.x_m, points.y_m),
        {
            "line": points.line.astype(str),
            "shot": points.shot.astype(str),
            "elevation_m": points.elevation_m,
            "depth_m": points.depth_m,
            "sigma_m": points.sigma_m,
            "reflector": points.reflector.astype(str),
            "ground_m": points.ground_m,
            "sigma_xy_m": points.sigma_xy_m,
            "status": points.status.astype(str),
        },
        "POINT",
        "Reflector points: perpendicular foot S + h n of each gather, in 3D (elevation, depth below ground, sigma)",
    )


def reflection_points_layer(points, fits) -> Layer:
    """Specular reflection point of every pick (coverage), with the pick's flags."""
    idx = points.pick_index
    return Layer(
        _points(points.x_m, points.y_m),
        {
            "line": points.line.astype(str),
            "shot": points.shot.astype(str),
            "elevation_m": points.elevation_m,
            "depth_m": points.depth_m,
            "residual_ms": _ms(fits.residual_s[idx]) if len(idx) else np.zeros(0),
            "rejected": fits.rejected[idx] if len(idx) else np.zeros(0, bool),
            "excluded": fits.excluded[idx] if len(idx) else np.zeros(0, bool),
        },
        "POINT",
        "Reflection point of every pick on its gather's fitted plane",
    )


def dips_layer(dips) -> Layer:
    """True dip and strike where lines of different directions meet."""
    return Layer(
        _points(dips.x_m, dips.y_m),
        {
            "dip_deg": dips.dip_deg,
            "dip_direction_deg": dips.dip_direction_deg,
            "strike_deg": dips.strike_deg,
            "sigma_dip_deg": dips.sigma_dip_deg,
            "lines": np.asarray(dips.lines).astype(str),
            "sigma_dip_direction_deg": dips.sigma_dip_direction_deg,
            "n_lines": np.asarray(dips.n_lines).astype(np.int64),
            "n_gathers": np.asarray(dips.n_gathers).astype(np.int64),
            "condition_number": dips.condition_number,
            "status": np.asarray(dips.status).astype(str),
            "reason": np.asarray(dips.reason).astype(str),
            "source": np.full(len(dips.x_m), "crossing lines", dtype=object),
        },
        "POINT",
        "True dip and strike (right-hand rule) from gathers of crossing lines",
    )


def surface_dips_layer(sdips) -> Layer:
    """Dip and strike read off the mapped surface on a regular spacing."""
    n = len(sdips.x_m)
    return Layer(
        _points(sdips.x_m, sdips.y_m),
        {
            "dip_deg": sdips.dip_deg,
            "dip_direction_deg": sdips.dip_direction_deg,
            "strike_deg": sdips.strike_deg,
            "source": np.full(n, "surface", dtype=object),
        },
        "POINT",
        "Dip = atan|grad z|, dip direction = azimuth of -grad z of the mapped surface",
    )


def misties_layer(misties) -> Layer:
    """Reflector elevation differences where two lines cross."""
    return Layer(
        _points(misties.x_m, misties.y_m),
        {
            "line_a": np.asarray(misties.line_a).astype(str),
            "line_b": np.asarray(misties.line_b).astype(str),
            "elevation_a_m": misties.elevation_a_m,
            "elevation_b_m": misties.elevation_b_m,
            "mistie_m": misties.mistie_m,
            "sigma_m": misties.sigma_m,
        },
        "POINT",
        "Line misties: elevation seen by line a minus that seen by line b at their crossing",
    )


def boreholes_layer(boreholes, check: BoreholeCheck) -> Layer:
    """Boreholes with the seismic-only surface's prediction and residual."""
    return Layer(
        _points(boreholes.x_m, boreholes.y_m),
        {
            "borehole": boreholes.name.astype(str),
            "collar_z_m": boreholes.z_m,
            "depth_m": boreholes.depth_m,
            "elevation_m": boreholes.elevation_m,
            "seismic_elevation_m": check.seismic_elevation_m,
            "seismic_sigma_m": check.seismic_sigma_m,
            "residual_m": check.residual_m,
            "standardised": check.standardised,
        },
        "POINT",
        "Borehole check: borehole reflector elevation minus the seismic-only surface there",
    )


def _point_table_layer(table: PointTable, description) -> Layer:
    """A point layer from a table located by ``x_m``, ``y_m`` (its other columns are the fields)."""
    cols = table.columns()
    return Layer(_points(cols.pop("x_m"), cols.pop("y_m")), cols, "POINT", description)


def dix_layer(table: DixTable) -> Layer:
    """Dix (1955) interval velocities and thicknesses under shots with several reflectors."""
    return _point_table_layer(
        table, "Interval velocity and thickness between successive reflectors (Dix 1955) under each shot"
    )


def cmp_layer(table: CmpTable) -> Layer:
    """Common-midpoint fits (t0, NMO velocity) at the bin centres."""
    return _point_table_layer(
        table, "Common-midpoint fits t^2 = t0^2 + x^2/Vnmo^2 (Levin 1971); depth_m = Vnmo t0 / 2 (small dip)"
    )


def run_info_layer(items) -> Layer:
    """A non-spatial key/value table saying how the outputs were made (method, velocity, grid...)."""
    keys = [str(k) for k, _ in items]
    values = [str(v) for _, v in items]
    return Layer(
        None,
        {"key": np.array(keys, dtype=object), "value": np.array(values, dtype=object)},
        description="How this run made its outputs: surface method, velocities, grid, settings",
    )


def cross_validation_layer(x_m, y_m, cv) -> Layer:
    """Leave-one-out cross-validation of the surface at each datum (CrossValidation)."""
    idx = np.asarray(cv.index)
    return Layer(
        _points(np.asarray(x_m)[idx], np.asarray(y_m)[idx]),
        {
            "estimate_m": cv.estimate,
            "residual_m": cv.residual,
            "sigma_m": cv.std,
            "standardised": cv.standardised,
        },
        "POINT",
        "Leave-one-out cross-validation: datum minus the estimate from all other data",
    )
