"""The last whole run of this QGIS session, kept for the QC panel so that it does not compute the survey again.

The whole-survey algorithm computes the survey (seconds); the QC panel that
opens or reloads after it needs that same computation. The algorithm run
with the survey's own surface method (the panel's) keeps its result here
with a stamp of its inputs (path, modification time and size of
survey.toml, of every file it names and of its pick edits file, present or
not); the panel takes the result while the stamp is unchanged,
and computes the survey itself otherwise. A file modified after the run
started is never trusted: the result is not kept at all.

No QGIS import: the stamp and the hand-over are plain Python.
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path
from typing import Optional

__all__ = ["forget_runs", "input_stamp", "keep_run", "kept_run", "run_started_ns"]

_LOCK = threading.Lock()
_KEPT: dict = {}  # at most one entry: abspath(survey.toml) -> (stamp, RunResult)


def run_started_ns() -> int:
    """The clock to pass to :func:`keep_run`, read just before a run reads its inputs (ns since the epoch)."""
    return time.time_ns()


def input_stamp(survey) -> tuple:
    """``(path, mtime_ns, size)`` of survey.toml, every input it names and the pick edits file beside it.

    A file that does not exist (the pick edits file before the first edit)
    is stamped ``(path, None, None)``, so its appearance changes the stamp.
    """
    from ..core.survey.edits import EDITS_FILE_NAME

    paths = {Path(survey.path).resolve(), (Path(survey.path).parent / EDITS_FILE_NAME).resolve()}
    paths.update(Path(p).resolve() for p in survey.files.values() if p is not None)
    out = []
    for p in sorted(str(p) for p in paths):
        try:
            st = os.stat(p)
            out.append((p, st.st_mtime_ns, st.st_size))
        except OSError:
            out.append((p, None, None))
    return tuple(out)


def _key(survey_path) -> str:
    return str(Path(survey_path).resolve())


def keep_run(result, started_ns: int) -> bool:
    """Keep a whole run's result for the panel; False (and nothing kept) when an input changed after ``started_ns``.

    Parameters
    ----------
    result : RunResult
        The run's computation.
    started_ns : int
        :func:`run_started_ns` read before the run.
    """
    stamp = input_stamp(result.survey)
    key = _key(result.survey.path)
    with _LOCK:
        _KEPT.clear()
        if any(mtime is not None and mtime >= started_ns for _, mtime, _ in stamp):
            return False
        _KEPT[key] = (stamp, result)
    return True


def kept_run(survey_path) -> Optional[object]:
    """The kept result of ``survey_path`` when none of its inputs changed since, else None."""
    with _LOCK:
        entry = _KEPT.get(_key(survey_path))
    if entry is None:
        return None
    stamp, result = entry
    return result if input_stamp(result.survey) == stamp else None


def forget_runs() -> None:
    """Drop the kept result (the plugin's unload)."""
    with _LOCK:
        _KEPT.clear()
