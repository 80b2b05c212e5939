"""A LandXML 1.2 surface (TIN) of a gridded reflector, for civil design software.

The TIN joins the cell centres of the elevation grid: every quad of four
neighbouring cell centres whose four cells are all mapped gives two triangles
(split along the quad's north-west to south-east diagonal); cells outside the
mask give no point, and a mapped cell that belongs to no complete quad is left
out (a TIN needs three corners). Faces are listed counter-clockwise seen from
above in (easting, northing), so their normals point up.

As the LandXML 1.2 schema says, a point ``<P>`` holds "northing easting
elevation" (northing first). The file names its units (``<Metric>``: metres)
and its coordinate system (``<CoordinateSystem>``: EPSG code and OGC WKT of
the horizontal CRS, and the vertical datum when the survey states one). It is
written with :mod:`xml.etree.ElementTree` and is deterministic: the date is the
issue date given (default ``SOURCE_DATE_EPOCH``, else today, UTC) and the time
00:00:00, so reruns on the same day give the same bytes.

Reference: LandXML.org (2008), LandXML-1.2 schema (LandXML-1.2.xsd), elements
LandXML, Units/Metric, CoordinateSystem, Application, Surfaces/Surface/
Definition (surfType "TIN"), Pnts/P, Faces/F.
"""

from __future__ import annotations

import datetime as _dt
import io
import os
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from typing import Optional

import numpy as np

from .atomic import atomic_path

__all__ = ["LANDXML_NAMESPACE", "Tin", "grid_tin", "issue_date", "write_landxml_surface"]

LANDXML_NAMESPACE = "http://www.landxml.org/schema/LandXML-1.2"
SCHEMA_LOCATION = "http://www.landxml.org/schema/LandXML-1.2/LandXML-1.2.xsd"
XSI = "http://www.w3.org/2001/XMLSchema-instance"


@dataclass(frozen=True)
class Tin:
    """A triangulated surface: points (n, 3) as (x, y, z) and faces (m, 3) of 0-based point indices."""

    points: np.ndarray
    faces: np.ndarray


def grid_tin(x_centres, y_centres, z) -> Tin:
    """Two triangles per fully mapped quad of cell centres of a grid.

    Parameters
    ----------
    x_centres : array_like (nx,)
        Cell-centre eastings (m), increasing.
    y_centres : array_like (ny,)
        Cell-centre northings (m) of the rows of ``z`` (either order).
    z : array_like (ny, nx)
        Elevations (m); NaN where the cell is not mapped.

    Returns
    -------
    Tin
        Points of the cells used by at least one face, in row-major order of
        the grid, and ``2 x`` (number of fully mapped quads) faces.

    >>> t = grid_tin([0.0, 1.0, 2.0], [1.0, 0.0], [[1.0, 2.0, np.nan], [3.0, 4.0, 5.0]])
    >>> len(t.points), t.faces.tolist()
    (4, [[0, 2, 3], [0, 3, 1]])
    """
    x = np.asarray(x_centres, float)
    y = np.asarray(y_centres, float)
    z = np.asarray(z, float)
    if z.shape != (len(y), len(x)):
        raise ValueError(f"z has shape {z.shape}; expected (len(y), len(x)) = ({len(y)}, {len(x)})")
    ok = np.isfinite(z)
    quad = ok[:-1, :-1] & ok[:-1, 1:] & ok[1:, :-1] & ok[1:, 1:]
    r, c = np.nonzero(quad)
    nx = len(x)
    a = r * nx + c  # upper-left in array order
    b = a + 1  # upper-right
    d = a + nx  # lower-left
    e = d + 1  # lower-right
    # counter-clockwise seen from above needs to know whether rows run north or south
    north_down = len(y) < 2 or y[0] > y[-1]
    if north_down:  # row 0 north: a = NW, b = NE, d = SW, e = SE
        faces = np.concatenate([np.column_stack([a, d, e]), np.column_stack([a, e, b])])
    else:  # row 0 south: a = SW, b = SE, d = NW, e = NE
        faces = np.concatenate([np.column_stack([a, b, d]), np.column_stack([d, b, e])])
    order = np.argsort(np.concatenate([np.arange(len(a)), np.arange(len(a))]), kind="stable")
    faces = faces[order]  # both triangles of a quad together
    used = np.unique(faces)
    new_index = np.full(z.size, -1, dtype=np.int64)
    new_index[used] = np.arange(len(used))
    gx, gy = np.meshgrid(x, y)
    pts = np.column_stack([gx.ravel()[used], gy.ravel()[used], z.ravel()[used]])
    return Tin(points=pts, faces=new_index[faces].reshape(-1, 3))


def issue_date(timestamp=None) -> _dt.date:
    """Return the date written on hand-off files.

    ``timestamp`` (datetime or epoch seconds), else ``SOURCE_DATE_EPOCH`` (the
    reproducible-builds convention), else today (UTC).
    """
    if timestamp is None:
        env = os.environ.get("SOURCE_DATE_EPOCH")
        timestamp = int(env) if env and env.strip().lstrip("-").isdigit() else None
    if timestamp is None:
        return _dt.datetime.now(_dt.timezone.utc).date()
    if isinstance(timestamp, (_dt.datetime, _dt.date)):
        return timestamp.date() if isinstance(timestamp, _dt.datetime) else timestamp
    return _dt.datetime.fromtimestamp(int(timestamp), _dt.timezone.utc).date()


