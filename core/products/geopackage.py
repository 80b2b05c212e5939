"""``survey.gpkg``: the run's layers in 3D, in the elevation CRS, with their metadata.

Every point layer that has a height gets it as the z of its geometry, and the
contours too, so that the GeoPackage can be draped and viewed in 3D (QGIS's 3D
map view, CAD). Each z is an elevation in metres in the survey's vertical
datum (the CRS of the file is then the compound working + vertical CRS), or
an elevation whose datum is not stated:

==================== ====================================================
layer                z of the geometry
==================== ====================================================
stations             ground elevation at the station (``z_m``)
shots                ground elevation at the shot (``source_z_m``)
reflector_points     reflector elevation (``elevation_m``)
reflection_points    reflector elevation at the pick's reflection point
boreholes            reflector elevation in the borehole (``elevation_m``)
misties              mean of the two lines' reflector elevations
cross_validation     the datum's reflector elevation (estimate + residual)
dip_measurements,    the mapped reflector surface at the point (bilinear;
surface_dips         NaN where the map is empty)
contours             elevation contours: their level; depth contours: the
                     reflector elevation along them, ground minus depth
==================== ====================================================

Other layers (lines, sections, tables) stay 2D. The CSV tables and the report
use the layers as computed (2D, every value a column).

Every table also gets a QGIS layer-metadata record (:func:`qgis_layer_metadata`):
title, abstract with the caution and the meaning of z, history.
"""

from __future__ import annotations

from typing import Dict, Tuple

import numpy as np

from ..formats.layer import Layer, point_xy
from ..formats.qgis_gpkg import layer_metadata_xml
from ..grid import bilinear
from .provenance import CAUTION, VERTICAL_NOT_STATED, Provenance

__all__ = ["Z_MEANING", "layers_3d", "qgis_layer_metadata"]

#: layer -> what the z of its geometries is
Z_MEANING = {
    "stations": "ground elevation at the station",
    "shots": "ground elevation at the shot",
    "reflector_points": "reflector elevation",
    "reflection_points": "reflector elevation at the reflection point",
    "boreholes": "reflector elevation in the borehole",
    "misties": "mean reflector elevation of the two lines",
    "cross_validation": "reflector elevation of the datum",
    "dip_measurements": "mapped reflector elevation at the point",
    "surface_dips": "mapped reflector elevation at the point",
    "contours": "reflector elevation (the level of an elevation contour; ground minus depth along a depth contour)",
}
_FIELD_Z = {
    "stations": "z_m",
    "shots": "source_z_m",
    "reflector_points": "elevation_m",
    "reflection_points": "elevation_m",
    "boreholes": "elevation_m",
}


def _float(values) -> np.ndarray:
    return np.asarray(values, dtype=float)


def _surface_at(result, x, y) -> np.ndarray:
    """The mapped elevation at points: bilinear, else (next to an empty cell) the value of the point's own cell."""
    if result.surface is None:
        return np.full(len(x), np.nan)
    spec = result.spec
    z = np.where(result.surface.mask, np.nan, result.surface.z)
    x, y = np.asarray(x, float), np.asarray(y, float)
    at = bilinear(spec, z, x, y)
    with np.errstate(invalid="ignore"):
        col = np.floor((x - spec.x0) / spec.cell_size_m + 0.5)
        row = np.floor((spec.y0 - y) / spec.cell_size_m + 0.5)
    inside = np.isfinite(col) & np.isfinite(row) & (col >= 0) & (col < spec.nx) & (row >= 0) & (row < spec.ny)
    own = np.full(x.shape, np.nan)
    own[inside] = z[row[inside].astype(int), col[inside].astype(int)]
    # a point near the edge of the map would otherwise get no z (and shapely 1.8 drops a NaN z)
    return np.where(np.isfinite(at), at, own)


def _point_z(name: str, layer: Layer, result):
    f = layer.fields
    if name in _FIELD_Z:
        return _float(f[_FIELD_Z[name]])
    if name == "misties":
        return 0.5 * (_float(f["elevation_a_m"]) + _float(f["elevation_b_m"]))
    if name == "cross_validation":
        return _float(f["estimate_m"]) + _float(f["residual_m"])
    if name in ("dip_measurements", "surface_dips"):
        xy = point_xy(layer.geometries or ())
        return _surface_at(result, xy[:, 0], xy[:, 1]).ravel() if len(xy) else np.zeros(0)
    return None


def _points_3d(layer: Layer, z) -> Layer:
    import shapely
    from shapely.geometry import Point

    geoms = list(layer.geometries or ())
    if hasattr(shapely, "points") and geoms:  # shapely >= 2: vectorised (a million points in a second)
        arr = np.empty(len(geoms), dtype=object)
        arr[:] = geoms
        null = shapely.is_missing(arr) | shapely.is_empty(arr)
        xyz = np.column_stack([shapely.get_x(arr), shapely.get_y(arr), np.asarray(z, float)[: len(geoms)]])
        out = np.full(len(geoms), None, dtype=object)
        out[~null] = shapely.points(xyz[~null])
        return Layer(out.tolist(), layer.fields, layer.geometry_type, layer.description)
    geoms = [None if g is None or g.is_empty else Point(*g.coords[0][:2], float(zz)) for g, zz in zip(geoms, z)]
    return Layer(geoms, layer.fields, layer.geometry_type, layer.description)


