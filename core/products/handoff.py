"""Write the hand-off products of a run: map sheet, sections, LandXML surface, design answers.

File names (fixed): ``map_sheet.pdf``, ``reflector_surface.xml``,
``probability_above_design.tif`` (with ``[design] elevation_m``), and per
section ``section_<name>.pdf`` (or ``.svg``) with ``section_<name>.csv``, where
``<name>`` is ``line_<line>`` for every seismic line and the vertex file's
name for every ``[sections] alignment``. GeoPackage layers: ``sections`` (the
alignments) and ``design_volumes`` (P10/P50/P90 of the rock volume).
"""

from __future__ import annotations

import numpy as np
from shapely.geometry import LineString

from ..formats.gdalio import write_raster
from ..formats.landxml import write_landxml_surface
from ..formats.layer import Layer
from ..formats.tables import write_csv
from ..handoff.steps import sections_step, sheet_info, surface_tin
from ..progress import check_cancel
from ..report import figures
from ..report.map_sheet import MapOverlays, MapPage, map_sheet
from ..report.section_sheet import section_sheet
from ..text import file_stem, printable

__all__ = [
    "HANDOFF_NAMES",
    "LANDXML_NAME",
    "MAP_SHEET_NAME",
    "MAX_LINE_SECTION_SHEETS",
    "PROBABILITY_NAME",
    "drawn_sections",
    "handoff_layers",
    "handoff_run_info",
    "map_content",
    "section_file_stem",
    "section_file_stems",
    "section_files",
    "sheet_jobs",
    "write_handoff",
]

MAP_SHEET_NAME = "map_sheet.pdf"
LANDXML_NAME = "reflector_surface.xml"
PROBABILITY_NAME = "probability_above_design.tif"
HANDOFF_NAMES = (MAP_SHEET_NAME, LANDXML_NAME, PROBABILITY_NAME)


def section_file_stem(name: str) -> str:
    """File stem of one section: ``section_<name>`` with only letters, digits, '-' and '_'.

    A name that had to be changed or cut gets a short hash (:func:`~..text.file_stem`);
    :func:`section_file_stems` also keeps the stems of several sections apart.
    """
    return file_stem("section", name)


#: Most section sheets drawn along seismic lines (a sheet takes about a second); a survey of more lines
#: gets sheets of an evenly spread subset and the CSV of every section. Alignments always get theirs.
MAX_LINE_SECTION_SHEETS = 20


