"""What every drawing shares (core/report/drawing.py): PNG files, the frozen heap; and the warm-up.

The PNG writer is checked against matplotlib's own ``savefig`` (the reference
renderer): the same pixels, decoded by Pillow.
"""

from __future__ import annotations

import gc
import io
import threading

import numpy as np
import pytest

pytest.importorskip("matplotlib")
from PIL import Image
from rockhead.core.report import drawing
from rockhead.core.report.qc_figures import GatherFigure, new_figure


def _decoded(png: bytes) -> Image.Image:
    image = Image.open(io.BytesIO(png))
    image.load()
    return image


def _matplotlib_png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi)
    return buf.getvalue()


def _gather_figure():
    x = np.linspace(-40.0, 40.0, 24)
    t = np.sqrt(x**2 + 30.0**2) / 1500.0  # flat reflector at 15 m under 1500 m/s (t0 = 20 ms)
    rejected = np.zeros(len(x), bool)
    rejected[3] = True
    return GatherFigure(dpi=72).draw(x, t + 0.0004 * rejected, t, rejected, np.zeros(len(x), bool), "line A", "V")


def test_png_has_matplotlibs_pixels_without_the_alpha_channel():
    fig = _gather_figure().figure
    ours, reference = _decoded(drawing.figure_png(fig)), _decoded(_matplotlib_png(fig))
    assert ours.mode == "RGB" and reference.mode == "RGBA"
    assert ours.size == reference.size == (720, 259)  # 10 x 3.6 in at 72 dpi
    ref = np.asarray(reference)
    assert np.all(ref[..., 3] == 255)  # matplotlib's file is opaque: the alpha channel said nothing
    np.testing.assert_array_equal(np.asarray(ours), ref[..., :3])
    assert ours.info["dpi"] == pytest.approx((72, 72), abs=0.01)  # stated, as matplotlib states it


def test_a_transparent_figure_keeps_its_alpha_channel():
    fig = new_figure(2.0, 1.0, 50)
    fig.patch.set_alpha(0.0)
    fig.text(0.1, 0.5, "half seen", fontsize=9)
    ours, reference = _decoded(drawing.figure_png(fig)), _decoded(_matplotlib_png(fig))
    assert ours.mode == "RGBA"
    np.testing.assert_array_equal(np.asarray(ours), np.asarray(reference))


def test_png_is_reproducible_and_carries_no_software_tag():
    fig = _gather_figure().figure
    a, b = drawing.figure_png(fig), drawing.figure_png(fig)
    assert a == b
    assert b"Software" not in a and b"matplotlib" not in a


def test_frozen_heap_is_given_back_after_nesting_threads_and_errors():
    assert gc.get_freeze_count() == 0
    with drawing.frozen_heap():
        assert gc.get_freeze_count() > 0
        with drawing.frozen_heap():
            pass
        assert gc.get_freeze_count() > 0  # the inner drawing left the outer one's heap frozen
        seen = []
        worker = threading.Thread(target=lambda: seen.append(_freeze_count_inside()))
        worker.start()
        worker.join()
        assert seen[0] > 0 and gc.get_freeze_count() > 0
    assert gc.get_freeze_count() == 0
    with pytest.raises(ZeroDivisionError):
        with drawing.frozen_heap():
            raise ZeroDivisionError("a drawing that fails")
    assert gc.get_freeze_count() == 0


def _freeze_count_inside() -> int:
    with drawing.frozen_heap():
        return gc.get_freeze_count()


def test_objects_made_while_drawing_are_still_collected():
    import weakref

    class Node:
        pass

    with drawing.frozen_heap():
        a, b = Node(), Node()
        a.other, b.other = b, a  # a reference cycle, made while the heap is frozen
        ref = weakref.ref(a)
        del a, b
        gc.collect()
        assert ref() is None


def test_warm_up_draws_without_files():
    import matplotlib
    from rockhead.core.report.figures import DEPTH_CMAP, warm_up

    warm_up()  # fonts and colour maps loaded: the named colour maps exist afterwards
    assert DEPTH_CMAP in matplotlib.colormaps
