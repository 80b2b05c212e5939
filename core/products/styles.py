"""Layer styles of every result, written once here for QGIS and for the files (QML documents).

A run's results must open styled wherever they are opened: from the command
line's folder, from the plugin, or from a GeoPackage sent to a colleague. So
the styles are made by the core, as QGIS style documents (QML, the XML that
QGIS reads and writes for a layer's style), and travel with the data: the
GeoPackage holds one per layer in its ``layer_styles`` table (the table QGIS
reads a GeoPackage layer's default style from) and every GeoTIFF has its
``.qml`` beside it (the file QGIS reads a raster's default style from). The
QGIS plugin applies the same documents (``plugin/styling.py``), so there is
one style definition.

What the styles show (colours from :mod:`core.colours`):

* rasters: a continuous colour ramp over the data's own range, the legend in
  units with sensible rounding ("11.3 m" ... "39.6 m", "±0.09 m");
* contours: heavier index contours, every index contour labelled with its
  value and unit along the line; depth contours and elevation contours as two
  styles of the one ``contours`` layer (depth by default);
* the strike-and-dip symbol of geologic maps (FGDC-STD-013-2006): a bar along
  strike, a tick toward the dip, the dip value beside it, rotated by strike
  (plus the grid convergence when the map is drawn in another CRS); measured
  dips black and larger, surface-derived dips blue;
* shots by fit status, lines labelled, boreholes labelled with name, depth and
  residual, plain markers for the rest;
* on every layer: field aliases with units and the number of decimals shown
  for every real-valued field (attribute table, identify results, forms).
"""

from __future__ import annotations

import math
from typing import Dict, Optional
from xml.sax.saxutils import quoteattr

import numpy as np

from .. import colours
from ..formats.layer import Layer

__all__ = [
    "CONTOUR_STYLES",
    "RASTER_STYLES",
    "field_display",
    "layer_qml",
    "layer_styles",
    "raster_qml",
    "raster_style",
    "raster_styles",
    "strike_dip_angle_expression",
    "styles_table",
]

QML_HEAD = "<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n"
QGIS_VERSION = "3.22.0"  # the oldest QGIS the plugin supports; later versions read it

# -- fields: alias and decimals shown ---------------------------------------------------------------
#: Field name -> (alias, decimals shown for real values). Per-layer overrides in _LAYER_FIELDS.
FIELDS = {
    "fid": ("Feature id", None),  # the GeoPackage's primary key, shown by QGIS as a field
    "line": ("Line", None),
    "station": ("Station", None),
    "shot": ("Shot", None),
    "reflector": ("Reflector", None),
    "x_m": ("Easting (m)", 2),
    "y_m": ("Northing (m)", 2),
    "z_m": ("Ground elevation (m)", 2),
    "azimuth_deg": ("Azimuth (°)", 1),
    "length_m": ("Length (m)", 1),
    "velocity_m_s": ("Velocity (m/s)", 0),
    "t0_ms": ("t0, two-way (ms)", 2),
    "normal_distance_m": ("Normal distance to reflector (m)", 2),
    "traveltime_dip_deg": ("Traveltime dip (°)", 1),
    "rms_residual_ms": ("RMS residual (ms)", 2),
    "picks_used": ("Picks used", None),
    "picks_rejected": ("Picks rejected by the fit", None),
    "picks_excluded": ("Picks excluded by edits", None),
    "status": ("Status", None),
    "reason": ("Reason", None),
    "se_velocity_m_s": ("± velocity (m/s)", 0),
    "se_t0_ms": ("± t0 (ms)", 2),
    "se_normal_distance_m": ("± normal distance (m)", 2),
    "se_traveltime_dip_deg": ("± traveltime dip (°)", 1),
    "cross_component": ("Cross-line normal component", 3),
    "variance_factor": ("Variance factor (χ²/dof)", 2),
    "source_z_m": ("Shot elevation (m)", 2),
    "line_azimuth_deg": ("Line azimuth (°)", 1),
    "spread_length_m": ("Spread length (m)", 1),
    "site_velocity_flag": ("Departs from site velocity", None),
    "note": ("Note", None),
    "elevation_m": ("Reflector elevation (m)", 2),
    "depth_m": ("Depth below ground (m)", 2),
    "sigma_m": ("± 1σ (m)", 2),
    "ground_m": ("Ground elevation (m)", 2),
    "sigma_xy_m": ("± position (m)", 2),
    "residual_ms": ("Residual (ms)", 2),
    "rejected": ("Rejected by the fit", None),
    "excluded": ("Excluded by an edit", None),
    "dip_deg": ("Dip (°)", 1),
    "dip_direction_deg": ("Dip direction (°)", 0),
    "strike_deg": ("Strike (°, right-hand rule)", 0),
    "sigma_dip_deg": ("± dip (°)", 1),
    "sigma_dip_direction_deg": ("± dip direction (°)", 0),
    "lines": ("Lines", None),
    "n_lines": ("Lines used", None),
    "n_gathers": ("Gathers used", None),
    "condition_number": ("Condition number", 1),
    "source": ("Source", None),
    "line_a": ("Line A", None),
    "line_b": ("Line B", None),
    "elevation_a_m": ("Reflector elevation, line A (m)", 2),
    "elevation_b_m": ("Reflector elevation, line B (m)", 2),
    "mistie_m": ("Mistie A − B (m)", 2),
    "borehole": ("Borehole", None),
    "collar_z_m": ("Collar elevation (m)", 2),
    "seismic_elevation_m": ("Seismic-only elevation (m)", 2),
    "seismic_sigma_m": ("± seismic-only (1σ, m)", 2),
    "residual_m": ("Residual (m)", 2),
    "standardised": ("Residual / σ", 2),
    "kind": ("Kind", None),
    "index": ("Index contour", None),
    "estimate_m": ("Estimate (m)", 2),
    "name": ("Name", None),
    "corridor_m": ("Corridor width (m)", 1),
    "boreholes": ("Boreholes", None),
    "file": ("File", None),
    "key": ("Item", None),
    "value": ("Value", None),
}
_LAYER_FIELDS = {
    "boreholes": {
        "depth_m": ("Borehole depth to reflector (m)", 2),
        "elevation_m": ("Borehole reflector elevation (m)", 2),
        "residual_m": ("Residual, borehole − seismic (m)", 2),
    },
    "contours": {"elevation_m": ("Contour elevation (m)", 2), "depth_m": ("Contour depth (m)", 2)},
    "cross_validation": {"residual_m": ("Residual, datum − estimate (m)", 2)},
    "misties": {"sigma_m": ("± mistie (1σ, m)", 2)},
    "reflection_points": {"elevation_m": ("Reflection point elevation (m)", 2)},
}


