"""The project's CSV tables: reading one with every problem located by file, line and field.

Format
------
CSV files are comma-separated UTF-8 text (a byte-order mark is accepted) with
LF or CRLF line ends and one header row. Blank lines and lines whose first
non-blank character is ``#`` are skipped anywhere. Header names are matched
without regard to case or surrounding spaces; fields may be quoted
(``"L1","101"``), but a field may not span lines. Trailing empty fields
(``1,101,5,6,7,``, as some spreadsheets write) are ignored, and so are rows
of empty fields (``,,,,``).

Unknown columns are *ignored with a* :class:`~core.errors.RockheadWarning`
(extra columns such as a remark or a pick quality are common and harmless).
Every error is an :class:`~core.errors.InputFileError` naming the file, the
1-based physical line and the field. Nothing here ever writes to a file.

The columns of the survey's tables are defined here (the readers in
:mod:`.readers` use them, and a file of the wrong kind is recognised by them).
"""

from __future__ import annotations

import codecs
import csv
import difflib
import math
import os
import re
import stat
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Optional, Union

from ..errors import InputFileError, RockheadWarning
from ..text import printable

__all__ = [
    "BOREHOLE_COLUMNS",
    "BOREHOLE_OPTIONAL",
    "MAX_CSV_BYTES",
    "PICK_COLUMNS",
    "PICK_OPTIONAL",
    "STATION_COLUMNS",
    "CsvTable",
    "excerpt",
    "file_kind",
    "read_csv_table",
    "split_lines",
]

#: Largest CSV file read (bytes): 512 MiB, some 12 million picks; larger files are refused
#: before they are read, so that a wrong file (a disk image, a log) cannot exhaust the memory.
MAX_CSV_BYTES = 512 * 2**20

#: Required columns of stations.csv.
STATION_COLUMNS = ("line", "station", "x", "y", "z")
#: Required columns of picks.csv.
PICK_COLUMNS = ("line", "shot", "receiver", "time_ms")
#: Optional columns of picks.csv.
PICK_OPTIONAL = ("sigma_ms", "reflector")
#: Required columns of boreholes.csv.
BOREHOLE_COLUMNS = ("borehole", "x", "y", "z", "depth_m")
#: Optional columns of boreholes.csv.
BOREHOLE_OPTIONAL = ("sigma_m",)

_ROLE_COLUMNS = {
    "stations": STATION_COLUMNS,
    "picks": PICK_COLUMNS,
    "boreholes": BOREHOLE_COLUMNS,
}
# every column name Rockhead reads in any table: a header with none of them is not one of ours
_ANY_COLUMN = (
    set(STATION_COLUMNS) | set(PICK_COLUMNS) | set(PICK_OPTIONAL) | set(BOREHOLE_COLUMNS) | set(BOREHOLE_OPTIONAL)
)


def excerpt(text: str, max_chars: int = 40) -> str:
    """A short, printable, quoted excerpt of a field for a message.

    Control characters are shown escaped and long text is cut, so that a
    message never carries a terminal escape sequence or a whole line of an
    unrelated file.

    Parameters
    ----------
    text : str
        The field's text.
    max_chars : int
        Longest excerpt (characters, before quoting).

    Returns
    -------
    str
        The excerpt in single quotes.

    Examples
    --------
    >>> excerpt("12,5")
    "'12,5'"
    >>> excerpt("a" * 50, max_chars=8)
    "'aaaaaaa…'"
    """
    return "'" + printable(text, max_chars).replace("'", "\\'") + "'"


def file_kind(mode: int) -> str:
    """What a file of ``os.stat`` mode ``mode`` is, in words ("a named pipe (FIFO)", ...).

    Parameters
    ----------
    mode : int
        ``st_mode`` of :func:`os.stat`.

    Returns
    -------
    str

    Examples
    --------
    >>> import stat
    >>> file_kind(stat.S_IFIFO)
    'a named pipe (FIFO)'
    """
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISREG(mode):
        return "a regular file"
    return "not a regular file"


_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+$")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")


def split_lines(text: str) -> list[str]:
    r"""Split text at LF, CRLF or CR line ends, as the readers count lines.

    Parameters
    ----------
    text : str
        The file's text.

    Returns
    -------
    list of str
        The physical lines, without their line ends (line k is item k - 1).

    Examples
    --------
    >>> split_lines("a\r\nb\rc\nd")
    ['a', 'b', 'c', 'd']
    """
    return _LINE_BREAK.split(text)


