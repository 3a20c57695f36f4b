"""Exceptions that the command line turns into one-line messages.

Every error a user can cause derives from :class:`CouponError`.  The command
line prints ``str(error)`` on one line and exits non-zero; a traceback is shown
only with ``--debug``.  Messages say what was expected, what arrived and how to
fix it, and name the file when there is one.
"""

from __future__ import annotations

from pathlib import Path


class CouponError(Exception):
    """Base class of all errors caused by input, settings or data."""

    def __init__(self, message: str, path: str | Path | None = None):
        self.path = None if path is None else Path(path)
        self.message = message
        super().__init__(f"{self.path}: {message}" if self.path is not None else message)


class ImageLoadError(CouponError):
    """An image file is missing, unreadable, corrupt, too large or not an image."""


class CalibrationError(CouponError):
    """A calibration cannot be fitted from the data given (too few points, a fold, no target found)."""


class ProfileError(CouponError):
    """A calibration profile file is malformed or fails validation."""


class AnalysisError(CouponError):
    """An analysis step could not produce a trustworthy result for one input."""
