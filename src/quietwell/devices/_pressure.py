"""Pressure controller: drive the chamber pressure to a setpoint and wait until settled.

.. caution::
   Venting and pumping move gas fast and load windows, bellows and the particle.
   Follow your local vacuum-safety codes and the lab's rules; the setpoint limits
   here protect the particle, they are no substitute for hardware interlocks.

Time is the **backend's** time: the controller polls the backend every
``poll_interval_s`` of backend time (``await backend.wait(dt)``), and the timeout
counts backend seconds (``backend.now()``). A real backend sleeps in ``wait``; a
simulated one advances its clock, so an hour-long pump-down finishes in
milliseconds. Between polls the controller only yields to the event loop.
"""

from __future__ import annotations

import asyncio
import math
from typing import Protocol, runtime_checkable

from ophyd_async.core import (
    AsyncStatus,
    StandardReadable,
    StandardReadableFormat,
    soft_signal_r_and_setter,
)

from .._errors import QuietwellError
from ._checked_signal import const_signal
from ._checks import check_limits_pair, check_real

__all__ = ["PressureBackend", "PressureController", "SettleTimeoutError"]


class SettleTimeoutError(QuietwellError, TimeoutError):
    """The pressure did not settle within the timeout (in backend time)."""


@runtime_checkable
class PressureBackend(Protocol):
    """What the pressure-control hardware (or a simulation of it) must offer."""

    async def set_setpoint(self, pressure_pa: float) -> None:
        """Start driving the pressure towards ``pressure_pa`` (Pa)."""

    async def read_pressure(self) -> float:
        """The pressure now, in Pa (the controller's own sensor)."""
        ...

    async def is_settled(self) -> bool:
        """True once the pressure is stable at the setpoint (the backend's criterion)."""
        ...

    async def now(self) -> float:
        """The backend clock in s (wall clock for hardware, simulated time for a sim)."""
        ...

    async def wait(self, duration_s: float) -> None:
        """Let ``duration_s`` of backend time pass (sleep, or advance the sim clock)."""


class PressureController(StandardReadable):
    """Movable pressure: ``yield from bps.mv(controller, 1e-3)`` waits until settled.

    Parameters
    ----------
    backend : PressureBackend
        The hardware or simulated control layer.
    setpoint_range_pa : (float, float)
        Allowed setpoints (min, max) in Pa; others raise :class:`~quietwell.LimitError`
        before the backend is called.
    timeout_s : float
        Backend time in s after which an unsettled ``set`` fails with
        :class:`SettleTimeoutError`, > 0.
    poll_interval_s : float
        Backend time in s between polls of ``is_settled``, > 0.
    name : str
        Device name.

    Notes
    -----
    ``read()``: ``pressure`` (Pa, read from the backend) and ``setpoint`` (Pa, the last
    accepted setpoint, ``nan`` before the first). Configuration: ``setpoint_min``,
    ``setpoint_max`` (Pa), ``timeout`` and ``poll_interval`` (s). A timed-out set
    leaves the setpoint in place; the plan decides what to do.
    """

    def __init__(
        self,
        backend: PressureBackend,
        *,
        setpoint_range_pa: tuple[float, float],
        timeout_s: float,
        poll_interval_s: float = 1.0,
        name: str = "",
    ) -> None:
        lo, hi = check_limits_pair("setpoint_range_pa", *setpoint_range_pa, "Pa")
        check_real("timeout_s", timeout_s, 1e-9, math.inf, "s")
        check_real("poll_interval_s", poll_interval_s, 1e-9, math.inf, "s")
        self._backend = backend
        self._lo, self._hi = lo, hi
        self._timeout = float(timeout_s)
        self._poll = float(poll_interval_s)
        with self.add_children_as_readables(StandardReadableFormat.HINTED_UNCACHED_SIGNAL):
            self.pressure, _ = soft_signal_r_and_setter(
                float, math.nan, units="Pa", getter=backend.read_pressure
            )
        with self.add_children_as_readables():
            self.setpoint, self._set_setpoint = soft_signal_r_and_setter(
                float, math.nan, units="Pa"
            )
        with self.add_children_as_readables(StandardReadableFormat.CONFIG_SIGNAL):
            self.setpoint_min = const_signal(lo, "Pa")
            self.setpoint_max = const_signal(hi, "Pa")
            self.timeout = const_signal(self._timeout, "s")
            self.poll_interval = const_signal(self._poll, "s")
        super().__init__(name=name)

    @AsyncStatus.wrap
    async def set(self, value: float) -> None:
        """Send setpoint ``value`` (Pa) and complete when the backend reports settled."""
        target = check_real("pressure setpoint", value, self._lo, self._hi, "Pa")
        await self._backend.set_setpoint(target)
        self._set_setpoint(target)
        start = await self._backend.now()
        while not await self._backend.is_settled():
            elapsed = await self._backend.now() - start
            if elapsed >= self._timeout:
                p = await self._backend.read_pressure()
                raise SettleTimeoutError(
                    f"pressure setpoint {target:g} Pa not settled after {elapsed:g} s "
                    f"(timeout_s={self._timeout:g}, pressure now {p:g} Pa); raise timeout_s "
                    "or check the pumps and valves"
                )
            await self._backend.wait(min(self._poll, self._timeout - elapsed))
            await asyncio.sleep(0)  # let the RunEngine loop breathe between polls
