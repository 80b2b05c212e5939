"""Quality-control panel: one shot gather's picks, fit, residuals; exclude picks and refit.

The panel shows, for the chosen shot gather, the picks against the fitted
curve in the t^2-x^2 plane (a horizontal reflector plots as a straight line of
slope 1/V^2 and intercept t0^2, Green 1938) and in the t-x plane, the
residuals, and the fitted parameters with their standard errors. A table
lists the picks with a check box each: clearing a box excludes the pick, and
"Refit" runs the core's fit again with those exclusions
(``core.seismic.shot_fits.fit_shot_gathers(..., exclude=...)``) and writes the new
values into the shots layer.

All numbers come from the core; :class:`GatherQc` holds the state without any
widget so that it can be tested on its own.
"""

from __future__ import annotations

import os

import numpy as np
from qgis.core import QgsProject, QgsVectorLayer
from qgis.PyQt.QtCore import QCoreApplication, Qt
from qgis.PyQt.QtWidgets import (
    QComboBox,
    QDockWidget,
    QFileDialog,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QSplitter,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from . import deps

PROJECT_SCOPE = "Rockhead"
PROJECT_KEY_SURVEY = "survey"


def tr(text: str) -> str:
    """Translate a user-visible string."""
    return QCoreApplication.translate("Rockhead", text)


# --------------------------------------------------------------------------------------------- state
class GatherQc:
    """Survey, gathers and fits of one survey, with the user's pick exclusions.

    Parameters
    ----------
    survey_path : str
        The survey.toml.
    """

    def __init__(self, survey_path):
        from ..core.seismic import geometry, shot_fits
        from ..core.survey import config

        self._geometry = geometry
        self._shot_fits = shot_fits
        self.survey_path = str(survey_path)
        self.survey = config.load_survey(self.survey_path)
        self.gathers = geometry.build_gathers(self.survey)
        self.exclude = np.zeros(len(self.gathers.time_s), dtype=bool)
        self.fits = shot_fits.fit_shot_gathers(self.gathers, self.survey.settings)

    # -- lookup -------------------------------------------------------------------------------
    def labels(self) -> list:
        """(line, shot) of every gather, in gather order."""
        return [(str(a), str(b)) for a, b in zip(self.gathers.line, self.gathers.shot)]

    def gather_index(self, line, shot) -> int:
        """Index of the gather of ``line``/``shot``; ValueError if there is none."""
        hit = np.flatnonzero((self.gathers.line == str(line)) & (self.gathers.shot == str(shot)))
        if len(hit) == 0:
            raise ValueError(f"no gather for line '{line}', shot '{shot}' in {self.survey_path}")
        return int(hit[0])

    def pick_rows(self, g: int) -> np.ndarray:
        """Indices (into the gather set's pick arrays) of gather ``g``'s picks, by offset."""
        rows = np.flatnonzero(self.gathers.gather == g)
        return rows[np.argsort(self.offsets_m(rows))]

    def offsets_m(self, rows) -> np.ndarray:
        """Signed offset along the line (receiver minus shot, along the line's unit vector)."""
        d = self.gathers.receiver_xyz[rows, :2] - self.gathers.source_xyz[rows, :2]
        u = self.gathers.line_unit[self.gathers.gather[rows]]
        return np.sum(d * u, axis=1)

    def model_times_s(self, rows) -> np.ndarray:
        """Fitted two-way times at the picks' receivers (exact image source, real 3D geometry)."""
        from ..core.seismic.forward import image_source_traveltime

        g = self.gathers.gather[rows]
        normals = self._geometry.gather_normals(self.gathers, self.fits)[g]
        h = self.fits.normal_distance_m[g]
        src = self.gathers.source_xyz[rows]
        offset = np.sum(normals * src, axis=1) + h
        with np.errstate(invalid="ignore"):
            return image_source_traveltime(
                src, self.gathers.receiver_xyz[rows], normals, offset, self.fits.velocity_m_s[g]
            )

    def parameters(self, g: int) -> dict:
        """The fitted parameters of gather ``g`` in display units (ms for times)."""
        f = self.fits
        return {
            "velocity_m_s": (float(f.velocity_m_s[g]), float(f.se_velocity_m_s[g])),
            "normal_distance_m": (float(f.normal_distance_m[g]), float(f.se_normal_distance_m[g])),
            "t0_ms": (float(f.t0_s[g]) * 1e3, float(f.se_t0_s[g]) * 1e3),
            "traveltime_dip_deg": (float(f.traveltime_dip_deg[g]), float(f.se_traveltime_dip_deg[g])),
            "rms_residual_ms": (float(f.rms_residual_s[g]) * 1e3, None),
            "picks_used": (int(f.picks_used[g]), None),
            "picks_rejected": (int(f.picks_rejected[g]), None),
            "status": (str(f.status[g]), None),
            "reason": (str(f.reason[g]), None),
        }

    # -- editing ------------------------------------------------------------------------------
    def set_excluded(self, pick_row: int, excluded: bool) -> None:
        """Exclude (True) or restore (False) one pick (index into the gather set)."""
        self.exclude[int(pick_row)] = bool(excluded)

    def refit(self, progress=None):
        """Fit again with the current exclusions; return the new fits.

        Gathers are fitted independently, so only gathers with changed
        exclusions change; the batched fit is simply run on all of them.
        """
        self.fits = self._shot_fits.fit_shot_gathers(
            self.gathers, self.survey.settings, exclude=self.exclude.copy(), progress=progress
        )
        return self.fits

    def shot_attributes(self, g: int) -> dict:
        """Values of the shots layer's fields for gather ``g`` (the fixed output fields)."""
        f = self.fits

        def num(v):
            v = float(v)
            return v if np.isfinite(v) else None

        return {
            "velocity_m_s": num(f.velocity_m_s[g]),
            "t0_ms": num(f.t0_s[g] * 1e3),
            "normal_distance_m": num(f.normal_distance_m[g]),
            "traveltime_dip_deg": num(f.traveltime_dip_deg[g]),
            "rms_residual_ms": num(f.rms_residual_s[g] * 1e3),
            "picks_used": int(f.picks_used[g]),
            "picks_rejected": int(f.picks_rejected[g]),
            "status": str(f.status[g]),
            "reason": str(f.reason[g]),
            "se_velocity_m_s": num(f.se_velocity_m_s[g]),
            "se_normal_distance_m": num(f.se_normal_distance_m[g]),
            "se_t0_ms": num(f.se_t0_s[g] * 1e3),
            "se_traveltime_dip_deg": num(f.se_traveltime_dip_deg[g]),
        }


def update_shots_layer(layer: QgsVectorLayer, line, shot, values: dict) -> int:
    """Write ``values`` (field -> value) into the features of ``line``/``shot``; return how many.

    Fields the layer does not have are ignored. Uses the edit buffer when the
    layer is being edited, else writes through the data provider.
    """
    fields = layer.fields()
    idx = {name: fields.indexOf(name) for name in values if fields.indexOf(name) >= 0}
    if fields.indexOf("line") < 0 or fields.indexOf("shot") < 0:
        return 0
    expr = "\"line\" = '{}' AND to_string(\"shot\") = '{}'".format(
        str(line).replace("'", "''"), str(shot).replace("'", "''")
    )
    from qgis.core import QgsFeatureRequest

    fids = [f.id() for f in layer.getFeatures(QgsFeatureRequest().setFilterExpression(expr))]
    if not fids:
        return 0
    if layer.isEditable():
        for fid in fids:
            for name, i in idx.items():
                layer.changeAttributeValue(fid, i, values[name])
    else:
        layer.dataProvider().changeAttributeValues({fid: {i: values[name] for name, i in idx.items()} for fid in fids})
        layer.reload()
    layer.triggerRepaint()
    return len(fids)


# --------------------------------------------------------------------------------------------- plots
class _Plots:
    """Three panels: t^2-x^2, t-x with the fitted curve, residuals (matplotlib, else Qt)."""

    def __init__(self, parent):
        self.use_matplotlib = deps.has_matplotlib()
        if self.use_matplotlib:
            from matplotlib.backends.backend_qt5agg import FigureCanvasQTAgg
            from matplotlib.figure import Figure

            self.figure = Figure(figsize=(5, 6), dpi=80, tight_layout=True)
            self.widget = FigureCanvasQTAgg(self.figure)
            self.widget.setParent(parent)
        else:
            from qgis.PyQt.QtWidgets import QGraphicsScene, QGraphicsView

            self.scene = QGraphicsScene(parent)
            self.widget = QGraphicsView(self.scene, parent)

    def draw(self, x, t_ms, model_ms, used, title):
        if self.use_matplotlib:
            self._draw_mpl(x, t_ms, model_ms, used, title)
        else:
            self._draw_qt(x, t_ms, model_ms, used)

    def _draw_mpl(self, x, t_ms, model_ms, used, title):
        fig = self.figure
        fig.clear()
        a1, a2, a3 = fig.subplots(3, 1)
        res = t_ms - model_ms
        for ax in (a1, a2, a3):
            ax.grid(True, lw=0.3, alpha=0.6)
        a1.plot(x[used] ** 2, t_ms[used] ** 2, "o", ms=3, color="#1f4e79", label=tr("used"))
        a1.plot(x[~used] ** 2, t_ms[~used] ** 2, "x", ms=5, color="#c0392b", label=tr("excluded/rejected"))
        o = np.argsort(x)
        a1.plot(x[o] ** 2, model_ms[o] ** 2, "-", lw=1, color="#333333", label=tr("fit"))
        a1.set_xlabel("x² (m²)")
        a1.set_ylabel("t² (ms²)")
        a1.set_title(title, fontsize=9)
        a1.legend(fontsize=7, loc="upper left")
        a2.plot(x[used], t_ms[used], "o", ms=3, color="#1f4e79")
        a2.plot(x[~used], t_ms[~used], "x", ms=5, color="#c0392b")
        a2.plot(x[o], model_ms[o], "-", lw=1, color="#333333")
        a2.invert_yaxis()
        a2.set_xlabel(tr("offset along line (m)"))
        a2.set_ylabel(tr("two-way time (ms)"))
        a3.axhline(0.0, color="#333333", lw=0.8)
        a3.plot(x[used], res[used], "o", ms=3, color="#1f4e79")
        a3.plot(x[~used], res[~used], "x", ms=5, color="#c0392b")
        a3.set_xlabel(tr("offset along line (m)"))
        a3.set_ylabel(tr("residual (ms)"))
        self.widget.draw()

    def _draw_qt(self, x, t_ms, model_ms, used):  # fallback without matplotlib: t-x only
        from qgis.PyQt.QtGui import QBrush, QColor, QPen

        self.scene.clear()
        if len(x) == 0:
            return
        w, h = 300.0, 200.0
        x0, x1 = float(np.min(x)), float(np.max(x))
        finite = np.isfinite(model_ms)
        t0 = float(np.nanmin(np.r_[t_ms, model_ms[finite]]))
        t1 = float(np.nanmax(np.r_[t_ms, model_ms[finite]]))
        sx = w / max(x1 - x0, 1e-9)
        st = h / max(t1 - t0, 1e-9)
        pen = QPen(QColor("#333333"))
        o = np.argsort(x)
        for a, b in zip(o[:-1], o[1:]):
            if finite[a] and finite[b]:
                self.scene.addLine(
                    (x[a] - x0) * sx, (model_ms[a] - t0) * st, (x[b] - x0) * sx, (model_ms[b] - t0) * st, pen
                )
        for xi, ti, ok in zip(x, t_ms, used):
            colour = QColor("#1f4e79" if ok else "#c0392b")
            self.scene.addEllipse((xi - x0) * sx - 2, (ti - t0) * st - 2, 4, 4, QPen(colour), QBrush(colour))


# --------------------------------------------------------------------------------------------- dock
class QcDock(QDockWidget):
    """The quality-control dock widget."""

    COLUMNS = ("use", "receiver", "offset_m", "time_ms", "residual_ms", "flag")

    def __init__(self, iface=None, parent=None):
        super().__init__(tr("Rockhead QC"), parent)
        self.setObjectName("RockheadQcDock")
        self.iface = iface
        self.qc = None
        self.current = None  # gather index
        self.rows = np.zeros(0, dtype=int)
        self.shots_layer = None
        self._filling = False

        body = QWidget(self)
        lay = QVBoxLayout(body)
        top = QHBoxLayout()
        self.survey_button = QPushButton(tr("Survey…"), body)
        self.survey_button.clicked.connect(self._choose_survey)
        self.combo = QComboBox(body)
        self.combo.currentIndexChanged.connect(self._combo_changed)
        self.from_selection_button = QPushButton(tr("Selected shot"), body)
        self.from_selection_button.clicked.connect(self.show_selected_shot)
        top.addWidget(self.survey_button)
        top.addWidget(self.combo, 1)
        top.addWidget(self.from_selection_button)
        lay.addLayout(top)
        splitter = QSplitter(Qt.Vertical, body)
        self.plots = _Plots(splitter)
        splitter.addWidget(self.plots.widget)
        lower = QWidget(splitter)
        lower_lay = QVBoxLayout(lower)
        self.params_label = QLabel(lower)
        self.params_label.setTextFormat(Qt.RichText)
        self.params_label.setWordWrap(True)
        lower_lay.addWidget(self.params_label)
        self.table = QTableWidget(0, len(self.COLUMNS), lower)
        self.table.setHorizontalHeaderLabels(
            [tr("use"), tr("receiver"), tr("offset (m)"), tr("time (ms)"), tr("residual (ms)"), tr("flag")]
        )
        self.table.itemChanged.connect(self._item_changed)
        lower_lay.addWidget(self.table)
        buttons = QHBoxLayout()
        self.refit_button = QPushButton(tr("Refit gather"), lower)
        self.refit_button.clicked.connect(self.refit)
        self.restore_button = QPushButton(tr("Restore all picks"), lower)
        self.restore_button.clicked.connect(self.restore_all)
        buttons.addWidget(self.refit_button)
        buttons.addWidget(self.restore_button)
        lower_lay.addLayout(buttons)
        splitter.addWidget(lower)
        lay.addWidget(splitter, 1)
        self.setWidget(body)
        self.load_from_project()

    def load_from_project(self):
        """Open the survey remembered by the project (set by the whole-survey algorithm), if any."""
        project = QgsProject.instance()
        survey = project.readEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, "")[0]
        if not survey:
            return False
        survey = project.readPath(survey)  # stored relative to the project file
        if self.qc is not None and os.path.abspath(self.qc.survey_path) == os.path.abspath(survey):
            return True
        from ..core.errors import RockheadError

        try:
            self.set_survey(survey)
        except (OSError, RockheadError) as err:  # a stale path or a survey that no longer reads
            self.params_label.setText(tr("Could not open the survey: {err}").format(err=err))
            return False
        return True

    # -- survey and shot choice ---------------------------------------------------------------
    def set_survey(self, survey_path, shots_layer=None):
        """Load a survey (fits all its gathers) and fill the shot list."""
        self.qc = GatherQc(survey_path)
        if shots_layer is not None:
            self.follow_layer(shots_layer)
        self._filling = True
        self.combo.clear()
        for line, shot in self.qc.labels():
            self.combo.addItem(tr("line {line}, shot {shot}").format(line=line, shot=shot), (line, shot))
        self._filling = False
        if self.qc.gathers.n_gathers:
            self.show_gather(0)

    def _choose_survey(self):
        path, _ = QFileDialog.getOpenFileName(self, tr("Survey file"), "", tr("Survey files (*.toml)"))
        if path:
            self.set_survey(path)

    def _combo_changed(self, index):
        if not self._filling and index >= 0 and self.qc is not None:
            self.show_gather(index)

    def show_shot(self, line, shot):
        """Show the gather of ``line``/``shot``."""
        self.show_gather(self.qc.gather_index(line, shot))

    def show_selected_shot(self):
        """Show the first selected feature of the shots layer (or of the active layer)."""
        layer = self.shots_layer
        if layer is None and self.iface is not None:
            layer = self.iface.activeLayer()
        if layer is None or not isinstance(layer, QgsVectorLayer) or not layer.selectedFeatureCount():
            return False
        feat = next(iter(layer.getSelectedFeatures()))
        self.follow_layer(layer)
        if self.qc is None or layer.fields().indexOf("line") < 0 or layer.fields().indexOf("shot") < 0:
            return False
        try:
            self.show_shot(feat["line"], feat["shot"])
        except ValueError:  # a feature of another survey: nothing to show
            return False
        return True

    def follow_layer(self, layer):
        """Use ``layer`` as the shots layer: selecting a shot on the map shows its gather."""
        if layer is self.shots_layer:
            return
        self._unfollow()
        self.shots_layer = layer
        layer.selectionChanged.connect(self._selection_changed)

    def _unfollow(self):
        if self.shots_layer is not None:
            try:
                self.shots_layer.selectionChanged.disconnect(self._selection_changed)
            except (TypeError, RuntimeError):  # already disconnected, or the layer was deleted
                pass
        self.shots_layer = None

    def _selection_changed(self, selected, *_):
        if selected and self.qc is not None:
            self.show_selected_shot()

    # -- display ------------------------------------------------------------------------------
    def show_gather(self, g):
        """Fill the table, the plots and the parameters for gather ``g``."""
        qc = self.qc
        self.current = int(g)
        if self.combo.currentIndex() != self.current:
            self._filling = True
            self.combo.setCurrentIndex(self.current)
            self._filling = False
        self.rows = qc.pick_rows(self.current)
        x = qc.offsets_m(self.rows)
        t_ms = qc.gathers.time_s[self.rows] * 1e3
        model_ms = qc.model_times_s(self.rows) * 1e3
        excluded = qc.exclude[self.rows]
        rejected = np.asarray(qc.fits.rejected, bool)[self.rows]
        used = ~(excluded | rejected)
        picks = qc.survey.picks
        receivers = picks.receiver[qc.gathers.pick_index[self.rows]]
        self._filling = True
        self.table.setRowCount(len(self.rows))
        for r, (rec, xi, ti, mi, exc, rej) in enumerate(zip(receivers, x, t_ms, model_ms, excluded, rejected)):
            use = QTableWidgetItem()
            use.setFlags(Qt.ItemIsUserCheckable | Qt.ItemIsEnabled)
            use.setCheckState(Qt.Unchecked if exc else Qt.Checked)
            self.table.setItem(r, 0, use)
            flag = tr("excluded") if exc else (tr("rejected by fit") if rej else "")
            for c, text in enumerate((str(rec), f"{xi:.1f}", f"{ti:.2f}", f"{ti - mi:+.2f}", flag), start=1):
                item = QTableWidgetItem(text)
                item.setFlags(Qt.ItemIsEnabled)
                self.table.setItem(r, c, item)
        self._filling = False
        line, shot = qc.labels()[self.current]
        self.plots.draw(x, t_ms, model_ms, used, tr("line {line}, shot {shot}").format(line=line, shot=shot))
        self.params_label.setText(self._parameters_html(qc.parameters(self.current)))

    @staticmethod
    def _parameters_html(p):
        def pm(key, fmt):
            value, se = p[key]
            if value != value:  # NaN
                return "–"
            return fmt.format(value) + (" ± " + fmt.format(se) if se is not None and se == se else "")

        return (
            f"<b>V</b> = {pm('velocity_m_s', '{:.0f}')} m/s &nbsp; "
            f"<b>h</b> = {pm('normal_distance_m', '{:.2f}')} m &nbsp; "
            f"<b>t0</b> = {pm('t0_ms', '{:.2f}')} ms<br>"
            f"<b>{tr('traveltime dip')}</b> = {pm('traveltime_dip_deg', '{:.1f}')}° &nbsp; "
            f"<b>rms</b> = {pm('rms_residual_ms', '{:.2f}')} ms<br>"
            f"{tr('picks used')}: {p['picks_used'][0]}, {tr('rejected')}: {p['picks_rejected'][0]} &nbsp; "
            f"{tr('status')}: <b>{p['status'][0]}</b> {p['reason'][0]}"
        )

    # -- editing ------------------------------------------------------------------------------
    def _item_changed(self, item):
        if self._filling or item.column() != 0 or self.qc is None:
            return
        self.qc.set_excluded(self.rows[item.row()], item.checkState() != Qt.Checked)

    def set_pick_used(self, table_row: int, used: bool):
        """Tick or clear a pick's check box (as a user would)."""
        self.table.item(table_row, 0).setCheckState(Qt.Checked if used else Qt.Unchecked)

    def restore_all(self):
        """Restore every pick of the current gather."""
        if self.qc is None or self.current is None:
            return
        self.qc.exclude[self.rows] = False
        self.refit()

    def refit(self):
        """Refit with the current exclusions, redraw, and update the shots layer."""
        if self.qc is None or self.current is None:
            return
        from ..core.errors import RockheadError

        try:
            self.qc.refit()
        except RockheadError as err:
            self.params_label.setText(str(err))
            return
        self.show_gather(self.current)
        layer = self.shots_layer or _find_shots_layer()
        if layer is not None:
            line, shot = self.qc.labels()[self.current]
            update_shots_layer(layer, line, shot, self.qc.shot_attributes(self.current))

    def close_panel(self):
        """Release the survey (called by the plugin's unload)."""
        self.qc = None
        self._unfollow()


def _find_shots_layer():
    for layer in QgsProject.instance().mapLayers().values():
        if isinstance(layer, QgsVectorLayer) and layer.source().endswith("layername=shots"):
            return layer
    return None
