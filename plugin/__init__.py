"""QGIS adapter of Reflector Mapper: Processing provider, QC panel, styling.

Nothing here computes: every number comes from :mod:`reflector_mapper.core`.
This package may import qgis and PyQt; the core never does.
"""