@dataclass(frozen=True)
class CsvTable:
    """A checked CSV file: lower-case column names and the data rows as text.

    ``rows[i][j]`` is the stripped text of column ``columns[j]`` in data row i,
    found on physical line ``lines[i]`` (1-based) of ``path``.

    Attributes
    ----------
    path : Path
        The file.
    columns : tuple of str
        The known columns found, required ones first.
    header_line : int
        1-based line of the header.
    rows : list of list of str
        The data rows (text of the known columns).
    lines : list of int
        1-based line of each data row.
    """

    path: Path
    columns: tuple
    header_line: int
    rows: list
    lines: list

    def column(self, name: str) -> list:
        """Return the text of one column in every data row.

        Parameters
        ----------
        name : str
            A column of :attr:`columns`.

        Returns
        -------
        list of str
        """
        j = self.columns.index(name)
        return [r[j] for r in self.rows]

    def number(self, i: int, name: str, text: str) -> float:
        """Parse a finite number of data row ``i``, or raise naming the file, line and field.

        Parameters
        ----------
        i : int
            Data row (0-based).
        name : str
            The column, for the message.
        text : str
            The field's text.

        Returns
        -------
        float

        Raises
        ------
        InputFileError
            Empty, not a number, not finite, or written with a decimal comma.
        """
        path, lineno = self.path, self.lines[i]
        if text == "":
            raise InputFileError(path, lineno, name, f"empty value: '{name}' needs a number")
        if _NUMBER.match(text):
            value = float(text)
            if math.isfinite(value):
                return value
            raise InputFileError(path, lineno, name, f"value {excerpt(text)} overflows: expected a finite number")
        low = text.lower()
        if low.lstrip("+-") in ("nan", "inf", "infinity"):
            raise InputFileError(path, lineno, name, f"value {excerpt(text)} is not a finite number: give a number")
        if _DECIMAL_COMMA.match(text):
            raise InputFileError(
                path,
                lineno,
                name,
                f"value {excerpt(text)} uses a decimal comma: write {text.replace(',', '.')} (decimal point; "
                "commas separate fields)",
            )
        raise InputFileError(path, lineno, name, f"value {excerpt(text)} is not a number")

    def label(self, i: int, name: str, text: str) -> str:
        """Return a non-empty label of data row ``i``, or raise naming the file, line and field.

        Parameters
        ----------
        i : int
            Data row (0-based).
        name : str
            The column, for the message.
        text : str
            The field's text.

        Returns
        -------
        str
            ``text`` itself.

        Raises
        ------
        InputFileError
            When the field is empty.
        """
        if text == "":
            raise InputFileError(self.path, self.lines[i], name, f"empty label: '{name}' needs a value")
        return text


def _read_text(path: Path, role: str) -> str:
    try:
        st = os.stat(path)
    except FileNotFoundError as exc:
        raise InputFileError(path, None, None, f"{role} file not found: '{printable(path)}'") from exc
    except (OSError, ValueError) as exc:
        raise InputFileError(path, None, None, f"cannot use the path '{printable(path)}': {exc}") from exc
    if stat.S_ISDIR(st.st_mode):
        raise InputFileError(path, None, None, f"'{printable(path)}' is a folder, not the {role} file")
    if not stat.S_ISREG(st.st_mode):  # reading a device or a pipe could block or never end
        raise InputFileError(
            path,
            None,
            None,
            f"'{printable(path)}' is {file_kind(st.st_mode)}, not a regular file: name the {role} CSV file",
        )
    if st.st_size > MAX_CSV_BYTES:
        raise InputFileError(
            path,
            None,
            None,
            f"the {role} file is {st.st_size / 2**20:.0f} MiB, more than the "
            f"{MAX_CSV_BYTES / 2**20:.0f} MiB Rockhead reads (some 12 million picks): is it the right file? Split a "
            "larger survey into parts",
        )
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise InputFileError(path, None, None, f"{role} file not found: '{printable(path)}'") from exc
    except (OSError, ValueError) as exc:
        raise InputFileError(path, None, None, f"cannot read the {role} file '{printable(path)}': {exc}") from exc
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise InputFileError(path, 1, None, "the file is UTF-16 text: save it as UTF-8 (CSV UTF-8)")
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    nul = data.find(b"\x00")
    if nul >= 0:
        raise InputFileError(
            path,
            data.count(b"\n", 0, nul) + 1,
            None,
            "the file contains NUL bytes: it is not a text CSV file (save it as CSV UTF-8)",
        )
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        bad = data[exc.start : exc.start + 1].hex().upper()
        raise InputFileError(
            path,
            line,
            None,
            f"byte 0x{bad} is not UTF-8 text (probably saved as Latin-1/Windows-1252): "
            "save the file as UTF-8 (CSV UTF-8)",
        ) from exc


