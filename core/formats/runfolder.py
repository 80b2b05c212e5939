"""A run's output folder, written as a whole: the old set or the new set, never a mix.

A run writes every output into a fresh hidden folder beside the output folder
(``.<name>.rockhead-new-<pid>-<random>``) and, once every file is complete and
flushed to disk, swaps that folder with the output folder in one atomic step
(``renameat2(RENAME_EXCHANGE)`` on Linux, ``renamex_np(RENAME_SWAP)`` on
macOS). The old set, now in the hidden folder, is then removed. Killed at any
moment (``kill -9``, power loss after the flush), the output folder holds either
the complete earlier run or the complete new one; outputs of an earlier run that
the new one does not make (figures of a removed line, a layer no longer
written) go with the old set instead of lingering as stale files.

Where the platform has no atomic exchange the swap is two renames (the old
folder aside, the new one in); a run killed between them leaves the output
folder missing for a moment, and the next run into it restores the complete set
(the new one if its manifest was written, else the old one) before anything
else.

Around that, :class:`RunFolder` does what a careful user would check by hand:

* every output path is resolved (symbolic links followed, subfolders included)
  before anything is written, and an output that equals or contains an input
  file is refused, naming the input and its ``survey.toml`` key;
* one run at a time per output folder: a lock file beside the folder,
  ``.<name>.rockhead-lock``, holds the PID of the run that owns it and an
  operating-system lock (``flock`` / ``msvcrt.locking``) that dies with the
  process, so the lock of a killed run is seen as stale and taken over, while a
  second run during a live one refuses at once with the first one's PID;
* leftovers of killed runs (hidden staging folders, temporary files) are
  removed once the lock is held;
* the output folder belongs to Rockhead: a folder holding files that no
  Rockhead run wrote (notes, a survey) is refused, never swapped away.

The manifest ``.rockhead-manifest.json`` inside the folder lists every file of
the run with its size and SHA-256; it is written last, so a staging folder with
a manifest is complete.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import errno
import hashlib
import json
import os
import re
import secrets
import shutil
import socket
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Dict, Iterable, List, Mapping, Optional, Tuple, Union

from ..errors import OutputError
from .atomic import fsync_path, register_staging, unregister_staging

__all__ = ["MANIFEST", "RunFolder", "read_manifest"]

PathLike = Union[str, "os.PathLike[str]"]

MANIFEST = ".rockhead-manifest.json"
_MANIFEST_FORMAT = "rockhead-run-folder-1"
_NEW, _OLD, _LOCK = "rockhead-new", "rockhead-old", "rockhead-lock"
# files other programs leave beside ours: SQLite journals (QGIS opening the
# GeoPackage), GDAL statistics, operating-system thumbnails and folder settings
_SIDECAR_SUFFIXES = ("-journal", "-wal", "-shm", ".aux.xml", ".ovr", ".qmd")
_SYSTEM_FILES = {".ds_store", "thumbs.db", "desktop.ini"}
# hidden temporary files of the atomic writers: .<stem>.<random>.tmp<suffix>
_TEMP_RE = re.compile(r"^\.(?:write-test\.|.+\.[A-Za-z0-9_]{6,}\.tmp)")
#: Names a Rockhead run wrote before run folders had a manifest (recognised as ours).
LEGACY_TOP = {
    "survey.gpkg",
    "reflector_elevation.tif",
    "reflector_depth.tif",
    "depth_sigma.tif",
    "probability_above_design.tif",
    "report.html",
    "contours_elevation.dxf",
    "contours_depth.dxf",
    "map_sheet.pdf",
    "reflector_surface.xml",
    "reflector_elevation.qml",
    "reflector_depth.qml",
    "depth_sigma.qml",
    "probability_above_design.qml",
    "elevation_sigma.tif",
    "elevation_sigma.qml",
}
_LEGACY_SECTION_RE = re.compile(r"^section_[A-Za-z0-9_-]+\.(pdf|svg|csv)$")
_LEGACY_DIRS = {"csv": (".csv",), "qc": (".png", ".svg")}


def _printable(text: str) -> str:
    """Text with control characters shown as escapes (safe to print on a terminal)."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in str(text))


def _display(path: Path) -> str:
    return _printable(str(path))


