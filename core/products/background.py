"""Child processes that write a run's files while the run computes (:class:`EarlyWorkers`).

A run's drawings and map products need a few seconds of imports and
processor time that depend on nothing but the run's result. On a machine
with a free core they are done by children forked before the computation,
which import what they need meanwhile and are handed the result after it;
the parent waits for them before the output folder is swapped in. Children
leave with ``os._exit`` (no clean-up of the parent's state, such as the
output folder's lock, runs in them) and die with the parent.

Anything unusual leaves the work to the parent, so the files and any error
are exactly those of a run without children: no ``fork`` (Windows), a single
usable core, a process that runs Qt (QGIS: forking a process with a GUI
event loop and its threads is not safe), or a child that fails.
"""

from __future__ import annotations

import os
import signal
import sys
from typing import IO, Callable, List, Optional, Sequence, Tuple

__all__ = ["EarlyWorkers", "fork_is_safe"]


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


#: A group of workers: (warm, works). ``warm()`` runs once while the parent computes (imports,
#: nothing the result decides); then each ``work(payload)`` runs in a process of its own (forked
#: from the warmed-up one), gets what the parent hands over and returns the relative paths of the
#: files it wrote, in order.
Work = Callable[[object], List[str]]
Group = Tuple[Callable[[], None], Sequence[Work]]


class EarlyWorkers:
    """Child processes forked before the computation, warmed up while it runs, handed its result after.

    A run's drawings (QC figures, the report, the printed sheets) need
    matplotlib and its PDF backend, a second or two of imports; forked before
    the computation, a child imports them on the second core while the parent
    computes, then forks one process per further work of its group (which
    share the imports: no second import), and they draw in parallel with the
    parent. The parent hands the result over pickled (through an unlinked
    temporary file, so that a child still warming up never blocks it); each
    work writes its files into the staging folder and sends back their
    relative paths (and the warnings it met) through a pipe of its own.

    Anything unusual leaves the work to the parent, with the files and errors
    of a run without children: no child where :func:`fork_is_safe` says no, a
    payload that cannot be pickled (:meth:`hand_over` returns False), or a
    work that fails (:meth:`collect` returns None). Children die with the
    parent (Linux) and are killed on :meth:`cancel` or an exception in the
    ``with`` block.

    Parameters
    ----------
    groups : sequence of (warm, works)
        One child per group, warmed up once; its works are numbered in order
        over all groups (the index of :meth:`collect`).
    parallel : bool, optional
        Fork the children; default :func:`fork_is_safe`.
    close_in_child : sequence of int
        File descriptors every child closes first (an inherited lock).
    """

    def __init__(self, groups: Sequence[Group], parallel: Optional[bool] = None, close_in_child: Sequence[int] = ()):
        self.groups = [(warm, list(works)) for warm, works in groups]
        self._group_of = [g for g, (_, works) in enumerate(self.groups) for _ in works]
        self.pids: List[Optional[int]] = []  # one child per group (its other works are its own children)
        self._go: List[Optional[int]] = []  # parent's write ends, per work: "the payload is there, n bytes"
        self._back: List[Optional[int]] = []  # parent's read ends, per work: the answer
        self._payload: Optional[IO[bytes]] = None
        self.handed = False
        if self._group_of and (fork_is_safe() if parallel is None else parallel):
            try:
                self._start(tuple(close_in_child))
            except OSError:  # no temporary file, pipe or process to be had: the run does the work itself
                self.cancel()

    @property
    def running(self) -> bool:
        """True while there are children waiting for, or working on, a payload."""
        return any(pid is not None for pid in self.pids)

    def _start(self, close_in_child: Tuple[int, ...]) -> None:
        import tempfile

        payload = self._payload = tempfile.TemporaryFile()
        pipes = [(os.pipe(), os.pipe()) for _ in self._group_of]  # per work: (go_r, go_w), (back_r, back_w)
        ends = [(go_r, back_w) for (go_r, _), (_, back_w) in pipes]
        sys.stdout.flush()
        sys.stderr.flush()
        parent = os.getpid()
        self._go = [go_w for (_, go_w), _ in pipes]
        self._back = [back_r for _, (back_r, _) in pipes]
        try:
            for g, (warm, works) in enumerate(self.groups):
                mine = [k for k, owner in enumerate(self._group_of) if owner == g]
                pid = os.fork()
                if pid == 0:  # the group's child: never returns
                    keep = {fd for k in mine for fd in ends[k]}
                    _close([fd for pair in pipes for p in pair for fd in p if fd not in keep] + list(close_in_child))
                    _group(parent, warm, [(works[i], ends[k]) for i, k in enumerate(mine)], payload.fileno())
                self.pids.append(pid)
        finally:
            _close([fd for end in ends for fd in end])  # the children's ends

    def hand_over(self, payload) -> bool:
        """Give ``payload`` to every work; False (children sent away) without children or a picklable payload."""
        if not self.running or self._payload is None:
            return False
        import pickle

        try:
            data = pickle.dumps(payload, protocol=pickle.HIGHEST_PROTOCOL)
        except Exception:  # an unpicklable part: the parent does the work itself
            self.cancel()
            return False
        try:
            self._payload.write(data)
            self._payload.flush()
        except OSError:  # no room for it in the temporary folder: the parent does the work itself
            self.cancel()
            return False
        size = len(data).to_bytes(8, "little")
        for i, fd in enumerate(self._go):
            if fd is not None:
                try:
                    os.write(fd, size)
                except OSError:  # the child is gone: collect() says so
                    pass
                os.close(fd)
                self._go[i] = None
        self.handed = True
        return True

    def collect(self, index: int) -> Optional[List[str]]:
        """Wait for work ``index``; the relative paths it wrote, or None when it did not finish.

        The warnings the work met are issued again here.
        """
        back = self._back[index] if index < len(self._back) else None
        if back is None or not self.handed:
            return None
        answer = _read_all(back)
        self._back[index] = None
        group = self._group_of[index]
        pid = self.pids[group]
        if pid is not None and all(self._back[k] is None for k, g in enumerate(self._group_of) if g == group):
            os.waitpid(pid, 0)  # the group's child, once every work of it has answered (it waits for its own)
            self.pids[group] = None
        if not answer:
            return None
        import pickle

        try:
            rels, caught = pickle.loads(answer)
        except Exception:  # cut short: the work did not finish
            return None
        import warnings

        for category, message in caught:
            warnings.warn(message, category, stacklevel=2)
        return list(rels)

    def cancel(self) -> None:
        """Stop every child still running (its own children die with it) and wait for it."""
        for i, pid in enumerate(self.pids):
            if pid is None:
                continue
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:  # pragma: no cover - already gone
                pass
            os.waitpid(pid, 0)
            self.pids[i] = None
        for fds in (self._go, self._back):
            for i, fd in enumerate(fds):
                if fd is not None:
                    os.close(fd)
                    fds[i] = None
        if self._payload is not None:
            self._payload.close()
            self._payload = None

    def __enter__(self) -> EarlyWorkers:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.cancel()


