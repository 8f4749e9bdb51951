"""Connect-time hook shared by the actuator devices."""

from __future__ import annotations

from ophyd_async.core import DEFAULT_TIMEOUT, DeviceMock, StandardReadable

__all__ = ["AdoptOnConnect"]


class AdoptOnConnect(StandardReadable):
    """A ``StandardReadable`` that takes over the hardware's current state on connect.

    Connecting must never change what the hardware does: switching the trap laser
    off, or opening the feedback loops at low pressure, loses the particle. So on a
    real (non-mock) connect, subclasses read the backend's state in ``_adopt_state``
    and show it in their signals, without sending anything. A held state outside
    the setup's limits raises :class:`~quietwell.LimitError` there, still without
    touching the hardware.
    """

    async def _adopt_state(self) -> None:
        raise NotImplementedError(type(self).__name__)

    async def connect(
        self,
        mock: bool | DeviceMock = False,
        timeout: float = DEFAULT_TIMEOUT,
        force_reconnect: bool = False,
    ) -> None:
        await super().connect(mock=mock, timeout=timeout, force_reconnect=force_reconnect)
        if mock is False:
            await self._adopt_state()
