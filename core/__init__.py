"""Pure-Python core of Rockhead (no QGIS, no Qt).

Conventions used in every module (see DEVELOPERS.md):

* x = easting, y = northing, metres in a projected CRS; z = elevation, metres,
  positive up. Depth = ground elevation - reflector elevation (positive down).
* Azimuths in degrees clockwise from grid north, in [0, 360).
* Dip in degrees below horizontal, [0, 90); dip direction = azimuth toward which
  the reflector deepens; strike by the right-hand rule (dip direction = strike + 90).
* Two-way traveltimes: milliseconds in files, seconds in code.
* Units are carried in names: ``depth_m``, ``time_s``, ``velocity_m_s``.
"""

__all__ = ["__version__"]
__version__ = "0.1.0"
