"""Layer styles written with every run (QML in the GeoPackage's layer_styles table and beside the rasters).

The QML documents are checked here as XML against what QGIS reads (element
and attribute names of QGIS 3.22's style documents, from memory and checked
in tests/qgis, where QGIS itself loads them); the numbers against the data.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rockhead.core import colours
from rockhead.core.formats.gdalio import list_layers, read_layer, read_raster
from rockhead.core.products import styles


@pytest.fixture(scope="module")
def run_dir(sample_run):
    """The output folder of the session's one run of the sample project (tests/conftest.py)."""
    return sample_run.out


def _qml(text):
    assert text.startswith("<!DOCTYPE qgis")
    return ET.fromstring(text.split("\n", 1)[1])


def _styles(run_dir):
    table, _ = read_layer(run_dir / "survey.gpkg", "layer_styles")
    f = table.fields
    return [
        {
            k: f[k][i]
            for k in ("f_table_schema", "f_table_name", "f_geometry_column", "styleName", "styleQML", "useAsDefault")
        }
        for i in range(len(table))
    ]


def test_every_layer_has_one_default_style(run_dir):
    rows = _styles(run_dir)
    names = [n for n in list_layers(run_dir / "survey.gpkg") if n != "layer_styles"]
    defaults = [r["f_table_name"] for r in rows if r["useAsDefault"]]
    assert sorted(defaults) == sorted(names)  # one default per layer, no more
    for r in rows:
        # QGIS looks the default up by f_table_schema = '' (empty text, not NULL) and the geometry column
        assert r["f_table_schema"] == ""
        assert r["f_geometry_column"] in ("geom", "")
        _qml(r["styleQML"])  # well-formed
    contour_styles = [r["styleName"] for r in rows if r["f_table_name"] == "contours"]
    assert contour_styles == ["depth contours", "elevation contours"]


def test_every_field_has_an_alias_and_reals_their_decimals(run_dir):
    for r in _styles(run_dir):
        layer, _ = read_layer(run_dir / "survey.gpkg", r["f_table_name"])
        root = _qml(r["styleQML"])
        aliases = {a.get("field"): a.get("name") for a in root.iter("alias")}
        assert set(aliases) == {"fid", *layer.fields}, r["f_table_name"]  # fid: the primary key
        assert all(aliases.values())
        widgets = {f.get("name"): f.find("editWidget") for f in root.iter("field")}
        for name, values in layer.fields.items():
            if np.asarray(values).dtype.kind == "f":
                w = widgets[name]
                assert w.get("type") == "Range"
                precision = [o for o in w.iter("Option") if o.get("name") == "Precision"]
                assert len(precision) == 1 and 0 <= int(precision[0].get("value")) <= 3
    # units in the aliases of the fixed fields
    assert styles.field_display("reflector_points", "depth_m") == ("Depth below ground (m)", 2)
    assert styles.field_display("shots", "t0_ms")[0].endswith("(ms)")


@pytest.mark.parametrize(
    "name, prefix, unit",
    [
        ("reflector_depth", "", " m"),
        ("reflector_elevation", "", " m"),
        ("depth_sigma", "±", " m"),
        ("interval_velocity_ground_to_1", "", " m/s"),  # the sample's one layer (reflector label "1")
    ],
    ids=["depth", "elevation", "sigma", "interval-velocity"],
)
def test_raster_legend_is_the_data_range_in_units(run_dir, name, prefix, unit):
    raster = read_raster(run_dir / f"{name}.tif")
    v = np.asarray(raster.values, float)
    v = v[np.isfinite(v)]
    root = _qml((run_dir / f"{name}.qml").read_text())
    r = root.find(".//rasterrenderer")
    assert r.get("type") == "singlebandpseudocolor"
    ramp, _suffix, _prefix, decimals, _fixed = styles.raster_style(f"{name}.tif")
    # the classification range is the data range exactly (float32 values read back from the file);
    # a constant field (the sample's one constant-velocity layer) spans one step of the legend
    lo, hi = float(v.min()), float(v.max())
    hi = hi if hi > lo else lo + 10.0**-decimals
    assert float(r.get("classificationMin")) == lo
    assert float(r.get("classificationMax")) == hi
    items = root.findall(".//colorrampshader/item")
    assert [i.get("color") for i in items] == [c for _, c in ramp]  # the shared colour code
    assert items[0].get("label") == f"{prefix}{lo:.{decimals}f}{unit}"
    assert items[-1].get("label") == f"{prefix}{hi:.{decimals}f}{unit}"
    legend = root.find(".//rampLegendSettings")
    assert legend.get("suffix") == unit and legend.get("prefix") == prefix
    assert [o.get("value") for o in legend.iter("Option") if o.get("name") == "decimals"] == [str(decimals)]