def _parts_xy(geom) -> list:
    """The (n, 2) vertex coordinates of each part of a line or multi-line."""
    parts = list(geom.geoms) if hasattr(geom, "geoms") else [geom]
    return [np.asarray(part.coords, float)[:, :2] for part in parts]


def _line_3d(geom, parts_xyz):
    from shapely.geometry import LineString, MultiLineString

    out = [LineString(xyz) for xyz in parts_xyz]
    return out[0] if len(out) == 1 and not hasattr(geom, "geoms") else MultiLineString(out)


def _contours_3d(layer: Layer, result) -> Layer:
    kinds = np.asarray(layer.fields["kind"]).astype(str)
    elev = _float(layer.fields["elevation_m"])
    depth = _float(layer.fields["depth_m"])
    # each line's parts' vertices (None for a null line)
    rows = [None if g is None or g.is_empty else _parts_xy(g) for g in (layer.geometries or ())]
    # the ground under every vertex of the depth contours, in one evaluation (it is pointwise)
    depth_xy = [xy for parts, kind in zip(rows, kinds) if parts is not None and kind != "elevation" for xy in parts]
    stacked = np.concatenate(depth_xy) if depth_xy else np.zeros((0, 2))
    ground = np.asarray(result.ground(stacked[:, 0], stacked[:, 1]), float) if len(stacked) else np.zeros(0)
    geoms: list = []
    start = 0
    for g, parts, kind, e, d in zip(layer.geometries or (), rows, kinds, elev, depth):
        if parts is None:
            geoms.append(None)
        elif kind == "elevation":
            geoms.append(_line_3d(g, [np.column_stack([xy, np.full(len(xy), e)]) for xy in parts]))
        else:  # depth = ground - reflector, so the reflector lies at ground - depth along the line
            xyz = []
            for xy in parts:
                xyz.append(np.column_stack([xy, ground[start : start + len(xy)] - d]))
                start += len(xy)
            geoms.append(_line_3d(g, xyz))
    return Layer(geoms, layer.fields, layer.geometry_type, layer.description)


def layers_3d(
    layers: Dict[str, Layer], result, vertical_label: str = VERTICAL_NOT_STATED
) -> Tuple[Dict[str, Layer], Dict[str, Dict[str, str]]]:
    """The layers with z in their geometries (see the module notes) and each layer's metadata.

    Returns
    -------
    layers : dict of str to Layer
        The same tables in the same order; the layers of the table above 3D.
    metadata : dict of str to dict
        Per 3D layer ``{"Z": "<meaning> (m, <vertical datum>)"}``.
    """
    out, meta = {}, {}
    for name, layer in layers.items():
        new = layer
        if layer.geometries is not None and name == "contours" and result.ground is not None:
            new = _contours_3d(layer, result)
        elif layer.geometries is not None and name in Z_MEANING and name != "contours":
            z = _point_z(name, layer, result)
            if z is not None:
                new = _points_3d(layer, z)
        out[name] = new
        if new is not layer:
            meta[name] = {"Z": f"{Z_MEANING[name]} (m, {vertical_label})"}
    return out, meta


def qgis_layer_metadata(
    layers: Dict[str, Layer], prov: Provenance, z_metadata: Dict[str, Dict[str, str]]
) -> Dict[str, str]:
    """QGIS layer metadata of every table (``{table: XML}``): title, abstract with the caution, history.

    The abstract is the layer's description, what the z of its geometries is
    (``z_metadata`` of :func:`layers_3d`) and the caution; the history says
    which software made it from which survey, by which surface method, and on
    which CRS and vertical datum. QGIS shows it in the layer's properties.
    """
    history = [
        f"Made by {prov.software} from the survey '{prov.survey}' (surface: {prov.method}; survey date: "
        f"{prov.date}); coordinates {prov.crs}, elevations {prov.vertical_datum}."
    ]
    out = {}
    for name, layer in layers.items():
        abstract = layer.description or name.replace("_", " ")
        if name in z_metadata:
            abstract += f"\n\nGeometry z: {z_metadata[name]['Z']}."
        out[name] = layer_metadata_xml(
            identifier=f"{prov.survey}: {name}",
            parent=prov.survey,
            title=f"{name.replace('_', ' ').capitalize()} - {prov.survey}",
            abstract=f"{abstract}\n\nCAUTION: {CAUTION}",
            history=history,
            caution=CAUTION,
            keywords=["geoscientificInformation"],
        )
    return out
