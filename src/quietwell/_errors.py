"""One rooted exception hierarchy for quietwell.

Each member also subclasses the matching built-in, so callers that catch
``ValueError`` or ``OSError`` keep working.
"""

from __future__ import annotations

__all__ = [
    "QuietwellError",
    "QuietwellWarning",
    "InputError",
    "LimitError",
    "FitError",
    "UnresolvedPeakError",
]


class QuietwellError(Exception):
    """Base class of every error quietwell raises on purpose.

    ``key`` (optional, keyword only) names the parameter the error is about
    (``"pressure"``, ``"gains[2]"``), so that a caller that knows where the value came
    from (a step of a campaign file) can name the file, the step, the key and the value
    as written there.
    """

    def __init__(self, *args: object, key: str | None = None):
        super().__init__(*args)
        self.key = key


class QuietwellWarning(UserWarning):
    """Base class of quietwell's own warnings (tests turn them into errors)."""


class InputError(QuietwellError, ValueError):
    """Bad input: a file, key or argument whose value is not allowed."""


class LimitError(QuietwellError, ValueError):
    """A request outside a device limit of the setup; refused before anything moves."""


class FitError(QuietwellError, RuntimeError):
    """A spectral fit that did not converge or gave a meaningless result."""


class UnresolvedPeakError(FitError):
    """A peak too narrow (a few bins) or too weak (below the floor) to fit."""
