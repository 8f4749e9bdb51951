"""Time that passes in the laboratory: wall time for hardware, simulated time for a sim.

Plans never call ``bps.sleep`` for waits that belong to the experiment (feedback
settling, reheating, a ramp's hold time): they ``yield from bps.mv(clock, seconds)``.
Against real devices the backend sleeps; against the simulated laboratory it advances
the shared simulation clock, so an eight-hour ramp takes seconds and the same plan
runs unchanged on both.
"""

from __future__ import annotations

import asyncio
import math
import time
from typing import Protocol, runtime_checkable

from ophyd_async.core import AsyncStatus, StandardReadable, soft_signal_r_and_setter

from ._checks import check_real

__all__ = ["ClockBackend", "LabClock", "WallClockBackend"]


@runtime_checkable
class ClockBackend(Protocol):
    """The time base of a setup."""

    async def now(self) -> float:
        """Current time in s."""
        ...

    async def wait(self, duration_s: float) -> None:
        """Let ``duration_s`` pass."""


class WallClockBackend:
    """Real time: ``now`` is the wall clock, ``wait`` sleeps."""

    async def now(self) -> float:
        return time.time()

    async def wait(self, duration_s: float) -> None:
        await asyncio.sleep(duration_s)


class LabClock(StandardReadable):
    """``bps.mv(clock, dt)`` lets ``dt`` seconds (0 … ``max_wait_s``) of setup time pass.

    ``read()`` gives ``lab_time`` (s), the backend's clock.
    """

    def __init__(
        self, backend: ClockBackend, *, max_wait_s: float = 86400.0, name: str = ""
    ) -> None:
        self._backend = backend
        self._max = float(max_wait_s)
        with self.add_children_as_readables():
            self.lab_time, _ = soft_signal_r_and_setter(
                float, math.nan, units="s", getter=backend.now
            )
        super().__init__(name=name)

    @AsyncStatus.wrap
    async def set(self, value: float) -> None:
        """Wait ``value`` seconds of setup time."""
        dt = check_real("wait duration", value, 0.0, self._max, "s")
        await self._backend.wait(dt)
