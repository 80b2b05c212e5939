"""Atomic file output: a file is either the old one or the complete new one.

Every writer of the project writes into a hidden temporary file in the target's
own folder and, only once the file is complete and flushed to disk, renames it
onto the target with :func:`os.replace` (an atomic rename on POSIX and Windows
within one file system). A failure, an exception or a cancellation on the way
removes the temporary file and leaves an earlier target byte-identical.

:class:`OutputSet` stages several outputs of one run and renames them all at the
end, so a run that fails half way leaves every earlier output untouched and no
partial file behind. :func:`check_output_dir` checks before a run that the
output folder can be written and that no output would overwrite an input.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import threading
from pathlib import Path
from typing import Iterable, Iterator, List, Tuple, Union

from ..errors import OutputError

__all__ = [
    "OutputSet",
    "atomic_path",
    "check_not_input",
    "check_output_dir",
    "flushed_later",
    "fsync_path",
    "register_staging",
    "unregister_staging",
]

PathLike = Union[str, "os.PathLike[str]"]

# sqlite (GeoPackage) may leave these beside a database file that failed mid-write.
_SIDECARS = ("-journal", "-wal", "-shm")


# Folders whose every file is flushed to disk by their owner before they become visible (the staging
# folders of open run folders, :class:`~.runfolder.RunFolder`): a writer inside one leaves the flush to it
_staging_roots: set = set()
_staging_lock = threading.Lock()


def register_staging(folder: Path) -> None:
    """Say that every file written inside ``folder`` is flushed by its owner before the folder is used.

    The atomic writers of this module then skip their own flush (``fsync``)
    for files inside it: the owner (:meth:`~.runfolder.RunFolder.commit`)
    flushes each file once, all together, before the folder is swapped in.
    """
    with _staging_lock:
        _staging_roots.add(os.path.abspath(os.fspath(folder)))


def unregister_staging(folder: Path) -> None:
    """Undo :func:`register_staging` (files inside ``folder`` are flushed by their writers again)."""
    with _staging_lock:
        _staging_roots.discard(os.path.abspath(os.fspath(folder)))


def flushed_later(path: PathLike) -> bool:
    """True when ``path`` lies inside a folder given to :func:`register_staging` (its owner flushes it)."""
    if not _staging_roots:
        return False
    text = os.path.abspath(os.fspath(path))
    with _staging_lock:
        return any(text.startswith(root + os.sep) for root in _staging_roots)


def _default_mode() -> int:
    """Permission bits a new file would get from ``open()`` under the current umask."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def _new_temp(target: Path) -> Path:
    """Create an empty hidden temporary file beside ``target`` with the same suffix."""
    folder = target.parent
    try:
        fd, name = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=f".tmp{target.suffix}", dir=folder)
    except OSError as exc:
        raise OutputError(
            f"cannot create a file in the output folder '{folder}': {exc.strerror or exc}; "
            "choose a folder you can write to"
        ) from exc
    os.close(fd)
    tmp = Path(name)
    try:
        # mkstemp makes the file private (0600); give it the mode a normal file would
        # get (or that of the file it replaces) so that the output is not surprising.
        mode = (target.stat().st_mode & 0o7777) if target.exists() else _default_mode()
        os.chmod(tmp, mode)
    except OSError:  # pragma: no cover - permissions are a nicety, not a requirement
        pass
    return tmp


def _remove_quietly(path: Path) -> None:
    for p in [path, *(Path(str(path) + s) for s in _SIDECARS)]:
        with contextlib.suppress(FileNotFoundError):
            p.unlink()


def _fsync_file(path: Path) -> None:
    with open(path, "rb+") as fh:
        fh.flush()
        os.fsync(fh.fileno())


