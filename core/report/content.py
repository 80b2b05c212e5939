"""Content of report.html: what a reviewer of the survey asks to see.

Sections: summary and cautions; site map; the surface (method, variogram,
cross-validation, comparison of the two methods); boreholes; every interface of
the overburden (velocity model, depths at the boreholes); true dips at line
crossings; misties; flagged gathers; one section per line (section view, fit
table, QC figures); method notes.
"""

from __future__ import annotations

import numpy as np

from .. import __version__
from ..results import RunResult
from ..text import printable
from . import figures
from .handoff_content import handoff_section
from .html import Report
from .overburden_content import overburden_section


def _rms(values):
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    return float(np.sqrt(np.mean(v**2))) if v.size else float("nan")


def build_report(result: RunResult, layers, qc_figures, sections=None, line_figures=None) -> str:
    """Render the report.

    ``qc_figures`` maps gather index -> (file name, PNG bytes) of the gathers
    with a QC figure of their own, ``line_figures`` line -> (file name, PNG
    bytes) of each line's QC figure (none when None).
    """
    survey, fit = result.survey, result.fit
    rep = Report(f"Reflector map — {survey.name}")
    rep.caution()
    _summary(rep, result)
    _map(rep, result)
    _surface(rep, result)
    _boreholes(rep, result)
    overburden_section(rep, result)
    _dips(rep, result)
    _misties(rep, result)
    _flagged(rep, fit)
    _pick_edits(rep, survey, fit)
    _lines(rep, result, layers, qc_figures, line_figures)
    handoff_section(rep, result, sections)
    _method(rep)
    rep.caution()
    return rep.render()


def _vertical(survey) -> str:
    from ..products.provenance import vertical_label

    return vertical_label(survey.handoff.vertical_crs)


def _summary(rep, r):
    survey, f = r.survey, r.fit.fits
    n_ok = int(np.sum(f.status == "ok"))
    n_picks = len(f.residual_s)
    items = [
        ("survey file", str(survey.path)),
        ("working CRS", f"{survey.crs.name} ({survey.crs.to_string()})"),
        ("input CRS", survey.input_crs.name),
        ("vertical datum of elevations", _vertical(survey)),
        ("lines", ", ".join(sorted(r.fit.frames))),
        ("stations / picks", f"{len(survey.stations)} / {n_picks}"),
        ("gathers", f"{len(f)} ({n_ok} ok, {len(f) - n_ok} flagged)"),
        (
            "picks rejected as mispicks",
            f"{int(f.picks_rejected.sum())} ({100 * f.picks_rejected.sum() / max(n_picks, 1):.1f} %)",
        ),
    ]
    site = r.site_velocity
    if site.n_gathers:
        items.append(
            (
                f"overburden velocity, gather fits of reflector '{site.reflector}' (median ± 1.4826 MAD)",
                f"{site.velocity_m_s:.0f} ± {site.spread_m_s:.0f} m/s from {site.n_gathers} gathers",
            )
        )
    tomo = r.tomography
    if tomo is not None and tomo.inversion is not None:
        res = tomo.inversion
        for j, text in enumerate(res.layer_text()):
            items.append((f"layer {j + 1} velocity, joint estimate", text))
        avg = res.median_average_velocity_m_s(res.names[-1])
        if np.isfinite(avg):
            items.append(
                (f"vertical-average velocity to {res.names[-1]} (median of the mapped cells)", f"{avg:.0f} m/s")
            )
    items += [
        ("surface method", r.method_used),
        (
            "grid",
            f"{r.spec.nx} × {r.spec.ny} cells of {r.spec.cell_size_m:g} m; "
            f"{int(np.sum(~r.surface.mask))} estimated, the rest farther than the masking distance from data",
        ),
        (
            "3D relocation",
            f"{len(r.relocation_history_m)} iterations, largest cell change per iteration (m): "
            + ", ".join(f"{c:.3f}" for c in r.relocation_history_m),
        ),
    ]
    depth = r.depth_m[np.isfinite(r.depth_m)]
    if depth.size:
        items.append(("depth to reflector (mapped cells)", f"{depth.min():.1f} to {depth.max():.1f} m"))
    if r.ground.source_ == "stations" and r.ground_buffer_m is not None:
        items.append(
            (
                "where depth is given",
                f"inside the stations' outline and up to {r.ground_buffer_m:.1f} m beyond it, where the ground "
                f"(extended flat) carries a sigma of the distance × {100 * r.ground.slope_bound_:.1f} % (the steepest "
                "slope between the stations); farther out the ground, and so the depth, is unknown",
            )
        )
    if r.depth_ratio is not None:
        d = r.depth_ratio
        items.append(
            (
                "borehole / seismic depth ratio (velocity check)",
                f"{d.factor:.3f} ± {d.sigma_factor:.3f} from {d.n} boreholes",
            )
        )
    scale = _scale_note(r)
    if scale:
        items.append(("grid scale factor", scale))
    items.append(("software", f"Rockhead {__version__}"))
    rep.heading("Summary")
    rep.items(items)
    for note in r.notes:
        rep.paragraph(note, cls="small")


