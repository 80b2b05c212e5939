"""Rockhead: QGIS plugin entry point.

QGIS imports this package and calls :func:`classFactory`. Everything heavy is
imported lazily inside it, so that importing the package (for the command line
or the tests) never needs QGIS.
"""


def classFactory(iface):  # the name is fixed by QGIS
    """Return the plugin object QGIS asks for."""
    from .plugin.main import RockheadPlugin

    return RockheadPlugin(iface)
