"""Worker threads for batched solves, with BLAS held to one thread meanwhile.

The batched kriging solves call LAPACK on tiny (k+1) systems; a threaded BLAS
then spends its time waking threads (measured 10-300 x slower on a loaded
2-core machine with Debian's OpenBLAS), and worker threads on top of BLAS
threads would oversubscribe the cores. :func:`run_chunks` therefore runs the
chunks of a job on a few threads of its own (NumPy releases the GIL in the
batched solve) while :class:`SingleThreadedBlas` holds every OpenBLAS of the
process to one thread; where the BLAS thread count cannot be set, the chunks
run on one thread and BLAS keeps its own.

OpenBLAS libraries are found through ``/proc/self/maps`` (Linux) and driven
with ``ctypes``; elsewhere through ``threadpoolctl`` when it is installed.
"""

from __future__ import annotations

import contextlib
import os
import threading
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any, Callable, Optional

from ..progress import NullProgress, Progress, check_cancel

__all__ = ["SingleThreadedBlas", "blas_thread_controls", "default_thread_count", "run_chunks"]

#: A (get, set) pair of functions for one BLAS library's thread count.
BlasControl = tuple[Callable[[], int], Callable[[int], Any]]

_BLAS_SYMBOLS = (
    ("openblas_get_num_threads", "openblas_set_num_threads"),
    ("scipy_openblas_get_num_threads64_", "scipy_openblas_set_num_threads64_"),
    ("scipy_openblas_get_num_threads", "scipy_openblas_set_num_threads"),
    ("openblas_get_num_threads64_", "openblas_set_num_threads64_"),
)
_blas_controls_cache: Optional[list[BlasControl]] = None
_blas_lock = threading.Lock()
_blas_depth = 0
_blas_saved: list[tuple[Callable[[int], Any], int]] = []


def blas_thread_controls() -> list[BlasControl]:
    """Return the thread-count controls of every OpenBLAS loaded in this process.

    Found through /proc/self/maps (Linux); elsewhere through threadpoolctl when
    it is installed; otherwise none (the solves then run with the BLAS
    default). The answer is cached.

    Returns
    -------
    list of (get, set)
        ``get()`` returns a library's thread count, ``set(n)`` sets it.
    """
    global _blas_controls_cache
    if _blas_controls_cache is not None:
        return _blas_controls_cache
    controls: list[BlasControl] = []
    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as f:
            paths = {line.split()[-1] for line in f if ".so" in line and "openblas" in line.lower()}
    except OSError:
        paths = set()
    if paths:
        import ctypes

        seen = set()
        for path in sorted(paths):
            real = os.path.realpath(path)
            if real in seen:
                continue
            seen.add(real)
            try:
                lib = ctypes.CDLL(path)
            except OSError:
                continue
            for get_name, set_name in _BLAS_SYMBOLS:
                if hasattr(lib, get_name) and hasattr(lib, set_name):
                    get_fn = getattr(lib, get_name)
                    set_fn = getattr(lib, set_name)
                    get_fn.restype = ctypes.c_int
                    set_fn.argtypes = [ctypes.c_int]
                    controls.append((get_fn, set_fn))
                    break
    else:
        try:
            from threadpoolctl import ThreadpoolController
        except ImportError:
            ThreadpoolController = None
        if ThreadpoolController is not None:
            ctl = ThreadpoolController()

            def _get(ctl: Any = ctl) -> int:
                counts = [m.get("num_threads", 1) for m in ctl.info() if m.get("user_api") == "blas"]
                return max(counts or [1])

            def _set(n: int, ctl: Any = ctl) -> None:
                ctl.limit(limits=n, user_api="blas")

            controls.append((_get, _set))
    _blas_controls_cache = controls
    return controls


