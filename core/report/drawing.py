"""What every drawing of a run shares: the garbage collector held back while drawing, and the PNG files.

matplotlib builds and drops tens of thousands of small Python objects per
figure (artists, transforms, paths, text layouts). Each burst sets off the
cyclic garbage collector, and its full passes walk every object the process
holds: the run's results, the imported libraries and, inside QGIS, the whole
application's Python objects. :func:`frozen_heap` keeps the objects that exist
before a drawing out of those passes while it draws (``gc.freeze``); the
figures' own short-lived objects are still collected as usual, and every
object goes back to the collector afterwards. Measured on the sample survey:
full passes took about 0.4 s of the 7 s of processor time of its figures,
report and sheets in a process of the command line.

PNG files (:func:`figure_png`) hold the pixels matplotlib draws, written by
Pillow with zlib's fastest level, and without the alpha channel when the
figure is opaque (all of the project's figures are): on the sample survey's
twelve report figures, about 3 % smaller and a third faster to encode than
matplotlib's own RGBA files at level 6 (670 against 695 kB, about 0.15
against 0.25 s).
"""

from __future__ import annotations

import contextlib
import functools
import gc
import io
import threading
from typing import Callable, Iterator, TypeVar

__all__ = ["PNG_COMPRESS_LEVEL", "drawn_with_frozen_heap", "figure_png", "frozen_heap"]

F = TypeVar("F", bound=Callable)

#: zlib level of every PNG (1: fastest; the files stay smaller than matplotlib's RGBA at level 6)
PNG_COMPRESS_LEVEL = 1

_lock = threading.Lock()
_depth = 0  # drawings under way that hold the heap frozen (nested or in other threads)


@contextlib.contextmanager
def frozen_heap() -> Iterator[None]:
    """Leave the objects that exist now out of the garbage collector's passes while the block draws.

    Re-entrant and safe across threads: the heap is frozen by the first
    drawing that starts and given back to the collector when the last one
    ends (``gc.unfreeze``), so nothing is kept from it for longer than the
    drawing. Objects made in the block are collected as usual.

    Examples
    --------
    >>> with frozen_heap():
    ...     with frozen_heap():
    ...         pass
    >>> import gc
    >>> gc.get_freeze_count()
    0
    """
    global _depth
    with _lock:
        if _depth == 0:
            gc.freeze()
        _depth += 1
    try:
        yield
    finally:
        with _lock:
            _depth -= 1
            if _depth == 0:
                gc.unfreeze()


def drawn_with_frozen_heap(function: F) -> F:
    """Decorate a function that draws: it runs under :func:`frozen_heap`."""

    @functools.wraps(function)
    def drawn(*args, **kwargs):
        with frozen_heap():
            return function(*args, **kwargs)

    return drawn  # type: ignore[return-value]


def figure_png(fig) -> bytes:
    """The figure as PNG bytes at its own size and dpi: RGB when opaque, no time stamp or software tag.

    The pixels are those of ``fig.savefig(format="png", dpi=fig.dpi)``
    (the figure drawn by its Agg canvas with its own face colour); a figure
    on another canvas goes through ``savefig``. The file states the dpi, as
    matplotlib's does.

    Parameters
    ----------
    fig : matplotlib.figure.Figure

    Returns
    -------
    bytes
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    buf = io.BytesIO()
    if type(fig.canvas) is not FigureCanvasAgg:  # e.g. the QGIS panel's Qt canvas: matplotlib's own route
        options = {"compress_level": PNG_COMPRESS_LEVEL}
        fig.savefig(buf, format="png", dpi=fig.dpi, metadata={"Software": None}, pil_kwargs=options)
        return buf.getvalue()
    import numpy as np
    from PIL import Image  # a dependency of matplotlib

    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    pixels = rgba[..., :3] if bool(np.all(rgba[..., 3] == 255)) else rgba
    Image.fromarray(np.ascontiguousarray(pixels)).save(
        buf, format="png", compress_level=PNG_COMPRESS_LEVEL, dpi=(fig.dpi, fig.dpi)
    )
    return buf.getvalue()
