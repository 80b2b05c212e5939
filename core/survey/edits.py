"""Pick edits: the interpreter's changes to picks.csv, kept in a plain CSV beside the survey.

Picks are never changed in picks.csv. An interpreter who judges a pick wrong
(a mispick on a noisy trace, a cycle skip) records an *edit*; the edits live
in ``pick_edits.csv`` beside survey.toml (or the file named by ``[files]
pick_edits``) and every run, from the command line or QGIS, applies them on
top of the picks.

Format
------
One row per edit, in the order they were made (the file is a log; later rows
win). Columns, as in every input CSV (:mod:`.csvfile`: comma separated, UTF-8,
header row, ``#`` comment lines):

``line, shot, receiver``
    The pick, as in picks.csv (required).
``reflector``
    The pick's reflector label; may be empty when only one reflector is
    picked at that receiver.
``action``
    ``exclude`` (leave the pick out of every fit), ``restore`` (take it back
    as it is in picks.csv: included, original time) or ``retime`` (use
    ``new_time_ms`` instead of the picked time).
``new_time_ms``
    The new two-way time (ms) of a ``retime``; empty otherwise.
``reason``
    Free text (why), optional.
``time_stamp``
    When the edit was made: ISO 8601, e.g. ``2026-12-02T07:30:12Z``; optional.

A retime keeps the pick's exclusion as it was; ``restore`` undoes both.
Excluded picks are reported as excluded (``picks_excluded`` in the shots
layer), never silently dropped. Every problem in the file is an
:class:`~core.errors.InputFileError` naming the file, the line and the field.
"""

from __future__ import annotations

import datetime as _dt
import difflib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Optional, Union

import numpy as np

from ..errors import InputFileError
from ..formats.tables import FORMULA_PREFIXES, write_csv
from .csvfile import read_csv_table
from .model import Picks
from .readers import MAX_TIME_MS, MIN_TIME_MS

__all__ = [
    "ACTIONS",
    "EDITS_FILE_NAME",
    "EDIT_COLUMNS",
    "EDIT_OPTIONAL",
    "AppliedEdits",
    "PickEdit",
    "PickEdits",
    "apply_pick_edits",
    "now_time_stamp",
    "read_pick_edits",
    "write_pick_edits",
]

#: Default file name, looked for beside survey.toml.
EDITS_FILE_NAME = "pick_edits.csv"
#: Required columns of the edits file.
EDIT_COLUMNS = ("line", "shot", "receiver", "action")
#: Optional columns of the edits file (always written).
EDIT_OPTIONAL = ("reflector", "new_time_ms", "reason", "time_stamp")
#: What an edit may do to a pick.
ACTIONS = ("exclude", "restore", "retime")


@dataclass(frozen=True)
class PickEdit:
    """One edit of one pick.

    Attributes
    ----------
    line, shot, receiver, reflector : str
        The pick (``reflector`` as in the picks, never empty once read).
    action : str
        One of :data:`ACTIONS`.
    new_time_ms : float or None
        New two-way time (ms) of a ``retime``; None otherwise.
    reason : str
        Why (free text; may be empty).
    time_stamp : str
        ISO 8601 time of the edit (may be empty).
    file_line : int or None
        1-based line in the edits file it was read from (None when made in memory).
    """

    line: str
    shot: str
    receiver: str
    reflector: str
    action: str
    new_time_ms: Optional[float] = None
    reason: str = ""
    time_stamp: str = ""
    file_line: Optional[int] = None

    @property
    def key(self) -> tuple:
        """(line, shot, receiver, reflector) of the pick."""
        return (self.line, self.shot, self.receiver, self.reflector)

    def describe(self) -> str:
        """Describe the edit in one line for people.

        Returns
        -------
        str
            E.g. ``exclude: line A, shot 101, receiver 124 (reflector 1)``, with the reason.
        """
        what = self.action
        if self.action == "retime" and self.new_time_ms is not None:
            what = f"retime to {self.new_time_ms:g} ms"
        text = f"{what}: line {self.line}, shot {self.shot}, receiver {self.receiver} (reflector {self.reflector})"
        return text + (f" — {self.reason}" if self.reason else "")


