"""A tiny progress and cancellation protocol.

The core reports progress through any object with ``set_progress(percent)``,
``is_canceled()`` and ``info(message)``; the QGIS adapter wraps a
``QgsProcessingFeedback`` in such an object and the command line prints to
stderr. Long loops call :func:`check_cancel` between gathers, lines or chunks
and raise :class:`~.errors.CancelledError` rather than return partial results.
"""

from __future__ import annotations

import sys
from typing import Optional, Protocol, TextIO

from .errors import CancelledError


class Progress(Protocol):
    """What the core needs of a progress sink (for type hints; any such object works)."""

    def set_progress(self, percent: float) -> None:
        """Report ``percent`` (0-100) done."""

    def is_canceled(self) -> bool:
        """Whether the user asked to stop."""

    def info(self, message: str) -> None:
        """Show a message."""


class NullProgress:
    """Progress sink that ignores everything and never cancels."""

    def set_progress(self, percent: float) -> None:
        """Ignore the progress."""

    def is_canceled(self) -> bool:
        """Never cancel."""
        return False

    def info(self, message: str) -> None:
        """Ignore the message."""


class StderrProgress(NullProgress):
    """Progress printed on stderr (command line)."""

    def __init__(self, stream: Optional[TextIO] = None) -> None:
        self.stream = stream or sys.stderr
        self._last = -1

    def set_progress(self, percent: float) -> None:
        """Print every whole 10 % once."""
        p = int(percent)
        if p != self._last and p % 10 == 0:
            self._last = p
            print(f"  {p:3d} %", file=self.stream, flush=True)

    def info(self, message: str) -> None:
        """Print the message on its own line."""
        print(message, file=self.stream, flush=True)


class SubProgress(NullProgress):
    """Maps 0-100 % of a sub-step onto [start, stop] % of a parent."""

    def __init__(self, parent: Optional[Progress], start: float, stop: float) -> None:
        self.parent: Progress = parent or NullProgress()
        self.start = start
        self.stop = stop

    def set_progress(self, percent: float) -> None:
        """Pass ``percent`` of the sub-step on as the parent's share of [start, stop]."""
        self.parent.set_progress(self.start + (self.stop - self.start) * percent / 100.0)

    def is_canceled(self) -> bool:
        """Whether the parent was asked to stop."""
        return self.parent.is_canceled()

    def info(self, message: str) -> None:
        """Pass the message on to the parent."""
        self.parent.info(message)


def check_cancel(progress: Optional[Progress]) -> None:
    """Raise :class:`CancelledError` if ``progress`` says the user cancelled."""
    if progress is not None and progress.is_canceled():
        raise CancelledError("cancelled by the user")