def field_display(layer_name: str, field: str) -> tuple:
    """Alias and decimals shown of one field of one layer.

    Parameters
    ----------
    layer_name : str
        The GeoPackage layer.
    field : str
        The field name.

    Returns
    -------
    alias : str
        Plain words with the unit in brackets.
    decimals : int or None
        Decimals shown for real values (None: text or integer).

    Examples
    --------
    >>> field_display("shots", "velocity_m_s")
    ('Velocity (m/s)', 0)
    >>> field_display("boreholes", "residual_m")[0]
    'Residual, borehole − seismic (m)'
    """
    if field in _LAYER_FIELDS.get(layer_name, {}):
        return _LAYER_FIELDS[layer_name][field]
    if field in FIELDS:
        return FIELDS[field]
    return field.replace("_", " ").capitalize(), 3


# -- small XML helpers ------------------------------------------------------------------------------
def _rgba(colour: str, alpha: int = 255) -> str:
    c = colour.lstrip("#")
    return f"{int(c[0:2], 16)},{int(c[2:4], 16)},{int(c[4:6], 16)},{alpha}"


def _options(values: dict) -> str:
    """A symbol layer's properties, both as the ``Option`` map and the older ``prop`` list."""
    opts = "".join(f'<Option name={quoteattr(k)} value={quoteattr(str(v))} type="QString"/>' for k, v in values.items())
    props = "".join(f"<prop k={quoteattr(k)} v={quoteattr(str(v))}/>" for k, v in values.items())
    return f'<Option type="Map">{opts}</Option>{props}'


def _dd(properties: dict) -> str:
    """A data-defined property collection: name -> expression."""
    items = "".join(
        f'<Option name={quoteattr(name)} type="Map"><Option name="active" value="true" type="bool"/>'
        f'<Option name="expression" value={quoteattr(expr)} type="QString"/>'
        f'<Option name="type" value="3" type="int"/></Option>'
        for name, expr in properties.items()
    )
    inner = f'<Option name="properties" type="Map">{items}</Option>' if properties else '<Option name="properties"/>'
    return (
        f'<Option type="Map"><Option name="name" value="" type="QString"/>{inner}'
        '<Option name="type" value="collection" type="QString"/></Option>'
    )


