"""Backends of the device protocols of :mod:`quietwell.devices`, all on one :class:`SimLab`.

Each class implements one protocol (``MotionBackend``, ``ElectrodeBackend``, ...)
by calling the shared laboratory. The coroutines never await anything: a
simulated instrument answers at once, and time passes only where the protocol
says so (``wait``) or where acquisition takes it (a record of ``n`` samples at
rate ``fs`` advances the sim clock by ``n/fs``). Nothing sleeps on the wall clock.

Values arrive validated by the devices against the setup's limits; the sim
checks again what it cannot do and raises :class:`~quietwell.LimitError` or
:class:`~quietwell.InputError` with a one-line message.

Conventions that the simulation fixes (and a real backend would take from its
calibration):

* **Cold damping** (:class:`SimElectrodes`): the gain of an axis *is* the added
  energy damping ``gamma_fb`` in 1/s, applied only while that axis is enabled.
  The loop delay is stored and reported but does not enter the motion: the sim
  assumes the electronics' calibration already compensates the ``cos(Omega0 tau)``
  loss of damping a delay ``tau`` causes, and it does not model the small
  frequency shift ``gamma_fb sin(Omega0 tau)/2``.
* **Feedback output** (:class:`SimElectrodes`): the voltage the cold-damping force
  needs, ``V = m gamma_fb v d/(q e kappa)``, clipped at the setup's
  ``limits.electrode_voltage_max``; the clipped force damps less (see
  :mod:`quietwell_sim._particle`). ``feedback_report`` gives the largest magnitude
  since the previous report and the fraction of that sim time at the limit.
* **Drive tone**: one electrode pair along x, field amplitude ``E0 = kappa V0/d``
  (``kappa`` and ``d`` from the setup's ``[electrodes]``); the tone acts on the
  particle through its charge only.
* **Charge** (:class:`SimCharge`): one discharge step moves exactly one elementary
  charge (sign as requested).
* **Laser** (:class:`SimLaser`): power in W goes to the lab; emission off (or a
  power of 0 W) takes the trap away and the particle is lost for good, as in the
  laboratory; emission on again restores the power but not the particle.
  The modulation depth ``delta`` (peak ``dP/P``) maps to the sim's parametric gain
  ``eta`` (1/m**2, force ``-m eta Omega0 x**2 dx/dt``) through
  ``delta = eta x_ref**2`` with ``x_ref**2 = k_B T/(m Omega0**2)`` per axis, the
  thermal position variance at the setup's temperature and the current trap
  frequency: a depth ``delta`` modulates the stiffness of a thermal-amplitude
  particle by about ``delta``. The same depth and phase act on all three axes;
  phase 0 cools (the sim's effective gain is ``eta cos(phase)``), pi heats.
* **Pressure** (:class:`SimPressure`): the controller regulates on, and reports,
  the *true* chamber pressure (an ideal controller sensor); plans take the
  pressure of a measurement from the gauges.
"""

from __future__ import annotations

import math

import numpy as np

from quietwell import InputError, LimitError
from quietwell import physics as ph
from quietwell.devices import (
    ElectrodeState,
    FeedbackReport,
    GaugeStatus,
    HeterodyneRecord,
    LaserState,
    RecordData,
)

from ._chamber import GaugeStatus as SimGaugeStatus
from ._lab import Record, SimLab

__all__ = [
    "SimMotion",
    "SimHeterodyne",
    "SimElectrodes",
    "SimCharge",
    "SimLaser",
    "SimGauge",
    "SimPressure",
    "SimClockBackend",
    "SAMPLE_RATE_RANGE_HZ",
]

#: Sample rates (Hz) the simulated digitiser can run at (those of DetectorParams).
SAMPLE_RATE_RANGE_HZ = (1e3, 1e9)

_STATUS = {
    SimGaugeStatus.OK: GaugeStatus.OK,
    SimGaugeStatus.OVER_RANGE: GaugeStatus.OVER_RANGE,
    SimGaugeStatus.UNDER_RANGE: GaugeStatus.UNDER_RANGE,
    SimGaugeStatus.SENSOR_OFF: GaugeStatus.SENSOR_OFF,
    SimGaugeStatus.FAULT: GaugeStatus.FAULT,
}


def _check_digitiser(sample_rate_hz: float, input_range_v: float) -> tuple[float, float]:
    lo, hi = SAMPLE_RATE_RANGE_HZ
    rate, rng = float(sample_rate_hz), float(input_range_v)
    if not (math.isfinite(rate) and lo <= rate <= hi):
        raise LimitError(
            f"sample_rate={sample_rate_hz!r} Hz is outside what the simulated digitiser "
            f"runs at, [{lo:g}, {hi:g}] Hz; choose a rate inside it"
        )
    if not (math.isfinite(rng) and rng > 0):
        raise LimitError(f"input_range={input_range_v!r} V must be finite and > 0 V")
    return rate, rng


