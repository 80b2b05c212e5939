"""QGIS adapter of Rockhead: Processing provider, QC panel, styling.

Nothing here computes: every number comes from :mod:`rockhead.core`.
This package may import qgis and PyQt; the core never does.
"""
