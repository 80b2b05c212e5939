"""The quality-control panel inside QGIS: opens in a task, follows the map, edits that last and remap.

References: the products the command line makes from the same pick edits
file (``rockhead run``), and the core's fits; nothing here compares the panel
with itself only.
"""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsProject, QgsVectorLayer
from rockhead.core.formats.gdalio import read_layer, read_raster
from rockhead.plugin import styling
from rockhead.plugin.qc_dock import PROJECT_SCOPE, GatherQc, QcDock, remember_run

TIMEOUT_S = 600  # a shared two-core machine: generous, and a hung task still fails


@pytest.fixture
def site(tmp_path, core_results):
    """A private copy of the sample survey and of the results the core made from it."""
    out, _ = core_results
    src = out.parent
    dst = tmp_path / "site"
    dst.mkdir()
    for name in ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv"):
        shutil.copy2(src / name, dst / name)
    shutil.copytree(out, dst / "results")
    return dst / "survey.toml", dst / "results"


def _shot_row(results, line, shot, layer="shots"):
    table, _ = read_layer(results / "survey.gpkg", layer)
    f = table.fields
    i = np.flatnonzero((np.asarray(f["line"]).astype(str) == line) & (np.asarray(f["shot"]).astype(str) == shot))
    assert len(i) == 1
    return {k: v[i[0]] for k, v in f.items()}


def _open(iface, survey, results, **kw):
    project = QgsProject.instance()
    styling.load_results(str(results), project)
    remember_run(project, survey, results)
    dock = QcDock(iface, **kw)
    assert dock.wait(TIMEOUT_S), dock.status_label.text()
    assert dock.qc is not None, dock.last_error
    return dock


def test_model_curve_is_the_core_fit(sample_survey):
    qc = GatherQc(sample_survey)
    g = qc.gather_index("A", "1001")
    rows = qc.pick_rows(g)
    # residual = observed - modelled (core); the panel's curve is the image-source time of the fit
    used = ~qc.fits.rejected[rows]
    np.testing.assert_allclose(
        qc.model_times_s(rows)[used], (qc.gathers.time_s - qc.fits.residual_s)[rows][used], atol=1e-9
    )
    assert np.all(np.diff(qc.offsets_m(rows)) >= 0)  # sorted by offset for the plot


def test_panel_opens_in_a_task_states_the_caution_and_shows_every_pick(iface, site):
    survey, results = site
    project = QgsProject.instance()
    remember_run(project, survey, results)
    dock = QcDock(iface)
    # the constructor only queued the work: the survey is read and fitted in a QgsTask
    assert dock.qc is None and dock.busy()
    assert "licensed professionals" in dock.caution_label.text()
    assert dock.wait(TIMEOUT_S) and dock.qc is not None
    assert dock.combo.count() == dock.qc.gathers.n_gathers == 56
    g = dock.current
    assert dock.table.rowCount() == int((dock.qc.gathers.gather == g).sum()) > 40  # every pick of the gather
    # the QC figure (matplotlib, on its Qt canvas) shows the gather's picks: each in one class
    fig = dock.gather_figure
    shown = sum(fig.panel_data("tx", k)[0].size for k in ("used", "rejected", "excluded"))
    assert shown == dock.table.rowCount() and fig.figure.canvas is dock.plot
    assert "V</b> =" in dock.params_label.text() and "±" in dock.params_label.text()
    dock.close_panel()
    dock.deleteLater()


def test_panel_follows_the_map_selection(iface, site):
    survey, results = site
    dock = _open(iface, survey, results)
    shots = next(lyr for lyr in styling.results_layers() if lyr.name() == "Shots (fit status)")
    # selecting a shot on the map shows its gather, without pressing anything
    target = next(f for f in shots.getFeatures() if f["line"] == "B")
    shots.selectByIds([target.id()])
    assert dock.qc.labels()[dock.current] == ("B", str(target["shot"]))
    # the reflector points (same line and shot fields) drive it too
    points = QgsVectorLayer(f"{results}/survey.gpkg|layername=reflector_points", "pts", "ogr")
    QgsProject.instance().addMapLayer(points)
    other = next(f for f in points.getFeatures() if f["line"] == "C")
    points.selectByIds([other.id()])
    assert dock.qc.labels()[dock.current] == ("C", str(other["shot"]))
    dock.close_panel()
    dock.deleteLater()


