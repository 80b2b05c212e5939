"""A small, self-contained HTML report (images embedded as base64 data, PNG or SVG).

The report is built from plain pieces — headings, paragraphs, key/value
summaries, tables of named columns and figures (PNG or SVG) — so the pipeline decides
the content and this module only renders it. Text is HTML-escaped; nothing is
fetched from the network when the page is opened.
"""

from __future__ import annotations

import base64
import html
import math

import numpy as np

CAUTION_HTML = (
    "<strong>Caution.</strong> This map is a geophysical interpretation with stated uncertainty. "
    "It does not replace borings. Designs that rely on it must be checked against borings and "
    "signed off under local codes by licensed professionals."
)

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2em auto;max-width:1150px;
color:#1b1b1b;line-height:1.4;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:2px solid #1f4e79;padding-bottom:.2em;margin-top:2em}
h3{margin-top:1.4em}
table{border-collapse:collapse;font-size:.82em;margin:.6em 0}
th,td{border:1px solid #c8c8c8;padding:2px 6px;text-align:right}
th{background:#e8eef5}td.t{text-align:left}
tr.flag td{background:#fdecea}
.caution{background:#fff4d6;border-left:5px solid #e0a800;padding:.7em 1em;margin:1em 0}
.kv td:first-child{text-align:left;font-weight:600;background:#f4f6f8}
img{max-width:100%;border:1px solid #ddd;margin:.3em 0}
.small{font-size:.85em;color:#444}
details{margin:.4em 0}
.wide{overflow-x:auto;max-width:100%}
"""


def _fmt(value, digits=4) -> str:
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return "–"
        return f"{v:.1f}" if abs(v) >= 10**digits else f"{v:.{digits}g}"
    return str(value)


class Report:
    """Accumulates report pieces and renders one HTML page."""

    def __init__(self, title: str):
        self.title = title
        self._parts: list[str] = []

    def heading(self, text: str, level: int = 2) -> None:
        """A heading of ``level`` (2 for a section)."""
        self._parts.append(f"<h{level}>{html.escape(text)}</h{level}>")

    def paragraph(self, text: str, cls: str | None = None) -> None:
        """A paragraph of text, with an optional CSS class."""
        c = f' class="{cls}"' if cls else ""
        self._parts.append(f"<p{c}>{html.escape(text)}</p>")

    def caution(self) -> None:
        """The caution box: an interpretation with stated uncertainty, to be checked and signed off."""
        self._parts.append(f'<div class="caution">{CAUTION_HTML}</div>')

    def items(self, pairs) -> None:
        """A two-column key/value table."""
        rows = "".join(
            f'<tr><td class="t">{html.escape(str(k))}</td><td class="t">{html.escape(_fmt(v))}</td></tr>'
            for k, v in pairs
        )
        self._parts.append(f'<table class="kv">{rows}</table>')

    def table(self, columns: dict, caption=None, flag=None, max_rows=None) -> None:
        """A table from a mapping column name -> sequence (all the same length).

        ``flag``: optional boolean sequence; flagged rows are highlighted.
        """
        names = list(columns)
        n = len(next(iter(columns.values()))) if names else 0
        shown = n if max_rows is None else min(n, max_rows)
        head = "".join(f"<th>{html.escape(c)}</th>" for c in names)
        body = []
        for i in range(shown):
            cls = ' class="flag"' if flag is not None and flag[i] else ""
            cells = []
            for c in names:
                v = columns[c][i]
                td = ' class="t"' if isinstance(v, str) else ""
                cells.append(f"<td{td}>{html.escape(_fmt(v))}</td>")
            body.append(f"<tr{cls}>{''.join(cells)}</tr>")
        cap = f"<caption>{html.escape(caption)}</caption>" if caption else ""
        more = f'<p class="small">{n - shown} more rows in the CSV files.</p>' if shown < n else ""
        table = f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"
        # a table wider than the page scrolls on its own instead of widening the whole page
        self._parts.append(f'<div class="wide">{table}</div>{more}')

    def files(self, rows) -> None:
        """A two-column table of files beside the report, each name a relative link, and what they hold.

        ``rows``: pairs (file names, description); the names are relative paths
        such as ``map_sheet.pdf`` or ``qc/line_A.png``.
        """
        out = []
        for names, text in rows:
            links = ", ".join(f'<a href="{html.escape(n, quote=True)}">{html.escape(n)}</a>' for n in names)
            out.append(f'<tr><td class="t">{links}</td><td class="t">{html.escape(str(text))}</td></tr>')
        self._parts.append(f'<table class="kv">{"".join(out)}</table>')

    def figure(self, image: bytes, alt: str, collapsed_summary: str | None = None) -> None:
        """An image: PNG bytes, or an SVG document (bytes starting with ``<svg`` or ``<?xml``)."""
        head = image[:64].lstrip()
        mime = "image/svg+xml" if head.startswith((b"<svg", b"<?xml")) else "image/png"
        data = base64.b64encode(image).decode("ascii")
        img = f'<img alt="{html.escape(alt)}" src="data:{mime};base64,{data}">'
        if collapsed_summary:
            img = f"<details><summary>{html.escape(collapsed_summary)}</summary>{img}</details>"
        self._parts.append(img)

    def link(self, href: str, text: str) -> None:
        """A link to a file beside the report (a relative path such as ``qc/gather_A_1.png``)."""
        self._parts.append(f'<p class="small"><a href="{html.escape(href, quote=True)}">{html.escape(text)}</a></p>')

    def render(self) -> str:
        """The whole page as one self-contained HTML string."""
        body = "\n".join(self._parts)
        return (
            '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f"<title>{html.escape(self.title)}</title><style>{_STYLE}</style></head>"
            f"<body><h1>{html.escape(self.title)}</h1>\n{body}\n</body></html>\n"
        )
