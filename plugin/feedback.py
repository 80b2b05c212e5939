"""Adapter from a QgsProcessingFeedback to the core's progress protocol.

The core talks to any object with ``set_progress(percent)``,
``is_canceled()`` and ``info(message)`` (see ``core/progress.py``); this class
forwards those calls to the Processing feedback, so the progress bar, the log
and the Cancel button of the Processing dialog (or of qgis_process) reach the
core's long loops.
"""

from __future__ import annotations


class FeedbackProgress:
    """Wrap a ``QgsProcessingFeedback`` (or ``None``) as a core progress object."""

    def __init__(self, feedback=None):
        self.feedback = feedback

    def set_progress(self, percent: float) -> None:
        """Forward the percentage (clipped to 0-100)."""
        if self.feedback is not None:
            self.feedback.setProgress(max(0.0, min(100.0, float(percent))))

    def is_canceled(self) -> bool:
        """True once the user pressed Cancel."""
        return self.feedback is not None and bool(self.feedback.isCanceled())

    def info(self, message: str) -> None:
        """Write a line to the Processing log."""
        if self.feedback is not None:
            self.feedback.pushInfo(str(message))
