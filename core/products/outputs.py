"""Write a :class:`~rockhead.core.results.RunResult` to its output folder.

Every file is written into the staging folder of a
:class:`~.runfolder.RunFolder`, which replaces the output folder as a whole
once the set is complete: a run that fails, is cancelled or is killed half way
leaves the previous outputs byte-identical and no partial file.
"""

from __future__ import annotations

from typing import List, Tuple

import numpy as np

from ..errors import OutputError
from ..formats.atomic import fsync_path
from ..formats.dxf import write_contours_dxf
from ..formats.gdalio import gdal_timestamp, write_layers, write_raster
from ..formats.qgis_gpkg import add_layer_metadata
from ..formats.runfolder import RunFolder
from ..formats.tables import write_layer_csv
from ..progress import check_cancel
from ..results import RunResult
from ..text import file_stem, printable
from ..workflow import surface_data
from . import layers as lay
from .geopackage import layers_3d, qgis_layer_metadata
from .handoff import PROBABILITY_NAME, handoff_layers, handoff_run_info, sheet_jobs, write_handoff
from .overburden import overburden_layers, overburden_rasters
from .provenance import elevation_crs, provenance
from .styles import layer_styles, raster_styles, styles_table

GPKG_NAME = "survey.gpkg"


def result_layers(result: RunResult, sections=None) -> dict:
    """The GeoPackage layers of a run, in the order a GIS should list them."""
    fit = result.fit
    out = {
        "stations": lay.stations_layer(result.survey.stations),
        "lines": lay.lines_layer(fit.frames),
        "shots": lay.shots_layer(fit.gathers, fit.fits, result.tomography),
        "reflector_points": lay.reflector_points_layer(fit.points),
        "reflection_points": lay.reflection_points_layer(fit.receiver_points, fit.fits),
    }
    out["dip_measurements"] = lay.dips_layer(result.dips)
    out["surface_dips"] = lay.surface_dips_layer(result.surface_dips)
    out["misties"] = lay.misties_layer(result.misties)
    if result.borehole_check is not None:
        out["boreholes"] = lay.boreholes_layer(result.survey.boreholes, result.borehole_check)
    if result.cmp is not None:
        out["cmp_fits"] = lay.cmp_layer(result.cmp)
    if len(result.dix):
        out["dix_intervals"] = lay.dix_layer(result.dix)
    out["contours"] = result.contours
    cv = result.seismic_diagnostics.cross_validation
    if cv is not None:
        x, y, _, _ = surface_data(result.fit.points, result.survey.settings.reflector)
        out["cross_validation"] = lay.cross_validation_layer(x, y, cv)
    out.update(overburden_layers(result))
    out.update(handoff_layers(result, sections))
    out["run_info"] = lay.run_info_layer(run_info(result))
    return out