# --------------------------------------------------------------------------- atomic exchange


def _exchange_function():
    """The platform's atomic directory exchange as ``f(a, b) -> errno`` or None."""
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            fn = libc.renameat2
        except (OSError, AttributeError):
            return None
        fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
        fn.restype = ctypes.c_int
        at_fdcwd, rename_exchange = -100, 2

        def exchange(a: Path, b: Path) -> int:
            rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
            return 0 if rc == 0 else ctypes.get_errno()

        return exchange
    if sys.platform == "darwin":  # pragma: no cover - exercised on macOS only
        try:
            libc = ctypes.CDLL(ctypes.util.find_library("c"), use_errno=True)
            fn = libc.renamex_np
        except (OSError, AttributeError):
            return None
        fn.argtypes = [ctypes.c_char_p, ctypes.c_char_p, ctypes.c_uint]
        fn.restype = ctypes.c_int
        rename_swap = 0x2

        def exchange(a: Path, b: Path) -> int:
            rc = fn(os.fsencode(a), os.fsencode(b), rename_swap)
            return 0 if rc == 0 else ctypes.get_errno()

        return exchange
    return None  # pragma: no cover - Windows and others: two renames


_EXCHANGE = _exchange_function()


def _rmtree(path: Path) -> None:
    """Remove a folder tree (never following links out of it); silent when already gone."""
    if path.is_symlink() or path.is_file():
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
        return
    shutil.rmtree(path, ignore_errors=True)


# --------------------------------------------------------------------------- lock


class _Lock:
    """An exclusive lock file holding the owner's PID; the OS lock dies with the process."""

    def __init__(self, path: Path, folder: Path):
        self.path = path
        self.folder = folder
        self._fd: Optional[int] = None
        self.previous_owner = ""

    @staticmethod
    def _try_os_lock(fd: int) -> bool:
        if os.name == "posix":
            import fcntl

            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                if exc.errno in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                    return False
                raise
            return True
        import msvcrt  # pragma: no cover - Windows

        try:  # pragma: no cover
            msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)  # type: ignore[attr-defined]
        except OSError:  # pragma: no cover
            return False
        return True  # pragma: no cover

    def owner(self) -> str:
        """Who holds (or last held) the lock, from the lock file: 'PID 1234' or 'PID 1234 on host'."""
        try:
            info = json.loads(self.path.read_text(encoding="utf-8") or "{}")
        except (OSError, ValueError):
            info = {}
        pid = info.get("pid") if isinstance(info, dict) else None
        host = info.get("host") if isinstance(info, dict) else None
        if not isinstance(pid, int):
            return "unknown PID"
        if isinstance(host, str) and host and host != socket.gethostname():
            return f"PID {pid} on {_printable(host)}"
        return f"PID {pid}"

    def acquire(self) -> bool:
        """Take the lock; return True when a stale lock of a killed run was taken over."""
        stale = False
        for _ in range(20):  # the file can be removed by its owner between open and lock: retry
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                raise OutputError(
                    f"cannot create the lock file '{self.path}' beside the output folder: "
                    f"{exc.strerror or exc}; choose an output folder inside a folder you can write to"
                ) from exc
            existed = os.fstat(fd).st_size > 0
            if not self._try_os_lock(fd):
                os.close(fd)
                owner = self.owner()
                for _ in range(20):  # its holder writes its PID just after taking the lock
                    if owner != "unknown PID":
                        break
                    time.sleep(0.05)
                    owner = self.owner()
                raise OutputError(
                    f"output folder '{_display(self.folder)}' is being written by another Rockhead run "
                    f"({owner}); wait for it to finish or choose another output folder "
                    f"(lock file '{self.path.name}' beside it)"
                )
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            if not same:  # locked a file its owner had just removed; take the new one
                os.close(fd)
                continue
            if existed:  # a lock file nobody holds: its run was killed
                stale = True
                self.previous_owner = self.owner()
            record = json.dumps({"pid": os.getpid(), "host": socket.gethostname()}).encode()
            os.ftruncate(fd, 0)
            os.lseek(fd, 0, os.SEEK_SET)
            os.write(fd, record)
            self._fd = fd
            return stale
        raise OutputError(f"could not take the lock file '{self.path}'; try again")  # pragma: no cover

    def release(self) -> None:
        if self._fd is None:
            return
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()  # while still holding it, so nobody locks a removed file
        os.close(self._fd)
        self._fd = None