def _close(fds) -> None:
    for fd in fds:
        try:
            os.close(fd)
        except OSError:
            pass


def _read_all(fd: int) -> bytes:
    chunks = []
    while True:
        data = os.read(fd, 1 << 16)
        if not data:
            break
        chunks.append(data)
    os.close(fd)
    return b"".join(chunks)


def _group(parent: int, warm, works, payload_fd: int) -> None:
    """A group's child: warm up, fork a process for each further work, do the first, wait for the others, leave."""
    code = 1
    try:
        _die_with(parent)
        try:
            warm()
        except Exception:  # the work meets the same problem and reports it
            pass
        me = os.getpid()
        helpers = []
        for k, (work, fds) in enumerate(works[1:], start=1):
            pid = os.fork()
            if pid == 0:  # a further work of the group, sharing the warmed-up imports
                _close([fd for j, (_, other) in enumerate(works) if j != k for fd in other])
                _serve(me, work, payload_fd, *fds)
            helpers.append(pid)
        _close([fd for _, other in works[1:] for fd in other])
        work, (go_fd, back_fd) = works[0]
        code = _answer(parent, work, payload_fd, go_fd, back_fd)
        for pid in helpers:
            os.waitpid(pid, 0)
    except BaseException:
        code = 1
    finally:
        os._exit(code)


def _serve(parent: int, work, payload_fd: int, go_fd: int, back_fd: int) -> None:
    """A further work's process: answer and leave by ``os._exit``."""
    code = 1
    try:
        _die_with(parent)
        code = _answer(parent, work, payload_fd, go_fd, back_fd)
    except BaseException:
        code = 1
    finally:
        os._exit(code)


def _answer(parent: int, work, payload_fd: int, go_fd: int, back_fd: int) -> int:
    """Wait for the payload, work on it, send the answer; 0 when answered, 1 when the work failed (no answer)."""
    try:
        size_bytes = b""
        while len(size_bytes) < 8:
            data = os.read(go_fd, 8 - len(size_bytes))
            if not data:  # no payload: the parent does the work itself, or the run ended
                return 0
            size_bytes += data
        size = int.from_bytes(size_bytes, "little")
        chunks, offset = [], 0
        while offset < size:
            data = os.pread(payload_fd, size - offset, offset)
            if not data:
                raise EOFError("the payload is shorter than announced")
            chunks.append(data)
            offset += len(data)
        import pickle
        import warnings

        payload = pickle.loads(b"".join(chunks))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            rels = work(payload)
        if os.getppid() != parent:  # the run was killed: nobody to answer
            return 1
        met = [(w.category, str(w.message)) for w in caught]
        try:
            answer = pickle.dumps(([str(r) for r in rels], met))
        except Exception:  # a warning class that does not pickle: said as a UserWarning
            answer = pickle.dumps(([str(r) for r in rels], [(UserWarning, m) for _, m in met]))
        view = memoryview(answer)
        while view:
            view = view[os.write(back_fd, view) :]
        return 0
    except Exception:  # the parent sees no answer and does the work itself, meeting the error there
        return 1
    finally:
        _close([go_fd, back_fd])
