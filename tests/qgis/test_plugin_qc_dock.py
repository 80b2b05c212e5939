"""The quality-control panel opens for a shot; excluding a pick and refitting changes that gather."""

import numpy as np
import pytest

pytest.importorskip("qgis.core", reason="needs QGIS's Python bindings")

from qgis.core import QgsProject, QgsVectorLayer
from qgis.PyQt.QtCore import Qt
from rockhead.core.seismic import shot_fits
from rockhead.plugin.qc_dock import GatherQc, QcDock


@pytest.fixture
def shots_layer(provider, sample_survey):
    import processing

    res = processing.run(
        "rockhead:fitgathers",
        {
            "SURVEY": str(sample_survey),
            "SHOTS": str(sample_survey.parent / "shots.gpkg"),
            "REFLECTOR_POINTS": "TEMPORARY_OUTPUT",
        },
    )
    layer = QgsVectorLayer(res["SHOTS"], "shots", "ogr")
    assert layer.isValid()
    QgsProject.instance().addMapLayer(layer)
    return layer


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


def test_panel_shows_selected_shot_and_refit_updates_layer(iface, sample_survey, shots_layer):
    dock = QcDock(iface)
    dock.set_survey(str(sample_survey), shots_layer)
    # choose the shot by selecting its feature on the shots layer (the panel follows the selection)
    target = next(f for f in shots_layer.getFeatures() if f["line"] == "B")
    shots_layer.selectByIds([target.id()])
    g = dock.current
    assert dock.qc.labels()[g] == ("B", str(target["shot"]))
    dock.show_gather(0)
    assert dock.show_selected_shot()  # the button does the same
    assert dock.current == g
    assert dock.qc.labels()[g] == ("B", str(target["shot"]))
    n_rows = dock.table.rowCount()
    assert n_rows == int((dock.qc.gathers.gather == g).sum()) > 6
    assert "V</b> =" in dock.params_label.text() and "±" in dock.params_label.text()
    before = dock.qc.fits.velocity_m_s.copy()
    before_used = int(dock.qc.fits.picks_used[g])

    # exclude the three farthest picks (the check boxes of the last table rows), then refit
    for r in range(n_rows - 3, n_rows):
        dock.set_pick_used(r, False)
    assert dock.qc.exclude.sum() == 3
    dock.refit()
    after = dock.qc.fits
    assert int(after.picks_excluded[g]) == 3
    assert int(after.picks_used[g]) < before_used
    # a real change, far above the rounding of the fit (1e-12), not a last-bit difference
    assert abs(after.velocity_m_s[g] - before[g]) > 1e-6 * before[g]
    others = np.arange(len(before)) != g
    # gathers are independent: the others keep their values (to the last bits of threaded batches)
    np.testing.assert_allclose(after.velocity_m_s[others], before[others], rtol=1e-12)
    # the same numbers as the core given the same exclusions
    ref = shot_fits.fit_shot_gathers(dock.qc.gathers, dock.qc.survey.settings, exclude=dock.qc.exclude)
    assert after.velocity_m_s[g] == pytest.approx(ref.velocity_m_s[g], rel=1e-12)
    # the shots layer now holds the refitted values
    feat = next(
        f
        for f in QgsVectorLayer(shots_layer.source(), "s", "ogr").getFeatures()
        if f["line"] == "B" and str(f["shot"]) == str(target["shot"])
    )
    assert feat["velocity_m_s"] == pytest.approx(float(after.velocity_m_s[g]), rel=1e-12)
    assert feat["picks_used"] == int(after.picks_used[g])
    assert dock.table.item(n_rows - 1, 0).checkState() == Qt.Unchecked
    assert dock.table.item(n_rows - 1, 5).text() == "excluded"

    # restore: back to the original fit
    dock.restore_all()
    assert dock.qc.fits.velocity_m_s[g] == pytest.approx(before[g], rel=1e-12)
    dock.close_panel()
    dock.deleteLater()


def test_panel_draws_plots(iface, sample_survey):
    dock = QcDock(iface)
    dock.set_survey(str(sample_survey))
    dock.show_shot("A", "1001")
    if dock.plots.use_matplotlib:
        axes = dock.plots.figure.axes
        assert len(axes) == 3
        # t^2-x^2 panel: used picks plotted as x^2, t^2
        xs = axes[0].lines[0].get_xdata()
        assert np.all(xs >= 0)
    dock.close_panel()
    dock.deleteLater()