def _marker_layer(
    shape: str,
    fill: str,
    size_mm: float,
    outline: str = "#202020",
    outline_mm: float = 0.2,
    angle: float = 0.0,
    offset=(0.0, 0.0),
    dd: Optional[dict] = None,
) -> str:
    props = {
        "angle": f"{angle:g}",
        "color": _rgba(fill),
        "name": shape,
        "offset": f"{offset[0]:g},{offset[1]:g}",
        "offset_unit": "MM",
        "outline_color": _rgba(outline),
        "outline_style": "solid",
        "outline_width": f"{outline_mm:g}",
        "outline_width_unit": "MM",
        "scale_method": "diameter",
        "size": f"{size_mm:g}",
        "size_unit": "MM",
        "joinstyle": "bevel",
        "cap_style": "square",
        "horizontal_anchor_point": "1",
        "vertical_anchor_point": "1",
    }
    return (
        f'<layer pass="0" class="SimpleMarker" locked="0" enabled="1">{_options(props)}'
        f"<data_defined_properties>{_dd(dd or {})}</data_defined_properties></layer>"
    )


def _line_layer(colour: str, width_mm: float, dash: bool = False) -> str:
    props = {
        "line_color": _rgba(colour),
        "line_width": f"{width_mm:g}",
        "line_width_unit": "MM",
        "line_style": "dash" if dash else "solid",
        "capstyle": "round",
        "joinstyle": "round",
        "offset": "0",
        "offset_unit": "MM",
    }
    return (
        f'<layer pass="0" class="SimpleLine" locked="0" enabled="1">{_options(props)}'
        f"<data_defined_properties>{_dd({})}</data_defined_properties></layer>"
    )


def _symbol(name: str, kind: str, layers: str) -> str:
    return (
        f'<symbol name="{name}" type="{kind}" alpha="1" clip_to_extent="1" force_rhr="0">'
        f"<data_defined_properties>{_dd({})}</data_defined_properties>{layers}</symbol>"
    )


def _point(shape: str, fill: str, size_mm: float, outline: str = "#202020", outline_mm: float = 0.2) -> str:
    return _marker_layer(shape, fill, size_mm, outline, outline_mm)


def _rule_renderer(rules: list, kind: str) -> str:
    """Rule-based renderer: rules of (label, filter expression, symbol layers xml)."""
    rule_xml = "".join(
        f'<rule key="{{r{i}}}" symbol="{i}" label={quoteattr(label)} filter={quoteattr(expr)}/>'
        for i, (label, expr, _layers) in enumerate(rules)
    )
    symbols = "".join(_symbol(str(i), kind, layers) for i, (_l, _e, layers) in enumerate(rules))
    return (
        f'<renderer-v2 type="RuleRenderer" forceraster="0" symbollevels="0" enableorderby="0">'
        f'<rules key="{{root}}">{rule_xml}</rules><symbols>{symbols}</symbols></renderer-v2>'
    )


def _single_renderer(kind: str, layers: str) -> str:
    return (
        f'<renderer-v2 type="singleSymbol" forceraster="0" symbollevels="0" enableorderby="0">'
        f"<symbols>{_symbol('0', kind, layers)}</symbols></renderer-v2>"
    )