class SimMotion:
    """``MotionBackend``: the lab's position detector (x, y, z, intensity; no heterodyne).

    Parameters
    ----------
    lab : SimLab
        The shared laboratory; its detector settings are the initial ones.

    Notes
    -----
    ``configure`` stores the rate and range; each ``record`` applies them to the
    lab's detector first (the heterodyne backend may have run at another rate).
    ``last_record`` keeps the last :class:`~quietwell_sim.Record` (with its truth).
    """

    CHANNELS = ("x", "y", "z", "intensity")

    def __init__(self, lab: SimLab) -> None:
        self._lab = lab
        det = lab.params.detector
        self.sample_rate_hz = float(det.sample_rate)
        self.input_range_v = float(det.adc_range)
        self.last_record: Record | None = None

    async def configure(self, sample_rate_hz: float, input_range_v: float) -> None:
        """Set the sample rate (Hz) and ADC full scale (+-V)."""
        self.sample_rate_hz, self.input_range_v = _check_digitiser(sample_rate_hz, input_range_v)

    async def record(self, n_samples: int) -> RecordData:
        """One record of ``n_samples`` per channel, float32 V; sim-clock start time (s)."""
        self._lab.configure_detector(self.sample_rate_hz, self.input_range_v)
        rec = self._lab.record(n_samples, channels=self.CHANNELS)
        self.last_record = rec
        v = rec.volts
        return RecordData(
            x=v["x"],
            y=v["y"],
            z=v["z"],
            intensity=v["intensity"],
            sample_rate_hz=float(rec.sample_rate),
            start_time_s=float(rec.start_time),
        )

    async def read_intensity(self) -> float:
        """The intensity level now in V (:meth:`SimLab.intensity_now`); no sim time passes."""
        return self._lab.intensity_now()


class SimHeterodyne:
    """``HeterodyneBackend``: the lab's sideband detector (beat) plus the intensity monitor.

    Only these two channels are computed; the particle moves by its exact jump
    over the record (no position samples).
    """

    def __init__(self, lab: SimLab) -> None:
        if lab.heterodyne is None:
            raise InputError(
                "the lab has no heterodyne detector; give the setup a [detector] heterodyne_carrier > 0 Hz"
            )
        self._lab = lab
        self.sample_rate_hz = float(lab.params.detector.sample_rate)
        self.input_range_v = float(lab.heterodyne.params.adc_range)
        self.last_record: Record | None = None

    def _check_sidebands(self, rate: float) -> None:
        het = self._lab.heterodyne
        assert het is not None
        stokes, anti = het.sideband_frequencies(self._lab.truth().frequencies)
        top = float(max(stokes.max(), anti.max()))
        if top >= rate / 2:
            raise LimitError(
                f"sample_rate={rate:g} Hz puts the highest sideband {top:g} Hz at or above "
                f"the Nyquist frequency {rate / 2:g} Hz; sample faster than {2 * top:g} Hz"
            )

    async def configure(self, sample_rate_hz: float, input_range_v: float) -> None:
        """Set the sample rate (Hz; every sideband below Nyquist) and full scale (+-V)."""
        rate, rng = _check_digitiser(sample_rate_hz, input_range_v)
        self._check_sidebands(rate)
        self.sample_rate_hz, self.input_range_v = rate, rng

    async def record(self, n_samples: int) -> HeterodyneRecord:
        """One record: ``beat`` and ``intensity`` (float32 V), start time on the sim clock."""
        self._lab.configure_detector(sample_rate=self.sample_rate_hz)
        self._lab.configure_heterodyne(self.input_range_v)
        rec = self._lab.record(n_samples, channels=("heterodyne", "intensity"))
        self.last_record = rec
        return HeterodyneRecord(
            beat=rec.volts["heterodyne"],
            intensity=rec.volts["intensity"],
            sample_rate_hz=float(rec.sample_rate),
            start_time_s=float(rec.start_time),
        )

    async def read_intensity(self) -> float:
        """The intensity level now in V (:meth:`SimLab.intensity_now`); no sim time passes."""
        return self._lab.intensity_now()