def test_edit_undo_redo_refit_and_remap(iface, site):
    survey, results = site
    dock = _open(iface, survey, results, whole_run_after_edits=False)
    line = "B"
    shot = next(s for (ln, s) in dock.qc.labels() if ln == line)
    dock.show_shot(line, shot)
    before = _shot_row(results, line, shot)
    before_pt = _shot_row(results, line, shot, "reflector_points")
    depth0 = read_raster(results / "reflector_depth.tif").values
    assert before["picks_excluded"] == 0
    n = dock.table.rowCount()

    # exclude the three farthest picks (clear their boxes), one edit each
    receivers = [dock.table.item(r, 1).text() for r in range(n - 3, n)]
    for r in range(n - 3, n):
        dock.set_pick_used(r, False)
    assert dock.wait(TIMEOUT_S), dock.last_error
    edits_file = survey.parent / "pick_edits.csv"
    rows = edits_file.read_text().splitlines()
    assert rows[0] == "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp"
    assert [r.split(",")[2] for r in rows[1:]] == receivers and all(",exclude," in r for r in rows[1:])
    assert dock.undo_stack.count() == 3

    # the map products follow: the gather refitted, its reflector point, the surface
    after = _shot_row(results, line, shot)
    assert after["picks_excluded"] == 3
    # every pick is used, rejected by the fit or excluded by an edit, never dropped
    assert after["picks_used"] + after["picks_rejected"] + 3 == before["picks_used"] + before["picks_rejected"]
    assert abs(after["velocity_m_s"] - before["velocity_m_s"]) > 1e-6 * before["velocity_m_s"]  # a real change
    pt = _shot_row(results, line, shot, "reflector_points")
    assert pt["elevation_m"] != before_pt["elevation_m"]
    depth1 = read_raster(results / "reflector_depth.tif").values
    assert np.nanmax(np.abs(depth1 - depth0)) > 1e-4  # the surface moved (float32 grids: above their rounding)
    # ... and the layers in the project show it (reloaded, not edited in place)
    layer = next(lyr for lyr in styling.results_layers() if lyr.name() == "Shots (fit status)")
    feat = next(f for f in layer.getFeatures() if f["line"] == line and str(f["shot"]) == shot)
    assert feat["picks_excluded"] == 3 and feat["velocity_m_s"] == pytest.approx(after["velocity_m_s"], rel=1e-12)
    assert not layer.isEditable() and not layer.isModified()
    assert dock.last_remap_seconds is not None
    # the panel shows the new state, in the table and in the figure
    assert dock.table.item(n - 1, 0).checkState() == 0 and "excluded" in dock.table.item(n - 1, 5).text()
    assert dock.gather_figure.panel_data("tx", "excluded")[0].size == 3

    # undo one: two edits left in the file, two picks excluded in the products
    dock.undo_stack.undo()
    assert dock.wait(TIMEOUT_S)
    assert len(edits_file.read_text().splitlines()) == 3
    assert _shot_row(results, line, shot)["picks_excluded"] == 2
    # redo it
    dock.undo_stack.redo()
    assert dock.wait(TIMEOUT_S)
    assert len(edits_file.read_text().splitlines()) == 4
    assert _shot_row(results, line, shot)["picks_excluded"] == 3
    # undo all: the header alone, and the products of the unedited survey again
    for _ in range(3):
        dock.undo_stack.undo()
    assert dock.wait(TIMEOUT_S)
    assert len(edits_file.read_text().splitlines()) == 1
    back = _shot_row(results, line, shot)
    assert back["picks_excluded"] == 0
    # the same fit as the run before the edits (batched solver: converged to far below this)
    assert back["velocity_m_s"] == pytest.approx(before["velocity_m_s"], rel=1e-9)
    # float32 grids; the relocation loop stops at a 0.05 m change, so the same inputs give the same cells
    np.testing.assert_allclose(read_raster(results / "reflector_depth.tif").values, depth0, atol=1e-4, equal_nan=True)
    dock.close_panel()
    dock.deleteLater()