def _open_quote_field(text: str) -> int | None:
    """0-based field in which a quote opens and is not closed on the line (None when quotes balance)."""
    field, quoted, start = 0, False, None
    i = 0
    while i < len(text):
        c = text[i]
        if quoted:
            if c == '"':
                if i + 1 < len(text) and text[i + 1] == '"':  # "" inside quotes is one quote
                    i += 1
                else:
                    quoted = False
        elif c == '"':
            quoted, start = True, field
        elif c == ",":
            field += 1
        i += 1
    return start if quoted else None


def _split_row(path: Path, lineno: int, text: str, header: Sequence[str] | None = None) -> list:
    if text and '"' not in text and "\x00" not in text:  # no quoting: the csv module would split at every comma
        return [f.strip().strip("\ufeff").strip() for f in text.split(",")]
    try:
        rows = list(csv.reader([text], strict=True, skipinitialspace=True))
    except csv.Error as exc:
        open_field = _open_quote_field(text)
        if open_field is not None:
            name = header[open_field] if header is not None and open_field < len(header) else None
            named = f" ({excerpt(name, 30)})" if name else ""
            raise InputFileError(
                path,
                lineno,
                name.lower() if name else None,
                f'a quote opened in field {open_field + 1}{named} is not closed on this line: close it with " '
                "(a field may not span lines) or remove it",
            ) from exc
        raise InputFileError(
            path,
            lineno,
            None,
            f'malformed CSV row ({exc}): quote a whole field as "..." and keep each row on one line',
        ) from exc
    fields = rows[0] if rows else []
    return [f.strip().strip("\ufeff").strip() for f in fields]


def _looks_numeric(s: str) -> bool:
    return bool(_NUMBER.match(s)) or bool(_DECIMAL_COMMA.match(s))


def _role_hint(found: Sequence[str]) -> str:
    for role, cols in _ROLE_COLUMNS.items():
        if set(cols) <= set(found):
            return f" (these are the columns of a {role} file: is the right file named in survey.toml?)"
    return ""


