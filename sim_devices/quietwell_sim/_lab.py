"""The simulated laboratory: one seeded object tying clock, particle, detectors and chamber.

Turning a valve changes the pressure the particle sees, hence the damping in the
next record. Random streams are independent children of one
:class:`numpy.random.SeedSequence` (particle, detector, heterodyne, gauges; each
gauge its own grandchild), so reading a gauge, or adding one, never changes the
particle's motion, and a seed makes a run bit-for-bit reproducible.

Faults on demand (for testing what watches an unattended run): :meth:`SimLab.lose_particle`,
:meth:`SimLab.pressure_burst`, :meth:`SimLab.gauge_dropout`,
:meth:`SimLab.change_charge` and :meth:`SimLab.saturate_drive` act now;
:meth:`SimLab.schedule_fault` runs any of them at a later simulated time. Every
duration runs on the sim clock, none draws a random number (so a fault never shifts
the random streams), and each start and end is written to :attr:`SimLab.fault_log`.
:meth:`SimLab.advance` stops at every fault time; a record holds the settings of its
start, so a fault due inside a record acts when the record ends, except a particle
loss, which shows from its own sample on.
"""

from __future__ import annotations

import heapq
import itertools
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from quietwell import InputError

from ._chamber import Chamber, ChamberParams, Gauge, GaugeKind, GaugeParams, GaugeReading
from ._clock import SimClock
from ._detector import Detector, DetectorParams, HeterodyneDetector, HeterodyneParams
from ._particle import GroundTruth, Particle, ParticleParams, TrapParams

__all__ = ["LabParams", "Record", "SimLab", "FaultEvent", "FAULT_KINDS"]

#: Fault kinds of :meth:`SimLab.schedule_fault`, each with its parameters (SI units).
FAULT_KINDS: dict[str, tuple[str, ...]] = {
    "lose_particle": (),
    "pressure_burst": ("factor", "duration_s"),
    "gauge_dropout": ("name", "duration_s", "mode"),
    "change_charge": ("delta_e",),
    "saturate_drive": ("duration_s", "axes"),
}


@dataclass(frozen=True)
class FaultEvent:
    """One entry of :attr:`SimLab.fault_log`.

    Attributes
    ----------
    time_s : float
        Simulated time in s at which it happened (or is due, for ``"scheduled"``).
    kind : str
        A key of :data:`FAULT_KINDS`.
    phase : str
        ``"scheduled"``, ``"start"`` or ``"end"`` (instant faults log ``"start"`` only).
    params : dict
        The fault's parameters in SI units.
    """

    time_s: float
    kind: str
    phase: str
    params: dict[str, Any]


#: Fault parameters with a default (``mode="fault"``, ``axes="xyz"``).
_OPTIONAL = ("mode", "axes")


def _duration(value: Any, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"{what} duration_s={value!r} must be a number of seconds > 0")
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"{what} duration_s={value!r} s must be finite and > 0")
    return float(value)


def _default_gauges() -> tuple[GaugeParams, ...]:
    return (GaugeParams("pirani", GaugeKind.THERMAL), GaugeParams("ion", GaugeKind.ION))


@dataclass(frozen=True)
class LabParams:
    """Everything that defines a simulated setup (SI units throughout).

    The defaults are an invented, realistic scenario: a 150 nm diameter sphere
    (density 1850 kg/m**3, charge 7 e) in a 0.3 W, 1064 nm trap with a 0.8 um waist
    (152, 171, 48 kHz), a 3e-13 m/sqrt(Hz) detector at 10 MS/s, and a chamber at
    10 mbar with a Pirani-type and an ionization gauge.

    Attributes
    ----------
    particle : ParticleParams
    trap : TrapParams
    detector : DetectorParams
    chamber : ChamberParams
    gauges : tuple of GaugeParams
        Names must be unique.
    heterodyne : HeterodyneParams or None
        Adds a ``heterodyne`` channel to every record when given.
    seed : int
        Seed of the whole laboratory.
    """

    particle: ParticleParams = field(default_factory=ParticleParams)
    trap: TrapParams = field(default_factory=TrapParams)
    detector: DetectorParams = field(default_factory=DetectorParams)
    chamber: ChamberParams = field(default_factory=ChamberParams)
    gauges: tuple[GaugeParams, ...] = field(default_factory=_default_gauges)
    heterodyne: HeterodyneParams | None = None
    seed: int = 0

    def __post_init__(self) -> None:
        names = [g.name for g in self.gauges]
        if len(set(names)) != len(names):
            raise InputError(f"gauge names {names} must be unique; rename the duplicates")
        if int(self.seed) != self.seed or self.seed < 0:
            raise InputError(f"seed={self.seed!r} must be a non-negative integer")


