"""Unattended safety: conditions watched around every record of a run.

The recorder asks its :class:`Monitors` before each record (the particle is still
there, the pressure is inside the step's band, a gauge covers it) and after it (the
intensity held, the feedback drive was not saturated). A condition acts as the
setup's ``[monitors]`` say:

* particle lost (intensity below ``intensity_min``, or no motional peak fitted in two
  records in a row): the run ends (:class:`ParticleLostError`, its message the stop
  document's reason), and the campaign stops;
* pressure excursion (the chosen gauge outside [P/band, P*band] of the step's
  pressure P): the run waits, reading on the lab clock, and goes on when the reading
  is back; past ``pressure_timeout`` the run ends (:class:`MonitorStop`) and the
  campaign follows ``pressure_policy``;
* gauge fault (status not ok, or reading outside its range): the reading of another
  gauge that covers the pressure is used; with none, the run waits as above;
* feedback saturation (the electrode drive at its limit for more than
  ``saturation_fraction`` of a record): the record is left out of every summary
  (``suspend``), or the run ends (``end``).

Waiting never rewinds anything: no checkpoint is involved, records taken while a
condition held are kept in ``primary`` (raw data are never thrown away) but left out of
the summaries. Every change of a condition is one event in the run's ``monitor`` stream
(``condition``, ``action``, ``value`` with its ``units``, ``message``, and ``record``:
the ``seq_num`` in ``primary`` of the record it concerns).
"""

from __future__ import annotations

import math
from typing import Any

import bluesky.plan_stubs as bps

from .._errors import QuietwellError
from .._plain import plain
from ._derived_device import DerivedValues
from ._state import best_gauge

__all__ = ["Monitors", "ParticleLostError", "MonitorStop"]


class ParticleLostError(QuietwellError, RuntimeError):
    """The particle is gone: the run ends, the campaign stops."""


class MonitorStop(QuietwellError, RuntimeError):
    """A condition outlasted its timeout or asks to end the run; ``policy`` says what the
    campaign does next (``skip`` the step or ``stop``)."""

    def __init__(self, message: str, policy: str) -> None:
        super().__init__(message)
        self.policy = policy