def _labels(
    expression: str,
    colour: str,
    size_pt: float = 8.0,
    placement: int = 0,
    flags: int = 10,
    dist_mm: float = 0.0,
    buffer_mm: float = 0.8,
    repeat_mm: float = 0.0,
    dd: Optional[dict] = None,
    bold: bool = False,
    priority: int = 5,
    display_all: bool = False,
    obstacle: bool = True,
) -> str:
    """Simple labelling. ``placement``: 0 around point, 1 over point, 2 parallel to line, 3 curved."""
    style = (
        f'<text-style fieldName={quoteattr(expression)} isExpression="1" fontFamily="Sans Serif" '
        f'fontSize="{size_pt:g}" fontSizeUnit="Point" textColor="{_rgba(colour)}" textOpacity="1" '
        f'fontWeight="{75 if bold else 50}" fontItalic="0" fontUnderline="0" fontStrikeout="0" namedStyle="" '
        'multilineHeight="1" blendMode="0" allowHtml="0" capitalization="0" textOrientation="horizontal" '
        'previewBkgrdColor="255,255,255,255" legendString="Aa" fontLetterSpacing="0" fontWordSpacing="0" '
        'fontKerning="1" useSubstitutions="0">'
        f'<text-buffer bufferDraw="1" bufferSize="{buffer_mm:g}" bufferSizeUnits="MM" '
        'bufferColor="255,255,255,255" bufferOpacity="1" bufferNoFill="1" bufferJoinStyle="128" bufferBlendMode="0"/>'
        "</text-style>"
    )
    fmt = (
        '<text-format wrapChar="" multilineAlign="3" formatNumbers="0" decimals="3" plussign="0" '
        'addDirectionSymbol="0" autoWrapLength="0" useMaxLineLengthForAutoWrap="1"/>'
    )
    place = (
        f'<placement placement="{placement}" placementFlags="{flags}" dist="{dist_mm:g}" distUnits="MM" '
        f'repeatDistance="{repeat_mm:g}" repeatDistanceUnits="MM" priority="{priority}" offsetType="0" '
        'offsetUnits="MM" xOffset="0" yOffset="0" quadOffset="4" maxCurvedCharAngleIn="25" '
        'maxCurvedCharAngleOut="-25" centroidInside="0" centroidWhole="0" fitInPolygonOnly="0" rotationAngle="0" '
        'preserveRotation="1" overrunDistance="0" overrunDistanceUnit="MM" lineAnchorPercent="0.5" '
        'lineAnchorType="0" lineAnchorClipping="0" geometryGeneratorEnabled="0" geometryGenerator="" '
        'geometryGeneratorType="PointGeometry" layerType="UnknownGeometry" polygonPlacementFlags="2" '
        'predefinedPositionOrder="TR,TL,BR,BL,R,L,TSR,BSR" rotationUnit="AngleDegrees"/>'
    )
    render = (
        f'<rendering drawLabels="1" displayAll="{int(display_all)}" obstacle="{int(obstacle)}" obstacleFactor="1" '
        'obstacleType="1" labelPerPart="0" mergeLines="0" minFeatureSize="0" limitNumLabels="0" '
        'maxNumLabels="2000" scaleVisibility="0" scaleMin="0" scaleMax="0" fontLimitPixelSize="0" '
        'fontMinPixelSize="0" fontMaxPixelSize="10000" upsidedownLabels="0" zIndex="0" unplacedVisibility="0"/>'
    )
    return (
        f'<labeling type="simple"><settings calloutType="simple">{style}{fmt}{place}{render}'
        f"<dd_properties>{_dd(dd or {})}</dd_properties></settings></labeling>"
    )


def _fields_xml(layer_name: str, fields: dict) -> str:
    """Aliases and, for real-valued fields, a range widget that shows ``decimals`` decimals."""
    config = []
    aliases = []
    for i, (name, kind) in enumerate(fields.items()):
        alias, decimals = field_display(layer_name, name)
        aliases.append(f'<alias field={quoteattr(name)} index="{i}" name={quoteattr(alias)}/>')
        if kind == "real" and decimals is not None:
            step = 10.0**-decimals
            widget = (
                '<editWidget type="Range"><config><Option type="Map">'
                '<Option name="AllowNull" value="true" type="bool"/>'
                '<Option name="Max" value="1e+15" type="double"/><Option name="Min" value="-1e+15" type="double"/>'
                f'<Option name="Precision" value="{decimals}" type="int"/>'
                f'<Option name="Step" value="{step:g}" type="double"/>'
                '<Option name="Style" value="SpinBox" type="QString"/>'
                "</Option></config></editWidget>"
            )
        else:
            widget = '<editWidget type="TextEdit"><config><Option/></config></editWidget>'
        config.append(f'<field name={quoteattr(name)} configurationFlags="None">{widget}</field>')
    return f"<fieldConfiguration>{''.join(config)}</fieldConfiguration><aliases>{''.join(aliases)}</aliases>"


def _qml(body: str, geometry: Optional[int] = None) -> str:
    geom = f"<layerGeometryType>{geometry}</layerGeometryType>" if geometry is not None else ""
    return f'{QML_HEAD}<qgis version="{QGIS_VERSION}" styleCategories="AllStyleCategories">{body}{geom}</qgis>\n'


# -- strike and dip ---------------------------------------------------------------------------------
def strike_dip_angle_expression(strike_field: str = "strike_deg") -> str:
    """Marker angle: strike plus the map-CRS azimuth of the layer's grid north at the point.

    QGIS turns a marker clockwise by its angle (and adds the map rotation), so
    the bar lies along strike when the map is drawn in the layer's CRS; drawn in
    another CRS, the survey's grid north is not "up", and the azimuth in the map
    CRS of a short step north at the point (the grid convergence between the
    two) is added (zero when the CRSs are equal).
    """
    north = (
        "degrees(azimuth(transform($geometry, @layer_crs, @map_crs), "
        "transform(translate($geometry, 0, 10), @layer_crs, @map_crs)))"
    )
    return f'"{strike_field}" + coalesce({north}, 0)'