def run_info(result: RunResult) -> list:
    """(key, value) pairs saying which method made which output, with the main numbers."""
    from .. import __version__

    s = result.survey.settings
    items: List[Tuple[str, object]] = [
        ("software", f"Rockhead {__version__}"),
        ("survey", result.survey.name),
        ("survey_file", str(result.survey.path)),
        ("crs", result.survey.crs.to_string()),
        ("reflector", s.reflector),
        ("gathers", "exact image-source fit of every shot gather (robust, with standard errors)"),
    ]
    buffer = result.ground_buffer_m
    extent = (
        "depth given where the DEM has values"
        if result.ground.source_ != "stations"
        else f"depth given up to {buffer:.1f} m beyond the stations' outline"
        if buffer is not None
        else ""
    )
    items += [
        ("surface_method", result.method_used),
        ("reflector_elevation.tif", f"{result.method_used} surface of the reflector (m)"),
        ("reflector_depth.tif", f"ground ({result.ground.description_}) minus reflector_elevation.tif (m)"),
        (
            "depth_sigma.tif",
            "standard deviation of the depth (m): the surface's, and beyond the stations the "
            "ground's (distance x steepest station slope)",
        ),
        ("elevation_sigma.tif", f"standard deviation of the {result.method_used} surface (m)"),
        ("ground_buffer_m", extent),
        ("cell_size_m", result.spec.cell_size_m),
        ("trend", s.trend),
    ]
    vm = result.seismic_diagnostics.variogram
    if vm is not None:
        items.append(
            ("variogram", f"{vm.model}, nugget {vm.nugget:.4g} m², sill {vm.sill:.4g} m², range {vm.range_m:.1f} m")
        )
    tomo = result.tomography
    if tomo is not None and tomo.inversion is not None:
        t = tomo.inversion
        items.append(("joint_estimate_layers", " | ".join(t.layer_text())))
    elif tomo is not None:
        items.append(("joint_inversion", f"not run: {tomo.skipped_reason}"))
    if result.depth_ratio is not None:
        d = result.depth_ratio
        items.append(("borehole_depth_ratio", f"{d.factor:.4f} ± {d.sigma_factor:.4f}"))
    ob = result.overburden
    if ob is not None:
        items.append(
            (
                "layers",
                f"{' over '.join(ob.order)} (top down; " + ("[processing] layers)" if s.layers else "by median t0)"),
            )
        )
        items.append(("interfaces", f"{', '.join(m.reflector for m in ob.interfaces)} mapped from the {ob.source}"))
    items.append(("calibrate_velocity", s.calibrate_velocity))
    items += handoff_run_info(result)
    items.append(
        (
            "caution",
            "An interpretation with stated uncertainty; it does not replace borings. Check "
            "against borings; designs need sign-off by licensed professionals under local codes.",
        )
    )
    return items


ELEVATION_NAME = "reflector_elevation.tif"
#: File name -> band description of the raster outputs
RASTER_DESCRIPTIONS = {
    ELEVATION_NAME: "reflector elevation (m, up positive)",
    "reflector_depth.tif": "reflector depth below ground (m, positive down)",
    "depth_sigma.tif": "standard deviation of the reflector depth (m)",
    "elevation_sigma.tif": "standard deviation of the reflector elevation (m)",
}


def result_rasters(result: RunResult) -> dict:
    """File name -> grid of the GeoTIFF outputs (on ``result.spec``, row 0 north)."""
    s = result.surface
    z = np.where(s.mask, np.nan, s.z)
    std = np.where(s.mask, np.nan, s.std)
    return {
        "reflector_elevation.tif": z,
        "reflector_depth.tif": result.depth_m,
        "depth_sigma.tif": result.depth_sigma_m if result.depth_sigma_m is not None else std,
        "elevation_sigma.tif": std,
    }


GATHER_FIGURES = ("all", "flagged", "none")


def figure_gathers(result: RunResult, which: str = "flagged") -> np.ndarray:
    """Indices of the gathers that get a QC figure of their own: ``all``, ``flagged`` (status not ok), ``none``.

    Every pick of every gather, rejected ones marked, is in its line's QC
    figure (:func:`line_qc_figures`); a gather of its own is drawn where its
    fit was flagged, or for every gather on request.
    """
    f = result.fit.fits
    if which == "none":
        return np.zeros(0, dtype=int)
    if which == "flagged":
        return np.flatnonzero(f.status != "ok")
    if which != "all":
        raise ValueError(f"gather_figures must be one of {', '.join(GATHER_FIGURES)}, not {which!r}")
    return np.arange(len(f))


def _pick_geometry(result: RunResult):
    """Per pick of the gather set: signed offset along the line (m) and the fitted time (s); picks by gather."""
    g, f = result.fit.gathers, result.fit.fits
    d = g.receiver_xyz - g.source_xyz
    x_along = np.einsum("ij,ij->i", d[:, :2], g.line_unit[g.gather])
    model = g.time_s - f.residual_s
    order = np.argsort(g.gather, kind="stable")
    bounds = np.searchsorted(g.gather[order], np.arange(g.n_gathers + 1))
    return x_along, model, order, bounds