@dataclass(frozen=True)
class PickEdits:
    """The edits of one survey, in file order.

    Attributes
    ----------
    edits : tuple of PickEdit
        In the order they were made.
    path : Path or None
        The file they were read from, or will be written to.
    """

    edits: tuple = ()
    path: Optional[Path] = None

    def __len__(self) -> int:
        """Return the number of edits."""
        return len(self.edits)

    def __iter__(self) -> Iterator[PickEdit]:
        """Iterate over the edits in order."""
        return iter(self.edits)

    def appended(self, edit: PickEdit) -> PickEdits:
        """Return a copy with ``edit`` added at the end.

        Parameters
        ----------
        edit : PickEdit
            The new edit.

        Returns
        -------
        PickEdits
        """
        return replace(self, edits=(*self.edits, edit))

    def without_last(self) -> PickEdits:
        """Return a copy without the last edit (undo).

        Returns
        -------
        PickEdits
        """
        return replace(self, edits=self.edits[:-1])


@dataclass(frozen=True)
class AppliedEdits:
    """Picks after the edits, with what changed.

    Attributes
    ----------
    picks : Picks
        The picks with retimed times (seconds); everything else as read.
    excluded : (n,) bool ndarray
        Picks excluded by the edits (per row of ``picks``).
    original_time_s : (n,) ndarray
        The picked times (s) as in picks.csv.
    edited : (n,) bool ndarray
        Picks whose state differs from picks.csv (excluded or retimed).
    edits : PickEdits
        The edits applied.
    """

    picks: Picks
    excluded: np.ndarray
    original_time_s: np.ndarray
    edited: np.ndarray
    edits: PickEdits = field(default_factory=PickEdits)

    @property
    def n_excluded(self) -> int:
        """Number of picks excluded."""
        return int(np.sum(self.excluded))

    @property
    def n_retimed(self) -> int:
        """Number of picks whose time differs from picks.csv."""
        return int(np.sum(self.picks.time_s != self.original_time_s))


def now_time_stamp() -> str:
    """Return the current UTC time in ISO 8601 to the second.

    Returns
    -------
    str
        E.g. ``2026-12-02T07:30:12Z``.
    """
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _check_time_stamp(text: str) -> bool:
    value = text[:-1] + "+00:00" if text.endswith(("Z", "z")) else text
    try:
        _dt.datetime.fromisoformat(value)
    except ValueError:
        return False
    return True


def _unguard(text: str) -> str:
    # write_csv guards text a spreadsheet would evaluate with a leading apostrophe: undo it
    if len(text) > 1 and text[0] == "'" and text[1:].startswith(FORMULA_PREFIXES):
        return text[1:]
    return text


def _near(label: str, choices: Iterable) -> str:
    close = difflib.get_close_matches(str(label), sorted(map(str, set(choices))), n=3, cutoff=0.5)
    return f" (close: {', '.join(repr(c) for c in close)})" if close else ""


