"""DXF contours read back with ezdxf and with GDAL's DXF driver (pyogrio or osgeo.ogr)."""

import numpy as np
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats.dxf import CONTOUR_LAYERS, DxfPolyline, DxfText, write_contours_dxf, write_dxf
from rockhead.core.surface.contours import contours_layer
from shapely import wkb as shapely_wkb


def _ogr_features(path):
    """(layer name, shapely geometry, text) per feature, through GDAL's DXF driver."""
    try:
        import pyogrio
    except ImportError:
        pyogrio = None
    if pyogrio is not None:
        meta, _, geoms, fields = pyogrio.raw.read(path)
        names = list(meta["fields"])
        layer = fields[names.index("Layer")]
        text = fields[names.index("Text")]
        return [(str(l), shapely_wkb.loads(bytes(g)), t) for l, g, t in zip(layer, geoms, text)]
    from osgeo import ogr

    ds = ogr.Open(str(path))
    lyr = ds.GetLayer(0)
    out = []
    for f in lyr:
        out.append(
            (
                f.GetField("Layer"),
                shapely_wkb.loads(bytes(f.GetGeometryRef().ExportToIsoWkb())),
                f.GetField("Text"),
            )
        )
    return out


def _surface():
    x = np.arange(0.0, 300.0 + 1, 10.0)
    y = np.arange(0.0, 200.0 + 1, 10.0)
    xx, yy = np.meshgrid(x, y)
    elevation = 180.0 + 0.1 * xx - 0.05 * yy + 8.0 * np.exp(-((xx - 150) ** 2 + (yy - 100) ** 2) / 2000.0)
    return x, y, elevation, 250.0 - elevation


@pytest.fixture
def contour_layer():
    x, y, elevation, depth = _surface()
    return contours_layer(x, y, elevation, depth, elevation_interval_m=2.0, depth_interval_m=5.0)


def _expected(layer, kind):
    field = "elevation_m" if kind == "elevation" else "depth_m"
    return [
        (g, float(v), bool(ix))
        for g, k, v, ix in zip(layer.geometries, layer.fields["kind"], layer.fields[field], layer.fields["index"])
        if k == kind
    ]


@pytest.mark.parametrize("kind", ["elevation", "depth"])
def test_contours_with_ezdxf(tmp_path, contour_layer, kind):
    pytest.importorskip("ezdxf")  # the reference DXF library (in .venv; python3-ezdxf on Debian)
    from ezdxf import recover

    path = write_contours_dxf(tmp_path / "c.dxf", contour_layer, kind=kind, labels="index")
    doc, auditor = recover.readfile(str(path))
    assert not auditor.has_errors and not auditor.has_fixes
    assert doc.dxfversion == "AC1009"
    names = CONTOUR_LAYERS[kind]
    layers = {lay.dxf.name: lay.dxf.color for lay in doc.layers}
    for name, colour in names.values():
        assert layers[name] == colour
    expected = _expected(contour_layer, kind)
    polylines = [e for e in doc.modelspace() if e.dxftype() == "POLYLINE"]
    assert len(polylines) == len(expected)
    for e, (geom, value, is_index) in zip(polylines, expected):
        assert e.is_3d_polyline
        assert e.dxf.layer == names["index" if is_index else "line"][0]
        pts = np.array([tuple(p) for p in e.points()])
        ref = np.asarray(geom.coords)
        if e.is_closed:  # the closing vertex is implied by the closed flag
            ref = ref[:-1]
        np.testing.assert_allclose(pts[:, :2], ref, atol=5e-7)  # six decimals written
        np.testing.assert_allclose(pts[:, 2], value, atol=5e-7)  # z = the contour value
    texts = [e for e in doc.modelspace() if e.dxftype() == "TEXT"]
    assert len(texts) == sum(ix for _, _, ix in expected)
    for t in texts:
        assert t.dxf.layer == names["label"][0]
        assert float(t.dxf.text) == pytest.approx(t.dxf.insert.z)
        assert -90.0 < (t.dxf.rotation + 180.0) % 360.0 - 180.0 <= 90.0  # labels stay upright


def test_contours_with_gdal_driver(tmp_path, contour_layer):
    path = write_contours_dxf(tmp_path / "c.dxf", contour_layer, kind="elevation", labels="all")
    feats = _ogr_features(path)
    lines = [(l, g) for l, g, t in feats if g.geom_type == "LineString"]
    labels = [(l, g, t) for l, g, t in feats if g.geom_type == "Point"]
    expected = _expected(contour_layer, "elevation")
    assert len(lines) == len(expected) and len(labels) == len(expected)
    for (layer_name, g), (geom, value, is_index) in zip(lines, expected):
        assert g.has_z
        xyz = np.asarray(g.coords)
        np.testing.assert_allclose(xyz[:, 2], value, atol=5e-7)
        assert g.hausdorff_distance(geom) < 1e-6
        assert layer_name == ("CONTOUR_INDEX" if is_index else "CONTOUR")
    for layer_name, p, text in labels:
        assert layer_name == "CONTOUR_LABEL" and float(text) == pytest.approx(p.z)