class SimElectrodes:
    """``ElectrodeBackend``: cold damping per axis and the drive tone (see module docs).

    Parameters
    ----------
    lab : SimLab
    distance_m : float
        Electrode gap ``d`` in m (> 0).
    geometry_factor : float
        ``kappa`` (dimensionless): the field is ``kappa V/d``.
    loop_delay_s : float
        Loop delay the electronics hold initially, s (stored, not simulated).
    drive_frequency_hz : float
        Initial drive-tone frequency in Hz (the tone starts off).
    voltage_limit_v : float or None
        Where the feedback output clips, V (> 0; ``None``: never).
    """

    def __init__(
        self,
        lab: SimLab,
        distance_m: float,
        geometry_factor: float,
        loop_delay_s: float = 0.0,
        drive_frequency_hz: float = 1e3,
        voltage_limit_v: float | None = None,
    ) -> None:
        if not (math.isfinite(distance_m) and distance_m > 0):
            raise InputError(f"electrode {distance_m=} m must be finite and > 0")
        self._lab = lab
        lab.set_electrodes(distance_m, geometry_factor, voltage_limit_v)
        self.distance_m = float(distance_m)
        self.geometry_factor = float(geometry_factor)
        self._gain = dict.fromkeys(ph.AXES, 0.0)
        self._delay = dict.fromkeys(ph.AXES, float(loop_delay_s))
        self._enabled = dict.fromkeys(ph.AXES, False)
        self._drive_f = float(drive_frequency_hz)
        self._drive_v = 0.0
        self._drive_on = False
        self._apply_damping()
        self._apply_drive()

    def _axis(self, axis: str) -> str:
        if axis not in ph.AXES:
            raise InputError(f"{axis=} is not an axis; choose one of {', '.join(ph.AXES)}")
        return axis

    def _apply_damping(self) -> None:
        self._lab.set_feedback_damping(
            [self._gain[a] if self._enabled[a] else 0.0 for a in ph.AXES]
        )

    def drive_field_v_per_m(self) -> float:
        """Field amplitude in V/m of the tone now (0 when off)."""
        if not self._drive_on:
            return 0.0
        return self.geometry_factor * self._drive_v / self.distance_m

    def _apply_drive(self) -> None:
        field = self.drive_field_v_per_m()
        if field == 0.0:
            self._lab.drive_off()
        else:
            self._lab.set_drive(self._drive_f, (field, 0.0, 0.0))

    async def state(self) -> ElectrodeState:
        """What the (simulated) electronics hold now."""
        return ElectrodeState(
            gain_per_s=dict(self._gain),
            delay_s=dict(self._delay),
            enabled=dict(self._enabled),
            drive_frequency_hz=self._drive_f,
            drive_amplitude_v=self._drive_v,
            drive_enabled=self._drive_on,
        )

    async def set_gain(self, axis: str, gain_per_s: float) -> None:
        """Added damping of ``axis`` in 1/s (acts while the axis is enabled)."""
        self._gain[self._axis(axis)] = float(gain_per_s)
        self._apply_damping()

    async def set_delay(self, axis: str, delay_s: float) -> None:
        """Loop delay of ``axis`` in s (stored; see module docs)."""
        self._delay[self._axis(axis)] = float(delay_s)

    async def set_enabled(self, axis: str, enabled: bool) -> None:
        """Close or open the loop of ``axis``."""
        self._enabled[self._axis(axis)] = bool(enabled)
        self._apply_damping()

    async def set_drive_frequency(self, frequency_hz: float) -> None:
        """Drive-tone frequency in Hz."""
        self._drive_f = float(frequency_hz)
        self._apply_drive()

    async def set_drive_amplitude(self, amplitude_v: float) -> None:
        """Drive-tone peak amplitude in V."""
        self._drive_v = float(amplitude_v)
        self._apply_drive()

    async def set_drive_enabled(self, enabled: bool) -> None:
        """Drive tone on or off."""
        self._drive_on = bool(enabled)
        self._apply_drive()

    async def feedback_report(self) -> FeedbackReport:
        """Peak |V| (V) and fraction at the limit (0..1) per axis since the previous
        report, and its length in s of sim time (see module docs)."""
        peak, sat, interval = self._lab.feedback_report()
        return FeedbackReport(
            peak_voltage_v={a: float(peak[i]) for i, a in enumerate(ph.AXES)},
            saturation={a: float(min(max(sat[i], 0.0), 1.0)) for i, a in enumerate(ph.AXES)},
            interval_s=float(interval),
        )


class SimCharge:
    """``ChargeBackend``: each step changes the particle's charge by one e."""

    def __init__(self, lab: SimLab) -> None:
        self._lab = lab

    async def discharge(self, steps: int) -> None:
        """Fire ``abs(steps)`` pulses of polarity ``sign(steps)``."""
        self._lab.discharge(int(steps))