class _PickIndex:
    """Look-up of picks by (line, shot, receiver[, reflector]) with located errors."""

    def __init__(self, picks: Picks):
        self.rows: dict = {}
        self.reflectors: dict = {}
        self.shots: dict = {}
        self.receivers: dict = {}
        for i, key in enumerate(zip(picks.line, picks.shot, picks.receiver, picks.reflector)):
            ln, sh, rc, rf = (str(k) for k in key)
            self.rows[(ln, sh, rc, rf)] = i
            self.reflectors.setdefault((ln, sh, rc), []).append(rf)
            self.shots.setdefault(ln, set()).add(sh)
            self.receivers.setdefault((ln, sh), set()).add(rc)

    def find(self, path, lineno, ln, sh, rc, rf) -> tuple:
        """Row index and reflector of the pick, or InputFileError naming the first field that misses."""
        if ln not in self.shots:
            raise InputFileError(path, lineno, "line", f"line {ln!r} has no picks in picks.csv{_near(ln, self.shots)}")
        if sh not in self.shots[ln]:
            raise InputFileError(
                path, lineno, "shot", f"shot {sh!r} of line {ln!r} has no picks in picks.csv{_near(sh, self.shots[ln])}"
            )
        if rc not in self.receivers[(ln, sh)]:
            raise InputFileError(
                path,
                lineno,
                "receiver",
                f"receiver {rc!r} has no pick in shot {sh!r} of line {ln!r}{_near(rc, self.receivers[(ln, sh)])}",
            )
        found = self.reflectors[(ln, sh, rc)]
        if rf == "":
            if len(found) > 1:
                raise InputFileError(
                    path,
                    lineno,
                    "reflector",
                    f"receiver {rc!r} of shot {sh!r}, line {ln!r} has picks of reflectors "
                    f"{', '.join(repr(f) for f in found)}: name the reflector of the pick to edit",
                )
            rf = found[0]
        if (ln, sh, rc, rf) not in self.rows:
            raise InputFileError(
                path,
                lineno,
                "reflector",
                f"no pick of reflector {rf!r} at receiver {rc!r} of shot {sh!r}, line {ln!r} (picked there: "
                f"{', '.join(repr(f) for f in found)})",
            )
        return self.rows[(ln, sh, rc, rf)], rf


def read_pick_edits(path: Union[str, Path], picks: Picks, *, max_time_ms: float = MAX_TIME_MS) -> PickEdits:
    """Read and check a pick edits file against the picks.

    Parameters
    ----------
    path : str or Path
        The edits file (see the module's description of the format).
    picks : Picks
        The picks of the survey, as read from picks.csv; every edit must name one.
    max_time_ms : float
        Largest new two-way time accepted (ms), as for picks.csv.

    Returns
    -------
    PickEdits
        The edits in file order; a file with a header and no rows gives none.

    Raises
    ------
    InputFileError
        Naming the file, the line and the field: an unknown action, a retime
        without a valid ``new_time_ms`` (> 0 ms, at most ``max_time_ms``), a
        ``new_time_ms`` on another action, a pick that picks.csv does not
        hold, a reflector left empty where several are picked, a malformed
        ``time_stamp``; and every structural problem of a CSV file.
    """
    path = Path(path)
    table = read_csv_table(path, EDIT_COLUMNS, EDIT_OPTIONAL, role="pick edits", allow_empty=True)
    cols = table.columns
    index = _PickIndex(picks)

    def text(row, name):
        return row[cols.index(name)] if name in cols else ""

    out = []
    for i, r in enumerate(table.rows):
        lineno = table.lines[i]
        ln = table.label(i, "line", _unguard(r[0]))
        sh = table.label(i, "shot", _unguard(r[1]))
        rc = table.label(i, "receiver", _unguard(r[2]))
        action = r[3].strip().lower()
        if action not in ACTIONS:
            close = difflib.get_close_matches(action, ACTIONS, n=1, cutoff=0.5)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise InputFileError(path, lineno, "action", f"action {r[3]!r} is not one of {', '.join(ACTIONS)}{hint}")
        _, rf = index.find(path, lineno, ln, sh, rc, _unguard(text(r, "reflector")))
        raw_time = text(r, "new_time_ms")
        new_time = None
        if action == "retime":
            if raw_time == "":
                raise InputFileError(
                    path, lineno, "new_time_ms", "a retime needs the new two-way time in new_time_ms (ms)"
                )
            new_time = table.number(i, "new_time_ms", raw_time)
            if not (MIN_TIME_MS <= new_time <= max_time_ms):
                raise InputFileError(
                    path,
                    lineno,
                    "new_time_ms",
                    f"new time {raw_time!r} ms is outside {MIN_TIME_MS:g} to {max_time_ms:g} ms: give the "
                    "two-way time in milliseconds",
                )
        elif raw_time != "":
            raise InputFileError(
                path,
                lineno,
                "new_time_ms",
                f"new_time_ms {raw_time!r} is given with action '{action}': only a retime takes a new time "
                "(leave it empty)",
            )
        stamp = text(r, "time_stamp")
        if stamp and not _check_time_stamp(stamp):
            raise InputFileError(
                path,
                lineno,
                "time_stamp",
                f"time stamp {stamp!r} is not an ISO 8601 date and time (e.g. 2026-12-02T07:30:12Z)",
            )
        out.append(PickEdit(ln, sh, rc, rf, action, new_time, _unguard(text(r, "reason")), stamp, lineno))
    return PickEdits(tuple(out), path)