def drawn_sections(sections) -> list:
    """Whether each section gets its sheet.

    Every alignment does, and at most :data:`MAX_LINE_SECTION_SHEETS`
    seismic lines, evenly spread (every k-th in order).

    Parameters
    ----------
    sections : sequence
        Sections with a ``title`` ("line ..." or "alignment ...").

    Returns
    -------
    list of bool

    Examples
    --------
    >>> from types import SimpleNamespace as S
    >>> secs = [S(title=f"line {i}") for i in range(100)] + [S(title="alignment axis")]
    >>> flags = drawn_sections(secs)
    >>> sum(flags), flags[0], flags[1], flags[-1]
    (21, True, False, True)
    """
    is_line = [not str(getattr(s, "title", "")).startswith("alignment ") for s in sections]
    n_lines = sum(is_line)
    step = max(1, -(-n_lines // MAX_LINE_SECTION_SHEETS))  # ceil
    out, k = [], 0
    for line in is_line:
        if line:
            out.append(k % step == 0)
            k += 1
        else:
            out.append(True)
    return out


def section_file_stems(sections) -> list:
    """File stems of ``sections``, unique even case-insensitively ("A B"/"A_B", "A"/"a")."""
    used: set = set()
    return [file_stem("section", s.name, used=used) for s in sections]


def design_volumes_layer(design) -> Layer:
    """One row: the rock volume above the design level (P10/P50/P90 of the simulations)."""
    v = design.volume
    geom = design.area  # None for the whole mapped area
    return Layer(
        [geom],
        {
            "design_elevation_m": np.array([v.design_elevation_m]),
            "area_m2": np.array([v.area_m2]),
            "mapped_area_m2": np.array([v.mapped_area_m2]),
            "volume_p10_m3": np.array([v.p10_m3]),
            "volume_p50_m3": np.array([v.p50_m3]),
            "volume_p90_m3": np.array([v.p90_m3]),
            "volume_mean_m3": np.array([v.mean_m3]),
            "volume_sd_m3": np.array([v.sd_m3]),
            "map_volume_m3": np.array([v.map_volume_m3]),
            "probability_any_rock": np.array([v.probability_any_rock]),
            "simulations": np.array([v.n_simulations], dtype=np.int64),
            "node_spacing_m": np.array([v.node_spacing_m]),
            "seed": np.array([v.seed], dtype=np.int64),
            "area_source": np.array(["polygon" if design.area is not None else "mapped area"], dtype=object),
            "note": np.array([design.note], dtype=object),
        },
        "MULTIPOLYGON" if geom is not None and geom.geom_type == "MultiPolygon" else "POLYGON",
        "Rock volume above the design level: percentiles of conditional simulations (90 % of them give less "
        "than volume_p90_m3); the kriged map's own volume for comparison",
    )


def sections_layer(sections, fmt) -> Layer:
    """The alignments of the sections (one polyline each) with their files."""
    return Layer(
        [LineString(s.vertices_xy) for s in sections],
        {
            "name": np.array([s.name for s in sections], dtype=object),
            "length_m": np.array([s.length_m for s in sections]),
            "corridor_m": np.array([s.corridor_m for s in sections]),
            "boreholes": np.array([len(s.boreholes) for s in sections], dtype=np.int64),
            "file": np.array(
                [
                    f"{stem}.{fmt if drawn else 'csv'}"
                    for stem, drawn in zip(section_file_stems(sections), drawn_sections(sections))
                ],
                dtype=object,
            ),
        },
        "LINESTRING",
        "Alignments of the sections (seismic lines and [sections] alignments); chainage from the first vertex",
    )


def handoff_layers(result, sections=None) -> dict:
    """GeoPackage layers of the hand-off products (``sections``, ``design_volumes``)."""
    out: dict = {}
    if result.surface is None:
        return out
    sections = sections if sections is not None else sections_step(result)
    if sections:
        out["sections"] = sections_layer(sections, result.survey.handoff.section_format)
    d = result.design
    if d is not None and d.volume is not None:
        out["design_volumes"] = design_volumes_layer(d)
    return out


def handoff_run_info(result) -> list:
    """(key, value) lines for the run_info table."""
    items: list = []
    if result.surface is None:
        return items
    h = result.survey.handoff
    items.append(("vertical_datum", h.vertical_datum or "vertical datum not stated"))
    items.append(("survey_date", h.survey_date or "not stated"))
    items.append(
        (
            MAP_SHEET_NAME,
            "A3 map sheet: depth, standard deviation"
            + (", probability above the design level" if result.design is not None else ""),
        )
    )
    items.append(
        (
            LANDXML_NAME,
            "LandXML 1.2 TIN of reflector_elevation.tif (two triangles per fully mapped quad "
            "of cell centres; points northing easting elevation)",
        )
    )
    d = result.design
    if d is not None:
        items.append(("design_elevation_m", d.design_elevation_m))
        if d.probability is not None:
            items.append((PROBABILITY_NAME, "P(reflector elevation > design elevation) = Phi((z - z_design)/sigma)"))
        if d.volume is not None:
            v = d.volume
            items.append(
                (
                    "rock_volume_above_design_m3",
                    f"P10 {v.p10_m3:.0f}, P50 {v.p50_m3:.0f}, P90 "
                    f"{v.p90_m3:.0f} ({v.n_simulations} conditional "
                    "simulations)",
                )
            )
        if d.note:
            items.append(("design_note", d.note))
    return items


def _contours(result, kind):
    c = result.contours
    out: list = []
    if c is None or not len(c):
        return tuple(out)
    kinds = np.asarray(c.fields["kind"])
    levels = c.fields["depth_m" if kind == "depth" else "elevation_m"]
    for geom, k, idx, level in zip(c.geometries, kinds, c.fields["index"], levels):
        if k != kind or geom is None:
            continue
        for part in getattr(geom, "geoms", [geom]):
            out.append((float(level), np.asarray(part.coords)[:, :2], bool(idx)))
    return tuple(out)


def map_content(result):
    """The pages and overlays of the map sheet of a run."""
    s = result.surface
    # the depth's sigma beside the depth map: the grid of depth_sigma.tif (the surface's, and the ground's
    # beyond the stations), as the QGIS print layout shows it
    sigma = result.depth_sigma_m if result.depth_sigma_m is not None else s.std
    sd = np.where(s.mask, np.nan, sigma)
    pages = [
        MapPage(
            "Depth to the reflector below ground",
            result.depth_m,
            "depth below ground (m)",
            figures.DEPTH_CMAP,
            contours=_contours(result, "depth"),
        )
    ]
    if np.any(np.isfinite(sd)):
        pages.append(
            MapPage(
                "Standard deviation of the depth",
                sd,
                "depth standard deviation, 1σ (m)",
                figures.SIGMA_CMAP,
                vmin=0.0,
                show_dips=False,
            )
        )
    d = result.design
    if d is not None and d.probability is not None:
        pages.append(
            MapPage(
                f"Probability that the reflector is above {d.design_elevation_m:g} m",
                d.probability,
                "probability of rock above the design level",
                figures.PROBABILITY_CMAP,
                vmin=0.0,
                vmax=1.0,
                contour_levels=(0.1, 0.5, 0.9),
                show_dips=False,
            )
        )
    pts = result.fit.points
    ok = np.isfinite(pts.x_m) & np.isfinite(pts.y_m)
    dips = None
    if result.dips is not None and len(result.dips):
        k = np.isfinite(result.dips.dip_deg)
        dips = (result.dips.x_m[k], result.dips.y_m[k], result.dips.strike_deg[k], result.dips.dip_deg[k])
    sdp = result.surface_dips
    bh = result.survey.boreholes
    overlays = MapOverlays(
        lines={name: np.column_stack([f.x_m, f.y_m]) for name, f in result.fit.frames.items()},
        points_xy=np.column_stack([pts.x_m[ok], pts.y_m[ok]]),
        boreholes=None if bh is None or not len(bh) else (bh.x_m, bh.y_m, list(bh.name)),
        dips=dips,
        surface_dips=None if sdp is None else (sdp.x_m, sdp.y_m, sdp.strike_deg, sdp.dip_deg),
        area=None if d is None else d.area,
    )
    return pages, overlays


def _plan(overlays) -> dict:
    return {
        "lines": overlays.lines,
        "boreholes": None if overlays.boreholes is None else np.column_stack(overlays.boreholes[:2]),
    }


def section_files(result, section, fmt="pdf", info=None, plan=None):
    """The sheet (PDF or SVG bytes) and the CSV columns of one section of a run."""
    info = info or sheet_info(result)
    if plan is None:
        plan = _plan(map_content(result)[1])
    return section_sheet(section, info, plan=plan, fmt=fmt), section.table()


def sheet_jobs(outputs, out_dir, result, sections=None) -> list:
    """Plan the printed sheets of ``result`` in ``outputs``: [(path, function making its bytes)].

    The A3 map sheet and the drawn section sheets (:func:`drawn_sections`);
    the caller draws them, in this process or in a worker
    (:func:`~.outputs.output_workers`). Nothing is drawn here.
    """
    from functools import partial

    if result.surface is None:
        return []
    info = sheet_info(result)
    pages, overlays = map_content(result)
    jobs = [(outputs.stage(out_dir / MAP_SHEET_NAME), partial(map_sheet, result.spec, pages, overlays, info))]
    sections = sections if sections is not None else sections_step(result)
    plan = _plan(overlays)
    fmt = result.survey.handoff.section_format
    for sec, stem, drawn in zip(sections, section_file_stems(sections), drawn_sections(sections)):
        if drawn:
            jobs.append(
                (outputs.stage(out_dir / f"{stem}.{fmt}"), partial(section_sheet, sec, info, plan=plan, fmt=fmt))
            )
    return jobs


def write_handoff(outputs, out_dir, result, progress, sections=None, sheets: bool = True) -> None:
    """Stage every hand-off file of ``result`` in ``outputs`` (an :class:`~..formats.atomic.OutputSet`).

    With ``sheets`` false the printed sheets are left to the caller (:func:`sheet_jobs`).
    """
    if result.surface is None:
        return
    spec, crs = result.spec, result.survey.crs
    h = result.survey.handoff
    info = sheet_info(result)
    sections = sections if sections is not None else sections_step(result)
    if sheets:
        for path, make in sheet_jobs(outputs, out_dir, result, sections):
            path.write_bytes(make())
            check_cancel(progress)
    s = result.surface
    sd = np.where(s.mask, np.nan, s.std)
    spread = (
        f"median sigma {np.nanmedian(sd):.2f} m"
        if np.any(np.isfinite(sd))
        else f"the {result.method_used} gives no sigma"
    )
    write_landxml_surface(
        outputs.stage(out_dir / LANDXML_NAME),
        surface_tin(result),
        crs,
        surface_name=f"reflector {result.survey.settings.reflector}",
        description=f"{result.method_used} surface of the seismic reflector (elevation, m); an interpretation with "
        f"stated uncertainty ({spread}): check against borings",
        project_name=printable(result.survey.name),
        vertical_datum=h.vertical_datum,
        version=info.software.split()[-1],
    )
    d = result.design
    if d is not None and d.probability is not None:
        from .provenance import provenance

        prov = provenance(result)
        write_raster(
            outputs.stage(out_dir / PROBABILITY_NAME),
            d.probability,
            spec,
            crs,
            unit="",
            metadata=prov.items(),
            timestamp=prov.timestamp,
            software=prov.software,
            description="probability (0 to 1) that the reflector lies above the design level",
        )
    for sec, stem in zip(sections, section_file_stems(sections)):
        check_cancel(progress)
        write_csv(outputs.stage(out_dir / f"{stem}.csv"), sec.table())
