"""Files of every interface and layer of the overburden: rasters and GeoPackage tables.

The mapped reflector keeps its fixed names (``reflector_elevation.tif``,
``reflector_depth.tif``, ``depth_sigma.tif``, ``elevation_sigma.tif``); every
other interface ``<label>`` gets ``<label>_elevation.tif``, ``<label>_depth.tif``,
``<label>_depth_sigma.tif`` and ``<label>_elevation_sigma.tif`` (the label
made safe for a file name; ``interface<k>_<label>`` should it clash), and every
layer ``interval_velocity_<top>_to_<base>.tif`` (the first layer's top is
``ground``). GeoPackage: ``velocity_model`` (one row per layer: the model,
its parameters with standard errors, why it was chosen) and
``borehole_depths`` (every borehole and reflector it logged: its depth
against the rms-velocity, Dix and joint-estimate depths).
"""

from __future__ import annotations

import numpy as np

from ..formats.layer import Layer
from ..results import RunResult

__all__ = ["overburden_layers", "overburden_rasters", "raster_file_label"]

FIXED = ("reflector",)  # labels whose rasters would take a fixed name


def _safe(text) -> str:
    return "".join(c if c.isalnum() or c in "-_" else "_" for c in str(text))


def raster_file_label(order: tuple, mapped: str) -> dict:
    """Reflector label -> the part of its raster names (the mapped one has none: fixed names).

    >>> raster_file_label(("wt", "reflector", "rock"), "rock")
    {'wt': 'wt', 'reflector': 'interface2_reflector'}
    """
    out, used = {}, set()
    for k, label in enumerate(order):
        if label == mapped:
            continue
        name = _safe(label)
        if name in FIXED or name in used or not name:
            name = f"interface{k + 1}_{name}"
        used.add(name)
        out[label] = name
    return out


def overburden_rasters(result: RunResult) -> dict:
    """File name -> (grid, band description, is an elevation, band unit) of the other interfaces and the layers."""
    ob = result.overburden
    if ob is None:
        return {}
    mapped = str(result.survey.settings.reflector)
    names = raster_file_label(ob.order, mapped)
    out = {}
    for m in ob.interfaces:
        if m.reflector not in names:
            continue
        n, src = names[m.reflector], m.source
        out[f"{n}_elevation.tif"] = (
            m.surface.z,
            f"elevation of interface {m.reflector} (m, up positive; {src})",
            True,
            "m",
        )
        out[f"{n}_depth.tif"] = (
            m.depth_m,
            f"depth of interface {m.reflector} below ground (m, positive down)",
            False,
            "m",
        )
        out[f"{n}_depth_sigma.tif"] = (
            m.depth_sigma_m,
            f"standard deviation of the depth of {m.reflector} (m)",
            False,
            "m",
        )
        out[f"{n}_elevation_sigma.tif"] = (
            m.surface.std,
            f"standard deviation of the elevation of {m.reflector} (m)",
            False,
            "m",
        )
    for v in ob.intervals:
        out[f"interval_velocity_{_safe(v.top)}_to_{_safe(v.base)}.tif"] = (
            v.velocity_m_s,
            f"vertical-average velocity of the layer from {v.top} to {v.base} (m/s; {v.source})",
            False,
            "m/s",
        )
    return out


def overburden_layers(result: RunResult) -> dict:
    """GeoPackage layers ``velocity_model`` and ``borehole_depths`` (when there are boreholes)."""
    ob = result.overburden
    if ob is None:
        return {}
    out = {
        "velocity_model": Layer(
            None,
            ob.velocity_model.columns(),
            description=f"Velocity model of each layer, top down ({ob.source}): model, parameters with standard "
            "errors, why chosen",
        )
    }
    b = ob.boreholes
    if b is not None and len(b):
        from shapely.geometry import Point

        cols = b.columns()
        x, y = cols.pop("x_m"), cols.pop("y_m")
        cols["borehole"] = np.asarray(cols["borehole"]).astype(str)
        cols["reflector"] = np.asarray(cols["reflector"]).astype(str)
        out["borehole_depths"] = Layer(
            [Point(float(a), float(c)) for a, c in zip(x, y)],
            cols,
            "POINT",
            "Depth of every reflector each borehole logged against the seismic depths: from the rms velocity of "
            "the gather fits and from Dix interval velocities (both without the boreholes), and from the joint "
            "estimate (which includes them)",
        )
    return out
