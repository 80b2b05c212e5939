"""LandXML 1.2 TIN writer: structure as the LandXML-1.2 schema defines it (elements LandXML, Units/Metric,
CoordinateSystem, Surfaces/Surface/Definition, Pnts/P "northing easting elevation", Faces/F), checked
by parsing with the standard library (the schema file itself is not available from a package registry,
so these are structural checks, not schema validation)."""

import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rockhead.core.crs import parse_crs
from rockhead.core.formats.landxml import grid_tin, issue_date, write_landxml_surface

NS = "{http://www.landxml.org/schema/LandXML-1.2}"


@pytest.mark.parametrize("north_first", [True, False], ids=["row0-north", "row0-south"])
def test_tin_faces_count_and_orientation(rng, north_first):
    x = np.arange(7) * 2.0 + 100.0
    y = np.arange(5) * 2.0 + 50.0
    if north_first:
        y = y[::-1]
    z = rng.normal(10, 1, (5, 7))
    z[rng.random((5, 7)) < 0.25] = np.nan
    t = grid_tin(x, y, z)
    ok = np.isfinite(z)
    quads = sum(ok[i, j] & ok[i, j + 1] & ok[i + 1, j] & ok[i + 1, j + 1] for i in range(4) for j in range(6))
    assert len(t.faces) == 2 * quads
    p = t.points[t.faces]
    u, v = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    area2 = u[:, 0] * v[:, 1] - v[:, 0] * u[:, 1]
    np.testing.assert_allclose(area2, 4.0)  # counter-clockwise from above, half a 2 m cell each
    assert np.isfinite(t.points).all() and len(np.unique(t.faces)) == len(t.points)  # no unused point


def test_plane_is_reproduced_exactly_inside_each_triangle():
    """A TIN of a plane is the plane: linear interpolation in any face gives a + b x + c y."""
    x = np.arange(4) * 5.0
    y = np.arange(3)[::-1] * 5.0
    gx, gy = np.meshgrid(x, y)
    t = grid_tin(x, y, 3.0 + 0.2 * gx - 0.1 * gy)
    p = t.points[t.faces]  # (m, 3, 3)
    w = np.array([0.2, 0.3, 0.5])
    q = np.einsum("k,mkj->mj", w, p)
    np.testing.assert_allclose(q[:, 2], 3.0 + 0.2 * q[:, 0] - 0.1 * q[:, 1], atol=1e-12)


def test_file_structure(tmp_path):
    x = np.array([0.0, 1.0, 2.0]) + 512000.0
    y = np.array([1.0, 0.0]) + 5455000.0
    t = grid_tin(x, y, np.array([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]))
    path = tmp_path / "s.xml"
    write_landxml_surface(
        path,
        t,
        parse_crs("EPSG:32633"),
        surface_name="rock",
        project_name="site",
        vertical_datum="NAVD88 height",
        version="0.1.0",
        timestamp=1764633600,
    )
    text = path.read_text(encoding="utf-8")
    assert text.startswith("<?xml version='1.0' encoding='utf-8'?>")
    root = ET.fromstring(text.encode())
    assert root.tag == NS + "LandXML" and root.get("version") == "1.2"
    assert root.get("date") == "2025-12-02" and root.get("time") == "00:00:00"
    cs = root.find(NS + "CoordinateSystem")
    assert cs.get("epsgCode") == "32633" and cs.get("verticalDatum") == "NAVD88 height"
    assert cs.get("horizontalDatum")
    d = root.find(f"{NS}Surfaces/{NS}Surface/{NS}Definition")
    assert d.get("surfType") == "TIN" and d.get("elevMin") == "1.000" and d.get("elevMax") == "6.000"
    pts = [p.text.split() for p in d.find(NS + "Pnts")]
    assert pts[0] == ["5455001.000", "512000.000", "1.000"]  # northing easting elevation
    assert [f.text for f in d.find(NS + "Faces")] == ["1 4 5", "1 5 2", "2 5 6", "2 6 3"]
    # the same inputs give the same bytes
    path2 = tmp_path / "s2.xml"
    write_landxml_surface(
        path2,
        t,
        parse_crs("EPSG:32633"),
        surface_name="rock",
        project_name="site",
        vertical_datum="NAVD88 height",
        version="0.1.0",
        timestamp=1764633600,
    )
    assert path.read_bytes() == path2.read_bytes()


def test_issue_date_follows_source_date_epoch(monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764633600")  # 2025-12-02T00:00:00Z
    assert issue_date().isoformat() == "2025-12-02"


def test_points_and_faces_written_as_elementtree_writes_them(tmp_path, rng):
    """The points and faces are spliced in as text (a large map has a million of them): the bytes
    must be those of the same document built element by element with xml.etree (the reference)."""
    from rockhead.core.formats.landxml import LANDXML_NAMESPACE

    z = 100.0 + rng.normal(0.0, 2.0, (7, 9))
    z[2, 3] = np.nan  # a hole: fewer faces around it
    tin = grid_tin(np.arange(9) * 5.0 + 500000.0, 5500000.0 - np.arange(7) * 5.0, z)
    crs = parse_crs("EPSG:32633")
    path = write_landxml_surface(tmp_path / "s.xml", tin, crs, surface_name="reflector")
    got = path.read_bytes()

    root = ET.fromstring(got)
    ns = "{" + LANDXML_NAMESPACE + "}"
    pnts = root.find(f".//{ns}Pnts")
    faces = root.find(f".//{ns}Faces")
    # rebuild the two lists element by element, as before, and serialise the whole document again
    for el in (pnts, faces):
        el.text = None
        for child in list(el):
            el.remove(child)
    for i, (x, y, zz) in enumerate(np.asarray(tin.points), start=1):
        ET.SubElement(pnts, ns + "P", {"id": str(i)}).text = f"{y:.3f} {x:.3f} {zz:.3f}"
    for a, b, c in np.asarray(tin.faces) + 1:
        ET.SubElement(faces, ns + "F").text = f"{a} {b} {c}"
    ET.register_namespace("", LANDXML_NAMESPACE)
    for el in root.iter():  # drop the indentation read back, then indent as the writer does
        el.tail = None
        if len(el):
            el.text = None
    tree = ET.ElementTree(root)
    ET.indent(tree, space=" ")
    import io

    buf = io.BytesIO()
    tree.write(buf, encoding="utf-8", xml_declaration=True)
    assert got == buf.getvalue()
    assert len(tin.points) == 62 and len(pnts) == 62  # 63 cells less the hole
