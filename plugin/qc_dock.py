"""Quality-control panel: one gather's picks and fit; pick edits that last and remap the survey.

The panel shows, for the chosen shot gather, the picks against the fitted
curve in the t^2-x^2 plane (a horizontal reflector plots as a straight line of
slope 1/V^2 and intercept t0^2, Green 1938), in the t-x plane and as
residuals (the core's own QC figure, ``core.report.qc_figures.GatherFigure``,
drawn on matplotlib's Qt canvas), the fitted
parameters with their standard errors, and every pick in a table.

Editing. Clearing a pick's box excludes it, ticking it restores it, typing a
new time retimes it. Each change is a *pick edit*, appended to the survey's
``pick_edits.csv`` (``core.survey.edits``: the file every run reads, from the
command line too) and pushed on an undo stack (Undo / Redo undo the last rows
of that file). Nothing is changed in place: after each change

1. the map is redone within about a second (``core.remap.remap``: every gather
   refitted, the surface with the variogram model and method of the last
   whole run, the GeoPackage and GeoTIFFs of the results folder rewritten),
   and the map layers of that folder are reloaded;
2. the whole run follows in the background (``core.job.run``, as the command
   line), which rewrites every product, the report included.

All work runs in ``QgsTask`` s, one at a time and in order, so QGIS never
freezes and the products always end with the latest edits. The panel opens
at once (the survey is read and fitted in a task), follows the shots
selected on the map, and states the caution.
"""

from __future__ import annotations

import os
import time
import weakref

import numpy as np
from qgis.core import QgsApplication, QgsProject, QgsTask, QgsVectorLayer
from qgis.PyQt.QtCore import QCoreApplication, QSize, Qt, QTimer
from qgis.PyQt.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QDockWidget,
    QFileDialog,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QSizePolicy,
    QSplitter,
    QTableWidget,
    QTableWidgetItem,
    QUndoCommand,
    QUndoStack,
    QVBoxLayout,
    QWidget,
)

PROJECT_SCOPE = "Rockhead"
PROJECT_KEY_SURVEY = "survey"
PROJECT_KEY_RESULTS = "results"

_DOCKS = weakref.WeakSet()  # the open panels, told when a whole run finishes elsewhere


def remember_run(project, survey_path, results_dir) -> None:
    """Store a run's survey and results folder in the project and tell the open panels to reload."""
    project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, project.writePath(os.path.abspath(str(survey_path))))
    if results_dir:
        project.writeEntry(PROJECT_SCOPE, PROJECT_KEY_RESULTS, project.writePath(os.path.abspath(str(results_dir))))
    for dock in list(_DOCKS):
        dock.reload(survey_path, results_dir)


def tr(text: str) -> str:
    """Translate a user-visible string."""
    return QCoreApplication.translate("Rockhead", text)