@dataclass(frozen=True)
class Record:
    """One acquired record.

    Attributes
    ----------
    volts : dict of str to ndarray
        float32 channels in V: ``x``, ``y``, ``z``, ``intensity`` (and ``heterodyne``).
    sample_rate : float
        Hz.
    start_time : float
        Simulated time of the first sample in s.
    truth : GroundTruth
        The truth at ``start_time`` (settings held over the record).
    clipped : dict of str to int
        ADC-clipped samples per channel.
    """

    volts: dict[str, np.ndarray]
    sample_rate: float
    start_time: float
    truth: GroundTruth
    clipped: dict[str, int]

    @property
    def n_samples(self) -> int:
        """Samples per channel."""
        return int(next(iter(self.volts.values())).shape[0])

    @property
    def duration(self) -> float:
        """Record duration in s."""
        return self.n_samples / self.sample_rate

    @property
    def units(self) -> dict[str, str]:
        """Units of every channel."""
        return {k: "V" for k in self.volts}


class SimLab:
    """The shared simulated laboratory (see module docs).

    Parameters
    ----------
    params : LabParams
        Setup; defaults to the invented scenario of :class:`LabParams`.
    """

    def __init__(self, params: LabParams | None = None) -> None:
        self.params = params = params or LabParams()
        root = np.random.SeedSequence(int(params.seed))
        s_particle, s_detector, s_het, s_gauges = root.spawn(4)
        # spawned after the first four, so adding it left their streams unchanged
        (s_monitor,) = root.spawn(1)
        self._monitor_rng = np.random.Generator(np.random.SFC64(s_monitor))
        self.clock = SimClock()
        self.chamber = Chamber(params.chamber, time=self.clock.now)
        self.particle = Particle(
            params.particle,
            params.trap,
            np.random.Generator(np.random.SFC64(s_particle)),
            gas=params.chamber.gas,
            pressure=self.chamber.pressure,
            time=self.clock.now,
        )
        self.particle.set_imprecision(params.detector.s_imp)
        self.detector = Detector(params.detector, np.random.Generator(np.random.SFC64(s_detector)))
        self.heterodyne = (
            HeterodyneDetector(params.heterodyne, np.random.Generator(np.random.SFC64(s_het)))
            if params.heterodyne is not None
            else None
        )
        seeds = s_gauges.spawn(len(params.gauges))
        self.gauges: dict[str, Gauge] = {
            g.name: Gauge(g, self.chamber, np.random.Generator(np.random.SFC64(s)))
            for g, s in zip(params.gauges, seeds, strict=True)
        }
        self.fault_log: list[FaultEvent] = []
        self._events: list[tuple[float, int, Callable[[float], None]]] = []
        self._seq = itertools.count()
        self._held_until = {a: -math.inf for a in "xyz"}

    # ---------------------------------------------------------------- time
    @property
    def now(self) -> float:
        """Simulated time in s."""
        return self.clock.now

    def advance(self, dt: float) -> None:
        """Let ``dt`` seconds (>= 0) pass without sampling.

        Chamber and particle move together in steps over which valves and pressure
        are held; each particle step is the exact O(1) jump, so hours cost
        milliseconds.
        """
        if not (math.isfinite(dt) and dt >= 0):
            raise InputError(f"{dt=} s must be finite and >= 0; time only moves forward")
        remaining = float(dt)
        t_end = self.clock.now + remaining
        tau = self.params.trap.instability_time
        self._fire_due(t_end - remaining)
        while remaining > 0:
            h = self.chamber.next_step(remaining)
            if self._events:
                h = min(h, max(self._events[0][0] - (t_end - remaining), 0.0))
            self.particle.set_pressure(self.chamber.pressure)
            if not self.particle.lost and np.any(self.particle.rates().unstable):
                h = min(h, 0.25 * tau)
            if h > 0:
                self.chamber.step(h)
                self.particle.propagate(h)
                remaining -= h
            self._fire_due(t_end - remaining)
        self.clock.advance(dt)
        self.particle.time = self.chamber.time = self.clock.now

    #: Every channel a record can hold; ``heterodyne`` only with heterodyne params.
    CHANNELS = ("x", "y", "z", "intensity", "heterodyne")

    def record(
        self, n_samples: int | None = None, channels: Iterable[str] | None = None
    ) -> Record:
        """Acquire one record of ``n_samples`` (default: the detector's record length).

        Advances the clock by the record duration. Pressure and settings are held
        over the record at their values at its start.

        Parameters
        ----------
        n_samples : int or None
            Samples per channel (>= 2).
        channels : iterable of str or None
            Which of :attr:`CHANNELS` to compute; ``None``: all there are. Only the
            requested ones are computed, so a motion record skips the (costly)
            heterodyne channel, and a record without ``x``, ``y``, ``z`` moves the
            particle by its exact O(1) jump instead of sampling it.
        """
        det = self.params.detector
        n = det.record_length if n_samples is None else n_samples
        if int(n) != n or n < 2:
            raise InputError(f"n_samples={n!r} must be an integer >= 2")
        n = int(n)
        available = self.CHANNELS if self.heterodyne is not None else self.CHANNELS[:4]
        if channels is None:
            want = set(available)
        else:
            want = {channels} if isinstance(channels, str) else set(channels)
            bad = sorted(want - set(available))
            if bad or not want:
                raise InputError(
                    f"channels={sorted(want)} must be a non-empty subset of {list(available)}"
                    + ("; this lab has no heterodyne detector" if "heterodyne" in bad else "")
                )
        fs = det.sample_rate
        dt = 1.0 / fs
        t0 = self.clock.now
        self._fire_due(t0)
        loss_at = self._loss_due_before(t0 + n * dt)
        self.particle.set_pressure(self.chamber.pressure)
        truth = self.particle.truth()
        was_lost = self.particle.lost
        motion = bool(want & {"x", "y", "z"})
        if motion:
            x = self.particle.sample(n, dt)
        else:
            self.particle.propagate(n * dt)
        if loss_at is not None and not self.particle.lost:
            k = min(n, max(0, int(math.ceil((loss_at - t0) * fs))))
            if motion:
                x[:, k:] = 0.0
            self.particle._mark_lost(t0 + k * dt)
        lost_from: int | None = None
        if self.particle.lost:
            lt = self.particle.lost_time if self.particle.lost_time is not None else t0
            lost_from = 0 if was_lost else min(n, max(0, int(round((lt - t0) * fs))))
        power_ratio = self.particle.laser_power / self.params.trap.power
        volts: dict[str, np.ndarray] = {}
        clipped: dict[str, int] = {}
        if motion:
            volts, clipped = self.detector.convert(x, lost_from, power_ratio)
        elif "intensity" in want:
            volts["intensity"], clipped["intensity"] = self.detector.intensity(
                n, lost_from, power_ratio
            )
        if "heterodyne" in want and self.heterodyne is not None:
            width = np.where(truth.total_damping > 0, truth.total_damping, 1e-3)
            volts["heterodyne"], clipped["heterodyne"] = self.heterodyne.record(
                n, fs, t0, truth.occupation, truth.frequencies, width, trapped=not was_lost
            )
        for name in [k for k in volts if k not in want]:
            del volts[name], clipped[name]
        self.chamber.advance(n * dt)
        self.clock.advance(n * dt)
        self.particle.time = self.chamber.time = self.clock.now
        self._fire_due(self.clock.now)
        return Record(volts, fs, t0, truth, clipped)

    def configure_detector(
        self, sample_rate: float | None = None, adc_range: float | None = None
    ) -> None:
        """Set the digitiser's sample rate (Hz) and full scale (+-V) for the next records.

        Values are checked as in :class:`DetectorParams` (rate within [1e3, 1e9] Hz,
        range > 0); the random streams carry on.
        """
        det = self.params.detector
        new = replace(
            det,
            sample_rate=det.sample_rate if sample_rate is None else float(sample_rate),
            adc_range=det.adc_range if adc_range is None else float(adc_range),
        )
        if new != det:
            self.params = replace(self.params, detector=new)
            self.detector.params = new

    def configure_heterodyne(self, adc_range: float) -> None:
        """Set the heterodyne digitiser's full scale (+-V, > 0)."""
        if self.heterodyne is None:
            raise InputError("this lab has no heterodyne detector; add HeterodyneParams")
        if not (math.isfinite(adc_range) and adc_range > 0):
            raise InputError(f"{adc_range=} V must be finite and > 0")
        het = replace(self.heterodyne.params, adc_range=float(adc_range))
        self.params = replace(self.params, heterodyne=het)
        self.heterodyne.params = het

    # ------------------------------------------------------------- settings
    def set_pressure_setpoint(self, pressure: float | None) -> None:
        """Regulate the chamber to ``pressure`` in Pa (``None``: stop regulating)."""
        self.chamber.set_setpoint(pressure)

    def set_valves(self, pump: float, bleed: float) -> None:
        """Set pump and bleed valve openings in [0, 1] by hand."""
        self.chamber.set_valves(pump, bleed)

    @property
    def pressure(self) -> float:
        """True chamber pressure in Pa (what no gauge tells exactly)."""
        return self.chamber.pressure

    @property
    def pressure_settled(self) -> bool:
        """True once the controller has held the setpoint for its hold time."""
        return self.chamber.settled

    def set_laser_power(self, power: float) -> None:
        """Power in the focus in W (refused outside ``(0, max_power]``)."""
        self.particle.set_laser_power(power)

    def laser_off(self) -> None:
        """Stop the trap light: with no trap the particle falls out, lost for good.

        The laser power the particle saw is kept (the model has no zero-power trap);
        from now on records hold only detector noise and the lost-intensity level.
        """
        if not self.particle.lost:
            self.particle._mark_lost(self.clock.now)

    def set_feedback_damping(self, gamma_fb: ArrayLike) -> None:
        """Cold-damping gains as added damping in 1/s, scalar or (x, y, z)."""
        self.particle.set_feedback_damping(gamma_fb)

    def set_parametric(self, eta: ArrayLike, phase: ArrayLike = 0.0) -> None:
        """Parametric gain ``eta`` in 1/m**2 and phase in rad, scalar or (x, y, z)."""
        self.particle.set_parametric(eta, phase)

    def set_drive(self, frequency: float, field: ArrayLike) -> None:
        """Drive tone at ``frequency`` (Hz) with field amplitude (V/m), scalar or (x, y, z)."""
        self.particle.set_drive(frequency, field)

    def drive_off(self) -> None:
        """Switch the drive tone off."""
        self.particle.set_drive(0.0, 0.0)

    def discharge(self, n: int) -> int:
        """Change the particle's charge by ``n`` e (integer); returns the new charge in e."""
        return self.particle.discharge(n)

    def read_gauge(self, name: str) -> GaugeReading:
        """Read gauge ``name`` now."""
        try:
            gauge = self.gauges[name]
        except KeyError:
            raise InputError(
                f"gauge {name=} does not exist; the setup has {sorted(self.gauges)}"
            ) from None
        return gauge.read()

    def truth(self) -> GroundTruth:
        """Ground truth now."""
        self.particle.set_pressure(self.chamber.pressure)
        return self.particle.truth()

    # ------------------------------------------------------------- electrodes
    def set_electrodes(
        self, distance: float, geometry_factor: float, voltage_max: float | None
    ) -> None:
        """Feedback electrodes: gap in m, geometry factor kappa, output limit in V (or None).

        The cold-damping output clips at ``voltage_max``, which weakens the damping
        (see :mod:`quietwell_sim._particle`).
        """
        self.particle.set_electrodes(distance, geometry_factor, voltage_max)

    def feedback_report(self) -> tuple[np.ndarray, np.ndarray, float]:
        """Feedback output since the previous call: peak |V| per axis (V), fraction of
        the time at the limit per axis (0..1) and the interval in s of sim time."""
        return self.particle.drive_report()

    #: Samples averaged by :meth:`intensity_now` (a 1024-sample mean).
    INTENSITY_SAMPLES = 1024

    def intensity_now(self) -> float:
        """The total-intensity channel now in V, a mean of :attr:`INTENSITY_SAMPLES`.

        The trapped level (scaled with the laser power) or the lost level, plus the
        detector's white intensity noise averaged over those samples. It draws from
        its own random stream (polling it never changes a record) and the clock does
        not move.
        """
        self._fire_due(self.clock.now)
        det = self.params.detector
        if self.particle.lost:
            level = det.lost_intensity_level
        else:
            level = det.intensity_level * self.particle.laser_power / self.params.trap.power
        sd = det.intensity_noise * math.sqrt(det.sample_rate / 2.0 / self.INTENSITY_SAMPLES)
        v = level + sd * float(self._monitor_rng.standard_normal())
        return float(min(max(v, -det.adc_range), det.adc_range))

    # ------------------------------------------------------------------ faults
    def _push(self, t: float, action: Callable[[float], None]) -> None:
        heapq.heappush(self._events, (float(t), next(self._seq), action))

    def _fire_due(self, t: float) -> None:
        while self._events and self._events[0][0] <= t:
            t_ev, _, action = heapq.heappop(self._events)
            action(t_ev)

    def _loss_due_before(self, t_end: float) -> float | None:
        losses = [t for t, _, a in self._events if t < t_end and getattr(a, "is_loss", False)]
        if not losses:
            return None
        t_l = min(losses)
        self._events = [e for e in self._events if not (e[0] == t_l and getattr(e[2], "is_loss", False))]
        heapq.heapify(self._events)
        self.fault_log.append(FaultEvent(t_l, "lose_particle", "start", {}))
        return t_l

    def _log(self, t: float, kind: str, phase: str, **params: Any) -> None:
        self.fault_log.append(FaultEvent(float(t), kind, phase, dict(params)))

    def _lose(self, t: float) -> None:
        self._log(t, "lose_particle", "start")
        if not self.particle.lost:
            self.particle._mark_lost(t)

    def lose_particle(self) -> None:
        """Lose the particle now (it leaves the trap for good; the intensity drops)."""
        self._lose(self.clock.now)

    def _check_burst(self, factor: Any, duration_s: Any) -> tuple[float, float]:
        if isinstance(factor, bool) or not isinstance(factor, int | float):
            raise InputError(f"pressure_burst factor={factor!r} must be a number > 0")
        if not (math.isfinite(factor) and factor > 0):
            raise InputError(
                f"pressure_burst factor={factor!r} must be finite and > 0 (e.g. 30 for a leak)"
            )
        return float(factor), _duration(duration_s, "pressure_burst")

    def _burst(self, t: float, factor: float, duration_s: float) -> None:
        self.chamber.add_burst(factor)
        self._log(t, "pressure_burst", "start", factor=factor, duration_s=duration_s)

        def end(t_end: float) -> None:
            self.chamber.remove_burst(factor)
            self._log(t_end, "pressure_burst", "end", factor=factor, duration_s=duration_s)

        self._push(t + duration_s, end)

    def pressure_burst(self, factor: float, duration_s: float) -> None:
        """Multiply the true chamber pressure by ``factor`` (> 0) for ``duration_s`` (s).

        A leak or a wrong valve: the pressure steps up now and back after
        ``duration_s`` of sim time; gauges and particle see it (see
        :mod:`quietwell_sim._chamber`).
        """
        f, d = self._check_burst(factor, duration_s)
        self._burst(self.clock.now, f, d)

    def _check_dropout(self, name: Any, duration_s: Any, mode: Any) -> tuple[str, float, str]:
        if name not in self.gauges:
            raise InputError(
                f"gauge_dropout name={name!r} is not a gauge; the setup has {sorted(self.gauges)}"
            )
        if mode not in Gauge.DROPOUT_MODES:
            raise InputError(
                f"gauge_dropout mode={mode!r} is not known; use one of {list(Gauge.DROPOUT_MODES)}"
            )
        return str(name), _duration(duration_s, "gauge_dropout"), str(mode)

    def _dropout(self, t: float, name: str, duration_s: float, mode: str) -> None:
        self.gauges[name].drop_out(t, t + duration_s, mode)
        self._log(t, "gauge_dropout", "start", name=name, duration_s=duration_s, mode=mode)

        def end(t_end: float) -> None:
            self._log(t_end, "gauge_dropout", "end", name=name, duration_s=duration_s, mode=mode)

        self._push(t + duration_s, end)

    def gauge_dropout(self, name: str, duration_s: float, mode: str = "fault") -> None:
        """Gauge ``name`` fails every read for ``duration_s`` (s) of sim time from now.

        ``mode``: ``"fault"`` (nan, status FAULT), ``"sensor_off"`` (nan, SENSOR_OFF) or
        ``"over_range"`` (a nonsense value ten times the range maximum, which the
        gauge device reports as over range). See :meth:`Gauge.drop_out`.
        """
        n, d, m = self._check_dropout(name, duration_s, mode)
        self._dropout(self.clock.now, n, d, m)

    @staticmethod
    def _check_delta(delta_e: Any) -> int:
        if isinstance(delta_e, bool) or not isinstance(delta_e, int | float) or (
            int(delta_e) != delta_e
        ):
            raise InputError(
                f"change_charge delta_e={delta_e!r} must be a whole number of elementary charges"
            )
        return int(delta_e)

    def _charge(self, t: float, delta_e: int) -> None:
        new = self.particle.discharge(delta_e)
        self._log(t, "change_charge", "start", delta_e=delta_e, charge_e=new)

    def change_charge(self, delta_e: int) -> int:
        """Change the particle's charge by ``delta_e`` e now (a stray discharge, a UV
        flash); returns the new charge in e. The feedback then needs
        ``q_old/q_new`` times the voltage for the same damping."""
        d = self._check_delta(delta_e)
        self._charge(self.clock.now, d)
        return self.particle.charge

    @staticmethod
    def _check_axes(axes: Any) -> str:
        if not isinstance(axes, str) or not axes or set(axes) - set("xyz") or len(
            set(axes)
        ) != len(axes):
            raise InputError(
                f"saturate_drive axes={axes!r} must be some of 'x', 'y', 'z' as one string, "
                "e.g. 'xyz' or 'z'"
            )
        return "".join(a for a in "xyz" if a in axes)

    def _apply_held(self, t: float) -> None:
        self.particle.hold_drive([self._held_until[a] > t for a in "xyz"])

    def _saturate(self, t: float, duration_s: float, axes: str) -> None:
        for a in axes:
            self._held_until[a] = max(self._held_until[a], t + duration_s)
        self._apply_held(t)
        self._log(t, "saturate_drive", "start", duration_s=duration_s, axes=axes)

        def end(t_end: float) -> None:
            self._apply_held(t_end)
            self._log(t_end, "saturate_drive", "end", duration_s=duration_s, axes=axes)

        self._push(t + duration_s, end)

    def saturate_drive(self, duration_s: float, axes: str = "xyz") -> None:
        """Hold the feedback output of ``axes`` at its voltage limit for ``duration_s`` (s).

        The physical cause modelled: an excess input on the feedback electronics
        drives the amplifier into its rail. The held axes get a constant force and no
        cold damping (below the loss pressure they become unstable, as without
        feedback) and report saturation 1 at the limit voltage.
        """
        d, a = _duration(duration_s, "saturate_drive"), self._check_axes(axes)
        self._saturate(self.clock.now, d, a)

    def schedule_fault(self, kind: str, at_s: float | None = None, **params: Any) -> FaultEvent:
        """Run fault ``kind`` at simulated time ``at_s`` (s; ``None``: now).

        ``kind`` and ``params`` (SI units) are those of the methods of the same name:
        ``lose_particle()``, ``pressure_burst(factor, duration_s)``,
        ``gauge_dropout(name, duration_s, mode="fault")``, ``change_charge(delta_e)``,
        ``saturate_drive(duration_s, axes="xyz")``. Parameters are checked now, so a
        bad one fails at once with a one-line :class:`~quietwell.InputError`. Returns
        the ``"scheduled"`` entry written to :attr:`fault_log`.
        """
        if kind not in FAULT_KINDS:
            raise InputError(f"fault kind={kind!r} is not known; use one of {list(FAULT_KINDS)}")
        allowed = FAULT_KINDS[kind]
        extra = sorted(set(params) - set(allowed))
        if extra:
            raise InputError(
                f"fault {kind!r} takes {list(allowed) or 'no parameters'}, not {extra}"
            )
        now = self.clock.now
        if at_s is None:
            t = now
        elif isinstance(at_s, bool) or not isinstance(at_s, int | float) or not math.isfinite(
            at_s
        ):
            raise InputError(f"fault {kind!r} at_s={at_s!r} must be a sim time in s (or None)")
        elif at_s < now:
            raise InputError(
                f"fault {kind!r} at_s={at_s!r} s is in the past (sim time is {now!r} s); "
                "give a time >= now"
            )
        else:
            t = float(at_s)
        missing = [k for k in allowed if k not in params and k not in _OPTIONAL]
        if missing:
            raise InputError(f"fault {kind!r} needs {missing} (of {list(allowed)}); add them")
        action = self._fault_action(kind, params)
        event = FaultEvent(t, kind, "scheduled", dict(params))
        self.fault_log.append(event)
        self._push(t, action)
        if t == now:
            self._fire_due(now)
        return event

    def _fault_action(self, kind: str, params: dict[str, Any]) -> Callable[[float], None]:
        if kind == "lose_particle":
            return _Loss(self._lose)
        if kind == "pressure_burst":
            f, d = self._check_burst(params["factor"], params["duration_s"])
            return lambda t: self._burst(t, f, d)
        if kind == "gauge_dropout":
            n, d, m = self._check_dropout(
                params["name"], params["duration_s"], params.get("mode", "fault")
            )
            return lambda t: self._dropout(t, n, d, m)
        if kind == "change_charge":
            q = self._check_delta(params["delta_e"])
            return lambda t: self._charge(t, q)
        d, a = _duration(params["duration_s"], "saturate_drive"), self._check_axes(
            params.get("axes", "xyz")
        )
        return lambda t: self._saturate(t, d, a)


class _Loss:
    """A scheduled particle loss (a record shows it from its own sample on)."""

    is_loss = True

    def __init__(self, action: Callable[[float], None]) -> None:
        self._action = action

    def __call__(self, t: float) -> None:
        self._action(t)
