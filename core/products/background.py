"""Files drawn in a child process while the parent writes the others: the run's printed sheets.

The A3 map sheet and the section sheets take a second or two of processor time
and depend on nothing the rest of the writing produces. On a machine with a
free core they are drawn in a child process forked once the run's results are
computed, while the parent writes the GeoPackage, the rasters, the QC figures
and the report; the parent waits for the child before the output folder is
swapped in. The child inherits the results (nothing is pickled), writes its
files into the staging folder the parent planned, and leaves with
``os._exit`` (no clean-up of the parent's state, such as the output folder's
lock, runs in it).

Anything unusual falls back to drawing in the parent, so the files and any
error are exactly those of a run without the child: no ``fork`` (Windows), a
single usable core, a process that runs Qt (QGIS: forking a process with a GUI
event loop and its threads is not safe), or a child that fails.
"""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path
from typing import Callable, List, Optional, Sequence, Tuple

__all__ = ["BackgroundFiles", "fork_is_safe"]

Job = Tuple[Path, Callable[[], bytes]]


def fork_is_safe() -> bool:
    """True where a child process can draw files: POSIX ``fork``, at least 2 usable cores, and no Qt in the process.

    ``ROCKHEAD_NO_FORK=1`` in the environment turns the child off.
    """
    if not hasattr(os, "fork") or os.environ.get("ROCKHEAD_NO_FORK"):
        return False
    if any(name in sys.modules for name in ("qgis.core", "PyQt5.QtCore", "PyQt6.QtCore", "PySide6.QtCore")):
        return False
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return cores >= 2


def _die_with(parent: int) -> None:
    """Have the kernel kill this child when its parent dies (Linux), so it never writes for a killed run."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL))  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):  # pragma: no cover - not Linux: the parent is checked before each write
        pass
    if os.getppid() != parent:  # the parent died before the request
        os._exit(1)


class BackgroundFiles:
    """Write files, each the bytes a function returns, in a forked child (or here, see the module's notes).

    Parameters
    ----------
    jobs : sequence of (Path, callable)
        Where to write, and the function that makes the bytes.
    parallel : bool, optional
        Use a child process; default :func:`fork_is_safe`.
    close_in_child : sequence of int
        File descriptors the child closes first (an inherited lock must die
        with the process that took it).

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> with BackgroundFiles([(folder / "a.txt", lambda: b"drawn")]) as files:
    ...     pass  # the parent's own work goes here
    >>> (folder / "a.txt").read_bytes()
    b'drawn'
    """

    def __init__(self, jobs: Sequence[Job], parallel: Optional[bool] = None, close_in_child: Sequence[int] = ()):
        self.jobs: List[Job] = list(jobs)
        self.close_in_child = tuple(close_in_child)
        self.pid: Optional[int] = None
        self.in_child = False
        self._read_fd: Optional[int] = None
        if self.jobs and (fork_is_safe() if parallel is None else parallel):
            self._start()

    def _start(self) -> None:
        read_fd, write_fd = os.pipe()
        sys.stdout.flush()
        sys.stderr.flush()
        parent = os.getpid()
        pid = os.fork()
        if pid == 0:  # the child: draw, write, leave without running any of the parent's clean-up
            code = 1
            try:
                os.close(read_fd)
                for fd in self.close_in_child:
                    os.close(fd)
                _die_with(parent)
                for path, make in self.jobs:
                    data = make()
                    if os.getppid() != parent:  # the run was killed: its staging folder is not ours to write
                        break
                    Path(path).write_bytes(data)
                else:
                    code = 0
            except BaseException as exc:  # reported to the parent, which draws again and raises itself
                try:
                    os.write(write_fd, f"{type(exc).__name__}: {exc}".encode("utf-8", "replace")[:2000])
                except OSError:
                    pass
            finally:
                os._exit(code)
        os.close(write_fd)
        self.pid, self._read_fd, self.in_child = pid, read_fd, True

    def finish(self) -> None:
        """Wait for the child; draw here what it did not write (all of it without a child, or after its failure)."""
        if self.pid is not None:
            _, status = os.waitpid(self.pid, 0)
            self.pid = None
            failure = self._read()
            if status == 0 and not failure and all(Path(p).is_file() for p, _ in self.jobs):
                return
        for path, make in self.jobs:
            Path(path).write_bytes(make())

    def cancel(self) -> None:
        """Stop the child, if any, and wait for it."""
        if self.pid is not None:
            try:
                os.kill(self.pid, signal.SIGKILL)
            except ProcessLookupError:  # pragma: no cover - already gone
                pass
            os.waitpid(self.pid, 0)
            self.pid = None
        self._read()

    def _read(self) -> str:
        if self._read_fd is None:
            return ""
        chunks = []
        while True:
            data = os.read(self._read_fd, 4096)
            if not data:
                break
            chunks.append(data)
        os.close(self._read_fd)
        self._read_fd = None
        return b"".join(chunks).decode("utf-8", "replace")

    def __enter__(self) -> BackgroundFiles:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.finish()
        else:
            self.cancel()
