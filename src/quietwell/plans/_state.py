"""The step contract: what a plan's arguments are, checked with no device open.

Every plan has a *validate* function ``validate(setup, params) -> Checked`` that

* cleans its parameters (SI units, types, the setup's limits), raising
  :class:`~quietwell.InputError` / :class:`~quietwell.LimitError` with one line;
* estimates the lab time it takes;
* states the laboratory state the step needs when it starts and the state it leaves
  (pressure, cold damping on or off and its gain, the particle's charge).

The plan calls the same function before anything moves, so a check by
``quietwell check`` and the plan itself can never disagree. :func:`reach_state`
is the one place that moves the apparatus from one state to the next, in the safe
order: cold damping is engaged before the pressure goes below the loss pressure,
and switched off only after the pressure is back above it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import bluesky.plan_stubs as bps

from .._errors import InputError, LimitError
from ..physics import Estimate
from ..setup import Setup

__all__ = ["LabState", "Checked", "reach_state", "safe_state", "HOLDING_GAIN", "state_after", "unsafe_reason",
           "unsafe_problem",
           "clean_pressure", "clean_pressures", "clean_gain", "clean_int", "clean_positive",
           "clean_estimate", "clean_estimates", "record_seconds", "pressure_move_seconds"]

#: Feedback modes of :class:`LabState`.
OFF, ON, ANY = "off", "on", "any"


@dataclass(frozen=True)
class LabState:
    """The part of the laboratory's state that steps depend on.

    Attributes
    ----------
    pressure : float or None
        Chamber pressure in Pa; None: not fixed (needs) or unknown (leaves).
    feedback : str
        ``"on"`` (cold damping on every axis), ``"off"``, or ``"any"`` (not fixed /
        unknown).
    gain : float or None
        The cold-damping gain in 1/s when ``feedback == "on"`` and it is known.
    charge_change : int
        Elementary charges added to the particle (negative: removed) by the step.
    needs_charge : bool
        The step needs a charged particle (cold damping and Coulomb drives act on it).
    """

    pressure: float | None = None
    feedback: str = ANY
    gain: float | None = None
    charge_change: int = 0
    needs_charge: bool = False

    def as_dict(self) -> dict[str, Any]:
        return {"pressure": self.pressure, "feedback": self.feedback, "gain": self.gain,
                "charge_change": self.charge_change, "needs_charge": self.needs_charge}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> LabState:
        return cls(**{k: d[k] for k in ("pressure", "feedback", "gain", "charge_change",
                                        "needs_charge") if k in d})


@dataclass(frozen=True)
class Checked:
    """What a validate function returns, with no device open.

    Attributes
    ----------
    plan_name : str
    params : dict
        Cleaned parameters in SI units (Estimates for values with errors).
    duration_s : float
        Estimated lab time in s (records, waits and pressure moves; not the analysis).
    needs, leaves : LabState
    """

    plan_name: str
    params: dict[str, Any]
    duration_s: float
    needs: LabState
    leaves: LabState
    notes: tuple[str, ...] = field(default=())


def state_after(before: LabState | None, checked: Checked) -> LabState:
    """The state a step leaves, given the state before it (for a chain of steps)."""
    leaves = checked.leaves
    prev = before or LabState()
    pressure = leaves.pressure if leaves.pressure is not None else (
        checked.needs.pressure if checked.needs.pressure is not None else prev.pressure)
    if leaves.feedback != ANY:
        fb, gain = leaves.feedback, leaves.gain
    elif checked.needs.feedback != ANY:
        fb, gain = checked.needs.feedback, checked.needs.gain
    else:
        fb, gain = prev.feedback, prev.gain
    return LabState(pressure=pressure, feedback=fb, gain=gain,
                    charge_change=prev.charge_change + leaves.charge_change)


def unsafe_reason(setup: Setup, before: LabState | None, checked: Checked) -> str | None:
    """Why the step would leave the particle undamped below the loss pressure, or None.

    Checks the state the step starts in (after :func:`reach_state`) and the state it
    leaves; a particle whose charge is known to be zero cannot be cold-damped. The text
    says what to change.
    """
    found = unsafe_problem(setup, before, checked)
    return None if found is None else found[1]


def unsafe_problem(setup: Setup, before: LabState | None, checked: Checked
                   ) -> tuple[str | None, str] | None:
    """As :func:`unsafe_reason`, with the parameter of the step to change: ``(key, text)``
    (``key`` is ``"pressure"``, or None when the cause is an earlier step), or None."""
    loss = setup.trap.loss_pressure
    prev = before or LabState()
    start = state_after(prev, replace(checked, leaves=LabState()))
    end = state_after(prev, checked)
    for when, st in (("starts", start), ("ends", end)):
        if st.pressure is not None and st.pressure < loss and st.feedback != ON:
            fb = "off" if st.feedback == OFF else "not known to be on"
            return "pressure", (
                f"it {when} at {st.pressure:.3g} Pa, below the loss pressure {loss:.3g} Pa, "
                f"with cold damping {fb}, and the particle would be lost; give the step a "
                "feedback_gain (cold damping on), put a step that engages cold damping "
                f"before it, or keep its pressure at {loss:.3g} Pa or above")
    charge = setup.particle.charge_e + prev.charge_change
    if checked.needs.needs_charge and charge == 0:
        return None, (
            "it needs a charged particle (cold damping and the Coulomb drive act on the "
            f"charge), and the charge_steps of the charge calibration before it leave "
            f"{charge} e (the setup's {setup.particle.charge_e} e changed by "
            f"{prev.charge_change}); change those charge_steps so that their sum is not "
            f"{-setup.particle.charge_e}, or remove this step")
    return None


def reach_state(app: Any, needs: LabState):
    """Plan stub: bring the apparatus into ``needs`` in the safe order.

    Cold damping is switched on (at ``needs.gain``) before the pressure is moved, and
    switched off only after the pressure has reached the step's pressure, which a
    feedback-off step always has at or above the loss pressure.
    """
    from ._common import set_feedback

    if needs.feedback == ON and needs.gain is not None:
        yield from set_feedback(app, needs.gain)
    if needs.pressure is not None:
        setpoint = yield from bps.rd(app.pressure.setpoint)
        same = (setpoint is not None and math.isfinite(float(setpoint))
                and math.isclose(float(setpoint), float(needs.pressure), rel_tol=1e-9))
        if not same:  # already there: no second wait for the controller to settle
            yield from bps.mv(app.pressure, float(needs.pressure))
    if needs.feedback == OFF:
        yield from set_feedback(app, None)


#: Cold-damping gain (1/s) that holds the particle when no step says which: the
#: pressure sweep's default, known to keep the shipped setups' particles trapped.
HOLDING_GAIN = 2000.0


def safe_state(app: Any, gain: float | None = None):
    """Plan stub: the state to leave the apparatus in when a campaign stops.

    The Coulomb drive off; below the loss pressure cold damping on (at ``gain`` 1/s, or
    :data:`HOLDING_GAIN`), so the particle is kept; the laser and the pressure unchanged.
    """
    from ._common import set_feedback

    yield from bps.mv(app.electrodes.drive_enabled, False)
    reading = yield from bps.rd(app.pressure)
    p = float(reading) if reading is not None else math.nan
    if not p >= app.setup.trap.loss_pressure:  # below, or unknown: keep the particle
        yield from set_feedback(app, min(gain or HOLDING_GAIN, app.setup.limits.feedback_gain_max))


# --- cleaning of parameters (pure; used by every validate function) ----------------


def best_gauge(setup: Setup, readings: Mapping[str, tuple[float, bool]]) -> tuple[float, str]:
    """The reading of the most accurate gauge that reads ``ok``: ``(pressure, name)``.

    ``readings`` maps a gauge name to ``(pressure, ok)``; a gauge not in the setup counts
    as accurate to 100 %.  ``(nan, "none")`` when no gauge reads.
    """
    accuracy = {g.name: g.accuracy for g in setup.vacuum.gauges}
    best = (math.nan, "none", math.inf)
    for name, (p, ok) in readings.items():
        acc = accuracy.get(name, 1.0)
        if ok and math.isfinite(p) and acc < best[2]:
            best = (float(p), name, acc)
    return best[0], best[1]


def _number(value: Any, what: str, unit: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(f"{what}={value!r} is not a number; give a value in {unit}", key=what)
    return float(value)


def clean_pressure(setup: Setup, value: Any, what: str = "pressure") -> float:
    """A pressure (Pa) inside the setup's limits."""
    p = _number(value, what, "Pa")
    lim = setup.limits
    if not lim.pressure_min <= p <= lim.pressure_max:
        raise LimitError(f"{what}={p:g} Pa is outside the setup {setup.name!r} limits "
                         f"[{lim.pressure_min:g}, {lim.pressure_max:g}] Pa; choose a pressure "
                         "inside them", key=what)
    return p


