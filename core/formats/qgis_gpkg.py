"""QGIS layer metadata inside a GeoPackage written by GDAL.

(Default styles, QGIS's ``layer_styles`` table, are a plain attributes table
that GDAL writes with the other layers: see
:func:`rockhead.core.products.styles.styles_table`.)

Layer metadata. QGIS reads a layer's metadata (title, abstract, history,
constraints; Layer Properties > Metadata) from a ``gpkg_metadata`` record in
its own XML (standard URI ``http://mrcc.com/qgis.dtd``, MIME ``text/xml``)
referenced by the table (``gpkg_metadata_reference``, scope ``table``): the
GeoPackage metadata extension (OGC 12-128r18 F.8). GDAL writes only records of
its own standard, so :func:`add_layer_metadata` adds these rows with sqlite3 to
the file GDAL has written and closed, before it is renamed into place; the
extension's tables and registration are GDAL's (the file must already hold a
GDAL metadata record, which :func:`~.gdalio.write_layers` writes when given
metadata).
"""

from __future__ import annotations

import sqlite3
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Iterable, Mapping

from ..errors import OutputError

__all__ = ["QGIS_METADATA_URI", "add_layer_metadata", "layer_metadata_xml"]

QGIS_METADATA_URI = "http://mrcc.com/qgis.dtd"


def layer_metadata_xml(
    identifier: str,
    title: str,
    abstract: str,
    history: Iterable[str] = (),
    caution: str = "",
    parent: str = "",
    keywords: Iterable[str] = (),
) -> str:
    """A layer's metadata in QGIS's XML (the elements QGIS's layer metadata reads)."""
    root = ET.Element("qgis", {"version": "3.22.0"})
    for tag, text in (
        ("identifier", identifier),
        ("parentidentifier", parent),
        ("language", "en"),
        ("type", "dataset"),
        ("title", title),
        ("abstract", abstract),
    ):
        ET.SubElement(root, tag).text = text
    words = list(keywords)
    if words:
        kw = ET.SubElement(root, "keywords", {"vocabulary": "gmd:topicCategory"})
        for w in words:
            ET.SubElement(kw, "keyword").text = w
    ET.SubElement(root, "links")
    for h in history:
        ET.SubElement(root, "history").text = h
    ET.SubElement(root, "fees").text = ""
    if caution:
        ET.SubElement(root, "constraints", {"type": "caution"}).text = caution
    ET.SubElement(root, "encoding").text = "UTF-8"
    return "<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n" + ET.tostring(root, encoding="unicode")


def add_layer_metadata(path, records: Mapping[str, str], timestamp: str) -> None:
    """Add one QGIS metadata record per table (``{table: XML}``) to a GeoPackage GDAL wrote.

    ``timestamp`` is the references' time (ISO 8601 with milliseconds and Z).
    """
    path = Path(path)
    con = sqlite3.connect(str(path), isolation_level=None)
    try:
        have = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if not {"gpkg_metadata", "gpkg_metadata_reference"} <= have:
            raise OutputError(f"'{path.name}' has no GeoPackage metadata tables; write it with metadata first")
        con.execute("BEGIN")
        for table, xml in records.items():
            cur = con.execute(
                "INSERT INTO gpkg_metadata (md_scope, md_standard_uri, mime_type, metadata) "
                "VALUES ('dataset', ?, 'text/xml', ?)",
                (QGIS_METADATA_URI, xml),
            )
            con.execute(
                "INSERT INTO gpkg_metadata_reference (reference_scope, table_name, column_name, row_id_value, "
                "timestamp, md_file_id, md_parent_id) VALUES ('table', ?, NULL, NULL, ?, ?, NULL)",
                (table, timestamp, cur.lastrowid),
            )
        con.execute("COMMIT")
    except sqlite3.Error as exc:
        raise OutputError(f"cannot add layer metadata to '{path.name}': {exc}") from exc
    finally:
        con.close()