def _scale_note(r):
    try:
        from ..crs import grid_scale_factor
    except ImportError:  # pragma: no cover
        return ""
    st = r.survey.stations
    k = float(np.mean(grid_scale_factor(r.survey.crs, np.mean(st.x_m), np.mean(st.y_m))))
    if not np.isfinite(k):
        return ""
    return (
        f"k = {k:.6f} at the site centre: ground distance = grid distance / k "
        f"({(1 / k - 1) * 1e3:+.2f} m per km); offsets and depths are computed in grid metres"
    )


def _map(rep, r):
    spec, s = r.spec, r.surface
    contours = []
    c = r.contours
    if len(c):
        kinds = np.asarray(c.fields["kind"])
        for geom, kind, idx, level in zip(c.geometries, kinds, c.fields["index"], c.fields["depth_m"]):
            if kind != "depth" or geom is None:
                continue
            parts = getattr(geom, "geoms", [geom])
            for part in parts:
                contours.append((level, np.asarray(part.coords), bool(idx)))
    lines = {name: np.column_stack([fr.x_m, fr.y_m]) for name, fr in r.fit.frames.items()}
    pts = r.fit.points
    dips = None
    if len(r.dips):
        ok = np.isfinite(r.dips.dip_deg)
        dips = (r.dips.x_m[ok], r.dips.y_m[ok], r.dips.strike_deg[ok], r.dips.dip_deg[ok])
    sd = r.surface_dips
    sdips = (sd.x_m, sd.y_m, sd.strike_deg, sd.dip_deg)
    bh = r.survey.boreholes
    bhs = None if bh is None or not len(bh) else (bh.x_m, bh.y_m, list(bh.name))
    png = figures.map_figure(
        spec.x_centres,
        spec.y_centres,
        r.depth_m,
        contours,
        lines,
        points_xy=np.column_stack([pts.x_m, pts.y_m]),
        dips=dips,
        surface_dips=sdips,
        boreholes=bhs,
        title=f"Depth to reflector below ground ({r.method_used}), depth contours, reflector points\n"
        "strike and dip: black = at line crossings, blue = from the surface; yellow = boreholes",
    )
    rep.heading("Map")
    rep.figure(png, "map of depth to the reflector")
    del s


