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
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._errors import InputError
from ..analysis._derived import fit_heating_rate
from ..live import LiveFitter, ModeAnalyzer
from ..physics import AXES, GASES, Estimate, epstein_damping
from ._common import (
    Apparatus,
    Recorder,
    check_gain,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
)
from ._derived_device import DerivedValues
from ._gain_sweep import predicted_cold_damping
from ._runner import (
    as_estimate,
    configure_detector,
    nominal_calibration,
    nominal_mass,
    run_with_fitter,
)

__all__ = ["reheating_cycles"]


def reheating_cycles(
    detectors: Sequence[Any],
    cycles: int,
    *,
    apparatus: Apparatus,
    feedback_gain: float,
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
    """Repeat ``cycles`` reheating cycles at the present pressure.

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
    if not isinstance(cycles, int) or cycles < 3:
        raise InputError(f"cycles={cycles!r} must be an integer >= 3")
    gain = check_gain(app, feedback_gain, "feedback_gain")
    if not (isinstance(off_time, int | float) and off_time > 0):
        raise InputError(f"off_time={off_time!r} must be a positive time in s")
    on = 30.0 / gain if on_time is None else float(on_time)
    cal = nominal_calibration(app) if calibration is None else [
        as_estimate(c, "calibration") for c in calibration]
    m = nominal_mass(app) if mass is None else as_estimate(mass, "mass")
    motion = detectors[0]
    rate = yield from configure_detector(app, motion, sample_rate, None, input_range)
    fs = rate[0]
    n = int(round(off_time * fs))
    fs, n = yield from configure_detector(app, motion, None, n)
    window = max(1, int(round(fs / envelope_bandwidth)))
    analyzer = ModeAnalyzer(app.setup.trap.frequencies, nperseg=max(256, n // 8),
                            calibration=[c.value for c in cal],
                            calibration_stderr=[c.stderr for c in cal], mass=m.value,
                            envelope_window=window, record_length=n)
    fitter = LiveFitter(analyzer)
    md_ = run_metadata(app, "reheating_cycles",
                       {"cycles": cycles, "feedback_gain": gain, "off_time": n / fs,
                        "on_time": on, "envelope_bandwidth": envelope_bandwidth,
                        "calibration": [c.value for c in cal], "mass": m.value}, md,
                       dimensions=[(["seq_num"], "primary")])
    values = DerivedValues("summary")

    def body(rec):
        for _ in range(cycles):
            yield from set_feedback(app, gain)
            yield from wait_lab(app, on)
            yield from set_feedback(app, None)
            yield from rec.record()
        yield from set_feedback(app, gain)
        yield from rec.flush()
        values.update(_summarize(app, rec, n_boot))
        yield from emit_summary(values)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


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
        out[f"predicted_heating_rate_{axis}"] = (pred[axis][0], "quanta/s")
    return out