def fsync_path(path: Path, directory: bool = False) -> None:
    """Flush a file, or a folder's entries (a rename into it), to disk where the platform allows it.

    Parameters
    ----------
    path : Path
        The file or folder.
    directory : bool
        ``path`` is a folder: nothing is done on Windows, which cannot open one
        (its renames are durable enough).
    """
    if directory and os.name != "posix":
        return
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # pragma: no cover
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover - some file systems refuse fsync on a folder
        pass
    finally:
        os.close(fd)


def _replace(tmp: Path, target: Path) -> None:
    try:
        os.replace(tmp, target)
    except OSError as exc:
        raise OutputError(
            f"cannot replace '{target}': {exc.strerror or exc}; is it open in another program "
            "(close it there) or read-only?"
        ) from exc


@contextlib.contextmanager
def atomic_path(target: PathLike) -> Iterator[Path]:
    """Yield a temporary path to write ``target`` through, and commit it on success.

    The temporary file is created (empty) in the same folder as ``target``, with a
    hidden name (leading dot) and the same suffix, so that format-sniffing
    libraries treat it like the target. When the ``with`` block ends normally the
    file is flushed to disk (``fsync``) and renamed onto ``target`` with
    :func:`os.replace`; when the block raises (including ``KeyboardInterrupt``
    and :class:`~.errors.CancelledError`) the temporary file is removed and an
    earlier ``target`` is left byte-identical. Inside a run's staging folder
    (:func:`register_staging`) the flush is left to the run folder's commit,
    which flushes every file of the run before any of them becomes visible.

    Parameters
    ----------
    target : str or path-like
        Final path of the output. Its folder must exist.

    Yields
    ------
    pathlib.Path
        The temporary path to write.

    Raises
    ------
    OutputError
        The folder cannot be written or the rename fails.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(folder / "a.txt") as tmp:
    ...     _ = tmp.write_text("hello")
    ...     tmp.name.startswith(".a.") and tmp.suffix == ".txt"
    True
    >>> (folder / "a.txt").read_text(), sorted(p.name for p in folder.iterdir())
    ('hello', ['a.txt'])
    """
    target = Path(os.fspath(target))
    if target.is_dir():
        raise OutputError(f"output path '{target}' is a folder; give a file name")
    tmp = _new_temp(target)
    try:
        yield tmp
        if not tmp.exists():
            raise OutputError(f"the writer of '{target}' removed its temporary file '{tmp.name}'")
        later = flushed_later(tmp)  # inside a run's staging folder: its commit flushes every file at once
        if not later:
            _fsync_file(tmp)
        _replace(tmp, target)
    except BaseException:
        _remove_quietly(tmp)
        raise
    if not later:
        fsync_path(target.parent, directory=True)


