"""Trap laser: optical power and parametric-feedback modulation.

.. caution::
   The trap laser is a high-power (typically class 4) source. Alignment, beam
   enclosures, interlocks and eyewear follow your local laser-safety codes and the
   instructions of the lab's laser-safety officer. The power limit enforced here
   protects the particle and the optics; it is no substitute for those measures.

Modulation convention: ``modulation_depth`` is the dimensionless peak relative
power modulation ``dP/P`` produced by a full-scale feedback signal (so it must
stay below 1: the power cannot go negative), ``modulation_phase`` the phase of
the ``2*Omega0`` modulation relative to the detected ``x**2`` signal, in rad,
within ``[-pi, pi]``. The backend maps both to its electronics.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

from ophyd_async.core import StandardReadableFormat, soft_signal_r_and_setter

from .._errors import InputError
from ._checked_signal import checked_signal_rw, const_signal
from ._checks import check_flag, check_limits_pair, check_real
from ._connect import AdoptOnConnect

__all__ = ["LaserBackend", "LaserState", "TrapLaser"]


@dataclass(frozen=True)
class LaserState:
    """What the laser does now: power setpoint (W), emission, modulation settings."""

    power_w: float
    emission: bool
    modulation_depth: float
    modulation_phase_rad: float
    modulation_enabled: bool


@runtime_checkable
class LaserBackend(Protocol):
    """What the trap-laser hardware (or a simulation of it) must offer."""

    async def state(self) -> LaserState:
        """The settings the laser holds now."""
        ...

    async def set_power(self, power_w: float) -> None:
        """Set the optical power delivered to the trap in W."""

    async def set_emission(self, enabled: bool) -> None:
        """Switch emission on (True) or off (False)."""

    async def set_modulation_depth(self, depth: float) -> None:
        """Set the parametric-feedback modulation depth (dimensionless, 0..1)."""

    async def set_modulation_phase(self, phase_rad: float) -> None:
        """Set the parametric-feedback phase in rad."""

    async def set_modulation_enabled(self, enabled: bool) -> None:
        """Switch parametric feedback on (True) or off (False)."""

    async def read_power(self) -> float:
        """Measured optical power in W (monitor photodiode)."""
        ...


class TrapLaser(AdoptOnConnect):
    """The trapping laser with parametric feedback.

    Parameters
    ----------
    backend : LaserBackend
        The hardware or simulated control layer.
    max_power_w : float
        Largest allowed power setpoint in W, > 0.
    max_modulation_depth : float
        Largest allowed modulation depth, in (0, 1).
    name : str
        Device name.

    Notes
    -----
    Signals in ``read()``: ``power`` (W, setpoint), ``measured_power`` (W, read from
    the backend on every read), ``emission``, ``modulation_depth`` (dimensionless),
    ``modulation_phase`` (rad), ``modulation_enabled``. Configuration:
    ``max_power`` (W), ``max_modulation_depth``. On connect the laser's state is
    adopted, never changed.
    """

    def __init__(
        self,
        backend: LaserBackend,
        *,
        max_power_w: float,
        max_modulation_depth: float = 0.5,
        name: str = "",
    ) -> None:
        check_limits_pair("max_power_w", 0.0, max_power_w, "W")
        check_limits_pair("max_modulation_depth", 0.0, max_modulation_depth, "")
        if max_modulation_depth >= 1.0:
            raise InputError(
                f"max_modulation_depth={max_modulation_depth:g} must be < 1 "
                "(the power cannot go negative); fix the setup file"
            )
        self._backend = backend
        with self.add_children_as_readables():
            self.power, self._adopt_power = checked_signal_rw(
                float,
                0.0,
                units="W",
                check=lambda v: check_real("power", v, 0.0, max_power_w, "W"),
                apply=backend.set_power,
            )
            self.measured_power, _ = soft_signal_r_and_setter(
                float, getter=backend.read_power, units="W"
            )
            self.emission, self._adopt_emission = checked_signal_rw(
                bool,
                False,
                units="",
                check=lambda v: check_flag("emission", v),
                apply=backend.set_emission,
            )
            self.modulation_depth, self._adopt_depth = checked_signal_rw(
                float,
                0.0,
                units="1",
                check=lambda v: check_real(
                    "modulation_depth", v, 0.0, max_modulation_depth, "(dimensionless)"
                ),
                apply=backend.set_modulation_depth,
            )
            self.modulation_phase, self._adopt_phase = checked_signal_rw(
                float,
                0.0,
                units="rad",
                check=lambda v: check_real("modulation_phase", v, -math.pi, math.pi, "rad"),
                apply=backend.set_modulation_phase,
            )
            self.modulation_enabled, self._adopt_mod_enabled = checked_signal_rw(
                bool,
                False,
                units="",
                check=lambda v: check_flag("modulation_enabled", v),
                apply=backend.set_modulation_enabled,
            )
        with self.add_children_as_readables(StandardReadableFormat.CONFIG_SIGNAL):
            self.max_power = const_signal(float(max_power_w), "W")
            self.max_modulation_depth = const_signal(float(max_modulation_depth), "1")
        super().__init__(name=name)

    async def _adopt_state(self) -> None:
        st = await self._backend.state()
        self._adopt_power(st.power_w)
        self._adopt_emission(st.emission)
        self._adopt_depth(st.modulation_depth)
        self._adopt_phase(st.modulation_phase_rad)
        self._adopt_mod_enabled(st.modulation_enabled)