def gather_qc_figures(result: RunResult, which: str = "flagged"):
    """Yield (gather index, file name, PNG bytes) of the QC figure of the gathers chosen by ``which``.

    One matplotlib figure is built and redrawn for each gather
    (:class:`~..report.qc_figures.GatherFigure`). File names are portable and
    unique even case-insensitively (:func:`~..text.file_stem`); labels in
    titles are shown printable.
    """
    chosen = figure_gathers(result, which)
    if not len(chosen):
        return
    from ..report.qc_figures import GatherFigure

    g, f = result.fit.gathers, result.fit.fits
    x_along, model, order, bounds = _pick_geometry(result)
    figure = GatherFigure()
    used: set = set()  # file names so far, case-folded: "A B"/"A_B" and "A"/"a" get their own files
    for k in chosen:
        sel = order[bounds[k] : bounds[k + 1]]
        title = (
            f"line {printable(g.line[k], 40)}, shot {printable(g.shot[k], 40)}, "
            f"reflector {printable(g.reflector[k], 40)}: {f.status[k]}"
        )
        if f.status[k] != "ok":
            title += f" ({printable(f.reason[k], 80)})"
        params = (
            f"V  = {f.velocity_m_s[k]:7.0f} ± {f.se_velocity_m_s[k]:.0f} m/s\n"
            f"h  = {f.normal_distance_m[k]:7.2f} ± {f.se_normal_distance_m[k]:.2f} m\n"
            f"t0 = {f.t0_s[k] * 1e3:7.2f} ± {f.se_t0_s[k] * 1e3:.2f} ms\n"
            f"traveltime dip = {f.traveltime_dip_deg[k]:.1f} ± {f.se_traveltime_dip_deg[k]:.1f}°\n"
            f"rms {f.rms_residual_s[k] * 1e3:.2f} ms; used {f.picks_used[k]}, rejected {f.picks_rejected[k]}"
        )
        png = figure.draw(
            x_along[sel], g.time_s[sel], model[sel], f.rejected[sel], f.excluded[sel], title, params
        ).png()
        yield k, file_stem("gather", g.line[k], g.shot[k], g.reflector[k], used=used) + ".png", png


def line_qc_figures(result: RunResult, lines=None):
    """Yield (line, file name, PNG bytes) of the QC figure of every gather of each line (all lines by default).

    Each figure shows every pick of the line's gathers (of every reflector)
    with the gathers' fitted curves, and the residual of each pick by shot
    (:class:`~..report.qc_figures.LineFigure`, one figure redrawn per line).
    """
    from ..report.qc_figures import LineFigure

    g, f = result.fit.gathers, result.fit.fits
    x_along, model, order, bounds = _pick_geometry(result)
    line_of_gather = np.asarray(g.line).astype(str)
    figure = None
    used: set = set()
    for line in sorted(result.fit.frames) if lines is None else lines:
        gathers = np.flatnonzero(line_of_gather == str(line))
        if not len(gathers):
            continue
        frame = result.fit.frames[line]
        first = order[np.minimum(bounds[gathers], len(order) - 1)]  # a pick of each gather: its shot's position
        shot_xy = g.source_xyz[first, :2]
        position, _ = frame.locate(shot_xy[:, 0], shot_xy[:, 1])
        local = np.full(g.n_gathers, -1)
        local[gathers] = np.arange(len(gathers))
        sel = np.flatnonzero(local[g.gather] >= 0)
        reflectors = sorted({str(r) for r in np.asarray(g.reflector)[gathers]})
        labels = [printable(s, 12) for s in np.asarray(g.shot)[gathers]]
        if len(reflectors) > 1:  # a row per gather: a shot's reflectors on rows a little apart, told apart
            refl = np.asarray(g.reflector)[gathers].astype(str)
            labels = [f"{s} {printable(r, 8)}" for s, r in zip(labels, refl)]
            steps = np.diff(np.unique(np.round(np.asarray(position, float), 3)))
            spacing = float(np.median(steps)) if len(steps) else 1.0
            rank = np.array([reflectors.index(r) for r in refl], float)
            position = np.asarray(position, float) + (rank - (len(reflectors) - 1) / 2) * spacing / len(reflectors)
        n_flagged = int(np.sum(f.status[gathers] != "ok"))
        n_rejected, n_excluded = int(np.sum(f.picks_rejected[gathers])), int(np.sum(f.picks_excluded[gathers]))
        title = (
            f"line {printable(line, 40)}: {len(gathers)} gathers ({n_flagged} flagged), "
            f"{n_rejected} picks rejected, {n_excluded} excluded"
        )
        figure = figure or LineFigure()
        png = figure.draw(
            x_along[sel],
            g.time_s[sel],
            model[sel],
            f.rejected[sel],
            f.excluded[sel],
            local[g.gather[sel]],
            np.asarray(position, float),
            labels,
            title,
        ).png()
        yield line, file_stem("line", line, used=used) + ".png", png