def _strike_dip_layers(colour: str, bar_mm: float, tick_mm: float, width_mm: float) -> str:
    """The symbol at angle 0: a bar north-south, a tick from its middle toward +x (east).

    At angle 0 the strike is north, so by the right-hand rule the dip direction
    is east. Both marker layers turn with the data-defined angle; QGIS turns a
    layer's offset by that layer's own total angle (here 90 + strike), so an
    offset pointing "up" ends at azimuth strike + 90: from the bar's middle
    toward the dip.
    """
    angle = strike_dip_angle_expression()
    bar = _marker_layer("line", colour, bar_mm, outline=colour, outline_mm=width_mm, dd={"angle": angle})
    tick = _marker_layer(
        "line",
        colour,
        tick_mm,
        outline=colour,
        outline_mm=width_mm,
        angle=90.0,
        offset=(0.0, -tick_mm / 2.0),
        dd={"angle": f"90 + ({angle})"},
    )
    return bar + tick


def _dip_qml(fields: dict, measured: bool, layer_name: str) -> str:
    colour = colours.MEASURED_DIP if measured else colours.SURFACE_DIP
    bar, tick, width = (7.0, 2.4, 0.5) if measured else (5.5, 1.9, 0.35)
    label = "dip and strike, crossing lines" if measured else "dip and strike, from the mapped surface"
    renderer = _rule_renderer(
        [(label, '"dip_deg" IS NOT NULL AND "strike_deg" IS NOT NULL', _strike_dip_layers(colour, bar, tick, width))],
        "marker",
    )
    angle = strike_dip_angle_expression() + " + 90"
    offset = f"array_to_string(array(4 * sin(radians({angle})), -4 * cos(radians({angle}))))"
    labels = _labels(
        'format_number("dip_deg", 0)',
        colour,
        8.0 if measured else 7.0,
        placement=1,
        buffer_mm=0.7,
        dd={"OffsetXY": offset},
        priority=8 if measured else 3,
    )
    return _qml(renderer + labels + _fields_xml(layer_name, fields), geometry=0)


# -- the other vector layers ------------------------------------------------------------------------
def _decimals_of(interval_m: Optional[float]) -> int:
    if not interval_m or not math.isfinite(interval_m) or interval_m <= 0:
        return 1
    return max(0, -math.floor(math.log10(interval_m) + 1e-9)) if interval_m < 1 else 0


def _contours_qml(fields: dict, kind: str, interval_m: Optional[float], label_all: bool = False) -> str:
    value = "depth_m" if kind == "depth" else "elevation_m"
    colour = colours.CONTOUR_DEPTH if kind == "depth" else colours.CONTOUR_ELEVATION
    only = f"\"kind\" = '{kind}'"
    words = "depth" if kind == "depth" else "elevation"
    renderer = _rule_renderer(
        [
            (f"index contour ({words}, labelled, m)", f'{only} AND "index"', _line_layer(colour, 0.6)),
            (f"contour ({words})", f'{only} AND NOT "index"', _line_layer(colour, 0.25)),
        ],
        "line",
    )
    d = _decimals_of(interval_m)
    # index contours are labelled; where the map holds fewer than three index levels every contour is
    # (common practice: a reader must find a labelled contour near any point of the map)
    show = only if label_all else f'{only} AND "index"'
    labels = _labels(
        f"format_number(\"{value}\", {d}) || ' m'",
        colour,
        8.0,
        placement=3,
        flags=1,
        repeat_mm=80.0,
        dd={"Show": show},
        display_all=True,
        obstacle=False,
        priority=7,
    )
    return _qml(renderer + labels + _fields_xml("contours", fields), geometry=1)


def _shots_qml(fields: dict) -> str:
    renderer = _rule_renderer(
        [
            ("fit ok", "\"status\" = 'ok'", _point("circle", colours.STATUS_OK, 2.6)),
            (
                "not fitted",
                '"velocity_m_s" IS NULL OR "status" = \'too_few_picks\'',
                _point("cross2", colours.STATUS_FAILED, 3.2, outline=colours.STATUS_FAILED, outline_mm=0.5),
            ),
            ("fitted, flagged (see status and reason)", "ELSE", _point("triangle", colours.STATUS_FLAGGED, 3.0)),
        ],
        "marker",
    )
    return _qml(renderer + _fields_xml("shots", fields), geometry=0)


def _lines_qml(fields: dict) -> str:
    renderer = _single_renderer("line", _line_layer(colours.LINE, 0.7))
    labels = _labels(
        "'line ' || \"line\"", colours.LINE, 9.0, placement=2, flags=10, dist_mm=1.0, bold=True, priority=9
    )
    return _qml(renderer + labels + _fields_xml("lines", fields), geometry=1)


