"""Pressure sweep: step the chamber pressure, follow the three modes, keep the particle.

Summary: the free-molecular damping slope d gamma/dP (1/(s Pa)) per axis and combined,
the radius and mass it implies (Phys. Rev. 23, 710 (1924); PHYSICS.md section 2), and
a thermalization check of the detector calibration (the peak area of each axis must
not change with pressure while the motion is thermal).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import bluesky.plan_stubs as bps
import numpy as np

from .._errors import InputError
from ..analysis._derived import fit_line
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
from ._common import (
    Apparatus,
    check_gain,
    check_pressures,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
    weighted_mean,
    weighted_mean_chi2,
)
from ._derived_device import DerivedValues
from ._runner import configure_detector, run_with_fitter

__all__ = ["pressure_sweep", "summarize_pressure_sweep"]


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
    ps = check_pressures(app, pressures)
    diffs = np.diff(ps)
    if ps and not (np.all(diffs < 0) or np.all(diffs > 0)):
        raise InputError(f"pressures={list(pressures)!r} must be strictly monotonic (a "
                         "pump-down or a bleed-up); sort them")
    if not isinstance(records_per_step, int) or records_per_step < 1:
        raise InputError(f"records_per_step={records_per_step!r} must be an integer >= 1")
    gain = check_gain(app, feedback_gain, "feedback_gain")
    rho = setup.particle.density if density is None else float(density)
    gas = GASES[setup.vacuum.gas]
    loss = setup.trap.loss_pressure
    if engage_damping is None:
        engage_damping = float(epstein_damping(setup.particle.radius, setup.particle.density,
                                               loss, setup.temperature, gas))
    plan_args = {"pressures": ps, "records_per_step": records_per_step,
                 "settle_time": settle_time, "feedback_gain": gain,
                 "engage_damping": engage_damping, "density": rho}
    motion = detectors[0]
    fs, n = yield from configure_detector(app, motion, sample_rate, record_length,
                                         input_range)
    fitter = LiveFitter(ModeAnalyzer(setup.trap.frequencies, nperseg=max(1024, n // 8)))
    md_ = run_metadata(app, "pressure_sweep", plan_args, md,
                       dimensions=[(["pressure"], "primary")])
    values = DerivedValues("summary")

    def body(rec):
        feedback_on = False
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
                yield from rec.record()
                step_flags.append(feedback_on)
            yield from rec.flush()
        values.update(summarize_pressure_sweep(rec.pairs(), step_flags, rho,
                                               setup.temperature, gas.name))
        yield from emit_summary(values)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


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