def write_all(result: RunResult, out_dir, progress, gather_figures: str = "flagged", workers=None) -> list:
    """Write every output into ``out_dir`` as one set; returns the files written.

    ``out_dir`` is a folder path or an open :class:`~.runfolder.RunFolder`
    (the command line opens it before computing, to hold its lock through the
    run). A system error while writing (disk full, permissions, a vanished
    folder) becomes :class:`~.errors.OutputError`; the staged files are
    removed and the previous outputs stay as they were. Every line gets its
    QC figure (:func:`line_qc_figures`); ``gather_figures`` chooses the
    gathers that get one of their own (:func:`figure_gathers`). ``workers``
    are the :func:`output_workers` forked for ``out_dir`` (an open RunFolder)
    before the computation, if any.
    """
    if isinstance(out_dir, RunFolder):
        return _guarded(_write_all, result, out_dir, progress, gather_figures, workers)
    with RunFolder(out_dir, result.survey.input_files()) as folder:
        return _guarded(_write_all, result, folder, progress, gather_figures)


def _guarded(write, result, folder: RunFolder, *args) -> list:
    try:
        return write(result, folder, *args)
    except OSError as exc:
        raise OutputError(
            f"could not write the outputs in {folder.requested}: {exc.strerror or exc}"
            f"{f' ({exc.filename})' if exc.filename else ''}; earlier outputs there are unchanged"
        ) from exc


def _stage_map(folder: RunFolder, result, layers, progress) -> None:
    """Stage the map products: the GeoPackage (with its styles), CSV tables, GeoTIFFs (with .qml), DXF."""
    crs = result.survey.crs
    spec = result.spec
    prov = provenance(result)
    z_crs = elevation_crs(result.survey)  # compound (working + vertical) when the survey states its datum
    stamp = prov.timestamp.strftime("%Y-%m-%dT%H:%M:%SZ")
    gpkg_layers, layer_md = layers_3d(layers, result, prov.vertical_datum)
    gpkg_layers["layer_styles"] = styles_table(layer_styles(layers), layers, stamp)
    gpkg = write_layers(
        folder.path(GPKG_NAME),
        gpkg_layers,
        z_crs,
        dataset_metadata=prov.items(),
        layer_metadata=layer_md,
        timestamp=prov.timestamp,
    )
    # QGIS's own layer metadata (title, abstract with the caution, history), shown in each layer's properties
    records = qgis_layer_metadata({k: v for k, v in gpkg_layers.items() if k != "layer_styles"}, prov, layer_md)
    add_layer_metadata(gpkg, records, gdal_timestamp(prov.timestamp))
    for name, layer in layers.items():
        write_layer_csv(folder.path(f"csv/{name}.csv"), layer)
    progress.set_progress(15)
    rasters = result_rasters(result)
    for name, grid in rasters.items():
        # elevations carry the vertical datum; depth below ground and sigma are lengths, not heights
        write_raster(
            folder.path(name),
            grid,
            spec,
            z_crs if name == ELEVATION_NAME else crs,
            metadata=prov.items(),
            description=RASTER_DESCRIPTIONS[name],
            timestamp=prov.timestamp,
            software=prov.software,
        )
    for name, (grid, description, is_elevation, unit) in overburden_rasters(result).items():
        write_raster(
            folder.path(name),
            grid,
            spec,
            z_crs if is_elevation else crs,
            unit=unit,
            metadata=prov.items(),
            description=description,
            timestamp=prov.timestamp,
            software=prov.software,
        )
        rasters[name] = grid
    if result.design is not None and result.design.probability is not None:
        rasters[PROBABILITY_NAME] = result.design.probability
    for name, qml in raster_styles(rasters).items():  # QGIS reads a raster's default style beside it
        folder.path(name.rsplit(".", 1)[0] + ".qml").write_text(qml, encoding="utf-8")
    if len(result.contours):
        for kind in ("elevation", "depth"):
            what = (
                "z = reflector elevation (m)"
                if kind == "elevation"
                else "z = depth of the reflector below ground (m, positive down)"
            )
            write_contours_dxf(
                folder.path(f"contours_{kind}.dxf"),
                result.contours,
                kind=kind,
                comments=[f"Reflector {kind} contours; {what}.", *prov.lines()],
            )
    check_cancel(progress)


