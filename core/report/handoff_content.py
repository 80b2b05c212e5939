"""The report's section on the hand-off products: design level, rock volume, sections, files."""

from __future__ import annotations

import numpy as np

from . import figures

__all__ = ["handoff_section"]


def handoff_section(rep, result, sections=None) -> None:
    """Add the design-level answers and the list of hand-off files to the report."""
    if result.surface is None:
        return
    d = result.design
    if d is not None:
        rep.heading(f"Design level {d.design_elevation_m:g} m")
        if d.probability is not None:
            p = d.probability[np.isfinite(d.probability)]
            rep.paragraph(
                f"Probability that the reflector is above the design level, per cell: Φ((z − z_design)/σ) with the "
                f"mapped elevation z and its standard deviation σ (probability_above_design.tif). Over the mapped "
                f"cells it ranges from {p.min():.2f} to {p.max():.2f}; {100 * np.mean(p > 0.9):.0f} % of them have "
                f"a probability above 0.9 and {100 * np.mean(p < 0.1):.0f} % below 0.1."
            )
            spec = result.spec
            rep.figure(
                figures.raster_figure(
                    spec.x_centres,
                    spec.y_centres,
                    d.probability,
                    "probability",
                    f"P(reflector above {d.design_elevation_m:g} m)",
                    cmap=figures.PROBABILITY_CMAP,
                    symmetric=False,
                ),
                "probability of rock above the design level",
            )
        v = d.volume
        if v is not None:
            where = "the design area" if d.area is not None else "the mapped area"
            rep.paragraph(
                f"Rock volume above the design level over {where}, from {v.n_simulations} conditional simulations "
                "of the surface (unconditional Gaussian simulation with the fitted variogram, conditioned by kriging "
                "the simulated values at the data; Deutsch & Journel 1998): P10, P50 and P90 are the 10th, 50th and "
                "90th percentiles (90 % of the realisations give less than P90)."
            )
            rep.items(
                [
                    ("volume P10 (m³)", f"{v.p10_m3:,.0f}"),
                    ("volume P50 (m³)", f"{v.p50_m3:,.0f}"),
                    ("volume P90 (m³)", f"{v.p90_m3:,.0f}"),
                    ("mean ± sd (m³)", f"{v.mean_m3:,.0f} ± {v.sd_m3:,.0f}"),
                    ("volume under the kriged map itself (m³)", f"{v.map_volume_m3:,.0f}"),
                    ("probability of any rock above the level", f"{v.probability_any_rock:.2f}"),
                    ("area asked / mapped (m²)", f"{v.area_m2:,.0f} / {v.mapped_area_m2:,.0f}"),
                    ("simulated nodes", f"{v.n_nodes} at {v.node_spacing_m:g} m spacing (seed {v.seed})"),
                ]
            )
        if d.note:
            rep.paragraph(d.note, cls="small")
    rep.heading("Hand-off files")
    items = [
        (
            ["map_sheet.pdf"],
            "A3 map sheet at a stated scale: depth, standard deviation"
            + (", probability above the design level" if d is not None else ""),
        ),
        (["reflector_surface.xml"], "LandXML 1.2 surface (TIN of the mapped cells) for civil design software"),
    ]
    # the file names the run writes: the same stems, and the sheets drawn (at most 20 lines get one)
    from ..products.handoff import MAX_LINE_SECTION_SHEETS, drawn_sections, section_file_stems

    sections = list(sections or ())
    fmt = result.survey.handoff.section_format
    for s, stem, drawn in zip(sections, section_file_stems(sections), drawn_sections(sections)):
        n = len(s.boreholes)
        holes = "1 borehole" if n == 1 else f"{n} boreholes"
        what = f"section {s.title}: {s.length_m:.0f} m, {holes} within {s.corridor_m / 2:g} m"
        if drawn:
            items.append(([f"{stem}.{fmt}", f"{stem}.csv"], what))
        else:
            note = f" (table only: sheets are drawn for at most {MAX_LINE_SECTION_SHEETS} lines, evenly spread)"
            items.append(([f"{stem}.csv"], what + note))
    rep.files(items)