# --------------------------------------------------------------------------------------------- state
class GatherQc:
    """A survey's gathers and fits (from a run's computation) and its pick edits; no widgets.

    Parameters
    ----------
    survey_path : str
        The survey.toml (its pick edits file is read, as by every run).
    result : RunResult, optional
        A computation of the survey; when omitted, that of the session's last whole run of it
        (:mod:`.last_run`) while none of its inputs changed, else computed here (as the
        command line does).
    """

    def __init__(self, survey_path, result=None):
        from ..core.survey.config import load_survey
        from ..core.survey.edits import EDITS_FILE_NAME, PickEdits
        from ..core.workflow import compute
        from .last_run import kept_run

        self.survey_path = str(survey_path)
        survey = load_survey(self.survey_path)
        self.edits_path = survey.files.get("pick_edits") or (survey.path.parent / EDITS_FILE_NAME)
        self.edits = survey.edits.edits if survey.edits is not None else PickEdits((), self.edits_path)
        if result is None:
            result = kept_run(self.survey_path)  # the whole run that just ended, when its inputs are unchanged
        self.set_result(result if result is not None else compute(survey))

    def set_result(self, result) -> None:
        """Take a new computation (after a remap or a whole run)."""
        from ..core.remap import pinned_choices

        self.result = result
        self.survey = result.survey
        self.gathers = result.fit.gathers
        self.fits = result.fit.fits
        self.pinned = pinned_choices(result)
        self._refresh_applied()

    # -- edits ----------------------------------------------------------------------------------
    def _original_picks(self):
        from dataclasses import replace

        p = self.survey.picks
        e = self.survey.edits
        return p if e is None else replace(p, time_s=np.asarray(e.original_time_s, float))

    def _refresh_applied(self) -> None:
        from ..core.survey.edits import apply_pick_edits

        self.applied = apply_pick_edits(self._original_picks(), self.edits)

    def set_edits(self, edits) -> None:
        """Take ``edits`` (a PickEdits) as the survey's edits and write the edits file."""
        from ..core.survey.edits import write_pick_edits

        self.edits = edits
        self._refresh_applied()
        write_pick_edits(self.edits_path, edits)

    def pick_key(self, pick_row: int) -> tuple:
        """(line, shot, receiver, reflector) of a pick (row of the survey's picks)."""
        p = self.survey.picks
        return tuple(str(v[pick_row]) for v in (p.line, p.shot, p.receiver, p.reflector))

    # -- lookup -----------------------------------------------------------------------------------
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
        return rows[np.argsort(self.offsets_m(rows), kind="stable")]

    def offsets_m(self, rows) -> np.ndarray:
        """Signed offset along the line (receiver minus shot, along the line's unit vector)."""
        d = self.gathers.receiver_xyz[rows, :2] - self.gathers.source_xyz[rows, :2]
        u = self.gathers.line_unit[self.gathers.gather[rows]]
        return np.sum(d * u, axis=1)

    def model_times_s(self, rows) -> np.ndarray:
        """Fitted two-way times at the picks' receivers (exact image source, real 3D geometry)."""
        from ..core.seismic.forward import image_source_traveltime
        from ..core.seismic.geometry import gather_normals

        g = self.gathers.gather[rows]
        normals = gather_normals(self.gathers, self.fits)[g]
        h = self.fits.normal_distance_m[g]
        src = self.gathers.source_xyz[rows]
        offset = np.sum(normals * src, axis=1) + h
        with np.errstate(invalid="ignore"):
            return image_source_traveltime(
                src, self.gathers.receiver_xyz[rows], normals, offset, self.fits.velocity_m_s[g]
            )

    def pick_state(self, rows) -> dict:
        """Per pick of ``rows``: picks-table row, current time (ms, after the edits), excluded, retimed, rejected."""
        idx = self.gathers.pick_index[rows]
        time_ms = self.applied.picks.time_s[idx] * 1e3
        return {
            "pick_row": idx,
            "time_ms": time_ms,
            "original_ms": self.applied.original_time_s[idx] * 1e3,
            "excluded": self.applied.excluded[idx],
            "retimed": self.applied.picks.time_s[idx] != self.applied.original_time_s[idx],
            "rejected": np.asarray(self.fits.rejected, bool)[rows],
            "fitted_ms": self.gathers.time_s[rows] * 1e3,
        }

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
            "picks_excluded": (int(f.picks_excluded[g]), None),
            "status": (str(f.status[g]), None),
            "reason": (str(f.reason[g]), None),
        }

    def draw_figure(self, g: int, figure) -> None:
        """Show gather ``g`` on ``figure`` (a :class:`~..core.report.qc_figures.GatherFigure`), as the report draws it.

        The picks are shown as they stand now: edits made since the fit show
        at their new times and states.
        """
        rows = self.pick_rows(g)
        st = self.pick_state(rows)
        line, shot = self.labels()[g]
        figure.draw(
            self.offsets_m(rows),
            st["time_ms"] / 1e3,
            self.model_times_s(rows),
            st["rejected"] & ~st["excluded"],
            st["excluded"],
            f"line {line}, shot {shot}: {self.parameters(g)['status'][0]}",
        )