def write_map(result, out_dir, progress) -> list:
    """Write only the map products of ``result`` (GeoPackage, GeoTIFFs and their styles, CSV, DXF).

    The interpretation loop's quick update after a pick edit: the map layers
    follow within a second, the documents (report, sheets, sections) come
    with the whole run that follows. The other files of the folder's last run
    are carried over (:meth:`~.runfolder.RunFolder.carry_over`) and the folder
    is replaced as one set, like :func:`write_all`; returns the files written.
    """
    from ..handoff.steps import sections_step

    def write(result, folder, progress):
        sections = sections_step(result)
        layers = result_layers(result, sections)
        _stage_map(folder, result, layers, progress)
        written = [folder.requested / rel for rel in folder.planned]
        folder.carry_over()
        folder.commit()
        return written

    with RunFolder(out_dir, result.survey.input_files()) as folder:
        written = _guarded(write, result, folder, progress)
    progress.set_progress(100)
    return written


def _import_matplotlib() -> None:
    import importlib

    try:
        for name in ("matplotlib.figure", "matplotlib.backends.backend_agg", "matplotlib.backends.backend_pdf"):
            importlib.import_module(name)
    except ImportError:  # said where a figure is drawn (MissingDependencyError)
        pass


def _draw_documents(result, folder: RunFolder, progress, gather_figures, layers, sections) -> None:
    """Draw every line's QC figure, the chosen gathers' and the report, into ``folder``."""
    from ..report.drawing import frozen_heap

    with frozen_heap():
        _draw_figures_and_report(result, folder, progress, gather_figures, layers, sections)


def _draw_figures_and_report(result, folder: RunFolder, progress, gather_figures, layers, sections) -> None:
    from ..report.content import build_report

    line_figures = {}
    for line, name, png in line_qc_figures(result):
        folder.path(f"qc/{name}").write_bytes(png)
        line_figures[line] = (name, png)
        check_cancel(progress)
    progress.set_progress(35)
    qc_figures = {}
    n_figures = max(len(figure_gathers(result, gather_figures)), 1)
    for i, (k, name, png) in enumerate(gather_qc_figures(result, gather_figures)):
        folder.path(f"qc/{name}").write_bytes(png)
        qc_figures[k] = (name, png)
        check_cancel(progress)
        progress.set_progress(35 + 40 * (i + 1) / n_figures)
    html = build_report(result, layers, qc_figures, sections, line_figures)
    folder.path("report.html").write_text(html, encoding="utf-8")
    check_cancel(progress)


#: The workers of :func:`output_workers`, by index
MAPS, DOCUMENTS, SHEETS = 0, 1, 2


def _stage_map_and_handoff(result, folder: RunFolder, progress, layers, sections) -> None:
    _stage_map(folder, result, layers, progress)
    write_handoff(folder, folder.requested, result, progress, sections, sheets=False)


