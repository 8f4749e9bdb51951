"""Reheating cycles: feedback on until steady, off for a while (recorded), on again.

Each record starts when the feedback goes off; its energy envelope (the record
demodulated at each mode frequency) gives ``n(t)`` per axis. Across cycles the ensemble
mean and spread; the summary fits ``n = n0 + Gamma t`` and the exponential form
(PHYSICS.md section 4) per axis with a bootstrap error over cycles, next to the gas and
photon-recoil heating predicted from the setup's nominal values at the measured
pressure.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import bluesky.plan_stubs as bps
import numpy as np

from .._errors import InputError, LimitError
from ..analysis._derived import fit_heating_rate
from ..analysis._resolution import segment_length
from ..live import LiveFitter, ModeAnalyzer
from ..physics import AXES, GASES, Estimate, epstein_damping, gas_heating_rate
from ..setup import Setup
from ._common import (
    Apparatus,
    Recorder,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
)
from ._derived_device import DerivedValues
from ._gain_sweep import predicted_cold_damping
from ._runner import (
    clean_detector,
    configure_detector,
    nominal_calibration,
    nominal_mass,
    run_with_fitter,
    take,
)
from ._state import (
    ON,
    Checked,
    LabState,
    clean_estimate,
    clean_estimates,
    clean_gain,
    clean_int,
    clean_positive,
    clean_pressure,
    reach_state,
)

__all__ = ["reheating_cycles", "validate_reheating_cycles"]


def validate_reheating_cycles(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`reheating_cycles` (no device is opened)."""
    a = take(params, "reheating_cycles", required=("cycles", "feedback_gain", "off_time"),
             optional={"pressure": None, "on_time": None, "envelope_bandwidth": 2000.0,
                       "calibration": None, "mass": None, "n_boot": 400, "sample_rate": None,
                       "input_range": None})
    a["cycles"] = clean_int(a["cycles"], "cycles", 3)
    gain = a["feedback_gain"] = clean_gain(setup, a["feedback_gain"], "feedback_gain")
    a["off_time"] = clean_positive(a["off_time"], "off_time", "s")
    a["on_time"] = (30.0 / gain if a["on_time"] is None
                    else clean_positive(a["on_time"], "on_time", "s"))
    a["envelope_bandwidth"] = clean_positive(a["envelope_bandwidth"], "envelope_bandwidth", "Hz")
    if a["pressure"] is not None:
        a["pressure"] = clean_pressure(setup, a["pressure"])
    if a["calibration"] is not None:
        a["calibration"] = clean_estimates(a["calibration"], "calibration")
    if a["mass"] is not None:
        a["mass"] = clean_estimate(a["mass"], "mass")
    a["n_boot"] = clean_int(a["n_boot"], "n_boot", 10)
    clean_detector(setup, a)
    fs = a["sample_rate"] or setup.detector.sample_rate
    n = int(round(a["off_time"] * fs))
    if not 1024 <= n <= setup.limits.record_length_max:
        raise LimitError(f"off_time={a['off_time']:g} s at {fs:g} Hz is a record of {n} samples,"
                         f" outside [1024, {setup.limits.record_length_max}] (setup "
                         f"{setup.name!r}); choose another off_time or sample_rate",
                         key="off_time")
    t = a["cycles"] * (a["on_time"] + a["off_time"])
    state = LabState(pressure=a["pressure"], feedback=ON, gain=gain, needs_charge=True)
    return Checked("reheating_cycles", a, t, needs=state, leaves=state)