def clean_pressures(setup: Setup, values: Any, what: str = "pressures") -> list[float]:
    """A non-empty list of pressures (Pa) inside the setup's limits."""
    if isinstance(values, str) or not isinstance(values, Sequence):
        raise InputError(f"{what}={values!r} is not a list of pressures; give a list in Pa",
                         key=what)
    out = [clean_pressure(setup, p, f"{what}[{i}]") for i, p in enumerate(values)]
    if not out:
        raise InputError(f"{what} is empty; give at least one pressure in Pa", key=what)
    return out


def clean_gain(setup: Setup, value: Any, what: str = "gain") -> float:
    """A cold-damping gain (1/s) in (0, feedback_gain_max] of the setup."""
    g = _number(value, what, "1/s (a damping rate)")
    hi = setup.limits.feedback_gain_max
    if not 0 < g <= hi:
        raise LimitError(f"{what}={g:g} 1/s is outside (0, {hi:g}] 1/s, the setup "
                         f"{setup.name!r} limit; choose a gain inside it", key=what)
    return g


def clean_int(value: Any, what: str, lo: int, hi: int | None = None) -> int:
    """An integer in [lo, hi]."""
    if isinstance(value, bool) or not isinstance(value, int) or value < lo or (
            hi is not None and value > hi):
        allowed = f">= {lo}" if hi is None else f"from {lo} to {hi}"
        raise InputError(f"{what}={value!r} must be an integer {allowed}", key=what)
    return int(value)