def test_generic_entities_with_ezdxf(tmp_path):
    pytest.importorskip("ezdxf")
    from ezdxf import recover

    ring = np.array([[0.0, 0.0, 5.0], [10.0, 0.0, 5.0], [10.0, 10.0, 5.0], [0.0, 0.0, 5.0]])
    path = write_dxf(
        tmp_path / "g.dxf",
        [DxfPolyline(ring, "RING", closed=True), DxfPolyline(ring[:2] + 0.25, "OPEN")],
        [DxfText(512000.5, 5001000.25, 212.0, "212.5", 1.5, "LABELS", 135.0)],
        {"RING": 3},
    )
    doc, auditor = recover.readfile(str(path))
    assert not auditor.has_errors
    ents = list(doc.modelspace())
    assert [e.dxftype() for e in ents] == ["POLYLINE", "POLYLINE", "TEXT"]
    assert ents[0].is_closed and len(list(ents[0].points())) == 3
    assert not ents[1].is_closed
    assert {lay.dxf.name: lay.dxf.color for lay in doc.layers}["RING"] == 3
    assert {lay.dxf.name: lay.dxf.color for lay in doc.layers}["OPEN"] == 7  # default colour
    t = ents[2]
    assert tuple(t.dxf.align_point) == (512000.5, 5001000.25, 212.0)
    assert t.dxf.text == "212.5" and t.dxf.height == 1.5 and t.dxf.rotation == 135.0


def test_repeat_write_is_byte_identical(tmp_path, contour_layer):
    a = write_contours_dxf(tmp_path / "a.dxf", contour_layer)
    b = write_contours_dxf(tmp_path / "b.dxf", contour_layer)
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes().isascii()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (([DxfPolyline(np.zeros((1, 3)), "A")],), "expected \\(n >= 2, 3\\)"),
        (([DxfPolyline(np.array([[0, 0, 0], [1, np.nan, 0]]), "A")],), "non-finite"),
        (([DxfPolyline(np.zeros((2, 3)), "bad name")],), "not valid for Release 12"),
        (([DxfPolyline(np.zeros((2, 3)), "A")], (), {"A": 300}), "ACI number"),
        (([], [DxfText(0, 0, 0, "x", 0.0, "T")]), "height"),
    ],
    ids=["one-vertex", "nan", "layer-name", "colour", "text-height"],
)
def test_bad_drawings_are_refused(tmp_path, args, message):
    target = tmp_path / "x.dxf"
    target.write_text("earlier")
    with pytest.raises(OutputError, match=message):
        write_dxf(target, *args)
    assert target.read_text() == "earlier"


def test_bad_options(tmp_path, contour_layer):
    with pytest.raises(OutputError, match="kind='slope'"):
        write_contours_dxf(tmp_path / "x.dxf", contour_layer, kind="slope")
    with pytest.raises(OutputError, match="labels='some'"):
        write_contours_dxf(tmp_path / "x.dxf", contour_layer, labels="some")


def test_header_comment_carries_caution_and_provenance(tmp_path, contour_layer):
    """Comments (group 999) at the head of the file: ezdxf reads them back, GDAL's DXF reader skips them."""
    from rockhead.core.products.provenance import CAUTION

    comments = ["Made by Rockhead 0.1.0 from the survey 'Süd site' (surface: kriging).", "CAUTION: " + CAUTION * 3]
    path = write_contours_dxf(tmp_path / "c.dxf", contour_layer, comments=comments)
    raw = path.read_bytes()
    assert raw.isascii() and raw.startswith(b"999\r\nMade by Rockhead 0.1.0 from the survey 'S\\U+00FCd site'")
    lines = raw.decode("ascii").split("\r\n")
    values = [lines[i + 1] for i in range(0, len(lines) - 1, 2) if lines[i].strip() == "999"]
    assert all(len(v) <= 250 for v in values)  # R12 strings stay short: the long caution is wrapped
    assert " ".join(values[1:]).replace("  ", " ").startswith("CAUTION: A seismic depth map is an interpretation")
    pytest.importorskip("ezdxf")
    from ezdxf import comments as dxf_comments
    from ezdxf import recover

    first = next(iter(dxf_comments.from_file(str(path))))
    assert str(getattr(first, "value", first)).startswith("Made by Rockhead")  # a DXFTag (ezdxf 1.x) or text
    _doc, auditor = recover.readfile(str(path))
    assert not auditor.has_errors
    # GDAL's DXF driver reads the same features as without comments
    plain = write_contours_dxf(tmp_path / "p.dxf", contour_layer)
    assert [(la, g.wkt) for la, g, _ in _ogr_features(path)] == [(la, g.wkt) for la, g, _ in _ogr_features(plain)]