def _num(v: float, digits: int = 3) -> str:
    s = f"{v:.{digits}f}"
    return "0.000" if s in ("-0.000",) else s


def write_landxml_surface(
    path,
    tin: Tin,
    crs,
    *,
    surface_name: str,
    description: str = "",
    project_name: str = "",
    vertical_datum: Optional[str] = None,
    software: str = "Rockhead",
    version: str = "",
    timestamp=None,
    digits: int = 3,
):
    """Write ``tin`` as a LandXML 1.2 TIN surface, atomically.

    Parameters
    ----------
    path : path-like
        Output ``.xml`` file.
    tin : Tin
        Points (x = easting, y = northing, z = elevation, metres) and faces.
    crs : pyproj.CRS
        Horizontal CRS of x/y (its EPSG code and WKT are written).
    surface_name, description, project_name : str
        Names written in the file.
    vertical_datum : str, optional
        Name of the vertical datum of z; "not stated" when None.
    software, version : str
        The ``<Application>`` element.
    timestamp : datetime, date or int, optional
        Issue date (see :func:`issue_date`).
    digits : int
        Decimals of coordinates and elevations (default 3: millimetres).
    """
    ET.register_namespace("", LANDXML_NAMESPACE)
    ET.register_namespace("xsi", XSI)
    ns = "{" + LANDXML_NAMESPACE + "}"
    day = issue_date(timestamp)
    root = ET.Element(
        ns + "LandXML",
        {
            "version": "1.2",
            "date": day.isoformat(),
            "time": "00:00:00",
            "{" + XSI + "}schemaLocation": f"{LANDXML_NAMESPACE} {SCHEMA_LOCATION}",
        },
    )
    units = ET.SubElement(root, ns + "Units")
    ET.SubElement(
        units,
        ns + "Metric",
        {
            "areaUnit": "squareMeter",
            "linearUnit": "meter",
            "volumeUnit": "cubicMeter",
            "temperatureUnit": "celsius",
            "pressureUnit": "milliBars",
            "angularUnit": "decimal degrees",
            "directionUnit": "decimal degrees",
        },
    )
    wkt = crs.to_wkt("WKT1_GDAL") or crs.to_wkt()  # OGC WKT 1 (what civil software reads), else WKT 2
    cs = {"name": crs.name or "custom CRS", "ogcWktCode": wkt, "verticalDatum": vertical_datum or "not stated"}
    epsg = crs.to_epsg()
    if epsg is not None:
        cs["epsgCode"] = str(epsg)
    if crs.datum is not None:
        cs["horizontalDatum"] = crs.datum.name
    ET.SubElement(root, ns + "CoordinateSystem", cs)
    if project_name:
        ET.SubElement(root, ns + "Project", {"name": project_name})
    app = ET.SubElement(root, ns + "Application", {"name": software, "manufacturer": software})
    if version:
        app.set("version", version)
    surfaces = ET.SubElement(root, ns + "Surfaces")
    surface = ET.SubElement(surfaces, ns + "Surface", {"name": surface_name})
    if description:
        surface.set("desc", description)
    pts = np.asarray(tin.points, float)
    definition = ET.SubElement(surface, ns + "Definition", {"surfType": "TIN"})
    if len(pts):
        definition.set("elevMin", _num(float(pts[:, 2].min()), digits))
        definition.set("elevMax", _num(float(pts[:, 2].max()), digits))
    pnts = ET.SubElement(definition, ns + "Pnts")
    faces = ET.SubElement(definition, ns + "Faces")
    face_index = np.asarray(tin.faces, np.int64) + 1
    # The points and faces (hundreds of thousands on a large map) are written as text, not as
    # ElementTree elements, which take a minute for a million; the bytes are those ElementTree
    # writes (same indentation and escaping: numbers need none), as the tests check.
    p_rows = [f"{_num(y, digits)} {_num(x, digits)} {_num(z, digits)}" for x, y, z in pts.tolist()]
    f_rows = [f"{a} {b} {c}" for a, b, c in face_index.tolist()]
    if p_rows:
        pnts.text = _PNTS_MARK
    if f_rows:
        faces.text = _FACES_MARK
    tree = ET.ElementTree(root)
    if hasattr(ET, "indent"):  # Python 3.9+
        ET.indent(tree, space=" ")
    buf = io.BytesIO()
    tree.write(buf, encoding="utf-8", xml_declaration=True)
    data = buf.getvalue().decode("utf-8")
    data = _splice(data, _PNTS_MARK, "P", [f' id="{i}">{row}' for i, row in enumerate(p_rows, start=1)])
    data = _splice(data, _FACES_MARK, "F", [f">{row}" for row in f_rows])
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data.encode("utf-8"))
    return path


_PNTS_MARK = "\x1fPNTS\x1f"
_FACES_MARK = "\x1fFACES\x1f"


def _splice(xml: str, mark: str, tag: str, rows: list) -> str:
    """Put child elements ``<tag{row}</tag>`` where ``mark`` stands, indented as ElementTree indents children."""
    at = xml.find(mark)
    if at < 0:
        return xml
    line_start = xml.rfind("\n", 0, at) + 1
    indent = len(xml[line_start:at]) - len(xml[line_start:at].lstrip(" "))
    child = "\n" + " " * (indent + 1)
    body = child + child.join(f"<{tag}{row}</{tag}>" for row in rows) + "\n" + " " * indent
    return xml[:at] + body + xml[at + len(mark) :]