def apply_pick_edits(picks: Picks, edits: PickEdits) -> AppliedEdits:
    """Apply edits, in order, to the picks.

    ``exclude`` sets a pick's exclusion, ``retime`` its time, ``restore``
    brings back the pick as read (included, picked time); the last edit of a
    pick decides.

    Parameters
    ----------
    picks : Picks
        The picks as read from picks.csv.
    edits : PickEdits
        The edits; each must name a pick of ``picks``.

    Returns
    -------
    AppliedEdits

    Raises
    ------
    InputFileError
        An edit naming a pick that ``picks`` does not hold (located when the
        edit was read from a file).

    Examples
    --------
    >>> import numpy as np
    >>> from rockhead.core.survey.model import Picks
    >>> s = lambda *v: np.array(v, dtype=object)
    >>> p = Picks(s("A", "A"), s("1", "1"), s("2", "3"), np.array([0.02, 0.03]), np.array([5e-4, 5e-4]),
    ...           s("1", "1"), np.array([2, 3]))
    >>> e = PickEdits((PickEdit("A", "1", "3", "1", "retime", 31.0), PickEdit("A", "1", "2", "1", "exclude")))
    >>> a = apply_pick_edits(p, e)
    >>> a.picks.time_s.tolist(), a.excluded.tolist(), a.n_retimed
    ([0.02, 0.031], [True, False], 1)
    """
    time_s = np.array(picks.time_s, dtype=float, copy=True)
    excluded = np.zeros(len(time_s), dtype=bool)
    if len(edits):
        index = _PickIndex(picks)
        for e in edits:
            row, _ = index.find(edits.path, e.file_line, e.line, e.shot, e.receiver, e.reflector)
            if e.action == "exclude":
                excluded[row] = True
            elif e.action == "restore":
                excluded[row] = False
                time_s[row] = picks.time_s[row]
            elif e.action == "retime":
                if e.new_time_ms is None:
                    raise InputFileError(
                        edits.path,
                        e.file_line,
                        "new_time_ms",
                        "a retime needs its new two-way time in new_time_ms (milliseconds)",
                    )
                time_s[row] = float(e.new_time_ms) / 1e3
            else:
                raise InputFileError(
                    edits.path, e.file_line, "action", f"action {e.action!r} is not one of {', '.join(ACTIONS)}"
                )
    edited = excluded | (time_s != picks.time_s)
    return AppliedEdits(replace(picks, time_s=time_s), excluded, np.asarray(picks.time_s, float), edited, edits)


def write_pick_edits(path: Union[str, Path], edits: PickEdits) -> Path:
    """Write the edits file (atomically: a reader never sees half a file).

    Parameters
    ----------
    path : str or Path
        Target file (usually ``pick_edits.csv`` beside survey.toml).
    edits : PickEdits
        The edits, in order; none writes the header alone.

    Returns
    -------
    Path
        ``path``.
    """
    rows = list(edits)
    columns = {
        "line": np.array([e.line for e in rows], dtype=object),
        "shot": np.array([e.shot for e in rows], dtype=object),
        "receiver": np.array([e.receiver for e in rows], dtype=object),
        "reflector": np.array([e.reflector for e in rows], dtype=object),
        "action": np.array([e.action for e in rows], dtype=object),
        "new_time_ms": np.array([np.nan if e.new_time_ms is None else e.new_time_ms for e in rows], dtype=float),
        "reason": np.array([e.reason for e in rows], dtype=object),
        "time_stamp": np.array([e.time_stamp for e in rows], dtype=object),
    }
    return write_csv(path, columns)
