"""Charge control: change the particle's net charge in integer discharge steps.

.. caution::
   Discharging uses a high-voltage corona electrode or an ultraviolet source
   inside the vacuum system. Both follow your local electrical-, radiation- and
   vacuum-safety codes and the lab's own rules; the step limit here protects the
   measurement, it is no substitute for hardware interlocks.

Sign convention: ``+n`` steps make the net charge more positive (remove
electrons), ``-n`` more negative. One step is one pulse of the discharger; how
many elementary charges it moves is for the calibration to find out.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

from ophyd_async.core import StandardReadable, StandardReadableFormat, soft_signal_r_and_setter

from .._errors import InputError
from ._checked_signal import checked_signal_rw, const_signal
from ._checks import check_int

__all__ = ["ChargeBackend", "ChargeControl"]


@runtime_checkable
class ChargeBackend(Protocol):
    """What the discharger (or a simulation of it) must offer."""

    async def discharge(self, steps: int) -> None:
        """Fire ``abs(steps)`` discharge pulses of the polarity ``sign(steps)``."""


class ChargeControl(StandardReadable):
    """Discharger: ``bps.mv(charge.steps, n)`` fires ``n`` steps (0 sends nothing).

    Parameters
    ----------
    backend : ChargeBackend
        The hardware or simulated control layer.
    max_steps : int
        Largest ``abs(n)`` allowed in one request, >= 1.
    name : str
        Device name.

    Notes
    -----
    ``steps`` (count) is the last request, ``total_steps`` (count) the signed sum of
    all requests since the device was made; both in ``read()``. ``max_steps`` is
    configuration.
    """

    def __init__(self, backend: ChargeBackend, *, max_steps: int, name: str = "") -> None:
        if isinstance(max_steps, bool) or not isinstance(max_steps, int) or max_steps < 1:
            raise InputError(
                f"max_steps={max_steps!r} must be an integer >= 1; fix the setup file"
            )
        self._backend = backend

        def _check(v: object) -> int:
            return check_int("steps", v, -max_steps, max_steps, "steps")

        async def _fire(n: int) -> None:
            if n == 0:
                return  # a request of zero steps fires nothing and is not sent
            await backend.discharge(n)
            self._set_total(await self.total_steps.get_value() + n)

        with self.add_children_as_readables():
            self.steps, _ = checked_signal_rw(int, 0, units="count", check=_check, apply=_fire)
            self.total_steps, self._set_total = soft_signal_r_and_setter(int, 0, units="count")
        with self.add_children_as_readables(StandardReadableFormat.CONFIG_SIGNAL):
            self.max_steps = const_signal(int(max_steps), "count")
        super().__init__(name=name)
