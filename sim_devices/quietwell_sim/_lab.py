"""The simulated laboratory: one seeded object tying clock, particle, detectors and chamber.

Turning a valve changes the pressure the particle sees, hence the damping in the
next record. Random streams are independent children of one
:class:`numpy.random.SeedSequence` (particle, detector, heterodyne, gauges; each
gauge its own grandchild), so reading a gauge, or adding one, never changes the
particle's motion, and a seed makes a run bit-for-bit reproducible.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import ArrayLike

from quietwell import InputError

from ._chamber import Chamber, ChamberParams, Gauge, GaugeKind, GaugeParams, GaugeReading
from ._clock import SimClock
from ._detector import Detector, DetectorParams, HeterodyneDetector, HeterodyneParams
from ._particle import GroundTruth, Particle, ParticleParams, TrapParams

__all__ = ["LabParams", "Record", "SimLab"]


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
        tau = self.params.trap.instability_time
        while remaining > 0:
            h = self.chamber.next_step(remaining)
            self.particle.set_pressure(self.chamber.pressure)
            if not self.particle.lost and np.any(self.particle.rates().unstable):
                h = min(h, 0.25 * tau)
            self.chamber.step(h)
            self.particle.propagate(h)
            remaining -= h
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
        self.particle.set_pressure(self.chamber.pressure)
        truth = self.particle.truth()
        was_lost = self.particle.lost
        motion = bool(want & {"x", "y", "z"})
        if motion:
            x = self.particle.sample(n, dt)
        else:
            self.particle.propagate(n * dt)
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