def _boreholes_qml(fields: dict) -> str:
    renderer = _single_renderer("marker", _point("circle", colours.BOREHOLE, 3.4, outline="#000000", outline_mm=0.4))
    has = set(fields)
    parts = ['"borehole"']
    if "depth_m" in has:
        parts.append("format_number(\"depth_m\", 1) || ' m deep'")
    if "residual_m" in has:
        parts.append(
            "if(\"residual_m\" IS NULL, '', 'residual ' || if(\"residual_m\" >= 0, '+', '') || "
            "format_number(\"residual_m\", 2) || ' m')"
        )
    expr = " || '\\n' || ".join(parts)
    labels = _labels(expr, "#000000", 8.0, placement=0, dist_mm=1.5, priority=10)
    return _qml(renderer + labels + _fields_xml("boreholes", fields), geometry=0)


_POINT_STYLES = {  # layer -> (shape, colour, size mm)
    "stations": ("circle", colours.STATION, 0.8),
    "reflector_points": ("circle", colours.REFLECTOR_POINT, 1.0),
    "reflection_points": ("circle", colours.REFLECTOR_POINT, 0.6),
    "misties": ("diamond", colours.STATUS_FLAGGED, 2.6),
    "cross_validation": ("square", colours.PICK_USED, 1.4),
    "cmp_fits": ("circle", colours.PICK_USED, 1.2),
    "dix_intervals": ("circle", colours.PICK_USED, 1.2),
}


def layer_qml(
    layer_name: str,
    fields: dict,
    geometry: Optional[str] = None,
    contour_interval_m: Optional[float] = None,
    contour_kind: str = "depth",
    label_all_contours: bool = False,
) -> str:
    """The QML style document of one result layer.

    Parameters
    ----------
    layer_name : str
        The GeoPackage layer (``shots``, ``contours``, ``dip_measurements``, ...).
    fields : dict
        Field name -> "real", "integer" or "text", in the layer's order.
    geometry : str, optional
        "POINT", "LINESTRING", ... (None for a table without geometry).
    contour_interval_m : float, optional
        Contour interval, for the decimals of the contour labels.
    contour_kind : str
        For ``contours``: "depth" or "elevation", the contours this style shows.
    label_all_contours : bool
        Label every contour, not only the index contours (for maps with few index contours).

    Returns
    -------
    str
        A QML document.
    """
    if layer_name in ("dip_measurements", "surface_dips"):
        return _dip_qml(fields, layer_name == "dip_measurements", layer_name)
    if layer_name == "contours":
        return _contours_qml(fields, contour_kind, contour_interval_m, label_all_contours)
    if layer_name == "shots":
        return _shots_qml(fields)
    if layer_name == "lines":
        return _lines_qml(fields)
    if layer_name == "boreholes":
        return _boreholes_qml(fields)
    geom = (geometry or "").upper()
    body = ""
    if "POINT" in geom:
        shape, colour, size = _POINT_STYLES.get(layer_name, ("circle", colours.REFLECTOR_POINT, 1.2))
        body = _single_renderer("marker", _point(shape, colour, size, outline_mm=0.1))
    elif "LINE" in geom:
        body = _single_renderer("line", _line_layer(colours.LINE_COLOURS[2], 0.5))
    kind = 0 if "POINT" in geom else 1 if "LINE" in geom else 2 if "POLYGON" in geom else None
    return _qml(body + _fields_xml(layer_name, fields), geometry=kind)


#: The two styles of the contours layer: (style name, kind); the first is the layer's default.
CONTOUR_STYLES = (("depth contours", "depth"), ("elevation contours", "elevation"))


def _field_kinds(layer) -> dict:
    out = {"fid": "integer"}  # written by the GeoPackage writer as the primary key
    for name, values in layer.fields.items():
        k = np.asarray(values).dtype.kind
        out[name] = "real" if k == "f" else "integer" if k in "iub" else "text"
    return out


def _contour_levels(layer, kind: str) -> tuple:
    """(interval, number of index levels) of one kind of contour in the contours layer."""
    f = layer.fields
    if "kind" not in f:
        return None, 0
    value = "depth_m" if kind == "depth" else "elevation_m"
    sel = np.asarray(f["kind"]).astype(str) == kind
    levels = np.asarray(f[value], float)[sel]
    ok = np.isfinite(levels)
    unique = np.unique(np.round(levels[ok], 9))
    interval = float(np.min(np.diff(unique))) if len(unique) > 1 else None
    n_index = len(np.unique(np.round(levels[ok & np.asarray(f["index"], bool)[sel]], 9))) if "index" in f else 0
    return interval, n_index