def test_contour_labels_carry_the_unit_and_the_kind(run_dir):
    rows = {r["styleName"]: _qml(r["styleQML"]) for r in _styles(run_dir) if r["f_table_name"] == "contours"}
    for style, kind in (("depth contours", "depth"), ("elevation contours", "elevation")):
        root = rows[style]
        text = root.find(".//text-style")
        assert text.get("fieldName").endswith("|| ' m'")
        assert ("depth_m" in text.get("fieldName")) == (kind == "depth")
        rules = root.findall(".//rules/rule")
        assert all(f"\"kind\" = '{kind}'" in rule.get("filter") for rule in rules)
        show = [o for o in root.iter("Option") if o.get("name") == "Show"]
        assert show and f"'{kind}'" in next(e for e in show[0].iter("Option") if e.get("name") == "expression").get(
            "value"
        )


def test_few_index_contours_label_every_contour():
    from rockhead.core.formats.layer import Layer
    from shapely.geometry import LineString

    def contours(levels, index):
        n = len(levels)
        return Layer(
            [LineString([(0, k), (10, k)]) for k in range(n)],
            {
                "kind": np.array(["depth"] * n, dtype=object),
                "elevation_m": np.full(n, np.nan),
                "depth_m": np.array(levels, float),
                "index": np.array(index, bool),
            },
        )

    few = styles.layer_styles({"contours": contours([10, 12, 14, 16], [True, False, False, False])})
    many = styles.layer_styles({"contours": contours([10, 20, 30, 40], [True, True, True, True])})

    def show(style):
        root = _qml(style["contours"][0][1])
        opt = next(o for o in root.iter("Option") if o.get("name") == "Show")
        return next(e for e in opt.iter("Option") if e.get("name") == "expression").get("value")

    assert '"index"' not in show(few)
    assert '"index"' in show(many)
    # interval 2 m: whole metres in the labels
    assert 'format_number("depth_m", 0)' in _qml(few["contours"][0][1]).find(".//text-style").get("fieldName")


def test_symbol_colours_are_the_shared_ones(run_dir):
    rows = {r["f_table_name"]: _qml(r["styleQML"]) for r in _styles(run_dir) if r["useAsDefault"]}

    def colours_of(root):
        return {o.get("value") for o in root.iter("Option") if o.get("name") in ("color", "line_color")}

    def rgba(hex_colour):
        h = hex_colour.lstrip("#")
        return f"{int(h[:2], 16)},{int(h[2:4], 16)},{int(h[4:], 16)},255"

    assert rgba(colours.MEASURED_DIP) in colours_of(rows["dip_measurements"])
    assert rgba(colours.SURFACE_DIP) in colours_of(rows["surface_dips"])
    assert rgba(colours.BOREHOLE) in colours_of(rows["boreholes"])
    assert rgba(colours.STATUS_OK) in colours_of(rows["shots"])
    assert rgba(colours.LINE) in colours_of(rows["lines"])


def test_strike_dip_symbol_rotates_with_strike_and_ticks_toward_dip(run_dir):
    """FGDC-STD-013-2006: a bar along strike and a tick toward the dip (right-hand rule: strike + 90)."""
    root = _qml(next(r["styleQML"] for r in _styles(run_dir) if r["f_table_name"] == "dip_measurements"))
    layers = root.findall(".//symbols/symbol/layer")
    assert [lyr.get("class") for lyr in layers] == ["SimpleMarker", "SimpleMarker"]

    def expr(layer):
        return next(o for o in layer.iter("Option") if o.get("name") == "expression").get("value")

    bar, tick = layers
    assert expr(bar) == styles.strike_dip_angle_expression()
    assert expr(tick) == f"90 + ({styles.strike_dip_angle_expression()})"
    # the tick starts at the bar's middle: offset of half its length "up" in its own frame
    offset = next(o for o in tick.iter("Option") if o.get("name") == "offset").get("value")
    size = float(next(o for o in tick.iter("Option") if o.get("name") == "size").get("value"))
    assert offset == f"0,{-size / 2:g}"
