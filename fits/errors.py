"""Errors of the fits layer: each a ValueError subclass with a one-line message.

The benchkit layer turns them into `UserError` (exit 2); fits never imports benchkit.
"""

from __future__ import annotations


class FitsError(ValueError):
    """Base of every error raised on purpose by fits/."""


class FitError(FitsError):
    """The data cannot be fitted as asked (too few points, one bias only, NaN, C <= 0, ...)."""


class OutOfRange(FitsError):
    """A curve was asked for a bias outside the range it was measured over."""


class CurveDocumentError(FitsError):
    """A curve document (JSON) is malformed; the message names the field."""


class ModelError(FitsError):
    """Parameters a model cannot take, or an expression it cannot write (names the parameter)."""