def layer_styles(layers: dict) -> dict:
    """Styles of a run's GeoPackage layers.

    Parameters
    ----------
    layers : dict
        Layer name -> :class:`~core.formats.layer.Layer` (as written to the GeoPackage).

    Returns
    -------
    dict
        Layer name -> list of (style name, QML); the first style is the
        layer's default.
    """
    out: Dict[str, list] = {}
    for name, layer in layers.items():
        fields = _field_kinds(layer)
        geometry = layer.geometry_type
        if geometry is None and layer.geometries is not None:
            first = next((g for g in layer.geometries if g is not None and not g.is_empty), None)
            geometry = first.geom_type.upper() if first is not None else "GEOMETRY"
        if name == "contours":
            out[name] = []
            for style, kind in CONTOUR_STYLES:
                interval, n_index = _contour_levels(layer, kind)
                out[name].append((style, layer_qml(name, fields, geometry, interval, kind, n_index < 3)))
        else:
            out[name] = [(name, layer_qml(name, fields, geometry))]
    return out


# -- rasters ----------------------------------------------------------------------------------------
#: File name -> (ramp, unit suffix, prefix, decimals, fixed range or None).
RASTER_STYLES = {
    "reflector_depth.tif": (colours.DEPTH_RAMP, " m", "", 1, None),
    "reflector_elevation.tif": (colours.ELEVATION_RAMP, " m", "", 1, None),
    "depth_sigma.tif": (colours.SIGMA_RAMP, " m", "±", 2, None),
    "elevation_sigma.tif": (colours.SIGMA_RAMP, " m", "±", 2, None),
    "probability_above_design.tif": (colours.PROBABILITY_RAMP, "", "P = ", 1, (0.0, 1.0)),
}


def _round_label(value: float, decimals: int, prefix: str, suffix: str) -> str:
    return f"{prefix}{value:.{decimals}f}{suffix}"


def raster_qml(ramp, lo: float, hi: float, suffix: str = " m", prefix: str = "", decimals: int = 1) -> str:
    """QML of a single-band raster: a continuous ramp from ``lo`` to ``hi``, legend in units.

    Parameters
    ----------
    ramp : sequence of (float, str)
        Colour stops (position 0..1 of the range, ``#rrggbb``), from :mod:`core.colours`.
    lo, hi : float
        The data range (the legend's ends).
    suffix, prefix : str
        Unit after the value (" m") and sign before it ("±").
    decimals : int
        Decimals of the legend's values.

    Returns
    -------
    str
        A QML document; the legend shows the continuous ramp with its ends
        labelled, e.g. "11.3 m" and "39.6 m".
    """
    lo, hi = float(lo), float(hi)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = 0.0, 1.0
    if not hi > lo:
        hi = lo + 10.0**-decimals
    items = "".join(
        f'<item value="{lo + p * (hi - lo)!r}" color="{c}" alpha="255" '
        f"label={quoteattr(_round_label(lo + p * (hi - lo), decimals, prefix, suffix))}/>"
        for p, c in ramp
    )
    legend = (
        f'<rampLegendSettings useContinuousLegend="1" prefix={quoteattr(prefix)} suffix={quoteattr(suffix)} '
        'minimumLabel="" maximumLabel="" direction="0" orientation="2">'
        '<numericFormat id="basic"><Option type="Map">'
        '<Option name="decimal_separator" value="" type="QChar"/>'
        f'<Option name="decimals" value="{decimals}" type="int"/>'
        '<Option name="rounding_type" value="0" type="int"/>'
        '<Option name="show_plus" value="false" type="bool"/>'
        '<Option name="show_thousand_separator" value="true" type="bool"/>'
        '<Option name="show_trailing_zeros" value="true" type="bool"/>'
        '<Option name="thousand_separator" value="" type="QChar"/>'
        "</Option></numericFormat></rampLegendSettings>"
    )
    body = (
        '<pipe><rasterrenderer type="singlebandpseudocolor" band="1" opacity="1" alphaBand="-1" nodataColor="" '
        f'classificationMin="{lo!r}" classificationMax="{hi!r}">'
        "<minMaxOrigin><limits>None</limits><extent>WholeRaster</extent><statAccuracy>Exact</statAccuracy>"
        "<cumulativeCutLower>0.02</cumulativeCutLower><cumulativeCutUpper>0.98</cumulativeCutUpper>"
        "<stdDevFactor>2</stdDevFactor></minMaxOrigin>"
        f'<rastershader><colorrampshader colorRampType="INTERPOLATED" classificationMode="1" clip="0" '
        f'labelPrecision="{decimals}" minimumValue="{lo!r}" maximumValue="{hi!r}">{items}{legend}'
        "</colorrampshader></rastershader></rasterrenderer>"
        '<brightnesscontrast brightness="0" contrast="0" gamma="1"/>'
        '<rasterresampler zoomedInResampler="bilinear" maxOversampling="2"/>'
        "<resamplingStage>resamplingFilter</resamplingStage></pipe><blendMode>0</blendMode>"
    )
    return _qml(body)


