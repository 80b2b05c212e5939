"""The plugin object QGIS creates through ``classFactory``: menus, toolbar, provider, dock."""

from __future__ import annotations

from qgis.core import Qgis, QgsApplication, QgsMessageLog
from qgis.PyQt.QtCore import QCoreApplication, Qt
from qgis.PyQt.QtGui import QIcon
from qgis.PyQt.QtWidgets import QAction

from . import deps
from .provider import ICON_PATH

MENU = "&Rockhead"
LOG_TAG = "Rockhead"


def tr(text: str) -> str:
    """Translate a user-visible string (translate first, format afterwards)."""
    return QCoreApplication.translate("Rockhead", text)


class RockheadPlugin:
    """Registers the Processing provider and the quality-control panel.

    ``unload`` removes everything ``initGui`` added: menu entries, the toolbar
    button, the provider and the dock widget.
    """

    def __init__(self, iface, importer=None):
        self.iface = iface
        self.provider = None  # keep a Python reference, or the provider vanishes
        self.actions = []
        self.dock = None
        self.missing = []
        self._importer = importer  # tests may simulate a missing package

    # -- life cycle ---------------------------------------------------------------------------
    def _check_dependencies(self) -> bool:
        """True when every required package imports; else say which are missing and how to install."""
        kwargs = {} if self._importer is None else {"importer": self._importer}
        self.missing = deps.find_missing(**kwargs)
        if self.missing:
            self._report_missing()
        return not self.missing

    def initGui(self):
        if not self._check_dependencies():
            return
        self.initProcessing()
        icon = QIcon(ICON_PATH)
        run_action = QAction(icon, tr("Run whole survey…"), self.iface.mainWindow())
        run_action.setObjectName("rockheadRunSurvey")
        run_action.triggered.connect(self.open_run_dialog)
        qc_action = QAction(icon, tr("Quality-control panel"), self.iface.mainWindow())
        qc_action.setObjectName("rockheadQcPanel")
        qc_action.setCheckable(True)
        qc_action.toggled.connect(self.show_qc_panel)
        open_action = QAction(icon, tr("Open results folder…"), self.iface.mainWindow())
        open_action.setObjectName("rockheadOpenResults")
        open_action.triggered.connect(self.choose_results_folder)
        for action in (run_action, open_action, qc_action):
            self.iface.addPluginToMenu(MENU, action)
            self.actions.append(action)
        self.iface.addToolBarIcon(qc_action)
        self.qc_action = qc_action

    def initProcessing(self):
        """Register the Processing provider (qgis_process calls this alone, without initGui)."""
        if self.provider is not None or not self._check_dependencies():
            return
        from .provider import RockheadProvider

        self.provider = RockheadProvider()
        QgsApplication.processingRegistry().addProvider(self.provider)

    def unload(self):
        for action in self.actions:
            self.iface.removePluginMenu(MENU, action)
            self.iface.removeToolBarIcon(action)
            action.deleteLater()
        self.actions = []
        if self.dock is not None:
            self.iface.removeDockWidget(self.dock)
            self.dock.close_panel()
            self.dock.deleteLater()
            self.dock = None
        if self.provider is not None:
            QgsApplication.processingRegistry().removeProvider(self.provider)
            self.provider = None
        from .last_run import forget_runs

        forget_runs()  # the last run's result, kept for the QC panel

    # -- actions ------------------------------------------------------------------------------
    def _report_missing(self):
        message = deps.missing_message(self.missing)
        QgsMessageLog.logMessage(message, LOG_TAG, Qgis.Critical)
        names = ", ".join(m.pip or m.name for m in self.missing)
        short = tr("missing Python package(s): {names}. See the log panel (Rockhead) for how to install them.").format(
            names=names
        )
        if self.iface is not None:  # qgis_process has no window: it prints the log message on stderr
            self.iface.messageBar().pushMessage(LOG_TAG, short, level=Qgis.Critical, duration=0)

    def open_run_dialog(self):
        """Open the Processing dialog of the whole-survey algorithm."""
        import processing

        processing.execAlgorithmDialog("rockhead:runsurvey", {})

    def choose_results_folder(self):
        """Ask for a results folder (a run's --out) and open it styled."""
        from qgis.PyQt.QtWidgets import QFileDialog

        folder = QFileDialog.getExistingDirectory(self.iface.mainWindow(), tr("Results folder of a run"))
        if folder:
            self.open_results(folder)

    def open_results(self, folder):
        """Load a results folder as the styled layer group (the styles stored with the results) and
        remember its survey for the quality-control panel. Returns the layer group."""
        from qgis.core import QgsProject

        from .qc_dock import remember_run
        from .styling import load_results, results_survey

        project = QgsProject.instance()
        group = load_results(str(folder), project)
        if not group.findLayers():
            self.iface.messageBar().pushMessage(
                LOG_TAG, tr("no Rockhead results in {folder}").format(folder=folder), level=Qgis.Warning, duration=8
            )
            return group
        survey = results_survey(str(folder))
        if survey:
            remember_run(project, survey, folder)
        return group

    def show_qc_panel(self, visible=True):
        """Create (once) and show or hide the quality-control dock."""
        if self.dock is None:
            if not visible:
                return
            from .qc_dock import QcDock

            self.dock = QcDock(self.iface, self.iface.mainWindow())
            self.iface.addDockWidget(Qt.RightDockWidgetArea, self.dock)
        elif visible:
            self.dock.load_from_project()  # a run may have set a new survey since
        self.dock.setVisible(bool(visible))