class OutputSet:
    """Stage several output files and commit them together at the end of a run.

    :meth:`stage` returns a hidden temporary path beside each target; writers
    write there (each through its own :func:`atomic_path`, which is harmless).
    :meth:`commit` flushes every staged file and renames them onto their targets
    in the order they were staged; :meth:`discard` removes them. Used as a
    context manager, the set commits when the block ends normally and discards
    when it raises, so a run that fails or is cancelled half way leaves all
    earlier outputs untouched and no partial file.

    The commit is a sequence of atomic renames, not one transaction: should a
    rename itself fail (another program holds the target open on Windows, the
    disk disappears), the files renamed before it are new, the rest are old and
    each file is complete; the error names the target and the remaining
    temporary files are removed.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> with OutputSet() as outputs:
    ...     _ = outputs.stage(folder / "a.csv").write_text("1")
    ...     _ = outputs.stage(folder / "b.csv").write_text("2")
    ...     sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))
    []
    >>> sorted(p.name for p in folder.iterdir())
    ['a.csv', 'b.csv']
    """

    def __init__(self) -> None:
        self._staged: List[Tuple[Path, Path]] = []
        self._closed = False

    @property
    def targets(self) -> List[Path]:
        """Targets staged so far, in commit order."""
        return [t for _, t in self._staged]

    def stage(self, target: PathLike) -> Path:
        """Reserve a temporary file for ``target`` and return its path."""
        if self._closed:
            raise OutputError("this output set was already committed or discarded")
        target = Path(os.fspath(target))
        if target.is_dir():
            raise OutputError(f"output path '{target}' is a folder; give a file name")
        key = os.path.normcase(os.path.abspath(target))
        if any(os.path.normcase(os.path.abspath(t)) == key for _, t in self._staged):
            raise OutputError(f"output '{target}' is staged twice in one run; give each output its own name")
        tmp = _new_temp(target)
        self._staged.append((tmp, target))
        return tmp

    def commit(self) -> List[Path]:
        """Flush and rename every staged file onto its target; return the targets."""
        if self._closed:
            raise OutputError("this output set was already committed or discarded")
        try:
            for tmp, target in self._staged:
                if not tmp.exists():
                    raise OutputError(f"the staged file for '{target}' is missing; it was never written")
                _fsync_file(tmp)
            for tmp, target in self._staged:
                _replace(tmp, target)
        except BaseException:
            self.discard()
            raise
        self._closed = True
        for folder in sorted({t.parent for _, t in self._staged}):
            fsync_path(folder, directory=True)
        return self.targets

    def discard(self) -> None:
        """Remove every staged temporary file that is still there."""
        for tmp, _ in self._staged:
            _remove_quietly(tmp)
        self._closed = True

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._closed:
            return
        if exc_type is None:
            self.commit()
        else:
            self.discard()


def _same_file(a: Path, b: Path) -> bool:
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:  # pragma: no cover
        pass
    return os.path.normcase(str(a.resolve())) == os.path.normcase(str(b.resolve()))


def check_not_input(output_path: PathLike, input_paths: Iterable[PathLike | None]) -> None:
    """Raise :class:`OutputError` when ``output_path`` is one of the input files.

    Two paths are the same file when :func:`os.path.samefile` says so (hard and
    symbolic links, different spellings) or, for a file not yet there, when their
    resolved absolute paths are equal.
    """
    out = Path(os.fspath(output_path))
    for inp in input_paths:
        if inp is None:
            continue
        inp = Path(os.fspath(inp))
        if _same_file(out, inp):
            raise OutputError(f"output '{out}' would overwrite the input file '{inp}'; choose another output folder")


def check_output_dir(
    out_dir: PathLike,
    input_paths: Iterable[PathLike | None] = (),
    output_names: Iterable[str] = (),
) -> Path:
    """Create the output folder if needed and check that the run can write there.

    Parameters
    ----------
    out_dir : str or path-like
        Output folder; created with its parents when missing.
    input_paths : iterable of path-like
        Every input file of the run (survey TOML, CSVs, DEM). ``None`` entries are
        ignored.
    output_names : iterable of str
        File names (or paths relative to ``out_dir``) the run will write.

    Returns
    -------
    pathlib.Path
        The absolute output folder.

    Raises
    ------
    OutputError
        The folder cannot be created or written (checked by creating and removing
        a probe file), it is an existing file, or an output would replace an input
        file (or the folder is itself an input).
    """
    folder = Path(os.fspath(out_dir)).expanduser()
    inputs = [Path(os.fspath(p)) for p in input_paths if p is not None]
    for inp in inputs:
        if folder.exists() and _same_file(folder, inp):
            raise OutputError(f"output folder '{folder}' is the input '{inp}'; choose another output folder")
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"output folder '{folder}' is an existing file; give a folder name")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(
            f"cannot create the output folder '{folder}': {exc.strerror or exc}; choose a folder you can write to"
        ) from exc
    try:
        fd, probe = tempfile.mkstemp(prefix=".write-test.", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(
            f"cannot write in the output folder '{folder}': {exc.strerror or exc}; choose a folder you can write to"
        ) from exc
    for name in output_names:
        check_not_input(folder / name, inputs)
    return folder.resolve()