# --------------------------------------------------------------------------- paths


def _abs(path: PathLike) -> Path:
    return Path(os.path.abspath(os.path.expanduser(os.fspath(path))))


def _real(path: PathLike) -> Path:
    return Path(os.path.realpath(os.path.abspath(os.fspath(path))))


def _within(child: Path, parent: Path) -> bool:
    """True when ``child`` equals ``parent`` or lies inside it (both absolute, same spelling rules)."""
    c, p = os.path.normcase(str(child)), os.path.normcase(str(parent))
    return c == p or c.startswith(p.rstrip(os.sep) + os.sep)


def read_manifest(folder: PathLike) -> Optional[dict]:
    """The manifest of a run folder, or None when it has none (or an unreadable one)."""
    path = Path(os.fspath(folder)) / MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("format") != _MANIFEST_FORMAT:
        return None
    if not isinstance(data.get("files"), list):
        return None
    return data


def _is_disposable(name: str) -> bool:
    low = name.lower()
    return low in _SYSTEM_FILES or bool(_TEMP_RE.match(name))


def _foreign_entries(folder: Path) -> List[str]:
    """Entries of ``folder`` that no Rockhead run wrote (relative names, at most a few)."""
    manifest = read_manifest(folder)
    ours_files = set()
    if manifest is not None:
        ours_files = {str(f.get("path")) for f in manifest["files"] if isinstance(f, dict)}
    ours_dirs = {p.split("/")[0] for p in ours_files if "/" in p}
    foreign: List[str] = []

    def ours(rel: str) -> bool:
        if rel == MANIFEST:
            return True
        base = rel.rsplit("/", 1)[-1]
        if _is_disposable(base):
            return True
        stem = rel
        for suffix in _SIDECAR_SUFFIXES:
            if rel.lower().endswith(suffix):
                stem = rel[: -len(suffix)]
                break
        if stem in ours_files:
            return True
        if manifest is None:  # a folder written before manifests: the product names of then
            if "/" not in stem:
                return stem in LEGACY_TOP or bool(_LEGACY_SECTION_RE.match(stem))
            top, _, rest = stem.partition("/")
            return "/" not in rest and rest.lower().endswith(_LEGACY_DIRS.get(top, ("\0",)))
        return False

    try:
        entries = sorted(os.scandir(folder), key=lambda e: e.name)
    except OSError as exc:
        raise OutputError(f"cannot list the output folder '{folder}': {exc.strerror or exc}") from exc
    for entry in entries:
        if entry.is_symlink():
            foreign.append(entry.name + " (a link)")
        elif entry.is_dir():
            known = entry.name in ours_dirs or (manifest is None and entry.name in _LEGACY_DIRS)
            if not known:
                foreign.append(entry.name + "/")
                continue
            try:
                subs = sorted(os.scandir(entry.path), key=lambda e: e.name)
            except OSError:
                foreign.append(entry.name + "/")
                continue
            for sub in subs:
                rel = f"{entry.name}/{sub.name}"
                if sub.is_symlink() or not sub.is_file() or not ours(rel):
                    foreign.append(rel + (" (a link)" if sub.is_symlink() else ""))
        elif not ours(entry.name):
            foreign.append(entry.name)
        if len(foreign) >= 4:
            break
    return foreign


# --------------------------------------------------------------------------- the run folder


