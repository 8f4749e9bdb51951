"""Pressure sweep: step the chamber pressure, follow the three modes, keep the particle.

Summary: the free-molecular damping slope d gamma/dP (1/(s Pa)) per axis and combined,
the radius and mass it implies (Phys. Rev. 23, 710 (1924); PHYSICS.md section 2), and
a thermalization check of the detector calibration (the peak area of each axis must
not change with pressure while the motion is thermal).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import bluesky.plan_stubs as bps
import numpy as np

from .._errors import InputError
from ..analysis._derived import fit_line
from ..analysis._resolution import segment_length
from ..live import LiveFitter, ModeAnalyzer
from ..physics import (
    AXES,
    GASES,
    Estimate,
    epstein_damping,
    mass_from_slope,
    radius_from_slope,
    thermal_calibration,
)
from ..setup import Setup
from ._common import (
    Apparatus,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
    weighted_mean,
    weighted_mean_chi2,
)
from ._derived_device import DerivedValues
from ._runner import DETECTOR_DEFAULTS, clean_detector, configure_detector, run_with_fitter, take
from ._state import (
    ANY,
    OFF,
    ON,
    Checked,
    LabState,
    clean_gain,
    clean_int,
    clean_positive,
    clean_pressures,
    pressure_move_seconds,
    reach_state,
    record_seconds,
)

__all__ = ["pressure_sweep", "summarize_pressure_sweep", "validate_pressure_sweep"]


def pressure_sweep(
    detectors: Sequence[Any],
    pressures: Sequence[float],
    *,
    apparatus: Apparatus,
    records_per_step: int = 2,
    settle_time: float = 1.0,
    feedback_gain: float = 2000.0,
    engage_damping: float | None = None,
    density: float | None = None,
    sample_rate: float | None = None,
    record_length: int | None = None,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Step the pressure (Pa) through ``pressures`` and record at each step.

    Parameters
    ----------
    detectors : list
        The motion detector first; more readables are read into every event.
    pressures : sequence of float
        Setpoints in Pa, monotonic (a pump-down or a bleed-up), inside the setup limits.
    apparatus : Apparatus
    records_per_step : int
        Records per setpoint, >= 1.
    settle_time : float
        Setup time in s to wait after the pressure has settled.
    feedback_gain : float
        Cold-damping gain (1/s) engaged on every axis before the pressure goes below the
        setup's loss pressure, or as soon as the fitted gas damping falls below
        ``engage_damping`` (1/s; default: the Epstein damping of the nominal particle at
        the loss pressure), whichever comes first.
    density : float
        kg/m**3 for the radius; default the setup's nominal density.
    """
    app = apparatus
    setup = app.setup
    chk = validate_pressure_sweep(setup, dict(
        pressures=pressures, records_per_step=records_per_step, settle_time=settle_time,
        feedback_gain=feedback_gain, engage_damping=engage_damping, density=density,
        sample_rate=sample_rate, record_length=record_length, input_range=input_range))
    ps, gain = chk.params["pressures"], chk.params["feedback_gain"]
    records_per_step, settle_time = chk.params["records_per_step"], chk.params["settle_time"]
    rho, engage_damping = chk.params["density"], chk.params["engage_damping"]
    gas = GASES[setup.vacuum.gas]
    loss = setup.trap.loss_pressure
    plan_args = {"pressures": ps, "records_per_step": records_per_step,
                 "settle_time": settle_time, "feedback_gain": gain,
                 "engage_damping": engage_damping, "density": rho}
    motion = detectors[0]
    fs, n = yield from configure_detector(app, motion, sample_rate, record_length,
                                         input_range)
    fitter = LiveFitter(ModeAnalyzer(setup.trap.frequencies, nperseg=segment_length(n)))
    md_ = run_metadata(app, "pressure_sweep", plan_args, md,
                       dimensions=[(["pressure"], "primary")])
    values = DerivedValues("summary")

    def body(rec):
        yield from reach_state(app, chk.needs)
        feedback_on = chk.needs.feedback == ON
        step_flags: list[bool] = []
        for p in ps:
            last = rec.fits[-records_per_step:] if rec.fits else []
            fitted = [f.get(f"gamma_{a}", math.nan) for f in last for a in AXES]
            fitted = [g for g in fitted if math.isfinite(g)]
            low_damping = bool(fitted) and min(fitted) < engage_damping
            if not feedback_on and (p < loss or low_damping):
                yield from set_feedback(app, gain)
                feedback_on = True
                yield from wait_lab(app, 20.0 / gain)
            yield from set_setpoint(app, p)
            yield from wait_lab(app, settle_time)
            for _ in range(records_per_step):
                clean = yield from rec.record()
                if clean:  # rec.primaries holds the clean records only
                    step_flags.append(feedback_on)
            yield from rec.flush()
        values.update(summarize_pressure_sweep(rec.pairs(), step_flags, rho,
                                               setup.temperature, gas.name))
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