def test_edits_file_read_by_the_command_line_gives_the_same_products(iface, site, tmp_path):
    survey, results = site
    dock = _open(iface, survey, results, whole_run_after_edits=False)
    shot = next(s for (ln, s) in dock.qc.labels() if ln == "A")
    dock.show_shot("A", shot)
    dock.set_pick_used(0, False)
    assert dock.wait(TIMEOUT_S), dock.last_error
    t_old = float(dock.table.item(5, 3).text())
    dock.set_pick_time(5, t_old + 1.5)  # retime one pick by typing its new time
    assert dock.wait(TIMEOUT_S), dock.last_error
    text = (survey.parent / "pick_edits.csv").read_text()
    assert ",exclude," in text and ",retime," in text

    # the command line, in its own process, on the same survey (it reads pick_edits.csv beside it)
    other = tmp_path / "cli"
    import rockhead

    package_parent = str(Path(rockhead.__path__[0]).parent)  # the folder holding the link named rockhead
    proc = subprocess.run(
        [sys.executable, "-m", "rockhead.core.cli", "run", str(survey), "--out", str(other)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": package_parent},
    )
    assert proc.returncode == 0, proc.stderr
    assert "pick edits: 2 read from pick_edits.csv: 1 picks excluded, 1 retimed" in proc.stdout
    for layer in ("shots", "reflector_points"):
        a, _ = read_layer(results / "survey.gpkg", layer)
        b, _ = read_layer(other / "survey.gpkg", layer)
        for k, v in a.fields.items():
            if np.asarray(v).dtype.kind == "f":
                # the panel's quick remap and the whole run compute the same fits and relocation (the same
                # variogram model, chosen again by the whole run); 1e-9 relative covers threaded sums
                np.testing.assert_allclose(v, b.fields[k], rtol=1e-9, atol=1e-9, equal_nan=True, err_msg=k)
            else:
                assert list(v) == list(b.fields[k]), k
    for name in ("reflector_depth.tif", "reflector_elevation.tif", "depth_sigma.tif"):
        np.testing.assert_allclose(
            read_raster(results / name).values,
            read_raster(other / name).values,
            rtol=0,
            atol=1e-4,
            equal_nan=True,
            err_msg=name,
        )  # float32 cells
    html = (other / "report.html").read_text(encoding="utf-8")
    assert "Pick edits" in html and "retime" in html
    dock.close_panel()
    dock.deleteLater()


def test_whole_run_follows_the_edit(iface, site):
    survey, results = site
    dock = _open(iface, survey, results)  # the whole run follows each quick remap
    shot = next(s for (ln, s) in dock.qc.labels() if ln == "D")
    dock.show_shot("D", shot)
    dock.set_pick_used(2, False)
    assert dock.wait(TIMEOUT_S), dock.last_error
    html = (results / "report.html").read_text(encoding="utf-8")
    assert "Pick edits" in html and ",exclude," in (survey.parent / "pick_edits.csv").read_text()
    assert "Every product updated" in dock.status_label.text()
    dock.close_panel()
    dock.deleteLater()


def test_malformed_edits_file_is_named_with_line_and_field(iface, site):
    survey, results = site
    (survey.parent / "pick_edits.csv").write_text(
        "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\nA,1001,1002,,exclde,,,\n"
    )
    remember_run(QgsProject.instance(), survey, results)
    dock = QcDock(iface)
    assert dock.wait(TIMEOUT_S)
    assert dock.qc is None
    assert "pick_edits.csv, line 2, field 'action'" in dock.status_label.text()
    assert QgsProject.instance().readEntry(PROJECT_SCOPE, "survey", "")[0]
    dock.close_panel()
    dock.deleteLater()