def _surface(rep, r):
    rep.heading("Surface")
    if r.method_used == "tomography":
        rep.paragraph(
            "The map above is the joint estimate from all picks (described below, after the kriging). The "
            "kriging of the gather-fit points described first is kept for comparison only; it is not the map."
        )
    diag = r.seismic_diagnostics
    vm = diag.variogram
    if vm is not None:
        rep.paragraph(
            f"Ordinary kriging with a {vm.model} variogram: nugget {vm.nugget:.3g} m², partial sill "
            f"{vm.sill:.3g} m², range {vm.range_m:.1f} m (fitted by weighted least squares to the experimental "
            "variogram, the mean measurement-error variance removed from the nugget), each point's "
            "measurement-error variance on the kriging diagonal, "
            f"{r.survey.settings.neighbours} nearest neighbours; cells farther than "
            f"{diag.max_distance_m:.0f} m from any datum are left empty."
        )
        trend = diag.trend
        if any(trend.coef[1:]):
            b, c = trend.coef[1], trend.coef[2]
            rep.paragraph(
                f"A regional plane was removed first and added back after kriging the residuals (linear drift): "
                f"dip {np.degrees(np.arctan(np.hypot(b, c))):.2f}° toward "
                f"{np.degrees(np.arctan2(-b, -c)) % 360:.0f}°. The variogram below is that of the residuals."
            )
        scores = diag.variogram_scores
        if len(scores) > 1:
            rep.paragraph(
                "Variogram model chosen by leave-one-out mean log score (lower is better; Gneiting & Raftery "
                "2007): " + ", ".join(f"{m} {v:.3f}" for m, v in scores) + "."
            )
        ev = diag.experimental_variogram
        if ev is not None:
            png = figures.variogram_figure(
                ev.lag_m,
                ev.semivariance,
                ev.n_pairs,
                vm,
                title="semivariogram of reflector elevations (after the trend)",
            )
            rep.figure(png, "variogram")
    elif diag.smoothing is not None:
        rep.paragraph(f"Smoothing thin-plate spline, smoothing {diag.smoothing:.3g}; no standard deviation.")
    cv = diag.cross_validation
    if cv is not None:
        kind = "5-fold" if diag.method == "spline" else "Leave-one-out"
        rep.heading(f"{kind} cross-validation (seismic points only)", level=3)
        rep.items(
            [
                ("mean error", f"{cv.mean_error:+.3f} m"),
                ("RMSE", f"{cv.rmse:.3f} m"),
                (
                    "mean standardised squared error (≈ 1 when the stated sigma is honest)",
                    f"{cv.mean_standardised_squared_error:.2f}",
                ),
                ("fraction within 2 sigma (≈ 0.95)", f"{cv.fraction_within_2sigma:.2f}"),
            ]
        )
        rep.figure(
            figures.scatter_figure(
                cv.estimate,
                cv.estimate + cv.residual,
                "elevation estimated without the point (m)",
                "reflector point elevation (m)",  # not "datum": read as the vertical datum
                "cross-validation",
            ),
            "cross-validation scatter",
        )
    tomo = r.tomography
    if tomo is not None and tomo.inversion is not None:
        res = tomo.inversion
        rep.heading("Joint estimate from all picks and comparison with the gather-fit surface", level=3)
        f = r.fit.fits
        used = f.weight > 0
        which = (
            f"reflector '{res.names[0]}'"
            if len(res.names) == 1
            else f"the reflectors {', '.join(res.names)} (top down)"
        )
        rep.paragraph(
            f"Every pick of {which} is modelled at once through a "
            "layered overburden: each interface a smooth surface through grid nodes with a geostatistical prior "
            "about a plane, each layer a velocity that may change laterally and with depth; the ray of each pick "
            "refracts at the interfaces above its reflector and reflects at it (Fermat's principle). Robust "
            f"Gauss-Newton, {res.iterations} iterations ({'converged' if res.converged else 'NOT converged'}). "
            "The map is the posterior mean and its sigma the posterior standard deviation, including the "
            "uncertainty of the velocities (velocity and depth trade off: 1 % of velocity is about 1 % of depth)."
        )
        rep.items([(f"layer {j + 1}", text) for j, text in enumerate(res.layer_text())])
        # each interface's prior: how its sill, range, anisotropy and smoothness were chosen
        rep.items([(f"prior of {name}", str(p.source)) for name, p in zip(res.names, res.priors)])
        if res.choice is not None:
            rep.paragraph(
                "Velocity model of each layer chosen by the Bayesian information criterion: "
                + res.choice.summary(res.names)
                + "."
            )
        for note in res.notes:
            rep.paragraph(note, cls="small")
        rep.items(
            [
                ("pick residual rms, per-gather plane fits", f"{_rms(f.residual_s[used]) * 1e3:.3f} ms"),
                ("pick residual rms, joint estimate", f"{_rms(res.residual_s[res.used]) * 1e3:.3f} ms"),
                ("picks rejected by the joint estimate", int(np.sum(res.rejected))),
                ("gathers flagged by the site velocity check", int(np.sum(tomo.curvature_flag))),
            ]
        )
        diff = tomo.difference_m
        if np.any(np.isfinite(diff)):
            rep.paragraph(
                f"Difference joint inversion − kriged gather fits: mean {np.nanmean(diff):+.2f} m, rms "
                f"{_rms(diff):.2f} m, largest {np.nanmax(np.abs(diff)):.2f} m. Large differences mark where the "
                "planar assumption of the gather fits fails (curved reflector)."
            )
            rep.figure(
                figures.raster_figure(
                    r.spec.x_centres,
                    r.spec.y_centres,
                    diff,
                    "difference (m)",
                    "joint inversion minus kriged gather fits",
                ),
                "difference map",
            )
    elif tomo is not None:
        rep.paragraph(f"Joint inversion not run: {tomo.skipped_reason}.")