class RunFolder:
    """The output folder of one run: checked, locked, staged, then swapped in whole.

    Parameters
    ----------
    out_dir : str or path-like
        The output folder (created with its parents when missing). A symbolic
        link to a folder is followed: the folder it points to is replaced.
    inputs : mapping of str to path-like
        Every input file of the run by its role (``"survey.toml"``,
        ``"[files] stations"``, ...); ``None`` values are ignored. No output may
        equal or contain one of them.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> base = pathlib.Path(tempfile.mkdtemp())
    >>> with RunFolder(base / "out", {}) as run:
    ...     _ = (run.staging / "a.csv").write_text("1")
    ...     [p.name for p in run.commit(["a.csv"])]
    ['a.csv']
    >>> sorted(p.name for p in (base / "out").iterdir())
    ['.rockhead-manifest.json', 'a.csv']
    >>> sorted(p.name for p in base.iterdir())  # no staging folder, no lock left
    ['out']
    """

    def __init__(self, out_dir: PathLike, inputs: Mapping[str, Optional[PathLike]]):
        text = os.fspath(out_dir)
        if not str(text).strip():
            raise OutputError("the output folder is empty text; give a folder name (e.g. --out results)")
        if any(ord(c) < 32 for c in str(text)):
            raise OutputError(f"the output folder {str(text)!r} holds control characters; give a plain folder name")
        self.requested = _abs(text)
        self.inputs: Dict[str, Path] = {k: _abs(v) for k, v in inputs.items() if v is not None}
        # each input as spelled and resolved (links followed), resolved once: every output is checked against them
        self._input_spellings: Dict[str, Tuple[Path, ...]] = {k: (p, _real(p)) for k, p in self.inputs.items()}
        self.target = _real(self.requested)
        self.parent = self.target.parent
        self.staging: Optional[Path] = None
        self.stale_lock = False
        self.recovered: List[str] = []
        self._lock: Optional[_Lock] = None
        self._committed = False
        self._planned: Dict[str, str] = {}  # case-folded relative path -> relative path
        self._linked: set = set()  # files carried over as hard links to the last run's (already on disk)

    @property
    def previous_owner(self) -> str:
        """'PID n' of the killed run whose stale lock this run took over ('' when none)."""
        return self._lock.previous_owner if self._lock is not None else ""

    def lock_descriptors(self) -> List[int]:
        """The open file descriptors of the folder's lock (none when not open).

        A process forked while the folder is open inherits them, and with them
        the operating-system lock: such a child must close them, so that the
        lock dies with the run that took it (a killed run's child would
        otherwise hold the folder for a moment longer).
        """
        fd = self._lock._fd if self._lock is not None else None
        return [] if fd is None else [fd]

    # -- checks ------------------------------------------------------------

    def _inputs_within(self, *outputs: Path) -> List[Tuple[str, Path]]:
        """Every input (role, path) that one of ``outputs`` equals or contains.

        Inputs and outputs are compared both as spelled and resolved (links followed).
        """
        return self._inputs_within_paths({o for out in outputs for o in (out, _real(out))})

    def _inputs_within_paths(self, outs) -> List[Tuple[str, Path]]:
        """:meth:`_inputs_within` for outputs given with their resolved spellings already."""
        return [
            (role, path)
            for role, path in self.inputs.items()
            if any(_within(c, out) for c in self._input_spellings[role] for out in outs)
        ]

    def _resolved(self, relpath: str) -> Path:
        """``relpath`` in the output folder with every link resolved (as :func:`os.path.realpath`).

        The folder itself was resolved when this run folder was made; only the
        (at most two) parts of ``relpath`` are looked at, and a link among them,
        or an unusual part, is resolved in full.
        """
        parts = str(relpath).replace(os.sep, "/").split("/")
        path = self.target
        for part in parts:
            path = path / part
            if part in ("", ".", "..") or os.path.islink(path):
                return _real(self.target / relpath)
        return path

    def _input_within(self, *outputs: Path) -> Optional[Tuple[str, Path]]:
        hits = self._inputs_within(*outputs)
        return hits[0] if hits else None

    def _refuse_input(self, output: Path, hit: Tuple[str, Path], how: str) -> OutputError:
        role, path = hit
        return OutputError(
            f"output '{_display(output)}' {how} the input file '{_display(path)}' ({role}); nothing was "
            "written: choose an output folder that holds none of the inputs"
        )

    def check_path(self, relpath: str) -> None:
        """Refuse an output (relative to the folder) that equals or contains an input file.

        The output is checked as spelled under the folder and resolved through
        any link the folder holds now, so an input reached through a linked
        subfolder of an earlier run is seen.
        """
        spelled = self.requested / relpath
        hits = self._inputs_within_paths({spelled, self.target / relpath, self._resolved(relpath)})
        hit = hits[0] if hits else None
        if hit is not None:
            same = any(_real(hit[1]) == _real(o) for o in (spelled, self.target / relpath))
            raise self._refuse_input(spelled, hit, "would replace" if same else "would replace a folder holding")

    def _check_folder(self) -> None:
        if self.target == self.parent:
            raise OutputError(f"output folder '{_display(self.target)}' is a file-system root; give a folder in it")
        hits = self._inputs_within(self.requested, self.target)
        if hits:
            # name the clash a user sees first: an input named like one of the outputs
            for role, path in hits:
                for folder in (self.requested, self.target):
                    if _within(path, folder) and path != folder:
                        rel = path.relative_to(folder).as_posix()
                        if rel in LEGACY_TOP or rel.split("/")[0] in _LEGACY_DIRS:
                            raise self._refuse_input(self.requested / rel, (role, path), "would replace")
            role, path = hits[0]
            raise OutputError(
                f"output folder '{_display(self.requested)}' is or holds the input file '{_display(path)}' "
                f"({role}); a run replaces its output folder as a whole: choose an output folder that holds "
                "none of the inputs (e.g. a new folder 'results' beside the survey)"
            )
        if self.target.exists() and not self.target.is_dir():
            raise OutputError(f"output folder '{_display(self.requested)}' is an existing file; give a folder name")
        if self.target.is_dir():
            # links inside an earlier run folder: an input reached through one would be replaced
            for link in self._links_inside(self.target):
                hit = self._input_within(link)
                if hit is not None:
                    raise self._refuse_input(
                        self.requested / link.relative_to(self.target), hit, "is a link to (or to a folder holding)"
                    )
            if os.path.ismount(self.target):
                raise OutputError(
                    f"output folder '{_display(self.requested)}' is a mount point, which cannot be replaced as a "
                    "whole; give a folder inside it"
                )

    @staticmethod
    def _links_inside(folder: Path) -> List[Path]:
        links = []
        with contextlib.suppress(OSError):
            for entry in os.scandir(folder):
                if entry.is_symlink():
                    links.append(Path(entry.path))
                elif entry.is_dir(follow_symlinks=False) and entry.name in ("csv", "qc"):
                    with contextlib.suppress(OSError):
                        links += [Path(e.path) for e in os.scandir(entry.path) if e.is_symlink()]
        return links

    # -- lifecycle ----------------------------------------------------------

    def open(self) -> RunFolder:
        """Check the folder, take its lock, tidy leftovers of killed runs and make the staging folder."""
        if self._lock is not None:  # already open (``with`` on an opened folder)
            return self
        self._check_folder()
        try:
            self.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(
                f"cannot create the output folder '{self.requested}': {exc.strerror or exc}; "
                "choose a folder you can write to"
            ) from exc
        self._lock = _Lock(self.parent / f".{self.target.name}.{_LOCK}", self.requested)
        self.stale_lock = self._lock.acquire()
        try:
            self._recover()
            if self.target.is_dir():
                foreign = _foreign_entries(self.target)
                if foreign:
                    raise OutputError(
                        f"output folder '{self.requested}' holds files no Rockhead run wrote "
                        f"({', '.join(foreign[:3])}{', ...' if len(foreign) > 3 else ''}); a run replaces its "
                        "output folder as a whole: choose a new or empty folder, or move those files"
                    )
            elif self.target.exists():
                raise OutputError(f"output folder '{self.requested}' is an existing file; give a folder name")
            self.staging = self._make_staging()
        except BaseException:
            self._lock.release()
            raise
        return self

    def _siblings(self) -> List[Path]:
        prefix = f".{self.target.name}."
        found = []
        with contextlib.suppress(OSError):
            for entry in os.scandir(self.parent):
                if entry.name.startswith(prefix) and (f".{_NEW}-" in entry.name or f".{_OLD}-" in entry.name):
                    found.append(Path(entry.path))
        return sorted(found)

    def _recover(self) -> None:
        """Restore a folder left missing by a run killed mid-swap, then remove every leftover."""
        leftovers = self._siblings()
        if not self.target.exists():
            complete = [p for p in leftovers if f".{_NEW}-" in p.name and read_manifest(p) is not None]
            old = [p for p in leftovers if f".{_OLD}-" in p.name]
            chosen = complete[-1] if complete else (old[-1] if old else None)
            if chosen is not None:
                os.rename(chosen, self.target)
                fsync_path(self.parent, directory=True)
                self.recovered.append(f"restored '{self.requested}' from a run killed while swapping")
                leftovers = [p for p in leftovers if p != chosen]
        for p in leftovers:
            _rmtree(p)
        if leftovers:
            self.recovered.append(f"removed {len(leftovers)} leftover folder(s) of killed runs")
        if self.target.is_dir():  # temporary files of killed writers inside the folder itself
            with contextlib.suppress(OSError):
                for root, _dirs, files in os.walk(self.target):
                    for name in files:
                        if _TEMP_RE.match(name):
                            with contextlib.suppress(OSError):
                                os.unlink(os.path.join(root, name))

    def _make_staging(self) -> Path:
        for _ in range(10):
            path = self.parent / f".{self.target.name}.{_NEW}-{os.getpid()}-{secrets.token_hex(4)}"
            try:
                path.mkdir()
            except FileExistsError:  # pragma: no cover - 32 random bits
                continue
            except OSError as exc:
                raise OutputError(
                    f"cannot create a folder beside the output folder '{self.requested}' "
                    f"(in '{self.parent}'): {exc.strerror or exc}; the run writes its new outputs there and "
                    "swaps them in whole: choose an output folder inside a folder you can write to"
                ) from exc
            mode = (self.target.stat().st_mode & 0o7777) if self.target.is_dir() else (0o777 & ~_umask())
            with contextlib.suppress(OSError):
                os.chmod(path, mode)
            register_staging(path)  # its files are flushed once, all together, by commit
            return path
        raise OutputError("could not create a staging folder; try again")  # pragma: no cover

    def path(self, relpath: str) -> Path:
        """Plan one output and return the path to write it at in the staging folder.

        ``relpath`` is relative to the output folder, ``/``-separated, one
        subfolder at most. It is checked against every input before anything
        is written, and against the outputs planned so far, case-insensitively
        (``Rock.png`` and ``rock.png`` are one file on Windows and macOS).
        """
        if self.staging is None or self._committed:
            raise OutputError("this run folder is not open")
        rel = str(relpath).replace(os.sep, "/")
        parts = rel.split("/")
        if not rel or len(parts) > 2 or any(p in ("", ".", "..") for p in parts) or os.path.isabs(rel):
            raise OutputError(f"output name {_printable(rel)!r} is not a plain file name in the output folder")
        key = rel.casefold()
        if key in self._planned:
            raise OutputError(
                f"outputs '{_printable(self._planned[key])}' and '{_printable(rel)}' would be the same file "
                "(names differing only in case are one file on Windows and macOS); give each output its own name"
            )
        for rel_part in (parts[0], rel) if len(parts) == 2 else (rel,):
            self.check_path(rel_part)
        self._planned[key] = rel
        out = self.staging / rel
        out.parent.mkdir(exist_ok=True)
        return out

    def stage(self, target: PathLike) -> Path:
        """:meth:`path` for a target given as a path in the output folder (as :class:`~.atomic.OutputSet` takes)."""
        target = _abs(target)
        for base in (self.requested, self.target):
            if _within(target, base) and target != base:
                return self.path(target.relative_to(base).as_posix())
        raise OutputError(f"output '{_display(target)}' is not in the output folder '{_display(self.requested)}'")

    def carry_over(self) -> List[str]:
        """Keep the files of the folder's last run that this run does not write (a partial update).

        Every file the current manifest lists (or, for a folder of an earlier
        version, every file recognised as a product) that is not planned is
        hard-linked into the staging folder (copied where the file system has
        no hard links), so that the swap replaces only what this run rewrote.
        Returns the relative paths carried over.
        """
        if self.staging is None or self._committed:
            raise OutputError("this run folder is not open")
        if not self.target.is_dir():
            return []
        manifest = read_manifest(self.target)
        if manifest is not None:
            rels = [str(f.get("path")) for f in manifest["files"] if isinstance(f, dict)]
        else:
            rels = [
                p.relative_to(self.target).as_posix()
                for p in sorted(self.target.rglob("*"))
                if p.is_file() and not p.is_symlink() and not _is_disposable(p.name)
            ]
        kept = []
        for rel in rels:
            if rel.casefold() in self._planned or rel == MANIFEST:
                continue
            src = self.target / rel
            if not src.is_file() or src.is_symlink():
                continue
            self.check_path(rel)
            dst = self.staging / rel
            dst.parent.mkdir(exist_ok=True)
            try:
                os.link(src, dst)
                self._linked.add(rel)
            except OSError:
                shutil.copy2(src, dst)
            self._planned[rel.casefold()] = rel
            kept.append(rel)
        return kept

    @property
    def planned(self) -> List[str]:
        """Relative paths planned so far, in order."""
        return list(self._planned.values())

    def commit(self, relpaths: Optional[Iterable[str]] = None) -> List[Path]:
        """Check, flush and swap the staged files in as the folder's new content.

        ``relpaths`` are the files written into :attr:`staging` (relative,
        ``/``-separated); by default every path given by :meth:`path`. Returns
        their final paths.
        """
        if self.staging is None or self._committed:
            raise OutputError("this run folder is not open")
        rels = [str(r).replace(os.sep, "/") for r in (self.planned if relpaths is None else relpaths)]
        for rel in sorted(set(rels) | {r.rsplit("/", 1)[0] for r in rels if "/" in r}):
            self.check_path(rel)
        for rel in rels:
            if not (self.staging / rel).is_file():
                raise OutputError(f"the output '{rel}' was never written")
        # every written file flushed to disk, on a few threads so that the file system can group the flushes
        # (a file carried over as a hard link is the last run's, flushed by its commit); hashed meanwhile
        staging = self.staging
        jobs = [(staging / rel, rel, rel not in self._linked) for rel in rels]
        if len(jobs) > 1:
            with ThreadPoolExecutor(max_workers=min(8, len(jobs))) as pool:
                records = list(pool.map(lambda job: _flushed_record(*job), jobs))
        else:
            records = [_flushed_record(*job) for job in jobs]
        manifest = {"format": _MANIFEST_FORMAT, "files": records}
        tmp = self.staging / (MANIFEST + ".part")
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(manifest, fh, indent=1)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.staging / MANIFEST)
        for folder in sorted({(self.staging / r).parent for r in rels} | {self.staging}, reverse=True):
            fsync_path(folder, directory=True)
        self._swap()
        self._committed = True
        return [self.requested / r for r in rels]

    def _swap(self) -> None:
        staged = self.staging
        assert staged is not None
        old = None
        try:
            if not self.target.exists():
                os.rename(staged, self.target)
            else:
                rc = _EXCHANGE(staged, self.target) if _EXCHANGE is not None else errno.ENOSYS
                if rc == 0:
                    old = staged  # the exchange left the previous set where the new one was
                elif rc in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EOPNOTSUPP):
                    old = self.parent / f".{self.target.name}.{_OLD}-{os.getpid()}-{secrets.token_hex(4)}"
                    os.rename(self.target, old)
                    os.rename(staged, self.target)
                else:
                    raise OSError(rc, os.strerror(rc), str(self.target))
        except OSError as exc:
            raise OutputError(
                f"cannot put the new outputs in place of '{self.requested}': {exc.strerror or exc}; is a file "
                "in it open in another program? Earlier outputs there are unchanged"
            ) from exc
        unregister_staging(staged)
        self.staging = None
        fsync_path(self.parent, directory=True)
        if old is not None:
            _rmtree(old)

    def close(self) -> None:
        """Remove the staging folder (if not swapped in) and release the lock."""
        if self.staging is not None:
            unregister_staging(self.staging)
            _rmtree(self.staging)
            self.staging = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def __enter__(self) -> RunFolder:
        return self.open()

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close()


def _flushed_record(path: Path, rel: str, flush: bool) -> dict:
    """The manifest record of one staged file (size, SHA-256), after flushing it to disk when ``flush``."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(1 << 20)
            if not block:
                break
            digest.update(block)
        if flush:
            os.fsync(fh.fileno())
        size = os.fstat(fh.fileno()).st_size
    return {"path": rel, "bytes": size, "sha256": digest.hexdigest()}


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask
