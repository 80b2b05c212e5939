"""The Processing provider that holds the Rockhead algorithms."""

from __future__ import annotations

import os

from qgis.core import QgsProcessingProvider
from qgis.PyQt.QtCore import QCoreApplication
from qgis.PyQt.QtGui import QIcon

PROVIDER_ID = "rockhead"
ICON_PATH = os.path.join(os.path.dirname(__file__), "icons", "icon.svg")


class RockheadProvider(QgsProcessingProvider):
    """Provider ``rockhead``: fit gathers, combine lines, interpolate surface, run survey."""

    def loadAlgorithms(self):
        from .algorithms import all_algorithms

        for alg in all_algorithms():
            self.addAlgorithm(alg)

    def id(self):
        return PROVIDER_ID

    def name(self):
        return QCoreApplication.translate("Rockhead", "Rockhead")

    def longName(self):
        return self.name()

    def icon(self):
        return QIcon(ICON_PATH)