# --------------------------------------------------------------------------------------------- tasks
class TaskProgress:
    """The core's progress protocol on a QgsTask (progress bar in QGIS, cancellation)."""

    def __init__(self, task: QgsTask):
        self.task = task

    def set_progress(self, percent: float) -> None:
        self.task.setProgress(float(percent))

    def is_canceled(self) -> bool:
        return self.task.isCanceled()

    def info(self, message: str) -> None:
        pass


class _Job:
    """One unit of work of the panel: a function run in a QgsTask, its callback in the main thread."""

    def __init__(self, kind: str, description: str, fn, done):
        self.kind = kind
        self.description = description
        self.fn = fn
        self.done = done
        self.task = None


class _EditCommand(QUndoCommand):
    """Append pick edits to the edits file (redo) or take them off its end again (undo)."""

    def __init__(self, dock, edits: tuple, text: str):
        super().__init__(text)
        self.dock = dock
        self.new = tuple(edits)

    def redo(self):
        qc = self.dock.qc
        current = qc.edits
        for e in self.new:
            current = current.appended(e)
        self.dock._edits_changed(current)

    def undo(self):
        qc = self.dock.qc
        current = qc.edits
        if current.edits[-len(self.new) :] != self.new:  # the file was changed behind the panel's back
            self.dock._error(tr("pick_edits.csv no longer ends with this edit (changed elsewhere?): not undone"))
            return
        for _ in self.new:
            current = current.without_last()
        self.dock._edits_changed(current)


# --------------------------------------------------------------------------------------------- plots
def _plot_canvas(parent):
    """matplotlib's Qt canvas holding the core's gather figure (t-x on top, t^2-x^2 and residuals below)."""
    from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
    from matplotlib.figure import Figure

    from ..core.report.qc_figures import GatherFigure

    figure = Figure(figsize=(5.2, 5.6), dpi=100, layout="constrained")
    canvas = FigureCanvasQTAgg(figure)
    canvas.setParent(parent)
    canvas.setSizePolicy(QSizePolicy.Expanding, QSizePolicy.Expanding)
    canvas.setMinimumSize(QSize(300, 300))
    return canvas, GatherFigure(figure=figure, layout="grid")


# --------------------------------------------------------------------------------------------- dock
class QcDock(QDockWidget):
    """The quality-control dock widget."""

    COLUMNS = ("use", "receiver", "offset_m", "time_ms", "residual_ms", "flag")

    def __init__(self, iface=None, parent=None, whole_run_after_edits: bool = True):
        super().__init__(tr("Rockhead QC"), parent)
        from ..core.products.provenance import CAUTION

        self.setObjectName("RockheadQcDock")
        self.iface = iface
        self.qc = None
        _DOCKS.discard(self)
        self.current = None  # gather index
        self.rows = np.zeros(0, dtype=int)
        self.results_dir = None
        self.whole_run_after_edits = bool(whole_run_after_edits)
        self._filling = False
        self._followed = []  # vector layers whose selection the panel follows
        self._jobs = []  # queued _Job
        self._running = None  # the _Job whose task is running
        self._remap_pending = False
        self._edit_time = None  # perf_counter of the last edit
        self.last_remap_seconds = None  # edit -> map layers reloaded (s)
        self.last_error = ""
        self.undo_stack = QUndoStack(self)
        self._deferred = 0  # table edits waiting for the event loop
        _DOCKS.add(self)

        body = QWidget(self)
        lay = QVBoxLayout(body)
        lay.setContentsMargins(4, 4, 4, 4)
        top = QHBoxLayout()
        self.survey_button = QPushButton(tr("Survey…"), body)
        self.survey_button.setToolTip(tr("Open a survey.toml"))
        self.survey_button.clicked.connect(self._choose_survey)
        self.combo = QComboBox(body)
        self.combo.currentIndexChanged.connect(self._combo_changed)
        top.addWidget(self.survey_button)
        top.addWidget(self.combo, 1)
        lay.addLayout(top)
        self.status_label = QLabel(tr("No survey: run the whole survey, open a results folder or choose one."), body)
        self.status_label.setWordWrap(True)
        lay.addWidget(self.status_label)

        splitter = QSplitter(Qt.Vertical, body)
        # the plot's canvas (matplotlib and its Qt backend, a third of a second to import) is made when the
        # first gather is shown, so that the panel opens at once
        self.plot_box = QWidget(splitter)
        QVBoxLayout(self.plot_box).setContentsMargins(0, 0, 0, 0)
        self.plot_box.setSizePolicy(QSizePolicy.Expanding, QSizePolicy.Expanding)
        self.plot_box.setMinimumSize(QSize(300, 300))
        self.plot = None  # FigureCanvasQTAgg
        self.gather_figure = None  # core.report.qc_figures.GatherFigure on it
        splitter.addWidget(self.plot_box)
        lower = QWidget(splitter)
        lower_lay = QVBoxLayout(lower)
        lower_lay.setContentsMargins(0, 0, 0, 0)
        self.params_label = QLabel(lower)
        self.params_label.setTextFormat(Qt.RichText)
        self.params_label.setWordWrap(True)
        lower_lay.addWidget(self.params_label)
        self.table = QTableWidget(0, len(self.COLUMNS), lower)
        self.table.setHorizontalHeaderLabels(
            [tr("use"), tr("receiver"), tr("offset (m)"), tr("time (ms)"), tr("residual (ms)"), tr("flag")]
        )
        self.table.verticalHeader().setVisible(False)
        self.table.verticalHeader().setDefaultSectionSize(19)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.DoubleClicked | QAbstractItemView.EditKeyPressed)
        self.table.setMinimumHeight(220)
        self.table.itemChanged.connect(self._item_changed)
        lower_lay.addWidget(self.table, 1)
        edit_row = QHBoxLayout()
        self.reason_edit = QLineEdit(lower)
        self.reason_edit.setPlaceholderText(tr("reason for the next edits (optional)"))
        self.undo_button = QPushButton(tr("Undo"), lower)
        self.undo_button.clicked.connect(self.undo_stack.undo)
        self.redo_button = QPushButton(tr("Redo"), lower)
        self.redo_button.clicked.connect(self.undo_stack.redo)
        self.restore_button = QPushButton(tr("Restore gather"), lower)
        self.restore_button.setToolTip(tr("Restore every edited pick of this gather"))
        self.restore_button.clicked.connect(self.restore_all)
        self.undo_stack.canUndoChanged.connect(self.undo_button.setEnabled)
        self.undo_stack.canRedoChanged.connect(self.redo_button.setEnabled)
        self.undo_stack.undoTextChanged.connect(lambda t: self.undo_button.setToolTip(tr("Undo: ") + t))
        self.undo_stack.redoTextChanged.connect(lambda t: self.redo_button.setToolTip(tr("Redo: ") + t))
        self.undo_button.setEnabled(False)
        self.redo_button.setEnabled(False)
        edit_row.addWidget(self.reason_edit, 1)
        edit_row.addWidget(self.undo_button)
        edit_row.addWidget(self.redo_button)
        edit_row.addWidget(self.restore_button)
        lower_lay.addLayout(edit_row)
        splitter.addWidget(lower)
        splitter.setStretchFactor(0, 1)
        splitter.setStretchFactor(1, 1)
        splitter.setSizes([420, 480])  # about half for the picks table: some 18 picks in view
        lay.addWidget(splitter, 1)
        self.caution_label = QLabel(tr("Caution: ") + CAUTION, body)
        self.caution_label.setWordWrap(True)
        self.caution_label.setStyleSheet(
            "QLabel { background: #fff4d6; border-left: 4px solid #e0a800; padding: 4px; font-size: 90%; }"
        )
        lay.addWidget(self.caution_label)
        self.setWidget(body)
        QgsProject.instance().layersAdded.connect(self._layers_added)
        self.follow_project_layers()
        self.load_from_project()

    # -- opening ------------------------------------------------------------------------------
    def load_from_project(self) -> bool:
        """Open the survey the project remembers (set by a run or by opening a results folder), if any."""
        project = QgsProject.instance()
        survey = project.readEntry(PROJECT_SCOPE, PROJECT_KEY_SURVEY, "")[0]
        if not survey:
            return False
        survey = project.readPath(survey)  # stored relative to the project file
        results = project.readEntry(PROJECT_SCOPE, PROJECT_KEY_RESULTS, "")[0]
        results = project.readPath(results) if results else None
        if self.qc is not None and os.path.abspath(self.qc.survey_path) == os.path.abspath(survey):
            self.results_dir = results or self.results_dir
            return True
        self.set_survey(survey, results_dir=results)
        return True

    def reload(self, survey_path, results_dir=None) -> None:
        """A whole run finished elsewhere (the Processing algorithm): read the survey and its results again."""
        if self._running is not None and self._running.kind in ("remap", "run"):
            return  # our own work: it reloads when done
        self.set_survey(survey_path, results_dir=results_dir)

    def set_survey(self, survey_path, shots_layer=None, results_dir=None) -> None:
        """Read and fit a survey in a task; the panel fills when it is done."""
        self.results_dir = str(results_dir) if results_dir else None
        if shots_layer is not None:
            self.follow_layer(shots_layer)
        self.status_label.setText(tr("Reading and fitting {path}…").format(path=os.path.basename(str(survey_path))))
        self.undo_stack.clear()
        path = str(survey_path)
        self._jobs = [j for j in self._jobs if j.kind != "load"]
        self._queue(
            _Job("load", tr("Rockhead: read and fit the survey"), lambda progress: GatherQc(path), self._loaded)
        )

    def _loaded(self, qc) -> None:
        self.qc = qc
        self._filling = True
        self.combo.clear()
        for line, shot in qc.labels():
            self.combo.addItem(tr("line {line}, shot {shot}").format(line=line, shot=shot), (line, shot))
        self._filling = False
        n_edits = len(qc.edits)
        self.status_label.setText(
            tr("{n} gathers; {e} pick edits in {file}.").format(
                n=qc.gathers.n_gathers, e=n_edits, file=os.path.basename(str(qc.edits_path))
            )
        )
        if not self.show_selected_shot() and qc.gathers.n_gathers:
            self.show_gather(0)

    def _choose_survey(self):
        path, _ = QFileDialog.getOpenFileName(self, tr("Survey file"), "", tr("Survey files (*.toml)"))
        if path:
            self.set_survey(path)

    # -- the task queue -----------------------------------------------------------------------
    def _queue(self, job: _Job) -> None:
        self._jobs.append(job)
        self._start_next()

    def _start_next(self) -> None:
        if self._running is not None or not self._jobs:
            return
        job = self._jobs.pop(0)
        self._running = job

        def run(task, job=job):
            return job.fn(TaskProgress(task))

        def finished(exception, value=None, job=job):
            self._running = None
            self._finish(job, exception, value)
            self._start_next()

        job.task = QgsTask.fromFunction(job.description, run, on_finished=finished)
        QgsApplication.taskManager().addTask(job.task)

    def _finish(self, job: _Job, exception, value) -> None:
        from ..core.errors import CancelledError, RockheadError

        if exception is None:
            try:
                job.done(value)
            except RuntimeError as err:  # a layer deleted meanwhile and the like: say so, keep going
                self._error(str(err))
            return
        if isinstance(exception, CancelledError):
            self.status_label.setText(tr("Whole run stopped for a newer edit."))
            return
        if isinstance(exception, (RockheadError, OSError)):
            self._error(str(exception))
            return
        self._error(f"{type(exception).__name__}: {exception}")

    def _error(self, message: str) -> None:
        self.last_error = message
        if self.plot is not None:  # an edit's figure waits for its remap: shown as it stands
            self.plot.draw_idle()
        self.status_label.setText(tr("Error: {message}").format(message=message))
        if self.iface is not None:
            from qgis.core import Qgis

            self.iface.messageBar().pushMessage("Rockhead", message, level=Qgis.Critical, duration=10)

    def busy(self) -> bool:
        """True while a task of the panel runs or waits (or a table edit waits for the event loop)."""
        return self._running is not None or bool(self._jobs) or self._deferred > 0

    def wait(self, timeout_s: float = 120.0) -> bool:
        """Process events until the panel's tasks are done (for scripts and tests); False on timeout."""
        end = time.perf_counter() + timeout_s
        while self.busy() and time.perf_counter() < end:
            QCoreApplication.processEvents()
            time.sleep(0.01)
        return not self.busy()

    # -- shots on the map ---------------------------------------------------------------------
    def follow_project_layers(self) -> None:
        """Follow the selection of every layer of the project that holds shots (fields line and shot)."""
        for layer in QgsProject.instance().mapLayers().values():
            self.follow_layer(layer)

    def _layers_added(self, layers) -> None:
        for layer in layers:
            self.follow_layer(layer)

    def follow_layer(self, layer) -> None:
        """Show the gather of the shot selected on ``layer`` whenever its selection changes."""
        if not isinstance(layer, QgsVectorLayer) or any(lyr is layer for lyr in self._followed):
            return
        fields = layer.fields()
        if fields.indexOf("line") < 0 or fields.indexOf("shot") < 0:
            return
        self._followed.append(layer)
        layer.selectionChanged.connect(self._selection_changed)
        layer.willBeDeleted.connect(lambda lyr=layer: self._unfollow(lyr))

    def _unfollow(self, layer) -> None:
        self._followed = [lyr for lyr in self._followed if lyr is not layer]

    def _selection_changed(self, selected, *_):
        layer = self.sender()
        if selected and self.qc is not None and isinstance(layer, QgsVectorLayer):
            self.show_selected_shot(layer)

    def show_selected_shot(self, layer=None) -> bool:
        """Show the gather of the first selected shot (on ``layer``, else on any followed layer)."""
        if self.qc is None:
            return False
        layers = [layer] if layer is not None else list(self._followed)
        if layer is None and self.iface is not None and self.iface.activeLayer() is not None:
            layers.insert(0, self.iface.activeLayer())
        for lyr in layers:
            if not isinstance(lyr, QgsVectorLayer) or not lyr.selectedFeatureCount():
                continue
            if lyr.fields().indexOf("line") < 0 or lyr.fields().indexOf("shot") < 0:
                continue
            feat = next(iter(lyr.getSelectedFeatures()))
            try:
                self.show_shot(feat["line"], feat["shot"])
            except ValueError:  # a feature of another survey: nothing to show
                continue
            return True
        return False

    def show_shot(self, line, shot) -> None:
        """Show the gather of ``line``/``shot``."""
        self.show_gather(self.qc.gather_index(line, shot))

    def _combo_changed(self, index):
        if not self._filling and index >= 0 and self.qc is not None:
            self.show_gather(index)

    # -- display ------------------------------------------------------------------------------
    def show_gather(self, g, repaint: bool = True) -> None:
        """Fill the table, the figure and the parameters for gather ``g`` (``repaint=False``: the canvas not yet)."""
        qc = self.qc
        self.current = int(g)
        if self.combo.currentIndex() != self.current:
            self._filling = True
            self.combo.setCurrentIndex(self.current)
            self._filling = False
        self.rows = qc.pick_rows(self.current)
        st = qc.pick_state(self.rows)
        x = qc.offsets_m(self.rows)
        model_ms = qc.model_times_s(self.rows) * 1e3
        receivers = qc.survey.picks.receiver[st["pick_row"]]
        self._filling = True
        self.table.setRowCount(len(self.rows))
        for r in range(len(self.rows)):
            use = QTableWidgetItem()
            use.setFlags(Qt.ItemIsUserCheckable | Qt.ItemIsEnabled)
            use.setCheckState(Qt.Unchecked if st["excluded"][r] else Qt.Checked)
            self.table.setItem(r, 0, use)
            flags = []
            if st["excluded"][r]:
                flags.append(tr("excluded"))
            if st["retimed"][r]:
                flags.append(tr("retimed from {t:.2f} ms").format(t=st["original_ms"][r]))
            if st["rejected"][r] and not st["excluded"][r]:
                flags.append(tr("rejected by fit"))
            texts = (
                str(receivers[r]),
                f"{x[r]:.1f}",
                f"{st['time_ms'][r]:.2f}",
                f"{st['time_ms'][r] - model_ms[r]:+.2f}",
                ", ".join(flags),
            )
            for c, text in enumerate(texts, start=1):
                item = QTableWidgetItem(text)
                editable = Qt.ItemIsEditable if c == 3 else Qt.NoItemFlags
                item.setFlags(Qt.ItemIsEnabled | Qt.ItemIsSelectable | editable)
                if c in (2, 3, 4):
                    item.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                self.table.setItem(r, c, item)
        self.table.resizeColumnsToContents()
        self._filling = False
        if self.plot is None:
            self.plot, self.gather_figure = _plot_canvas(self.plot_box)
            self.plot_box.layout().addWidget(self.plot)
        qc.draw_figure(self.current, self.gather_figure)
        if repaint:
            self.plot.draw_idle()  # drawn once, when Qt next paints (rapid changes of gather coalesce)
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
            f"{tr('picks used')}: {p['picks_used'][0]}, {tr('rejected')}: {p['picks_rejected'][0]}, "
            f"{tr('excluded')}: {p['picks_excluded'][0]} &nbsp; "
            f"{tr('status')}: <b>{p['status'][0]}</b> {p['reason'][0]}"
        )

    # -- editing ------------------------------------------------------------------------------
    def _item_changed(self, item):
        if self._filling or self.qc is None or item.row() >= len(self.rows):
            return
        # the edit refills the table: do it after Qt has finished with this item
        row, column, text, checked = item.row(), item.column(), item.text(), item.checkState() == Qt.Checked
        self._deferred += 1

        def later():
            self._deferred -= 1
            self._table_edit(row, column, text, checked)

        QTimer.singleShot(0, later)

    def _table_edit(self, r: int, column: int, text: str, checked: bool) -> None:
        if self.qc is None or r >= len(self.rows):
            return
        st = self.qc.pick_state(self.rows[r : r + 1])
        pick_row = int(st["pick_row"][0])
        if column == 0:
            exclude = not checked
            if exclude != bool(st["excluded"][0]):
                self.edit_picks([(pick_row, "exclude" if exclude else "restore", None)])
        elif column == 3:
            try:
                new_ms = float(text.replace(",", "."))
            except ValueError:
                self._error(tr("'{text}' is not a time in ms").format(text=text))
                self.show_gather(self.current)
                return
            if abs(new_ms - float(st["time_ms"][0])) > 1e-9:
                self.edit_picks([(pick_row, "retime", new_ms)])

    def set_pick_used(self, table_row: int, used: bool) -> None:
        """Tick or clear a pick's box (as a user would)."""
        self.table.item(table_row, 0).setCheckState(Qt.Checked if used else Qt.Unchecked)

    def set_pick_time(self, table_row: int, time_ms: float) -> None:
        """Type a new time into a pick's time cell (as a user would)."""
        self.table.item(table_row, 3).setText(f"{time_ms:.3f}")

    def edit_picks(self, changes) -> None:
        """Record edits ``(pick_row, action, new_time_ms)`` as one undoable command."""
        from ..core.survey.edits import PickEdit, now_time_stamp

        reason = self.reason_edit.text().strip()
        stamp = now_time_stamp()
        edits = []
        for pick_row, action, new_ms in changes:
            line, shot, receiver, reflector = self.qc.pick_key(pick_row)
            edits.append(
                PickEdit(
                    line, shot, receiver, reflector, action, None if new_ms is None else float(new_ms), reason, stamp
                )
            )
        if not edits:
            return
        text = edits[0].describe() if len(edits) == 1 else tr("{n} pick edits").format(n=len(edits))
        self.undo_stack.push(_EditCommand(self, tuple(edits), text))

    def restore_all(self) -> None:
        """Restore every excluded or retimed pick of the current gather (one command)."""
        if self.qc is None or self.current is None:
            return
        st = self.qc.pick_state(self.rows)
        changed = np.flatnonzero(st["excluded"] | st["retimed"])
        self.edit_picks([(int(st["pick_row"][k]), "restore", None) for k in changed])

    def _edits_changed(self, edits) -> None:
        """An edit was made or undone: write the file, show it, redo the map."""
        self.qc.set_edits(edits)
        self._edit_time = time.perf_counter()
        if self.current is not None:
            # the table at once; the figure is painted when the remap is done, with the refit (painting it
            # now, about 0.6 s on the main thread, would slow the remap's thread by as much)
            self.show_gather(self.current, repaint=False)
        self.status_label.setText(tr("{n} pick edits; updating the map…").format(n=len(edits)))
        self.schedule_remap()

    # -- remapping ----------------------------------------------------------------------------
    def schedule_remap(self) -> None:
        """Queue a quick remap (stopping a whole run in progress: it would be out of date)."""
        running = self._running
        if running is not None and running.kind == "run" and running.task is not None:
            running.task.cancel()
        self._jobs = [j for j in self._jobs if j.kind not in ("remap", "run")]
        survey = self.qc.survey_path
        pinned = self.qc.pinned
        out = self.results_dir

        def work(progress):
            from ..core.remap import remap

            return remap(survey, pinned, out, progress=progress)

        self._queue(_Job("remap", tr("Rockhead: remap after a pick edit"), work, self._remapped))

    def _remapped(self, outcome) -> None:
        from . import styling

        self.qc.set_result(outcome.result)
        if self.results_dir:
            styling.refresh_results_layers(self.results_dir)
        if self._edit_time is not None:
            self.last_remap_seconds = time.perf_counter() - self._edit_time
        if self.current is not None:
            self.show_gather(self.current)
        text = tr("Map updated in {s:.1f} s").format(s=self.last_remap_seconds or outcome.seconds)
        if self.results_dir and self.whole_run_after_edits and not any(j.kind == "remap" for j in self._jobs):
            self.status_label.setText(text + tr("; whole run (report, sheets) in the background…"))
            self._queue_whole_run()
        else:
            self.status_label.setText(text + ".")

    def _queue_whole_run(self) -> None:
        survey, out = self.qc.survey_path, self.results_dir

        def work(progress):
            from ..core.job import run

            return run(survey, out, progress=progress)

        self._queue(_Job("run", tr("Rockhead: whole run after pick edits"), work, self._whole_run_done))

    def _whole_run_done(self, result) -> None:
        from . import styling

        self.qc.set_result(result)
        styling.refresh_results_layers(self.results_dir)
        if self.current is not None:
            self.show_gather(self.current)
        self.status_label.setText(
            tr("Every product updated (report, sheets, map) with {n} pick edits.").format(n=len(self.qc.edits))
        )

    def close_panel(self) -> None:
        """Release the survey and stop following layers (called by the plugin's unload)."""
        for job in list(self._jobs):
            self._jobs.remove(job)
        if self._running is not None and self._running.task is not None:
            self._running.task.cancel()
        for layer in list(self._followed):
            try:
                layer.selectionChanged.disconnect(self._selection_changed)
            except (TypeError, RuntimeError):  # already disconnected, or the layer was deleted
                pass
        self._followed = []
        try:
            QgsProject.instance().layersAdded.disconnect(self._layers_added)
        except (TypeError, RuntimeError):
            pass
        self.qc = None
        _DOCKS.discard(self)