def _boreholes(rep, r):
    chk, bh = r.borehole_check, r.survey.boreholes
    if chk is None:
        return
    rep.heading("Borehole check")
    rep.paragraph(
        "Each borehole against the seismic-only surface (boreholes not used), so the check is independent; "
        "the final surface then honours the boreholes within their stated error."
    )
    rep.table(
        {
            "borehole": [str(n) for n in bh.name],
            "depth_m": list(bh.depth_m),
            "elevation_m": list(bh.elevation_m),
            "seismic_elevation_m": list(chk.seismic_elevation_m),
            "seismic_sigma_m": list(chk.seismic_sigma_m),
            "residual_m": list(chk.residual_m),
            "residual/sigma": list(chk.standardised),
        },
        flag=list(np.abs(chk.standardised) > 2),
    )


def _dips(rep, r):
    d = r.dips
    rep.heading("True dip and strike at line crossings")
    if not len(d):
        rep.paragraph("No place where gathers of two well-separated line directions meet: no true dip measured.")
        return
    if np.isfinite(d.radius_m):
        rep.paragraph(
            f"At each crossing of two lines, the gathers whose zero-offset points lie within {d.radius_m:.1f} m of "
            "it give the dip there, refitted with the cross-line dip the crossing resolves until it settles; "
            "each row is placed at the weighted centre of its gathers. A line that meets no other line cannot "
            "give its cross-line dip (flagged)."
        )
    rep.table(
        {
            "lines": [str(x) for x in d.lines],
            "dip_deg": list(d.dip_deg),
            "sigma_dip_deg": list(d.sigma_dip_deg),
            "dip_direction_deg": list(d.dip_direction_deg),
            "strike_deg": list(d.strike_deg),
            "gathers": list(d.n_gathers),
            "status": [str(x) for x in d.status],
            "reason": [str(x) for x in d.reason],
        },
        flag=list(d.status != "ok"),
    )


def _misties(rep, r):
    m = r.misties
    rep.heading("Line misties")
    if not len(m):
        rep.paragraph("No line crossings with reflector points on both lines.")
        return
    rep.table(
        {
            "line_a": [str(x) for x in m.line_a],
            "line_b": [str(x) for x in m.line_b],
            "elevation_a_m": list(m.elevation_a_m),
            "elevation_b_m": list(m.elevation_b_m),
            "mistie_m": list(m.mistie_m),
            "sigma_m": list(m.sigma_m),
        },
        flag=list(np.abs(m.mistie_m) > 2 * m.sigma_m),
    )


def _flagged(rep, fit):
    f, g = fit.fits, fit.gathers
    bad = np.flatnonzero(f.status != "ok")
    rep.heading("Flagged gathers")
    if not len(bad):
        rep.paragraph("Every gather gave a physical, well-conditioned fit.")
        return
    rep.table(
        {
            "line": [str(g.line[k]) for k in bad],
            "shot": [str(g.shot[k]) for k in bad],
            "status": [str(f.status[k]) for k in bad],
            "reason": [str(f.reason[k]) for k in bad],
        },
        caption="Gathers not used for the surface, with the reason",
        max_rows=200,
    )