class Monitors:
    """The monitors of one run of ``app`` (see the module docstring)."""

    def __init__(self, app: Any) -> None:
        self.app = app
        self.spec = app.setup.monitors
        self.device = DerivedValues("monitor")
        self.active: dict[str, str] = {}  # condition -> message while it holds
        self.events: list[dict] = []
        #: seq_num in ``primary`` of the record an event concerns (the recorder sets it:
        #: the next record before it is taken, the record itself after)
        self.record = 0
        self._no_peak = 0
        self._ranges = {g.name: (g.range_min, g.range_max) for g in app.setup.vacuum.gauges}

    # --- events -------------------------------------------------------------------
    def _emit(self, condition: str, action: str, value: float, units: str, message: str):
        self.device.clear()
        self.device.put("condition", condition, "")
        self.device.put("action", action, "")
        self.device.put("value", float(value) if value is not None else math.nan, units)
        self.device.put("message", message, "")
        self.device.put("record", int(self.record), "")
        self.events.append({"condition": condition, "action": action, "value": value,
                            "units": units, "message": message, "record": self.record})
        yield from bps.trigger_and_read([self.device], name="monitor")

    def _change(self, condition: str, holds: bool, action: str, value: float, units: str,
                message: str):
        """Emit an event when ``condition`` starts or stops holding."""
        if holds and condition not in self.active:
            self.active[condition] = message
            yield from self._emit(condition, action, value, units, message)
        elif not holds and condition in self.active:
            del self.active[condition]
            yield from self._emit(condition, "resume", value, units, f"{condition} cleared")

    # --- readings -----------------------------------------------------------------
    def _gauges(self):
        out = {}
        for g in self.app.gauges:
            r = yield from bps.read(g)
            vals = {k: plain(v["value"]) for k, v in (r or {}).items()}
            p, st = vals.get(f"{g.name}-pressure"), vals.get(f"{g.name}-status")
            lo, hi = self._ranges.get(g.name, (0.0, math.inf))
            ok = (st is not None and str(st) == "ok" and isinstance(p, float)
                  and math.isfinite(p) and lo <= p <= hi)
            out[g.name] = (p, ok, st)
        return out

    def _pressure(self, gauges: dict) -> tuple[float, str]:
        return best_gauge(self.app.setup, {n: (p, ok) for n, (p, ok, _) in gauges.items()})

    # --- around a record ------------------------------------------------------------
    def before_record(self, detector: Any = None):
        """Plan stub: wait out a pressure excursion or a gauge fault; refuse a lost particle.

        Ends by reading the electrodes, so that the saturation after the record covers the
        record alone.
        """
        spec = self.spec
        waited = 0.0
        while True:
            motion = self.app.detector
            sig = getattr(motion, "intensity", None)
            if sig is not None:
                value = yield from bps.rd(sig)
                yield from self._check_intensity(
                    float(value) if value is not None else None, motion, "before the record")
            gauges = yield from self._gauges()
            p, used = self._pressure(gauges)
            setpoint = yield from bps.rd(self.app.pressure.setpoint)
            ref = float(setpoint) if setpoint is not None else p
            # a gauge matters where its range covers the step's pressure (an ionization
            # gauge reading over-range at 10 mbar is no fault)
            faulty = sorted(n for n, (_, ok, _) in gauges.items()
                            if not ok and self._covers(n, ref))
            for name, (reading, _ok, status) in gauges.items():
                yield from self._change(
                    f"gauge_fault:{name}", name in faulty,
                    "switch gauge" if math.isfinite(p) else "suspend",
                    reading if isinstance(reading, float) else math.nan, "Pa",
                    f"gauge {name} status {str(status)!r}, reading {reading!r} Pa; using "
                    f"{used if math.isfinite(p) else 'no gauge'}")
            band = spec.pressure_band
            out_of_band = (setpoint is not None and math.isfinite(float(setpoint))
                           and math.isfinite(p)
                           and not float(setpoint) / band <= p <= float(setpoint) * band)
            no_reading = not math.isfinite(p)
            yield from self._change(
                "pressure_excursion", out_of_band, "suspend", p, "Pa",
                f"gauge {used} reads {p:.3g} Pa, outside [{float(setpoint or 0) / band:.3g}, "
                f"{float(setpoint or 0) * band:.3g}] Pa of the step's {float(setpoint or 0):.3g}"
                " Pa")
            yield from self._change("no_gauge", no_reading, "suspend", math.nan, "Pa",
                                    f"no gauge covers the pressure (faulty: {faulty})")
            if not (out_of_band or no_reading):
                yield from self._saturation()
                return
            if spec.pressure_policy != "wait" and waited >= spec.pressure_timeout:
                what = "pressure_excursion" if out_of_band else "no_gauge"
                msg = (f"{what} lasted {waited:.0f} s of lab time, more than "
                       f"pressure_timeout {spec.pressure_timeout:g} s; policy "
                       f"{spec.pressure_policy}: {self.active.get(what, '')}")
                yield from self._emit(what, f"end run ({spec.pressure_policy})", p, "Pa", msg)
                raise MonitorStop(msg, spec.pressure_policy)
            yield from bps.mv(self.app.clock, float(spec.poll_interval))
            waited += spec.poll_interval

    def _covers(self, name: str, p: float) -> bool:
        lo, hi = self._ranges.get(name, (0.0, math.inf))
        return not math.isfinite(p) or lo <= p <= hi

    def _check_intensity(self, intensity: Any, detector: Any, where: str):
        """Plan stub: raise :class:`ParticleLostError` if ``intensity`` (V) is below the
        threshold: ``intensity_min``, at most half the digitiser's input range (a channel
        clipped at a small range, set for microvolt motion, reads the range, not zero)."""
        threshold = self.spec.intensity_min
        if threshold <= 0 or not isinstance(intensity, float) or not math.isfinite(intensity):
            return
        rng = getattr(detector, "input_range", None)
        if rng is not None:
            value = yield from bps.rd(rng)
            if value is not None and math.isfinite(float(value)) and float(value) > 0:
                threshold = min(threshold, 0.5 * float(value))
        if intensity < threshold:
            msg = (f"particle lost: intensity {intensity:.3g} V {where} below the threshold "
                   f"{threshold:.3g} V (intensity_min {self.spec.intensity_min:g} V, at most "
                   "half the input range)")
            yield from self._emit("particle_lost", "end run, stop campaign", intensity, "V", msg)
            raise ParticleLostError(msg)

    def after_record(self, readings: dict, detector: Any = None):
        """Plan stub: True if the record is clean; raises for a lost particle."""
        spec = self.spec
        # the motion detector's intensity channel tells whether the particle is there
        # (a heterodyne channel's level is set by the local oscillator)
        motion = self.app.detector
        intensity = readings.get("intensity_mean") if detector is motion else None
        yield from self._check_intensity(intensity, motion, "in the record")
        fraction = yield from self._saturation()
        saturated = fraction is not None and fraction > spec.saturation_fraction
        msg = (f"electrode drive at its limit for {fraction:.2g} of the record, more than "
               f"saturation_fraction {spec.saturation_fraction:g}" if saturated else "")
        if saturated and spec.saturation_action == "end":
            yield from self._emit("feedback_saturation", "end run", fraction, "1", msg)
            raise MonitorStop(msg, "stop")
        yield from self._change("feedback_saturation", saturated, "record left out",
                                fraction if fraction is not None else math.nan, "1", msg)
        if saturated:
            # each saturated record is its own event: every one is left out
            if self.events[-1]["condition"] != "feedback_saturation":
                yield from self._emit("feedback_saturation", "record left out", fraction,
                                      "1", msg)
        return not saturated

    def _saturation(self):
        """Plan stub: the largest fraction of time an axis's feedback drive sat at its
        limit since the previous read of the electrodes (None if they do not say)."""
        el = self.app.electrodes
        if getattr(el, "feedback_saturation", None) is None:
            return None
        r = yield from bps.read(el)  # a fresh report: it starts the next interval
        key = f"{el.name}-feedback_saturation"
        value = (r or {}).get(key, {}).get("value")
        return float(value) if value is not None else None

    def after_fit(self, fit: dict):
        """Plan stub: a record with no motional peak on any axis, twice in a row, is a lost
        particle (watched only when no ``intensity_min`` is set: the intensity tells
        sooner, and short records may fit no peak for other reasons)."""
        if self.spec.intensity_min > 0:
            return
        status = [fit.get(f"fit_status_{a}") for a in "xyz" if f"fit_status_{a}" in fit]
        if not status:
            return
        self._no_peak = self._no_peak + 1 if all(s != "ok" for s in status) else 0
        if self._no_peak >= 2:
            msg = "particle lost: no motional peak on any axis in two records in a row"
            yield from self._emit("particle_lost", "end run, stop campaign", 0.0, "", msg)
            raise ParticleLostError(msg)