def clean_positive(value: Any, what: str, unit: str, *, allow_zero: bool = False) -> float:
    """A finite number > 0 (>= 0 with ``allow_zero``)."""
    x = _number(value, what, unit)
    if x < 0 or (x == 0 and not allow_zero):
        raise InputError(f"{what}={x:g} must be {'>= 0' if allow_zero else '> 0'} {unit}",
                         key=what)
    return x


def clean_estimate(value: Any, what: str) -> Estimate:
    """An :class:`Estimate` from an Estimate or a plain number (error unknown: 0)."""
    if isinstance(value, Estimate):
        if not (math.isfinite(value.value) and value.value > 0):
            raise InputError(f"{what}={value.value!r} is not a positive measured value; the "
                             "step it comes from did not give one: check that step's summary",
                             key=what)
        return value
    return Estimate(clean_positive(value, what, "SI units"), 0.0)


def clean_estimates(values: Any, what: str, n: int = 3) -> list[Estimate]:
    """``n`` Estimates (x, y, z)."""
    if isinstance(values, str) or not isinstance(values, Sequence) or len(values) != n:
        raise InputError(f"{what}={values!r} must give {n} values (x, y, z)", key=what)
    return [clean_estimate(v, f"{what}[{i}]") for i, v in enumerate(values)]


def record_seconds(setup: Setup, sample_rate: float | None, record_length: int | None) -> float:
    """Lab time of one record (s) at the given or the setup's detector settings."""
    fs = sample_rate or setup.detector.sample_rate
    n = record_length or setup.detector.record_length
    return n / fs


#: Estimated lab time of a pressure move: seconds per decade of pump-down and per
#: bleed-up move, plus the controller's settling hold. A rough figure for a small
#: turbo-pumped chamber (common practice, no source); only ``check``'s estimate uses it.
PUMP_S_PER_DECADE = 120.0
BLEED_S = 30.0
SETTLE_S = 5.0


def pressure_move_seconds(p_from: float | None, p_to: float | None) -> float:
    """Estimated lab time (s) of moving the pressure from ``p_from`` to ``p_to`` (Pa)."""
    if p_to is None or p_from is None or p_from == p_to:
        return 0.0 if p_from == p_to else SETTLE_S
    if p_to < p_from:
        return PUMP_S_PER_DECADE * math.log10(p_from / p_to) + SETTLE_S
    return BLEED_S + SETTLE_S