def _pick_edits(rep, survey, fit):
    """The interpreter's pick edits (pick_edits.csv), each as read, and what they changed."""
    applied = getattr(survey, "edits", None)
    if applied is None:
        return
    edits = list(applied.edits)
    rep.heading("Pick edits")
    path = applied.edits.path
    rep.paragraph(
        f"{len(edits)} edit{'s' if len(edits) != 1 else ''} read from {path.name if path else 'the pick edits'} "
        f"(applied in order; picks.csv itself is unchanged): {applied.n_excluded} picks excluded, "
        f"{applied.n_retimed} retimed. Excluded picks are left out of every fit and counted in picks_excluded "
        f"({int(np.sum(fit.fits.picks_excluded))} in the gathers fitted)."
    )
    if edits:
        rep.table(
            {
                "file line": [e.file_line for e in edits],
                "action": [e.action for e in edits],
                "line": [e.line for e in edits],
                "shot": [e.shot for e in edits],
                "receiver": [e.receiver for e in edits],
                "reflector": [e.reflector for e in edits],
                "new_time_ms": [np.nan if e.new_time_ms is None else e.new_time_ms for e in edits],
                "reason": [e.reason for e in edits],
                "time_stamp": [e.time_stamp for e in edits],
            },
            caption="Pick edits, in the order made",
        )


#: The report stays a few megabytes however large the survey: at most this many lines get their section
#: figure and table of gather fits, and this many gather QC figures are embedded (the others are linked
#: to their files in qc/; every fit is in csv/shots.csv and the GeoPackage).
REPORT_MAX_LINES = 30
REPORT_MAX_QC_FIGURES = 60
#: ... and the figures of the lines embedded in it stay within this many bytes (PNG; about 4 MB once
#: encoded in the page): the figures beyond are linked to their files in qc/ (a line's section figure,
#: which has no file of its own, is then left to its section sheet).
REPORT_MAX_LINE_FIGURE_BYTES = 3 * 2**20


def _report_lines(r, names_sorted):
    """The lines shown in full: all of them, or the REPORT_MAX_LINES with the most flagged gathers."""
    if len(names_sorted) <= REPORT_MAX_LINES:
        return list(names_sorted)
    g, f = r.fit.gathers, r.fit.fits
    lines = np.asarray(g.line).astype(str)
    flagged = {ln: int(np.sum((lines == ln) & (f.status != "ok"))) for ln in names_sorted}
    chosen = sorted(names_sorted, key=lambda ln: (-flagged[ln], ln))[:REPORT_MAX_LINES]
    return [ln for ln in names_sorted if ln in set(chosen)]