#: Name ending -> style of the rasters of the other interfaces and layers (``wt_depth.tif``, ...).
RASTER_SUFFIX_STYLES = (
    ("_depth_sigma.tif", RASTER_STYLES["depth_sigma.tif"]),
    ("_elevation_sigma.tif", RASTER_STYLES["elevation_sigma.tif"]),
    ("_depth.tif", RASTER_STYLES["reflector_depth.tif"]),
    ("_elevation.tif", RASTER_STYLES["reflector_elevation.tif"]),
)


#: The style of every layer's interval-velocity raster (``interval_velocity_<top>_to_<base>.tif``).
VELOCITY_STYLE = (colours.VELOCITY_RAMP, " m/s", "", 0, None)


def raster_style(name: str):
    """The style of a raster written by a run, by its file name, or None.

    Parameters
    ----------
    name : str
        File name, e.g. ``reflector_depth.tif``, ``wt_depth_sigma.tif``,
        ``interval_velocity_ground_to_wt.tif``.

    Returns
    -------
    tuple or None
        (ramp, unit suffix, prefix, decimals, fixed range or None): the
        fixed names of :data:`RASTER_STYLES`, the other interfaces' by their
        name's ending, the interval velocities by their prefix.

    Examples
    --------
    >>> raster_style("interval_velocity_ground_to_rock.tif")[1]
    ' m/s'
    >>> raster_style("wt_depth.tif") == RASTER_STYLES["reflector_depth.tif"]
    True
    """
    if name in RASTER_STYLES:
        return RASTER_STYLES[name]
    if name.startswith("interval_velocity_") and name.endswith(".tif"):
        return VELOCITY_STYLE
    for ending, style in RASTER_SUFFIX_STYLES:
        if name.endswith(ending):
            return style
    return None


def raster_styles(rasters: dict) -> dict:
    """QML of each raster written, over its own data range.

    Parameters
    ----------
    rasters : dict
        File name -> grid (NaN = nodata).

    Returns
    -------
    dict
        File name -> QML (the rasters :func:`raster_style` knows).
    """
    out = {}
    for name, grid in rasters.items():
        style = raster_style(name)
        if style is None:
            continue
        ramp, suffix, prefix, decimals, fixed = style
        v = np.asarray(grid, float).astype(np.float32).astype(float)  # the values the GeoTIFF holds
        v = v[np.isfinite(v)]
        if fixed is not None:
            lo, hi = fixed
        elif v.size:
            lo, hi = float(v.min()), float(v.max())
        else:
            lo, hi = 0.0, 1.0
        out[name] = raster_qml(ramp, lo, hi, suffix, prefix, decimals)
    return out


def styles_table(styles: dict, layers: dict, update_time: str = "") -> Layer:
    """The ``layer_styles`` table of a GeoPackage, as QGIS reads it.

    QGIS looks up a GeoPackage layer's default style in this table by
    ``f_table_schema = ''``, ``f_table_name`` (the layer) and
    ``f_geometry_column`` (``geom``, or empty for a table), preferring the row
    with ``useAsDefault``; other rows are the layer's further named styles.

    Parameters
    ----------
    styles : dict
        Layer name -> list of (style name, QML), the default first (:func:`layer_styles`).
    layers : dict
        The layers written (for their geometry column).
    update_time : str
        ISO 8601 time of the styles (the run's product time, so the same run
        gives the same file).

    Returns
    -------
    Layer
        A table without geometry.
    """
    rows = []
    for name, entries in styles.items():
        geom_column = "geom" if layers[name].geometries is not None else ""
        for k, (style_name, qml) in enumerate(entries):
            rows.append((name, geom_column, style_name, qml, k == 0))
    text = lambda values: np.array(list(values), dtype=object)  # noqa: E731
    return Layer(
        None,
        {
            "f_table_catalog": text("" for _ in rows),
            "f_table_schema": text("" for _ in rows),
            "f_table_name": text(r[0] for r in rows),
            "f_geometry_column": text(r[1] for r in rows),
            "styleName": text(r[2] for r in rows),
            "styleQML": text(r[3] for r in rows),
            "styleSLD": text("" for _ in rows),
            "useAsDefault": np.array([r[4] for r in rows], dtype=bool),
            "description": text(f"Rockhead style of {r[0]}: {r[2]}" for r in rows),
            "owner": text("" for _ in rows),
            "ui": text("" for _ in rows),
            "update_time": text(update_time for _ in rows),
        },
        description="Layer styles (QGIS reads each layer's default style from here)",
    )
