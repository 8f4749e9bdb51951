"""Simulated time shared by every part of the simulated laboratory."""

from __future__ import annotations

import math

from quietwell import InputError

__all__ = ["SimClock"]


class SimClock:
    """Simulated time in seconds; it moves only when told to, never with the wall clock.

    An eight-hour pump-down is a single :meth:`advance` call and costs what the
    physics costs to compute, not eight hours.

    Parameters
    ----------
    start : float
        Initial simulated time in s.
    time_scale : float or None
        Recorded for a future real-time-ish mode (simulated seconds per wall
        second). The simulation itself never reads it and never sleeps.
    """

    def __init__(self, start: float = 0.0, time_scale: float | None = None) -> None:
        if not math.isfinite(start):
            raise InputError(f"{start=} s is not finite; give a finite start time in s")
        if time_scale is not None and not (math.isfinite(time_scale) and time_scale > 0):
            raise InputError(f"{time_scale=} must be a positive number or None")
        self._now = float(start)
        self.time_scale = time_scale

    @property
    def now(self) -> float:
        """Current simulated time in s."""
        return self._now

    def advance(self, dt: float) -> float:
        """Move simulated time forward by ``dt`` (s, >= 0) and return the new time in s."""
        if not (math.isfinite(dt) and dt >= 0.0):
            raise InputError(f"{dt=} s must be finite and >= 0; simulated time only moves forward")
        self._now += float(dt)
        return self._now

    def __repr__(self) -> str:
        return f"SimClock(now={self._now!r}, time_scale={self.time_scale!r})"