def reheating_cycles(
    detectors: Sequence[Any],
    cycles: int,
    *,
    apparatus: Apparatus,
    feedback_gain: float,
    pressure: float | None = None,
    off_time: float,
    on_time: float | None = None,
    envelope_bandwidth: float = 2000.0,
    calibration: Sequence[Estimate | float] | None = None,
    mass: Estimate | float | None = None,
    n_boot: int = 400,
    sample_rate: float | None = None,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Repeat ``cycles`` reheating cycles at ``pressure`` (Pa; default: the present one).

    Cold damping is engaged at ``feedback_gain`` before the pressure is moved.

    Parameters
    ----------
    cycles : int
        Number of cycles, >= 3.
    feedback_gain : float
        Cold-damping gain (1/s) while the feedback is on.
    off_time : float
        Feedback-off time in s; the record spans it (record length = off_time x rate).
    on_time : float
        Feedback-on time in s before each cycle (default ``30/feedback_gain``).
    envelope_bandwidth : float
        Hz; the envelope averages windows of ``sample_rate/envelope_bandwidth`` samples.

    Summary: ``heating_rate_x|y|z`` (quanta/s, linear model; bootstrap error),
    ``heating_rate_exp_x|y|z`` (exponential model), ``predicted_heating_rate_x|y|z``,
    ``pressure`` (Pa, mean gauge reading with its spread). Run name: ``reheating_cycles``.
    """
    app = apparatus
    chk = validate_reheating_cycles(app.setup, dict(
        cycles=cycles, pressure=pressure, feedback_gain=feedback_gain, off_time=off_time,
        on_time=on_time, envelope_bandwidth=envelope_bandwidth, calibration=calibration,
        mass=mass, n_boot=n_boot, sample_rate=sample_rate, input_range=input_range))
    cycles, gain, off_time = chk.params["cycles"], chk.params["feedback_gain"], chk.params[
        "off_time"]
    on, envelope_bandwidth = chk.params["on_time"], chk.params["envelope_bandwidth"]
    n_boot = chk.params["n_boot"]
    cal = nominal_calibration(app) if calibration is None else chk.params["calibration"]
    m = nominal_mass(app) if mass is None else chk.params["mass"]
    motion = detectors[0]
    rate = yield from configure_detector(app, motion, sample_rate, None, input_range)
    fs = rate[0]
    n = int(round(off_time * fs))
    fs, n = yield from configure_detector(app, motion, None, n)
    window = max(1, int(round(fs / envelope_bandwidth)))
    analyzer = ModeAnalyzer(app.setup.trap.frequencies, nperseg=segment_length(n, shortest=256),
                            calibration=[c.value for c in cal],
                            calibration_stderr=[c.stderr for c in cal], mass=m.value,
                            envelope_window=window, record_length=n)
    fitter = LiveFitter(analyzer)
    md_ = run_metadata(app, "reheating_cycles",
                       {"cycles": cycles, "pressure": chk.params["pressure"],
                        "feedback_gain": gain, "off_time": n / fs,
                        "on_time": on, "envelope_bandwidth": envelope_bandwidth,
                        "calibration": [c.value for c in cal], "mass": m.value}, md,
                       dimensions=[(["seq_num"], "primary")])
    values = DerivedValues("summary")

    ensemble = DerivedValues("ensemble")

    def emit_ensemble():
        # running ensemble mean and spread of n(t) over the cycles fitted so far
        env = {a: np.array([f[f"envelope_{a}"] for f in rec_ref[0].fits], dtype=float)
               for a in AXES}
        ensemble.clear()
        ensemble.put("cycles_in_mean", len(rec_ref[0].fits), "")
        for a in AXES:
            ensemble.put(f"ensemble_mean_{a}", np.nanmean(env[a], axis=0).tolist(), "quanta")
            spread = (np.nanstd(env[a], axis=0, ddof=1) if env[a].shape[0] > 1
                      else np.full(env[a].shape[1], np.nan))
            ensemble.put(f"ensemble_spread_{a}", spread.tolist(), "quanta")
        yield from bps.trigger_and_read([ensemble], name="ensemble")

    rec_ref: list = []

    def body(rec):
        yield from reach_state(app, chk.needs)
        rec_ref.append(rec)
        seen = 0
        for _ in range(cycles):
            yield from set_feedback(app, gain)
            yield from wait_lab(app, on)
            yield from set_feedback(app, None)
            yield from rec.record()
            if len(rec.fits) > seen:
                seen = len(rec.fits)
                yield from emit_ensemble()
        yield from set_feedback(app, gain)
        yield from rec.flush()
        yield from emit_ensemble()
        values.update(_summarize(app, rec, n_boot))
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


def _gauge_accuracy(app: Apparatus, rec: Recorder) -> float:
    """Stated accuracy (fraction) of the gauge the records used most."""
    names = [r.get("pressure_gauge") for r in rec.primaries]
    used = max(set(names), key=names.count) if names else None
    for g in app.setup.vacuum.gauges:
        if g.name == used:
            return g.accuracy
    return max(g.accuracy for g in app.setup.vacuum.gauges)


def _summarize(app: Apparatus, rec: Recorder, n_boot: int) -> dict:
    s = app.setup
    pressures = np.array([r["pressure"] for r in rec.primaries], dtype=float)
    p_mean = float(np.nanmean(pressures))
    p_err = float(np.nanstd(pressures)) if pressures.size > 1 else 0.0
    out: dict = {"pressure": (Estimate(p_mean, p_err), "Pa"),
                 "cycles_done": (len(rec.fits), "")}
    gamma = float(epstein_damping(s.particle.radius, s.particle.density, p_mean,
                                  s.temperature, GASES[s.vacuum.gas]))
    pred = predicted_cold_damping(app, p_mean)
    acc = _gauge_accuracy(app, rec)
    for i, axis in enumerate(AXES):
        t = np.asarray(rec.fits[0]["envelope_time"], dtype=float)
        env = np.array([f[f"envelope_{axis}"] for f in rec.fits], dtype=float)
        good = np.all(np.isfinite(env), axis=1)
        nan = Estimate(math.nan, math.nan)
        try:
            fit = fit_heating_rate(t, env[good], gamma=gamma, n_boot=n_boot, seed=i)
            out[f"heating_rate_{axis}"] = (fit.linear, "quanta/s")
            out[f"heating_rate_exp_{axis}"] = (fit.exponential, "quanta/s")
            out[f"initial_occupation_{axis}"] = (fit.n0, "quanta")
        except (InputError, ValueError, RuntimeError) as exc:
            out[f"heating_rate_{axis}"] = (nan, "quanta/s")
            out[f"heating_rate_exp_{axis}"] = (nan, "quanta/s")
            out[f"fit_status_{axis}"] = (f"{type(exc).__name__}: {exc}"[:300], "")
        # the prediction's error: the gauge's stated accuracy on the gas part
        gas_part = float(gas_heating_rate(gamma, 2 * math.pi * s.trap.frequencies[i],
                                          s.temperature))
        out[f"predicted_heating_rate_{axis}"] = (Estimate(pred[axis][0], acc * gas_part),
                                                 "quanta/s")
    return out
