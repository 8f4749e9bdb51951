"""Vacuum gauge: pressure with an explicit status, never a made-up number.

.. caution::
   Hot-cathode and cold-cathode gauges run at high voltage, and vacuum hardware
   stores mechanical energy. Follow your local codes and the lab's rules for
   working on the vacuum system.

A reading whose status is not ``ok`` carries ``pressure = nan``: an over-range
gauge does not know the pressure, and reporting the range limit instead would be
a fake number. A backend that says ``ok`` for a value outside the stated range
is overruled: the status becomes ``over_range``/``under_range`` and the pressure
``nan``.
"""

from __future__ import annotations

import math
from typing import Protocol, runtime_checkable

from bluesky.protocols import Reading
from ophyd_async.core import (
    StandardReadable,
    StandardReadableFormat,
    StrictEnum,
    soft_signal_r_and_setter,
)

from .._errors import InputError
from ._checked_signal import const_signal
from ._checks import check_limits_pair

__all__ = ["GaugeStatus", "GaugeBackend", "VacuumGauge"]


class GaugeStatus(StrictEnum):
    """State of a gauge reading."""

    OK = "ok"
    OVER_RANGE = "over_range"
    UNDER_RANGE = "under_range"
    SENSOR_OFF = "sensor_off"
    FAULT = "fault"


@runtime_checkable
class GaugeBackend(Protocol):
    """What the gauge controller (or a simulation of it) must offer."""

    async def read(self) -> tuple[float, GaugeStatus]:
        """One reading: ``(pressure_pa, status)``; the pressure is ignored unless ``ok``."""
        ...


class VacuumGauge(StandardReadable):
    """A pressure gauge.

    Parameters
    ----------
    backend : GaugeBackend
        The gauge controller or simulation.
    range_pa : (float, float)
        Range (min, max) in Pa over which the gauge's readings are valid.
    accuracy : float
        Stated relative accuracy of a reading (fraction, e.g. 0.15 for 15 %).
    gas : str
        Gas species in the chamber (e.g. ``"N2"``).
    sensitivity : float
        Relative sensitivity of the gauge to ``gas`` against the gas it is calibrated for
        (N2): 1 for N2 or a gas-independent gauge; for an ionization gauge the published
        factor (He 0.18, Ar 1.4, ..., see :data:`quietwell.physics.GASES`). The gauge's
        reading is divided by it, ``p_true = p_indicated / S``.
    name : str
        Device name.

    Notes
    -----
    ``read()`` queries the backend once and carries ``pressure`` (Pa, corrected for the
    gas), ``indicated_pressure`` (Pa, as the gauge shows it) and ``status``
    (:class:`GaugeStatus`). The range applies to the indicated reading. Configuration:
    ``gas``, ``sensitivity``, ``range_min`` and ``range_max`` (Pa), ``accuracy``
    (fraction).
    """

    def __init__(
        self,
        backend: GaugeBackend,
        *,
        range_pa: tuple[float, float],
        accuracy: float,
        gas: str = "N2",
        sensitivity: float = 1.0,
        name: str = "",
    ) -> None:
        lo, hi = check_limits_pair("range_pa", *range_pa, "Pa")
        if isinstance(accuracy, bool) or not isinstance(accuracy, int | float):
            raise InputError(f"accuracy={accuracy!r} must be a fraction in (0, 1); fix the setup")
        if not 0.0 < accuracy < 1.0:
            raise InputError(
                f"accuracy={accuracy!r} must be a fraction in (0, 1) (0.15 means 15 %); "
                "fix the setup file"
            )
        if not isinstance(gas, str) or not gas:
            raise InputError(f"gas={gas!r} must name the gas species, e.g. 'N2'")
        if (isinstance(sensitivity, bool) or not isinstance(sensitivity, int | float)
                or not 0.0 < sensitivity < 100.0):
            raise InputError(f"sensitivity={sensitivity!r} must be a positive factor relative to "
                             "N2 (1 for N2; the published ionization-gauge factor of the gas)")
        self._backend = backend
        self._lo, self._hi = lo, hi
        self._sensitivity = float(sensitivity)
        with self.add_children_as_readables(StandardReadableFormat.HINTED_SIGNAL):
            self.pressure, self._set_pressure = soft_signal_r_and_setter(
                float, math.nan, units="Pa"
            )
        with self.add_children_as_readables():
            self.indicated_pressure, self._set_indicated = soft_signal_r_and_setter(
                float, math.nan, units="Pa"
            )
            self.status, self._set_status = soft_signal_r_and_setter(
                GaugeStatus, GaugeStatus.SENSOR_OFF, units=""
            )
        with self.add_children_as_readables(StandardReadableFormat.CONFIG_SIGNAL):
            self.gas = const_signal(gas, "")
            self.sensitivity = const_signal(self._sensitivity, "1")
            self.range_min = const_signal(lo, "Pa")
            self.range_max = const_signal(hi, "Pa")
            self.accuracy = const_signal(float(accuracy), "1")
        super().__init__(name=name)

    async def refresh(self) -> tuple[float, GaugeStatus]:
        """Query the backend once and update ``pressure`` and ``status``."""
        raw, status = await self._backend.read()
        status = GaugeStatus(status)
        if status is GaugeStatus.OK:
            p = float(raw)
            if not math.isfinite(p):
                status, p = GaugeStatus.FAULT, math.nan
            elif p > self._hi:
                status, p = GaugeStatus.OVER_RANGE, math.nan
            elif p < self._lo:
                status, p = GaugeStatus.UNDER_RANGE, math.nan
        else:
            p = math.nan
        # Status first, so a subscriber never sees a number paired with a stale status.
        self._set_status(status)
        self._set_indicated(p)
        true_p = p / self._sensitivity
        self._set_pressure(true_p)
        return true_p, status

    async def read(self) -> dict[str, Reading]:
        await self.refresh()
        return await super().read()