def read_csv_table(
    path: Union[str, Path],
    required: Sequence[str],
    optional: Sequence[str] = (),
    role: str = "CSV",
    allow_empty: bool = False,
    optional_pattern: Optional[str] = None,
) -> CsvTable:
    """Read and check the structure of one CSV file.

    Checks: readable UTF-8 text, comma separator (semicolon, tab and space
    separated files are recognised and refused with a hint), a header with
    every required column, no duplicate or empty column name, at least one
    data row, and the same number of fields in every row. Unknown columns are
    ignored with a :class:`RockheadWarning`.

    Parameters
    ----------
    path : str or Path
        The file.
    required, optional : sequence of str
        Lower-case column names.
    role : str
        Name of the file's role for messages ("stations", "picks", ...).
    allow_empty : bool
        Accept a header without data rows (a log such as the pick edits may
        hold none).
    optional_pattern : str, optional
        Regular expression: header names it matches in full are optional
        columns too (kept in header order after the named optional ones).

    Returns
    -------
    CsvTable
        Only the known columns (required first, then the optional ones found).

    Raises
    ------
    InputFileError
    """
    path = Path(path)
    text = _read_text(path, role)
    lines = _LINE_BREAK.split(text)
    header = None
    rows, linenos = [], []
    for i, raw in enumerate(lines, start=1):
        stripped = raw.strip().strip("\ufeff").strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = _split_row(path, i, raw, header)
        if not any(fields):  # ",,,,": a blank row as spreadsheets export it
            continue
        if header is None:
            header, header_line, header_raw = fields, i, raw
            continue
        rows.append(fields)
        linenos.append(i)
    if header is None:
        raise InputFileError(path, None, None, f"the {role} file is empty: expected a header row and data rows")

    columns = [h.lower() for h in header]
    while columns and columns[-1] == "":  # trailing separators after the last name
        columns.pop()
    if len(columns) <= 1:
        wanted = ", ".join(required)
        for sep, name in ((";", "semicolons"), ("\t", "tabs"), ("|", "vertical bars")):
            if sep in header_raw:
                raise InputFileError(
                    path,
                    header_line,
                    None,
                    f"fields are separated by {name}: use commas (',') between fields and points ('.') "
                    f"as decimal marks; expected the header {wanted}",
                )
        if len(header_raw.split()) > 1:
            raise InputFileError(
                path,
                header_line,
                None,
                f"fields are separated by spaces: use commas; expected the header {wanted}",
            )
    if optional_pattern is not None:
        pattern = re.compile(optional_pattern)
        optional = list(optional) + [
            c for c in columns if c not in required and c not in optional and pattern.fullmatch(c)
        ]
    known_names = set(required) | set(optional)
    if columns and not known_names & set(columns) and any(_looks_numeric(c) for c in columns):
        raise InputFileError(
            path,
            header_line,
            None,
            f"the first row {excerpt(header_raw.strip(), 60)} holds data, not column names: add the header "
            f"row {', '.join(required)}",
        )
    for j, name in enumerate(columns):
        if name == "":
            raise InputFileError(
                path, header_line, None, f"column {j + 1} of the header has no name: name it or delete it"
            )
        if columns.index(name) != j:
            raise InputFileError(path, header_line, name, f"column '{name}' appears twice in the header: keep one")
    missing = [c for c in required if c not in columns]
    if missing and not _ANY_COLUMN & set(columns):
        # not a table of ours (another file named by mistake): say so without quoting its content
        raise InputFileError(
            path,
            header_line,
            None,
            f"line {header_line} is not the header of a {role} file: none of its {len(columns)} field(s) is a "
            f"column Rockhead reads (required: {', '.join(required)}); is the right file named in survey.toml?",
        )
    if missing:
        unknown = [c for c in columns if c not in required and c not in optional]
        hints = []
        for m in missing:
            close = difflib.get_close_matches(m, unknown, n=1, cutoff=0.6)
            if close:
                hints.append(f"rename '{close[0]}' to '{m}'")
        if "time_ms" in missing and any(c in ("time_s", "time", "t", "twt") for c in columns):
            hints.append("time_ms holds two-way times in milliseconds")
        hint = ("; " + "; ".join(hints)) if hints else ""
        raise InputFileError(
            path,
            header_line,
            missing[0],
            f"missing column{'s' if len(missing) > 1 else ''} {', '.join(repr(m) for m in missing)}: "
            f"the header has {', '.join(printable(c, 30) for c in columns) or 'nothing'}; required: "
            f"{', '.join(required)}"
            f"{hint}{_role_hint(columns)}",
        )
    known = list(required) + [c for c in optional if c in columns]
    extra = [c for c in columns if c not in known]
    if extra:
        suggestions = []
        for c in extra:
            close = difflib.get_close_matches(c, list(required) + list(optional), n=1, cutoff=0.6)
            suggestions.append(f"'{c}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        warnings.warn(
            RockheadWarning(
                f"{path.name}, line {header_line}: column{'s' if len(extra) > 1 else ''} "
                f"{', '.join(suggestions)} not used by Rockhead and ignored; known columns: "
                f"{', '.join(list(required) + list(optional))}"
            ),
            stacklevel=3,
        )
    if not rows and not allow_empty:
        raise InputFileError(path, header_line, None, f"the {role} file has a header but no data rows")
    index = [columns.index(c) for c in known]
    ncol = len(columns)
    out = []
    for fields, lineno in zip(rows, linenos):
        if len(fields) > ncol:
            if any(f for f in fields[ncol:]):
                hint = ""
                if any(_DECIMAL_COMMA.match(f"{a},{b}") for a, b in zip(fields, fields[1:])):
                    hint = (
                        "; if a number such as '12,5' is meant, write it with a decimal point (12.5): "
                        "a comma separates fields"
                    )
                raise InputFileError(
                    path,
                    lineno,
                    None,
                    f"the row has {len(fields)} fields but the header has {ncol} ({', '.join(columns)}){hint}",
                )
            fields = fields[:ncol]
        elif len(fields) < ncol:
            if len(fields) == 1 and ";" in fields[0]:
                raise InputFileError(
                    path, lineno, None, "fields are separated by semicolons: use commas (',') between fields"
                )
            raise InputFileError(
                path,
                lineno,
                columns[len(fields)],
                f"the row has {len(fields)} field{'s' if len(fields) != 1 else ''} but the header has "
                f"{ncol} ({', '.join(columns)}): value of '{columns[len(fields)]}' missing",
            )
        out.append([fields[j] for j in index])
    return CsvTable(path=path, columns=tuple(known), header_line=header_line, rows=out, lines=linenos)