def validate_pressure_sweep(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`pressure_sweep` (no device is opened)."""
    a = take(params, "pressure_sweep", required=("pressures",),
             optional={"records_per_step": 2, "settle_time": 1.0, "feedback_gain": 2000.0,
                       "engage_damping": None, "density": None, **DETECTOR_DEFAULTS})
    ps = clean_pressures(setup, a["pressures"])
    diffs = np.diff(ps)
    if not (np.all(diffs < 0) or np.all(diffs > 0)):
        raise InputError(f"pressures={ps!r} Pa must be strictly monotonic (a pump-down or a "
                         "bleed-up); sort them", key="pressures")
    a["pressures"] = ps
    a["records_per_step"] = clean_int(a["records_per_step"], "records_per_step", 1)
    a["settle_time"] = clean_positive(a["settle_time"], "settle_time", "s", allow_zero=True)
    gain = a["feedback_gain"] = clean_gain(setup, a["feedback_gain"], "feedback_gain")
    a["density"] = (setup.particle.density if a["density"] is None
                    else clean_positive(a["density"], "density", "kg/m**3"))
    loss = setup.trap.loss_pressure
    if a["engage_damping"] is None:
        a["engage_damping"] = float(epstein_damping(
            setup.particle.radius, setup.particle.density, loss, setup.temperature,
            GASES[setup.vacuum.gas]))
    else:
        a["engage_damping"] = clean_positive(a["engage_damping"], "engage_damping", "1/s")
    clean_detector(setup, a)
    per_step = (a["records_per_step"] * record_seconds(setup, a["sample_rate"],
                                                       a["record_length"]) + a["settle_time"])
    t = len(ps) * per_step + sum(pressure_move_seconds(p0, p1) for p0, p1 in
                                 zip(ps[:-1], ps[1:], strict=True))
    # the sweep starts at its first pressure: with cold damping on if that is below the
    # loss pressure, else off (its thermalization check needs feedback-off records)
    needs = (LabState(pressure=ps[0], feedback=ON, gain=gain, needs_charge=True)
             if ps[0] < loss else LabState(pressure=ps[0], feedback=OFF))
    below = min(ps) < loss
    leaves = LabState(pressure=ps[-1], feedback=ON if below else ANY,
                      gain=gain if below else None)
    if below:
        needs = replace(needs, needs_charge=True)
    return Checked("pressure_sweep", a, t, needs=needs, leaves=leaves)


def set_setpoint(app: Apparatus, p: float):
    """Plan stub: move the pressure controller and wait until it reports settled."""
    yield from bps.mv(app.pressure, float(p))


def summarize_pressure_sweep(pairs: Sequence[tuple[dict, dict]], feedback_flags: Sequence[bool],
                             density: float, temperature: float, gas_name: str) -> dict:
    """Damping slope per axis and combined, radius, mass and the thermalization check.

    Uses records whose fit succeeded; feedback-off and feedback-on records get separate
    intercepts (the feedback adds a constant damping), one common slope per axis.
    """
    gas = GASES[gas_name]
    out: dict = {}
    slopes, slope_errs = [], []
    for axis in AXES:
        rows = [(prim["pressure"], fit[f"gamma_{axis}"], fit[f"gamma_{axis}_stderr"], fb)
                for (prim, fit), fb in zip(pairs, feedback_flags, strict=False)
                if fit.get(f"fit_status_{axis}") == "ok" and math.isfinite(prim["pressure"])]
        est = _common_slope(rows)
        out[f"damping_slope_{axis}"] = (est, "1/(s*Pa)")
        if math.isfinite(est.value):
            slopes.append(est.value)
            slope_errs.append(est.stderr)
    if not slopes:
        nan = Estimate(math.nan, math.nan)
        out.update({"damping_slope": (nan, "1/(s*Pa)"), "radius": (nan, "m"),
                    "mass": (nan, "kg")})
        return out
    s, s_err = weighted_mean(slopes, slope_errs)
    out["damping_slope"] = (Estimate(s, s_err), "1/(s*Pa)")
    r = radius_from_slope(s, s_err, density, temperature, gas)
    m = mass_from_slope(s, s_err, density, temperature, gas)
    out["radius"] = (r, "m")
    out["mass"] = (m, "kg")
    # thermalization: feedback-off areas must agree; their mean gives a calibration
    for axis in AXES:
        areas = [(fit[f"area_{axis}"], fit[f"area_{axis}_stderr"], fit[f"f0_{axis}"])
                 for (prim, fit), fb in zip(pairs, feedback_flags, strict=False)
                 if not fb and fit.get(f"fit_status_{axis}") == "ok"]
        if len(areas) >= 2:
            mean, mean_err, chi2 = weighted_mean_chi2([x[0] for x in areas],
                                                      [x[1] for x in areas])
            omega = 2 * math.pi * float(np.mean([x[2] for x in areas]))
            c = thermal_calibration(mean, mean_err, m.value, m.stderr, omega, temperature)
            out[f"thermalization_chi2_{axis}"] = (chi2, "1")
            out[f"thermal_calibration_{axis}"] = (c, "V/m")
    return out


def _common_slope(rows: list[tuple[float, float, float, bool]]) -> Estimate:
    """Weighted fit gamma = s P + b_off (feedback off) or + b_on (feedback on)."""
    rows = [r for r in rows if all(math.isfinite(v) for v in r[:3]) and r[2] > 0]
    if len(rows) < 3 or len({r[0] for r in rows}) < 2:
        return Estimate(math.nan, math.nan)
    p = np.array([r[0] for r in rows])
    g = np.array([r[1] for r in rows])
    e = np.array([r[2] for r in rows])
    fb = np.array([r[3] for r in rows])
    if fb.all() or (~fb).all():
        line = fit_line(p, g, e)
        return line.slope
    x = np.vstack([p, (~fb).astype(float), fb.astype(float)]).T
    w = 1 / e**2
    cov = np.linalg.inv(x.T @ (x * w[:, None]))
    beta = cov @ (x.T @ (w * g))
    dof = max(len(rows) - 3, 1)
    chi2 = float(np.sum(w * (g - x @ beta) ** 2) / dof)
    return Estimate(float(beta[0]), float(math.sqrt(cov[0, 0] * max(1.0, chi2))))