class SingleThreadedBlas(contextlib.ContextDecorator):
    """Context manager (or decorator): BLAS/LAPACK on one thread while our own threads run.

    The previous thread counts are restored on exit; nesting and concurrent
    use are counted under a lock, so the counts are saved by the first entry
    and restored by the last exit.
    """

    def __enter__(self) -> SingleThreadedBlas:
        """Save every BLAS thread count and set it to 1 (on the first entry)."""
        global _blas_depth, _blas_saved
        with _blas_lock:
            if _blas_depth == 0:
                controls = blas_thread_controls()
                _blas_saved = [(fset, int(fget())) for fget, fset in controls]
                for fset, _ in _blas_saved:
                    fset(1)
            _blas_depth += 1
        return self

    def __exit__(self, *exc: object) -> None:
        """Restore the saved thread counts (on the last exit); an error passes on."""
        global _blas_depth
        with _blas_lock:
            _blas_depth -= 1
            if _blas_depth == 0:
                for fset, n in _blas_saved:
                    fset(max(1, n))


def default_thread_count() -> int:
    """Return the default number of worker threads: the CPU count, at most 8.

    Returns
    -------
    int
        At least 1.
    """
    n = os.cpu_count() or 1
    return max(1, min(n, 8))


def run_chunks(
    n: int,
    chunk: int,
    work: Callable[[slice], Any],
    progress: Optional[Progress] = None,
    *,
    n_threads: Optional[int] = None,
    limit_blas: bool = True,
    p0: float = 0.0,
    p1: float = 100.0,
) -> list[Any]:
    """Apply ``work(slice)`` to consecutive chunks of ``range(n)``, on threads.

    With ``limit_blas`` and a BLAS whose thread count can be set, the chunks
    run on ``n_threads`` worker threads under :class:`SingleThreadedBlas`;
    otherwise they run one after the other on this thread (BLAS keeps its own
    threads: right for a few large solves). At most ``2 * n_threads`` chunks
    are in flight, so memory stays about ``n_threads`` chunks. Cancellation
    is checked between chunks.

    Parameters
    ----------
    n : int
        Number of items.
    chunk : int
        Items per chunk, >= 1.
    work : callable
        Called with each chunk's ``slice`` of ``range(n)``.
    progress : Progress, optional
        Progress sink; reported from ``p0`` to ``p1`` percent.
    n_threads : int, optional
        Worker threads; default :func:`default_thread_count`.
    limit_blas : bool
        Hold BLAS to one thread and run on worker threads (see above).
    p0, p1 : float
        Progress (percent) at the start and at the end.

    Returns
    -------
    list
        What ``work`` returned for each chunk, in order.

    Raises
    ------
    CancelledError
        The progress sink says the user cancelled.

    >>> run_chunks(10, 4, lambda sl: sl.stop - sl.start, limit_blas=False)
    [4, 4, 2]
    """
    sink: Progress = progress or NullProgress()
    slices = [slice(s, min(n, s + chunk)) for s in range(0, n, chunk)]
    threads = n_threads or default_thread_count()
    if limit_blas and blas_thread_controls():
        with SingleThreadedBlas():
            return _run_threads(slices, threads, work, sink, p0, p1)
    return _run_threads(slices, 1, work, sink, p0, p1)


def _run_threads(
    slices: list[slice], threads: int, work: Callable[[slice], Any], progress: Progress, p0: float, p1: float
) -> list[Any]:
    out: list[Any] = [None] * len(slices)
    if threads <= 1 or len(slices) <= 1:
        for i, sl in enumerate(slices):
            check_cancel(progress)
            out[i] = work(sl)
            progress.set_progress(p0 + (p1 - p0) * (i + 1) / len(slices))
        return out
    with ThreadPoolExecutor(max_workers=threads) as pool:
        # submit in bounded waves so memory stays ~threads x chunk
        pending: dict[int, Future[Any]] = {}
        nxt = 0
        done = 0
        try:
            while done < len(slices):
                while nxt < len(slices) and len(pending) < 2 * threads:
                    pending[nxt] = pool.submit(work, slices[nxt])
                    nxt += 1
                first = min(pending)
                out[first] = pending.pop(first).result()
                done += 1
                progress.set_progress(p0 + (p1 - p0) * done / len(slices))
                check_cancel(progress)
        finally:
            for f in pending.values():
                f.cancel()
    return out
