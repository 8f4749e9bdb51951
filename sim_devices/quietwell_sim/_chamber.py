"""Vacuum chamber, pressure controller and gauges of the simulated laboratory.

Chamber model (phenomenological, SI units): one volume ``V`` pumped through a pump
valve (opening ``u_p`` in [0, 1], speed ``S u_p``) and fed through a bleed valve
(``u_b`` in [0, 1], throughput ``Q_b u_b``)::

    dp/dt = -(S u_p/V) (p - p_base) + (Q_b u_b + Q_des(a))/V

The surface desorption load ``Q_des(a) = Q_0 t_1/(a + t_1)`` falls as 1/a with
the pumping age ``a`` (the 1/t outgassing law of unbaked metal, common practice,
no source), so the fast exponential pump-out (``V/S``, about a second) is followed
by hours of slow decay at low pressure; ``a`` resets to zero whenever the pressure
is above ``resaturation_pressure`` (surfaces re-covered). With the defaults the
chamber goes from 10 mbar to 1e-8 mbar in about 3.5 hours and approaches the base
pressure 2e-9 mbar over days. Between controller updates the coefficients are
constant and the solution is the exact exponential.

Pressure burst (a fault on demand: a leak, a valve opened by mistake): while
bursts are active the true pressure is the pumped pressure above times the product
of their factors (:meth:`Chamber.add_burst`, :meth:`Chamber.remove_burst`). It
steps up at once and back at once: the pump-out time ``V/S`` (about a second) is
short against a burst of minutes. The controller does not fight it (it sets the
valves for the setpoint's equilibrium), but it no longer reports *settled*.

Pressure controller: with a setpoint the valves are chosen so that the equilibrium
pressure equals the setpoint (full pumping, bleed trimmed; the pump valve throttled
when even the full bleed is not enough). It reports *settled* once the pressure
stays within ``settle_tolerance`` (relative) of the setpoint for ``settle_hold``
seconds.

Gauges read in Pa. Thermal-conductivity gauge (Pirani type): 5e-2 Pa ... 1e5 Pa
(5e-4 ... 1000 mbar), stated accuracy +-15 % of reading, gas factor of
:data:`THERMAL_GAS_FACTORS`. Ionization gauge: hot cathode, 1e-7 ... 1 Pa (1e-9 ...
1e-2 mbar), stated accuracy +-15 % of reading, reading ``S_gas p_true`` with ``S``
from :data:`quietwell.physics.GASES` (CRC Handbook), cathode off for protection
above 5 Pa and on again below it (unless switched off by hand). Capacitance
diaphragm gauge: a membrane's deflection, so gas-independent (gas factor 1),
1e-2 ... 1.3e3 Pa (1e-4 ... 13 mbar, four decades below a 10 Torr head), stated
accuracy +-0.25 % of reading (typically 0.2-0.5 %). Each instance
carries a fixed calibration error drawn uniformly within 80 % of its accuracy plus
a read noise within 10 % of it, and displays 3 significant digits by default (0.5 %
at most; give a 0.25 % capacitance gauge 5), so that every reading is within the
stated accuracy. Typical ranges and
accuracies: common practice (memory), see PHYSICS.md section 7.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np

from quietwell import InputError, LimitError
from quietwell import physics as ph

__all__ = [
    "ChamberParams",
    "Chamber",
    "GaugeKind",
    "GaugeParams",
    "GaugeStatus",
    "GaugeReading",
    "Gauge",
    "THERMAL_GAS_FACTORS",
]

#: Thermal-conductivity gauge: indicated/true pressure for an N2-calibrated gauge,
#: below ~10 mbar (inverse of typical manufacturer correction factors; memory,
#: common practice). Non-linear above ~10 mbar in reality; modelled as constant.
THERMAL_GAS_FACTORS: dict[str, float] = {
    "N2": 1.0,
    "CO": 1.0,
    "O2": 1.0,
    "He": 1.0 / 0.8,
    "Ne": 1.0 / 1.4,
    "Ar": 1.0 / 1.6,
    "H2": 1.0 / 0.5,
    "H2O": 1.0 / 0.6,
    "CO2": 1.0 / 0.89,
}


@dataclass(frozen=True)
class ChamberParams:
    """Vacuum chamber and controller (SI units).

    Attributes
    ----------
    volume : float
        m**3 (default 0.01).
    pump_speed : float
        Effective pumping speed at a fully open pump valve in m**3/s (default 0.01).
    base_pressure : float
        Pa (default 2e-7 Pa = 2e-9 mbar).
    bleed_throughput : float
        Gas throughput of the fully open bleed valve in Pa m**3/s (default 10).
    desorption_throughput : float
        ``Q_0`` in Pa m**3/s at age 0 (default 1e-5).
    desorption_time : float
        ``t_1`` in s (default 10).
    resaturation_pressure : float
        Pa above which the pumping age resets (default 10 Pa).
    initial_pressure : float
        Pa (default 1000 Pa = 10 mbar).
    gas : str
        Background gas, a key of :data:`quietwell.physics.GASES` (default "N2").
    settle_tolerance : float
        Relative band around the setpoint (default 0.03).
    settle_hold : float
        Time in s the pressure must stay in the band (default 5).
    max_pressure : float
        Largest accepted setpoint in Pa (default 1e5).
    """

    volume: float = 0.01
    pump_speed: float = 0.01
    base_pressure: float = 2e-7
    bleed_throughput: float = 10.0
    desorption_throughput: float = 1e-5
    desorption_time: float = 10.0
    resaturation_pressure: float = 10.0
    initial_pressure: float = 1000.0
    gas: str = "N2"
    settle_tolerance: float = 0.03
    settle_hold: float = 5.0
    max_pressure: float = 1e5

    def __post_init__(self) -> None:
        for name in (
            "volume",
            "pump_speed",
            "base_pressure",
            "bleed_throughput",
            "desorption_time",
            "initial_pressure",
            "settle_tolerance",
            "max_pressure",
        ):
            val = getattr(self, name)
            if not (math.isfinite(val) and val > 0):
                raise InputError(f"{name}={val!r} must be finite and > 0 (SI units)")
        if self.desorption_throughput < 0 or self.settle_hold < 0:
            raise InputError("desorption_throughput and settle_hold must be >= 0")
        if self.gas not in ph.GASES:
            raise InputError(f"gas={self.gas!r} is not known; use one of {sorted(ph.GASES)}")


class Chamber:
    """Pressure dynamics and controller; see module docs.

    Parameters
    ----------
    params : ChamberParams
    time : float
        Initial simulated time in s.
    """

    def __init__(self, params: ChamberParams, time: float = 0.0) -> None:
        self.params = params
        self._pumped = float(params.initial_pressure)
        self._bursts: list[float] = []
        self.burst_factor = 1.0
        self.time = float(time)
        self.age = 0.0
        self.pump_valve = 1.0
        self.bleed_valve = 0.0
        self.setpoint: float | None = None
        self._in_band_since: float | None = None

    @property
    def gas(self) -> str:
        """Background gas name."""
        return self.params.gas

    @property
    def pressure(self) -> float:
        """True chamber pressure in Pa (the pumped pressure times any burst factor)."""
        return self._pumped * self.burst_factor

    @pressure.setter
    def pressure(self, value: float) -> None:
        self._pumped = float(value) / self.burst_factor

    def add_burst(self, factor: float) -> None:
        """Start a pressure burst: the true pressure is multiplied by ``factor`` (> 0)."""
        if not (math.isfinite(factor) and factor > 0):
            raise InputError(f"burst {factor=} must be finite and > 0 (1 changes nothing)")
        self._bursts.append(float(factor))
        self.burst_factor = math.prod(self._bursts)
        self._in_band_since = None

    def remove_burst(self, factor: float) -> None:
        """End one burst of ``factor`` started by :meth:`add_burst`."""
        self._bursts.remove(float(factor))
        self.burst_factor = math.prod(self._bursts)
        self._in_band_since = None

    def desorption(self) -> float:
        """Current desorption throughput in Pa m**3/s."""
        p = self.params
        return p.desorption_throughput * p.desorption_time / (self.age + p.desorption_time)

    def set_setpoint(self, pressure: float | None) -> None:
        """Regulate to ``pressure`` (Pa, in (0, max_pressure]); ``None`` stops regulating."""
        if pressure is not None:
            if not (math.isfinite(pressure) and 0 < pressure <= self.params.max_pressure):
                raise LimitError(
                    f"pressure setpoint={pressure!r} Pa is outside (0, "
                    f"{self.params.max_pressure}] Pa; choose a reachable pressure"
                )
            pressure = float(pressure)
        self.setpoint = pressure
        self._in_band_since = None

    def set_valves(self, pump: float, bleed: float) -> None:
        """Set valve openings (0 closed ... 1 open) by hand; stops regulating."""
        for name, val in (("pump", pump), ("bleed", bleed)):
            if not (math.isfinite(val) and 0.0 <= val <= 1.0):
                raise LimitError(f"{name} valve={val!r} must be within [0, 1] (0 closed, 1 open)")
        self.setpoint = None
        self._in_band_since = None
        self.pump_valve, self.bleed_valve = float(pump), float(bleed)

    def _control(self) -> None:
        if self.setpoint is None:
            return
        p = self.params
        excess = self.setpoint - p.base_pressure
        q_des = self.desorption()
        if excess <= 0:
            self.pump_valve, self.bleed_valve = 1.0, 0.0
            return
        need = (p.bleed_throughput + q_des) / (p.pump_speed * excess)
        self.pump_valve = min(1.0, need)
        bleed = (excess * p.pump_speed * self.pump_valve - q_des) / p.bleed_throughput
        self.bleed_valve = min(1.0, max(0.0, bleed))

    @property
    def settled(self) -> bool:
        """True once within tolerance of the setpoint for the hold time."""
        return (
            self.setpoint is not None
            and self._in_band_since is not None
            and self.time - self._in_band_since >= self.params.settle_hold
        )

    def _in_band(self) -> bool:
        return (
            self.setpoint is not None
            and abs(self.pressure - self.setpoint) <= self.params.settle_tolerance * self.setpoint
        )

    def next_step(self, remaining: float) -> float:
        """Largest step in s (<= ``remaining``) over which the coefficients are held."""
        p = self.params
        h = min(remaining, 0.05 * (self.age + p.desorption_time))
        # Fine steps only near the band, where they time the settling; far from it a
        # step moves the pressure by a few per cent at most (outgassing-limited 1/a
        # decay, or the fast pump-out at age ~0), so it cannot jump over the zone.
        if self.setpoint is not None and not self.settled and self._near_band():
            h = min(h, max(0.25 * p.settle_hold, 1e-3))
        return h

    def _near_band(self) -> bool:
        assert self.setpoint is not None
        zone = max(4.0 * self.params.settle_tolerance, 0.1)
        return abs(self.pressure - self.setpoint) <= zone * self.setpoint

    def step(self, h: float) -> None:
        """Advance by ``h`` s with the valves held (exact exponential)."""
        p = self.params
        self._control()
        k = p.pump_speed * self.pump_valve / p.volume
        inflow = (p.bleed_throughput * self.bleed_valve + self.desorption()) / p.volume
        if k > 0:
            p_eq = p.base_pressure + inflow / k
            self._pumped = p_eq + (self._pumped - p_eq) * math.exp(-k * h)
        else:
            self._pumped += inflow * h
        self._pumped = max(self._pumped, p.base_pressure * 1e-3)
        self.age = 0.0 if self.pressure > p.resaturation_pressure else self.age + h
        self.time += h
        if self._in_band():
            if self._in_band_since is None:
                self._in_band_since = self.time
        else:
            self._in_band_since = None

    def advance(self, dt: float) -> None:
        """Let ``dt`` seconds (>= 0) pass."""
        if not (math.isfinite(dt) and dt >= 0):
            raise InputError(f"{dt=} s must be finite and >= 0")
        remaining = float(dt)
        while remaining > 0:
            h = self.next_step(remaining)
            self.step(h)
            remaining -= h


class GaugeStatus(enum.StrEnum):
    """State of a gauge reading."""

    OK = "ok"
    OVER_RANGE = "over-range"
    UNDER_RANGE = "under-range"
    SENSOR_OFF = "sensor off"
    FAULT = "fault"


class GaugeKind(enum.StrEnum):
    """Measuring principle of a gauge."""

    THERMAL = "thermal-conductivity"
    ION = "ionization"
    CAPACITANCE = "capacitance-diaphragm"


#: Default (low, high) range in Pa and stated relative accuracy of each kind.
_KIND_DEFAULTS: dict[GaugeKind, tuple[float, float, float]] = {
    GaugeKind.THERMAL: (5e-2, 1e5, 0.15),
    GaugeKind.ION: (1e-7, 1.0, 0.15),
    GaugeKind.CAPACITANCE: (1e-2, 1.3e3, 0.0025),
}


@dataclass(frozen=True)
class GaugeParams:
    """One pressure gauge (Pa).

    Attributes
    ----------
    name : str
        Identifier (e.g. "pirani", "ion").
    kind : GaugeKind
        Thermal conductivity (Pirani), ionization (hot cathode) or capacitance
        diaphragm.
    low, high : float or None
        Range limits in Pa; ``None`` takes the kind's default (thermal 5e-2 ... 1e5,
        ion 1e-7 ... 1, capacitance diaphragm 1e-2 ... 1.3e3).
    accuracy : float or None
        Stated relative accuracy of reading; ``None``: 0.15 for thermal and ion,
        0.0025 for capacitance diaphragm.
    digits : int
        Displayed significant digits (default 3; the rounding, up to
        ``5 * 10**-digits`` of reading, must stay well inside the accuracy, so a
        0.25 % gauge needs 5).
    protect_pressure : float or None
        Ion gauge: the cathode switches off above this pressure in Pa (default 5 Pa).
    """

    name: str
    kind: GaugeKind
    low: float | None = None
    high: float | None = None
    accuracy: float | None = None
    digits: int = 3
    protect_pressure: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "kind", GaugeKind(self.kind))
        if not 1 <= self.digits <= 6:
            raise InputError(f"digits={self.digits!r} must be in [1, 6]")

    @property
    def range(self) -> tuple[float, float]:
        """(low, high) in Pa."""
        lo, hi, _ = _KIND_DEFAULTS[self.kind]
        return (
            self.low if self.low is not None else lo,
            self.high if self.high is not None else hi,
        )

    @property
    def stated_accuracy(self) -> float:
        """Relative accuracy of reading."""
        return _KIND_DEFAULTS[self.kind][2] if self.accuracy is None else self.accuracy


@dataclass(frozen=True)
class GaugeReading:
    """One gauge read.

    Attributes
    ----------
    value : float
        Pressure in Pa (the range limit when over/under range; nan when off or faulty).
    status : GaugeStatus
    time : float
        Simulated time in s.
    """

    value: float
    status: GaugeStatus
    time: float


def _round_sig(x: float, digits: int) -> float:
    if x == 0 or not math.isfinite(x):
        return x
    return float(f"{x:.{digits - 1}e}")


class Gauge:
    """A simulated gauge on a :class:`Chamber`; faults can be injected.

    Parameters
    ----------
    params : GaugeParams
    chamber : Chamber
    rng : numpy.random.Generator
        The gauge's own stream (calibration error, read noise, drop-outs).
    """

    def __init__(self, params: GaugeParams, chamber: Chamber, rng: np.random.Generator) -> None:
        self.params = params
        self._chamber = chamber
        self._rng = rng
        acc = params.stated_accuracy
        self.calibration_error = float(rng.uniform(-0.8 * acc, 0.8 * acc))
        self.on = True
        self.dropout_probability = 0.0
        self._stuck: float | None = None
        self._last: GaugeReading | None = None
        self._windows: list[tuple[float, float, GaugeStatus]] = []

    def gas_factor(self) -> float:
        """Indicated/true pressure for the chamber's gas (1 for N2)."""
        gas = self._chamber.gas
        if self.params.kind is GaugeKind.ION:
            return ph.GASES[gas].ion_sensitivity
        if self.params.kind is GaugeKind.CAPACITANCE:
            return 1.0  # a diaphragm feels force per area, whatever the gas
        return THERMAL_GAS_FACTORS[gas]

    # faults
    def inject_dropouts(self, probability: float) -> None:
        """From now on each read fails (nan, FAULT) with ``probability`` in [0, 1]."""
        if not 0.0 <= probability <= 1.0:
            raise InputError(f"{probability=} must be within [0, 1]")
        self.dropout_probability = float(probability)

    def inject_stuck(self, value: float | None = None) -> None:
        """Freeze the reading at ``value`` (Pa; None: the last reading); status stays OK."""
        if value is None:
            value = self._last.value if self._last is not None else self._indicated()
        self._stuck = float(value)

    #: Drop-out modes of :meth:`drop_out`: the status the gauge controller reports.
    DROPOUT_MODES = ("fault", "sensor_off", "over_range")

    def drop_out(self, start: float, end: float, mode: str = "fault") -> None:
        """Fail every read with the chamber time in ``[start, end)`` (s, sim time).

        ``mode``: ``"fault"`` reads nan with FAULT (a broken cable, a dead
        controller), ``"sensor_off"`` nan with SENSOR_OFF (a tripped filament),
        ``"over_range"`` a nonsense value ten times the range maximum that the
        controller still calls OK (a gauge reading garbage; the device layer
        refuses it as over range). Windows may overlap; none is random.
        """
        if mode not in self.DROPOUT_MODES:
            raise InputError(
                f"gauge drop-out mode={mode!r} is not known; use one of {list(self.DROPOUT_MODES)}"
            )
        if not (math.isfinite(start) and math.isfinite(end) and end > start):
            raise InputError(f"drop-out window [{start!r}, {end!r}) s must be finite, end > start")
        status = {
            "fault": GaugeStatus.FAULT,
            "sensor_off": GaugeStatus.SENSOR_OFF,
            "over_range": GaugeStatus.OK,
        }[mode]
        self._windows = [w for w in self._windows if w[1] > self._chamber.time]
        self._windows.append((float(start), float(end), status))

    def _dropped(self) -> GaugeStatus | None:
        t = self._chamber.time
        for start, end, status in self._windows:
            if start <= t < end:
                return status
        return None

    def clear_faults(self) -> None:
        """Remove drop-outs (random and timed) and a stuck value."""
        self.dropout_probability = 0.0
        self._stuck = None
        self._windows = []

    def switch_off(self) -> None:
        """Switch the sensor off: reads return nan with SENSOR_OFF."""
        self.on = False

    def switch_on(self) -> None:
        """Switch the sensor on (an ion gauge stays dark above its protection pressure)."""
        self.on = True

    def _protect(self) -> float | None:
        if self.params.kind is not GaugeKind.ION:
            return None
        return 5.0 if self.params.protect_pressure is None else self.params.protect_pressure

    def _indicated(self) -> float:
        acc = self.params.stated_accuracy
        noise = self._rng.uniform(-0.1 * acc, 0.1 * acc)
        return self._chamber.pressure * self.gas_factor() * (1.0 + self.calibration_error + noise)

    def read(self) -> GaugeReading:
        """Read the gauge now (Pa, with status)."""
        t = self._chamber.time
        pp = self._protect()
        protected = pp is not None and self._chamber.pressure > pp
        dropped = self._dropped()
        if dropped is GaugeStatus.OK:  # "over_range" mode: garbage the controller calls OK
            reading = GaugeReading(10.0 * self.params.range[1], GaugeStatus.OK, t)
        elif dropped is not None:
            reading = GaugeReading(math.nan, dropped, t)
        elif not self.on or protected:
            reading = GaugeReading(math.nan, GaugeStatus.SENSOR_OFF, t)
        elif self.dropout_probability > 0 and self._rng.random() < self.dropout_probability:
            reading = GaugeReading(math.nan, GaugeStatus.FAULT, t)
        elif self._stuck is not None:
            reading = GaugeReading(self._stuck, GaugeStatus.OK, t)
        else:
            val = self._indicated()
            lo, hi = self.params.range
            if val > hi:
                reading = GaugeReading(hi, GaugeStatus.OVER_RANGE, t)
            elif val < lo:
                reading = GaugeReading(lo, GaugeStatus.UNDER_RANGE, t)
            else:
                reading = GaugeReading(_round_sig(val, self.params.digits), GaugeStatus.OK, t)
        self._last = reading
        return reading