class SimLaser:
    """``LaserBackend``: trap power and parametric modulation (see module docs)."""

    def __init__(self, lab: SimLab) -> None:
        self._lab = lab
        self._power = float(lab.particle.laser_power)
        self._emission = True
        self._depth = 0.0
        self._phase = 0.0
        self._mod_on = False

    @property
    def emitted_power_w(self) -> float:
        """Power reaching the trap now in W (0 with emission off)."""
        return self._power if self._emission else 0.0

    def eta_for_depth(self, depth: float) -> np.ndarray:
        """Parametric gain ``eta`` (x, y, z) in 1/m**2 for modulation depth ``depth``.

        ``eta = depth/x_ref**2``, ``x_ref**2 = k_B T/(m Omega0**2)`` at the current
        trap frequencies.
        """
        truth = self._lab.truth()
        x_ref2 = ph.K_B * self._lab.params.particle.temperature / (truth.mass * truth.omega0**2)
        return float(depth) / x_ref2

    def _apply_modulation(self) -> None:
        if self._mod_on and self._emission and self._depth > 0:
            self._lab.set_parametric(self.eta_for_depth(self._depth), self._phase)
        else:
            self._lab.set_parametric(0.0, 0.0)

    def _apply_power(self) -> None:
        if self.emitted_power_w > 0:
            self._lab.set_laser_power(self._power)
        else:
            self._lab.laser_off()

    async def state(self) -> LaserState:
        """Setpoint (W), emission and modulation settings."""
        return LaserState(self._power, self._emission, self._depth, self._phase, self._mod_on)

    async def set_power(self, power_w: float) -> None:
        """Power in the focus in W; 0 W takes the trap away (the particle is lost)."""
        p = float(power_w)
        if not (math.isfinite(p) and p >= 0):
            raise LimitError(f"laser power={power_w!r} W must be finite and >= 0 W")
        max_p = self._lab.params.trap.max_power
        if p > max_p:
            raise LimitError(
                f"laser power={p:g} W is outside the simulated laser's [0, {max_p:g}] W; "
                "lower it or raise laser_power_max in the setup"
            )
        self._power = p
        self._apply_power()
        self._apply_modulation()  # eta follows the new trap frequencies

    async def set_emission(self, enabled: bool) -> None:
        """Emission on or off (off loses the particle; on does not bring it back)."""
        self._emission = bool(enabled)
        self._apply_power()
        self._apply_modulation()

    async def set_modulation_depth(self, depth: float) -> None:
        """Peak ``dP/P`` in [0, 1)."""
        d = float(depth)
        if not (math.isfinite(d) and 0 <= d < 1):
            raise LimitError(f"modulation depth={depth!r} must be within [0, 1) (peak dP/P)")
        self._depth = d
        self._apply_modulation()

    async def set_modulation_phase(self, phase_rad: float) -> None:
        """Phase in rad (0 cools, pi heats)."""
        self._phase = float(phase_rad)
        self._apply_modulation()

    async def set_modulation_enabled(self, enabled: bool) -> None:
        """Parametric feedback on or off."""
        self._mod_on = bool(enabled)
        self._apply_modulation()

    async def read_power(self) -> float:
        """Power reaching the trap in W (an ideal monitor; 0 with emission off)."""
        return self.emitted_power_w


class SimGauge:
    """``GaugeBackend`` of the lab's gauge ``name``: (Pa, device status)."""

    def __init__(self, lab: SimLab, name: str) -> None:
        if name not in lab.gauges:
            raise InputError(f"gauge {name=} does not exist; the lab has {sorted(lab.gauges)}")
        self._lab = lab
        self.name = name

    async def read(self) -> tuple[float, GaugeStatus]:
        """One reading in Pa and its status."""
        r = self._lab.read_gauge(self.name)
        return float(r.value), _STATUS[r.status]


class SimPressure:
    """``PressureBackend``: the chamber's controller; reports the true pressure (Pa)."""

    def __init__(self, lab: SimLab) -> None:
        self._lab = lab

    async def set_setpoint(self, pressure_pa: float) -> None:
        """Regulate to ``pressure_pa`` (Pa)."""
        self._lab.set_pressure_setpoint(float(pressure_pa))

    async def read_pressure(self) -> float:
        """The true chamber pressure in Pa (the controller's ideal sensor)."""
        return float(self._lab.pressure)

    async def is_settled(self) -> bool:
        """True once the chamber has held the setpoint for its hold time."""
        return bool(self._lab.pressure_settled)

    async def now(self) -> float:
        """Sim time in s."""
        return float(self._lab.now)

    async def wait(self, duration_s: float) -> None:
        """Let ``duration_s`` of sim time pass (no wall-clock sleep)."""
        self._lab.advance(float(duration_s))


class SimClockBackend:
    """``ClockBackend``: the sim clock; ``wait`` advances the whole laboratory."""

    def __init__(self, lab: SimLab) -> None:
        self._lab = lab

    async def now(self) -> float:
        """Sim time in s."""
        return float(self._lab.now)

    async def wait(self, duration_s: float) -> None:
        """Let ``duration_s`` of sim time pass."""
        self._lab.advance(float(duration_s))
