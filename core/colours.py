"""The colour code of every product: one definition for the report, the sheets and QGIS.

The report's figures (:mod:`.report.figures`, the map and section sheets) and
the QGIS styles (``plugin/styling.py`` and the styles stored in the
GeoPackage) read their colours from here, so a measured dip, a rejected pick
or a depth of 20 m looks the same in every product. The colours are our own
choice: the ramps run from pale to dark along the quantity (depth, standard
deviation) so that they also read in grey-scale print, and the categorical
pairs (used/rejected, measured/surface dip) differ in lightness as well as in
hue, for readers with a colour-vision deficiency.

Ramps are tuples of (position in 0..1 of the data range, ``#rrggbb``).
"""

from __future__ import annotations

__all__ = [
    "BOREHOLE",
    "CONTOUR_DEPTH",
    "CONTOUR_ELEVATION",
    "DEPTH_RAMP",
    "DIFFERENCE_RAMP",
    "ELEVATION_RAMP",
    "FIT_CURVE",
    "GROUND",
    "LINE",
    "LINE_COLOURS",
    "MEASURED_DIP",
    "PICK_EXCLUDED",
    "PICK_REJECTED",
    "PICK_USED",
    "PROBABILITY_RAMP",
    "REFLECTOR_POINT",
    "SIGMA_RAMP",
    "STATION",
    "STATUS_FAILED",
    "STATUS_FLAGGED",
    "STATUS_OK",
    "SURFACE_DIP",
    "VELOCITY_RAMP",
    "ramp_colour",
]

# -- continuous ramps (0 = low end of the data range, 1 = high end) ---------------------------------
#: Depth of the reflector below ground: pale (shallow) to dark (deep).
DEPTH_RAMP = (
    (0.00, "#fbf3da"),
    (0.25, "#f1c98a"),
    (0.50, "#d98a4e"),
    (0.75, "#9c4b4f"),
    (1.00, "#432b57"),
)
#: Reflector elevation: deep blue-green (low) to pale sand (high).
ELEVATION_RAMP = (
    (0.00, "#1d3d6b"),
    (0.30, "#2f7f86"),
    (0.60, "#8fbf74"),
    (0.85, "#e3d69a"),
    (1.00, "#fbf3e4"),
)
#: Standard deviation of the depth: light grey (small) to crimson (large).
SIGMA_RAMP = (
    (0.00, "#f2f2f2"),
    (0.50, "#c9a3a3"),
    (1.00, "#9b1230"),
)
#: Probability of rock above a design level: pale (unlikely) to deep teal (likely).
PROBABILITY_RAMP = (
    (0.00, "#f7f7f2"),
    (0.50, "#8cc3b8"),
    (1.00, "#0e4d4f"),
)
#: Interval velocity of a layer (m/s): pale straw (slow) to deep green (fast).
VELOCITY_RAMP = (
    (0.00, "#fbf6e3"),
    (0.35, "#c9d98f"),
    (0.70, "#5a9c6e"),
    (1.00, "#1f4a36"),
)
#: A signed difference (m): blue (negative), white (zero), brown (positive).
DIFFERENCE_RAMP = (
    (0.00, "#2a5d9f"),
    (0.50, "#f7f7f7"),
    (1.00, "#9a5b1d"),
)

# -- picks and fits (QC figures and the QC panel) ---------------------------------------------------
PICK_USED = "#1f4e79"  # a pick the fit used
PICK_REJECTED = "#c0392b"  # rejected by the fit as a mispick (flagged, kept in the files)
PICK_EXCLUDED = "#8a8a8a"  # excluded by the interpreter (pick edits)
FIT_CURVE = "#e08e0b"  # the fitted traveltime curve, the mapped surface in sections

# -- map symbols ------------------------------------------------------------------------------------
MEASURED_DIP = "#141414"  # strike and dip measured where lines cross
SURFACE_DIP = "#2458a6"  # strike and dip read off the mapped surface
CONTOUR_ELEVATION = "#5a3d1e"
CONTOUR_DEPTH = "#3b2f6b"
BOREHOLE = "#f2c418"  # fill of the borehole symbol (outlined black)
STATION = "#9a9a9a"
REFLECTOR_POINT = "#505050"
LINE = "#1d6f42"  # a seismic line on the map
GROUND = "#7f6000"  # the ground profile in sections
#: Gather fit status on the map: fitted and ok; fitted but flagged; not fitted.
STATUS_OK = "#2e8b57"
STATUS_FLAGGED = "#e08a1e"
STATUS_FAILED = "#c0262d"
#: Several lines told apart in one figure (sections along several lines).
LINE_COLOURS = ("#1b9e77", "#d95f02", "#7570b3", "#e7298a", "#66a61e", "#e6ab02", "#a6761d", "#666666")


def ramp_colour(ramp, position: float) -> str:
    """The colour of ``ramp`` at ``position`` (0..1), linearly between its stops.

    Parameters
    ----------
    ramp : sequence of (float, str)
        Stops (position, ``#rrggbb``), positions increasing from 0 to 1.
    position : float
        Where to read the ramp; clipped to [0, 1].

    Returns
    -------
    str
        ``#rrggbb``.

    Examples
    --------
    >>> ramp_colour(((0.0, "#000000"), (1.0, "#ffffff")), 0.5)
    '#808080'
    >>> ramp_colour(DEPTH_RAMP, 0.0) == DEPTH_RAMP[0][1]
    True
    """
    p = min(max(float(position), 0.0), 1.0)
    for (p0, c0), (p1, c1) in zip(ramp[:-1], ramp[1:]):
        if p <= p1:
            f = 0.0 if p1 == p0 else (p - p0) / (p1 - p0)
            a = [int(c0[i : i + 2], 16) for i in (1, 3, 5)]
            b = [int(c1[i : i + 2], 16) for i in (1, 3, 5)]
            return "#" + "".join(f"{round(u + f * (v - u)):02x}" for u, v in zip(a, b))
    return ramp[-1][1]