def _lines(rep, r, layers, qc_figures, line_figures=None):
    fit = r.fit
    f, g = fit.fits, fit.gathers
    shots = layers["shots"]
    rep.heading("Lines")
    names = [
        "shot",
        "velocity_m_s",
        "se_velocity_m_s",
        "t0_ms",
        "se_t0_ms",
        "normal_distance_m",
        "se_normal_distance_m",
        "traveltime_dip_deg",
        "rms_residual_ms",
        "picks_used",
        "picks_rejected",
        "status",
    ]
    all_lines = sorted(fit.frames)
    shown = _report_lines(r, all_lines)
    if len(shown) < len(all_lines):
        rep.paragraph(
            f"{len(all_lines)} lines: the {len(shown)} with the most flagged gathers are shown with their section "
            "and gather fits; every line's fits are in csv/shots.csv and the GeoPackage, its section sheet among "
            "the section files."
        )
    rep.paragraph(
        "Each line's QC figure shows every pick of its gathers against offset with each gather's fitted curve "
        "(time down), and the residual of each pick (picked minus fitted time) on its shot's row: a poorly "
        "fitted gather shows as a row, a bad receiver as a column. Picks rejected by the fit as mispicks are "
        "marked ×, picks excluded by a pick edit ○."
    )
    if len(qc_figures) < len(f):
        rep.paragraph(
            f"{len(qc_figures)} of the {len(f)} gathers have a QC figure of their own in qc/ (t²–x², t–x with the "
            "fit, residuals; gather_figures: by default the flagged gathers, all on request); at most "
            f"{REPORT_MAX_QC_FIGURES} are shown here, the others linked."
        )
    line_figures = line_figures or {}
    embedded = 0
    budget = [REPORT_MAX_LINE_FIGURE_BYTES]  # bytes of line figures still to embed
    noted: list = []

    def fits(image):
        if len(image) <= budget[0]:
            budget[0] -= len(image)
            return True
        if not noted:
            rep.paragraph(
                f"The line figures of this report are limited to {REPORT_MAX_LINE_FIGURE_BYTES / 2**20:.0f} MB; "
                "from here on they are linked to their files in qc/ (sections: the section sheets)."
            )
            noted.append(True)
        return False

    lines_of = np.asarray(g.line)
    section = figures.SectionFigure()
    for line in shown:
        frame = fit.frames[line]
        rep.heading(f"Line {line} (azimuth {frame.azimuth_deg:.0f}°, {frame.length_m:.0f} m)", level=3)
        png = _section_png(section, r, line) if budget[0] > 0 else b""
        if png and fits(png):
            rep.figure(png, f"section of line {line}")
        if line in line_figures:
            name, image = line_figures[line]
            if fits(image):
                rep.figure(image, f"QC of the gathers of line {line} (qc/{name})")
            else:
                rep.link(f"qc/{name}", f"QC of the gathers of line {line} (qc/{name})")
        sel = np.flatnonzero(lines_of == line)
        rep.table(
            {n: [shots.fields[n][i] for i in sel] for n in names},
            caption=f"Gather fits of line {line}",
            flag=[f.status[i] != "ok" for i in sel],
        )
        for i in sel:
            if i in qc_figures:
                name, image = qc_figures[i]
                if embedded < REPORT_MAX_QC_FIGURES and fits(image):
                    rep.figure(
                        image,
                        f"QC of line {line} shot {g.shot[i]}",
                        collapsed_summary=f"QC figure, shot {g.shot[i]}: {f.status[i]} (qc/{name})",
                    )
                    embedded += 1
                else:
                    rep.link(f"qc/{name}", f"QC figure, shot {g.shot[i]}: {f.status[i]} (qc/{name})")


def _section_png(figure, r, line):
    from ..grid import bilinear as _bilinear

    frame = r.fit.frames[line]
    pts = r.fit.points
    sel = np.asarray(pts.line) == line
    ch, _ = frame.locate(pts.x_m[sel], pts.y_m[sel])
    ok = pts.status[sel] == "ok"
    s = r.surface
    z = _bilinear(r.spec, np.where(s.mask, np.nan, s.z), frame.x_m, frame.y_m)
    sd = _bilinear(r.spec, np.where(s.mask, np.nan, s.std), frame.x_m, frame.y_m)
    return figure.draw(
        frame.chainage_m,
        frame.z_m,
        (ch, pts.elevation_m[sel], pts.sigma_m[sel], ok),
        surface=(frame.chainage_m, z, sd),
        title=f"line {printable(line, 40)}: ground, reflector points, mapped surface (±2σ)",
    ).png()


def _method(rep):
    rep.heading("Method and conventions")
    rep.paragraph(
        "Each shot gather is fitted with the exact image-source traveltime of a plane below a homogeneous "
        "layer, t = |R − S'|/V with S' = S + 2hn, from the surveyed 3D source and receiver positions; a "
        "linear t²–x² fit (Green 1938) gives the start, a robust nonlinear fit in time gives V, the normal "
        "distance h, t0 = 2h/V and the along-line normal component s = sin(dip)·cos(β), with standard errors "
        "from the covariance; picks beyond the rejection threshold are flagged, never dropped silently. "
        "The traveltime dip asin(s) is not the apparent dip of the section (tan α = tan(dip)·cos(β)); true "
        "dip comes from crossing lines or from the mapped surface. Reflector points are the feet of the "
        "perpendicular S + hn, moved in 3D with the surface's cross-line dip until the surface stops "
        "changing. Depth = ground elevation − reflector elevation (positive down); azimuths clockwise from "
        "grid north; strike by the right-hand rule (dip direction = strike + 90°)."
    )