def _flushed(folder: RunFolder, rels: list) -> list:
    """``rels`` after flushing their files to disk: a worker's disk writes overlap the others' drawing.

    The folder's commit flushes every file again, then with nothing left to write.
    """
    for rel in rels:
        fsync_path(folder.staging / rel)
    return rels


def output_workers(folder: RunFolder, parallel=None):
    """Child processes that write a run's files, forked now (before the computation) and warmed up meanwhile.

    One writes the map products and the hand-off files (GDAL through
    rasterio and pyogrio); another imports matplotlib and its PDF backend,
    then forks a third: one draws the QC figures and the report, the other
    the printed sheets (:class:`~.background.EarlyWorkers`). They import what
    they need while the computation runs, and :func:`write_all` hands them
    the result. None where there is no child to be had
    (:func:`~.background.fork_is_safe`); either way the files are those of a
    run in one process.

    Parameters
    ----------
    folder : RunFolder
        The open output folder; the children write into its staging folder.
    parallel : bool, optional
        Fork; default :func:`~.background.fork_is_safe`.

    Returns
    -------
    EarlyWorkers or None
        To be used as a context manager around the computation and :func:`write_all`.
    """
    from ..progress import NullProgress
    from .background import EarlyWorkers, fork_is_safe

    if not (fork_is_safe() if parallel is None else parallel):
        return None

    def warm_maps() -> None:
        from importlib.util import find_spec

        from ..formats.gdalio import engine

        if find_spec("osgeo") is None:  # rasterio and pyogrio it is
            from ..formats.gdal_pypi import import_for_writing

            import_for_writing()  # a process that only writes: no pandas and geopandas behind pyogrio
        engine()

    def maps(payload) -> list:
        result, sections, _ = payload
        before = len(folder.planned)
        _stage_map_and_handoff(result, folder, NullProgress(), result_layers(result, sections), sections)
        return folder.planned[before:]

    def warm_drawing() -> None:
        _import_matplotlib()
        from ..report import content, map_sheet, qc_figures, section_sheet  # noqa: F401 - ahead, while the run computes
        from ..report.figures import warm_up

        warm_up()  # fonts and colour maps loaded once, for both drawing processes

    def documents(payload) -> list:
        result, sections, gather_figures = payload
        before = len(folder.planned)
        _draw_documents(result, folder, NullProgress(), gather_figures, result_layers(result, sections), sections)
        return _flushed(folder, folder.planned[before:])

    def sheets(payload) -> list:
        result, sections, _ = payload
        jobs = sheet_jobs(folder, folder.requested, result, sections)
        for path, make in jobs:
            path.write_bytes(make())
        return _flushed(folder, [str(path.relative_to(folder.staging)) for path, _ in jobs])

    return EarlyWorkers(
        [(warm_maps, [maps]), (warm_drawing, [documents, sheets])],  # the drawings share one import of matplotlib
        parallel=True,
        close_in_child=folder.lock_descriptors(),
    )


def _write_all(result, folder: RunFolder, progress, gather_figures, workers=None) -> list:
    from ..handoff.steps import sections_step

    sections = sections_step(result)
    layers = result_layers(result, sections)
    handed = workers is not None and workers.hand_over((result, sections, gather_figures))

    def done_by_worker(index: int) -> bool:
        """True when worker ``index`` wrote its files (now planned here); else this process writes them."""
        rels = workers.collect(index) if handed else None
        for rel in rels or ():
            folder.path(rel)
        return rels is not None

    # what no worker wrote is written here, in the order of a run alone
    if not done_by_worker(MAPS):
        _stage_map_and_handoff(result, folder, progress, layers, sections)
    progress.set_progress(25)
    if not done_by_worker(DOCUMENTS):
        _draw_documents(result, folder, progress, gather_figures, layers, sections)
    progress.set_progress(75)
    if not done_by_worker(SHEETS):
        for path, make in sheet_jobs(folder, folder.requested, result, sections):
            path.write_bytes(make())
            check_cancel(progress)
    progress.set_progress(90)
    written = folder.commit()
    progress.set_progress(100)
    return written
