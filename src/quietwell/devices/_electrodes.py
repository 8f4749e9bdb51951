"""Feedback electrodes: cold damping on three axes and a Coulomb calibration drive.

.. caution::
   The electrode amplifiers can deliver high voltage. Wiring, interlocks and
   work on the vacuum feedthroughs follow your local electrical-safety codes and
   the lab's own rules; the limits enforced here protect the particle and the
   electronics, they are no substitute for a hardware interlock.

Gain convention: each axis's gain is the **added energy damping rate**
``gamma_fb`` in 1/s (the feedback adds ``gamma_fb`` to the FWHM of the
displacement PSD in rad/s, the convention of :mod:`quietwell.physics`). The
backend translates it into its own electronics gain using its calibration.

Feedback output: the cold-damping force ``F = m gamma_fb v`` on a particle of charge
``q e`` between electrodes at distance ``d`` with geometry factor ``kappa`` (field
``kappa V/d``) needs the voltage ``V = F d/(q e kappa)``; the amplifier stops at the
setup's ``limits.electrode_voltage_max``, and while it sits there the damping is
weaker than set. The device reports, per axis and as the largest over the axes,
``feedback_voltage`` (V, the largest magnitude of the feedback output since the
previous report) and ``feedback_saturation`` (1, the fraction 0..1 of that interval
at the limit), with ``feedback_interval`` (s, the interval covered). "Drive" in this
device names the calibration tone, not the feedback output.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

from bluesky.protocols import Reading
from ophyd_async.core import StandardReadableFormat, soft_signal_r_and_setter

from .._errors import InputError
from ..physics import AXES
from ._checked_signal import checked_signal_rw, const_signal
from ._checks import check_flag, check_limits_pair, check_real
from ._connect import AdoptOnConnect
from ._motion import BackendDataError

__all__ = [
    "ElectrodeBackend",
    "ElectrodeState",
    "FeedbackReport",
    "DampingAxis",
    "FeedbackElectrodes",
]


@dataclass(frozen=True)
class ElectrodeState:
    """What the electrode hardware currently does (read on connect).

    Mappings are keyed by axis ``"x"``, ``"y"``, ``"z"``; gains in 1/s, delays in s,
    drive frequency in Hz, drive amplitude in V.
    """

    gain_per_s: dict[str, float]
    delay_s: dict[str, float]
    enabled: dict[str, bool]
    drive_frequency_hz: float
    drive_amplitude_v: float
    drive_enabled: bool


@dataclass(frozen=True)
class FeedbackReport:
    """What the cold-damping outputs did since the previous report.

    Mappings are keyed by axis ``"x"``, ``"y"``, ``"z"``.

    Attributes
    ----------
    peak_voltage_v : dict of str to float
        Largest magnitude of each axis's feedback output in V over the interval (at
        most the voltage limit; nan if the hardware cannot tell).
    saturation : dict of str to float
        Fraction (0..1) of the interval each axis's output sat at its voltage limit.
    interval_s : float
        Length of the interval in s on the backend's clock (0 before any time passed).
    """

    peak_voltage_v: dict[str, float]
    saturation: dict[str, float]
    interval_s: float


@runtime_checkable
class ElectrodeBackend(Protocol):
    """What the electrode hardware (or a simulation of it) must offer.

    ``axis`` is one of ``"x"``, ``"y"``, ``"z"``. Values arrive already validated.
    """

    async def state(self) -> ElectrodeState:
        """The settings the hardware holds now."""
        ...

    async def set_gain(self, axis: str, gain_per_s: float) -> None:
        """Set the cold-damping gain of ``axis`` as added damping rate in 1/s."""

    async def set_delay(self, axis: str, delay_s: float) -> None:
        """Set the loop delay of ``axis`` in s."""

    async def set_enabled(self, axis: str, enabled: bool) -> None:
        """Close (True) or open (False) the feedback loop of ``axis``."""

    async def set_drive_frequency(self, frequency_hz: float) -> None:
        """Set the frequency of the calibration drive tone in Hz."""

    async def set_drive_amplitude(self, amplitude_v: float) -> None:
        """Set the peak amplitude of the calibration drive tone in V."""

    async def set_drive_enabled(self, enabled: bool) -> None:
        """Switch the calibration drive tone on (True) or off (False)."""

    async def feedback_report(self) -> FeedbackReport:
        """The feedback outputs since the previous call, then start a new interval.

        Hardware: the peak and the time at the rail of each amplifier output (or of
        the digital feedback's command) over the interval, e.g. from the
        controller's running maximum and its clip counter, both reset by this call.
        If no time has passed since the previous call, return that report again.
        """
        ...


class DampingAxis(AdoptOnConnect):
    """Cold-damping loop of one axis: ``gain`` (1/s), ``delay`` (s), ``enabled``.

    Its output: ``feedback_voltage`` (V, the largest magnitude since the previous
    report) and ``feedback_saturation`` (1, the fraction of that interval at the
    voltage limit), refreshed by the parent's ``read()`` or ``refresh_feedback()``
    (reading this axis alone shows the last report). Made by
    :class:`FeedbackElectrodes`, which adopts its state on connect.
    """

    def __init__(
        self,
        backend: ElectrodeBackend,
        axis: str,
        gain_limit_per_s: float,
        max_delay_s: float,
        name: str = "",
    ) -> None:
        async def _gain(v: float) -> None:
            await backend.set_gain(axis, v)

        async def _delay(v: float) -> None:
            await backend.set_delay(axis, v)

        async def _enabled(v: bool) -> None:
            await backend.set_enabled(axis, v)

        with self.add_children_as_readables():
            self.gain, self._adopt_gain = checked_signal_rw(
                float,
                0.0,
                units="1/s",
                check=lambda v: check_real(f"{axis} gain", v, 0.0, gain_limit_per_s, "1/s"),
                apply=_gain,
            )
            self.delay, self._adopt_delay = checked_signal_rw(
                float,
                0.0,
                units="s",
                check=lambda v: check_real(f"{axis} delay", v, 0.0, max_delay_s, "s"),
                apply=_delay,
            )
            self.enabled, self._adopt_enabled = checked_signal_rw(
                bool,
                False,
                units="",
                check=lambda v: check_flag(f"{axis} enabled", v),
                apply=_enabled,
            )
            self.feedback_voltage, self._set_voltage = soft_signal_r_and_setter(
                float, math.nan, units="V"
            )
            self.feedback_saturation, self._set_saturation = soft_signal_r_and_setter(
                float, 0.0, units="1"
            )
        super().__init__(name=name)

    async def _adopt_state(self) -> None:
        # The parent reads the backend once for all axes.
        return None

    def adopt(self, gain_per_s: float, delay_s: float, enabled: bool) -> None:
        """Show a state read from the hardware (checked against the limits, not sent)."""
        self._adopt_gain(gain_per_s)
        self._adopt_delay(delay_s)
        self._adopt_enabled(enabled)


class FeedbackElectrodes(AdoptOnConnect):
    """Electrodes around the trap: per-axis cold damping plus a calibration drive.

    Parameters
    ----------
    backend : ElectrodeBackend
        The hardware or simulated control layer.
    gain_limit_per_s : float
        Largest allowed cold-damping gain (added damping rate) in 1/s, > 0.
    voltage_limit_v : float
        Largest allowed drive amplitude in V, > 0.
    max_delay_s : float
        Largest allowed loop delay in s, > 0.
    drive_frequency_range_hz : (float, float)
        Allowed drive-tone frequencies (min, max) in Hz.
    name : str
        Device name.

    Notes
    -----
    Signals: ``x``, ``y``, ``z`` are :class:`DampingAxis` (``gain`` 1/s, ``delay`` s,
    ``enabled``, ``feedback_voltage`` V, ``feedback_saturation`` 1);
    ``drive_frequency`` (Hz), ``drive_amplitude`` (V), ``drive_enabled`` (the
    calibration tone); ``feedback_voltage`` (V) and ``feedback_saturation`` (1), the
    largest over the axes, and ``feedback_interval`` (s). All are in ``read()``. The
    limits are configuration: ``gain_limit`` (1/s), ``voltage_limit`` (V),
    ``max_delay`` (s).

    The feedback signals come from :meth:`ElectrodeBackend.feedback_report` and cover
    the time since the previous report: ``read()`` of this device (not of one axis)
    and :meth:`refresh_feedback` ask for one. Two readers (a plan and a monitor)
    therefore share the intervals; each sees what happened since the other's read.

    On connect the device adopts the hardware's state (see
    :class:`~quietwell.devices.AdoptOnConnect`). A set outside the limits raises
    :class:`~quietwell.LimitError` before the backend is called.
    """

    def __init__(
        self,
        backend: ElectrodeBackend,
        *,
        gain_limit_per_s: float,
        voltage_limit_v: float,
        max_delay_s: float = 1e-3,
        drive_frequency_range_hz: tuple[float, float] = (1.0, 1e6),
        name: str = "",
    ) -> None:
        check_limits_pair("gain_limit_per_s", 0.0, gain_limit_per_s, "1/s")
        check_limits_pair("voltage_limit_v", 0.0, voltage_limit_v, "V")
        check_limits_pair("max_delay_s", 0.0, max_delay_s, "s")
        f_lo, f_hi = check_limits_pair("drive_frequency_range_hz", *drive_frequency_range_hz, "Hz")
        self._backend = backend
        with self.add_children_as_readables():
            self.x = DampingAxis(backend, "x", float(gain_limit_per_s), float(max_delay_s))
            self.y = DampingAxis(backend, "y", float(gain_limit_per_s), float(max_delay_s))
            self.z = DampingAxis(backend, "z", float(gain_limit_per_s), float(max_delay_s))
            self.drive_frequency, self._adopt_frequency = checked_signal_rw(
                float,
                f_lo,
                units="Hz",
                check=lambda v: check_real("drive_frequency", v, f_lo, f_hi, "Hz"),
                apply=backend.set_drive_frequency,
            )
            self.drive_amplitude, self._adopt_amplitude = checked_signal_rw(
                float,
                0.0,
                units="V",
                check=lambda v: check_real("drive_amplitude", v, 0.0, voltage_limit_v, "V"),
                apply=backend.set_drive_amplitude,
            )
            self.drive_enabled, self._adopt_drive_enabled = checked_signal_rw(
                bool,
                False,
                units="",
                check=lambda v: check_flag("drive_enabled", v),
                apply=backend.set_drive_enabled,
            )
            self.feedback_voltage, self._set_voltage = soft_signal_r_and_setter(
                float, math.nan, units="V"
            )
            self.feedback_saturation, self._set_saturation = soft_signal_r_and_setter(
                float, 0.0, units="1"
            )
            self.feedback_interval, self._set_interval = soft_signal_r_and_setter(
                float, 0.0, units="s"
            )
        with self.add_children_as_readables(StandardReadableFormat.CONFIG_SIGNAL):
            self.gain_limit = const_signal(float(gain_limit_per_s), "1/s")
            self.voltage_limit = const_signal(float(voltage_limit_v), "V")
            self.max_delay = const_signal(float(max_delay_s), "s")
        super().__init__(name=name)

    def axis(self, axis: str) -> DampingAxis:
        """The :class:`DampingAxis` called ``axis`` (``"x"``, ``"y"`` or ``"z"``)."""
        if axis not in AXES:
            raise InputError(f"axis={axis!r} is not an axis; choose one of {', '.join(AXES)}")
        return {"x": self.x, "y": self.y, "z": self.z}[axis]

    async def _adopt_state(self) -> None:
        st = await self._backend.state()
        for a in AXES:
            self.axis(a).adopt(st.gain_per_s[a], st.delay_s[a], st.enabled[a])
        self._adopt_frequency(st.drive_frequency_hz)
        self._adopt_amplitude(st.drive_amplitude_v)
        self._adopt_drive_enabled(st.drive_enabled)

    async def refresh_feedback(self) -> FeedbackReport:
        """Ask the backend for the feedback report and show it in the feedback signals.

        Returns the report (voltages in V, fractions 0..1, interval in s). A
        saturation outside [0, 1] or a negative voltage or interval raises
        :class:`~quietwell.devices.BackendDataError` (a fault of the backend).
        """
        rep = await self._backend.feedback_report()
        volts, sats = [], []
        for a in AXES:
            v = float(rep.peak_voltage_v[a])
            f = float(rep.saturation[a])
            if not (math.isnan(v) or v >= 0) or not 0.0 <= f <= 1.0:
                raise BackendDataError(
                    f"{self.name}: backend feedback_report axis {a}: peak_voltage_v={v!r} V "
                    f"must be >= 0 (or nan) and saturation={f!r} within [0, 1]; fix the backend"
                )
            ax = self.axis(a)
            ax._set_voltage(v)
            ax._set_saturation(f)
            volts.append(v)
            sats.append(f)
        interval = float(rep.interval_s)
        if not (math.isfinite(interval) and interval >= 0):
            raise BackendDataError(
                f"{self.name}: backend feedback_report interval_s={interval!r} must be "
                "finite and >= 0 s; fix the backend"
            )
        finite = [v for v in volts if not math.isnan(v)]
        self._set_voltage(max(finite) if finite else math.nan)
        self._set_saturation(max(sats))
        self._set_interval(interval)
        return rep

    async def read(self) -> dict[str, Reading]:
        await self.refresh_feedback()
        return await super().read()
