"""Gain sweep: step the cold-damping gain at low pressure and find the best cooling.

Per step the fitted damping and the calibrated occupation of each axis; summary: the
cold-damping model of PHYSICS.md section 4 (Nature 524, 325 (2015)) fitted per axis,
its optimal gain and minimum occupation with errors, beside the model's prediction
from the setup's nominal values.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._errors import InputError
from ..analysis._derived import fit_cold_damping
from ..analysis._resolution import segment_length
from ..live import LiveFitter, ModeAnalyzer
from ..physics import (
    AXES,
    GASES,
    Estimate,
    cold_damping_occupation,
    cold_damping_optimum,
    epstein_damping,
    gas_heating_rate,
    measurement_rate,
    recoil_heating_rate,
    scattered_power,
    silica_index,
    sphere_mass,
)
from ..setup import Setup
from ._common import (
    Apparatus,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
    weighted_mean,
)
from ._derived_device import DerivedValues
from ._runner import (
    DETECTOR_DEFAULTS,
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
    record_seconds,
)

__all__ = ["gain_sweep", "predicted_cold_damping", "validate_gain_sweep"]


def predicted_cold_damping(app: Apparatus, pressure: float) -> dict[str, tuple[float, float]]:
    """Per axis ``(Gamma_dec, Gamma_meas)`` from the setup's nominal values at ``pressure``.

    ``Gamma_dec = gamma_gas (n_th + 1/2) + Gamma_recoil`` (quanta/s) and
    ``Gamma_meas = x_zpf**2/(2 S_imp)`` (1/s) with ``S_imp`` the setup's imprecision
    squared (m**2/Hz).
    """
    s = app.setup
    p, t = s.particle, s.trap
    m = float(sphere_mass(p.radius, p.density))
    gamma = float(epstein_damping(p.radius, p.density, pressure, s.temperature,
                                  GASES[s.vacuum.gas]))
    p_scat = float(scattered_power(p.radius, silica_index(t.wavelength), t.wavelength, t.power,
                                   t.waist))
    out = {}
    for axis, f in zip(AXES, t.frequencies, strict=True):
        w = 2 * math.pi * f
        dec = float(gas_heating_rate(gamma, w, s.temperature)) + float(
            recoil_heating_rate(p_scat, t.wavelength, m, w, axis))
        meas = float(measurement_rate(m, w, s.detector.imprecision**2))
        out[axis] = (dec, meas)
    return out


def validate_gain_sweep(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`gain_sweep` (no device is opened)."""
    a = take(params, "gain_sweep", required=("gains",),
             optional={"pressure": None, "records_per_step": 2, "settle_periods": 30.0,
                       "calibration": None, "mass": None, "stop_after_rises": 3,
                       "stop_axes": AXES, **DETECTOR_DEFAULTS})
    g = a["gains"]
    if isinstance(g, str) or not isinstance(g, Sequence):
        raise InputError(f"gains={g!r} is not a list of gains; give a list in 1/s", key="gains")
    gs = a["gains"] = [clean_gain(setup, x, f"gains[{i}]") for i, x in enumerate(g)]
    if len(gs) < 3:
        raise InputError(f"gains={gs!r} 1/s: the cold-damping model needs >= 3 gains; give "
                         "at least 3", key="gains")
    if a["pressure"] is not None:
        a["pressure"] = clean_pressure(setup, a["pressure"])
    if a["calibration"] is not None:
        a["calibration"] = clean_estimates(a["calibration"], "calibration")
    if a["mass"] is not None:
        a["mass"] = clean_estimate(a["mass"], "mass")
    axes = a["stop_axes"]
    if isinstance(axes, str) or not axes or any(x not in AXES for x in axes):
        raise InputError(f"stop_axes={axes!r} must name axes among x, y, z",
                         key="stop_axes")
    a["stop_axes"] = list(axes)
    a["records_per_step"] = clean_int(a["records_per_step"], "records_per_step", 1)
    a["settle_periods"] = clean_positive(a["settle_periods"], "settle_periods", "damping times",
                                         allow_zero=True)
    a["stop_after_rises"] = clean_int(a["stop_after_rises"], "stop_after_rises", 1)
    clean_detector(setup, a)
    rec = a["records_per_step"] * record_seconds(setup, a["sample_rate"], a["record_length"])
    t = sum(a["settle_periods"] / x + rec for x in gs)
    needs = LabState(pressure=a["pressure"], feedback=ON, gain=gs[0], needs_charge=True)
    leaves = LabState(pressure=a["pressure"], feedback=ON, gain=gs[0])
    return Checked("gain_sweep", a, t, needs=needs, leaves=leaves)


def gain_sweep(
    detectors: Sequence[Any],
    gains: Sequence[float],
    *,
    apparatus: Apparatus,
    pressure: float | None = None,
    records_per_step: int = 2,
    settle_periods: float = 30.0,
    calibration: Sequence[Estimate | float] | None = None,
    mass: Estimate | float | None = None,
    stop_after_rises: int = 3,
    stop_axes: Sequence[str] = AXES,
    sample_rate: float | None = None,
    record_length: int | None = None,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Step the cold-damping gain (1/s, all axes) through ``gains`` at ``pressure`` (Pa).

    Cold damping is engaged at the first gain before the pressure is moved; without
    ``pressure`` the sweep runs at the present pressure.

    Each step waits ``settle_periods / gain`` of setup time, then records. The sweep stops
    early when the occupation summed over ``stop_axes`` rose ``stop_after_rises`` steps
    in a row (past their optimum). Occupations need a calibration (V/m per axis, e.g. the summary of a
    thermal calibration) and the mass; without them the setup's nominal values are
    used and the summary says so (``calibration_source``). Run name: ``gain_sweep``.
    """
    app = apparatus
    chk = validate_gain_sweep(app.setup, dict(
        gains=gains, pressure=pressure, records_per_step=records_per_step,
        settle_periods=settle_periods, calibration=calibration, mass=mass,
        stop_after_rises=stop_after_rises, stop_axes=stop_axes, sample_rate=sample_rate,
        record_length=record_length, input_range=input_range))
    gs, records_per_step = chk.params["gains"], chk.params["records_per_step"]
    settle_periods, stop_axes = chk.params["settle_periods"], chk.params["stop_axes"]
    stop_after_rises = chk.params["stop_after_rises"]
    cal = nominal_calibration(app) if calibration is None else chk.params["calibration"]
    m = nominal_mass(app) if mass is None else chk.params["mass"]
    motion = detectors[0]
    fs, n = yield from configure_detector(app, motion, sample_rate, record_length,
                                         input_range)
    analyzer = ModeAnalyzer(app.setup.trap.frequencies, nperseg=segment_length(n),
                            calibration=[c.value for c in cal],
                            calibration_stderr=[c.stderr for c in cal], mass=m.value)
    fitter = LiveFitter(analyzer)
    md_ = run_metadata(app, "gain_sweep",
                       {"gains": gs, "pressure": chk.params["pressure"],
                        "records_per_step": records_per_step,
                        "settle_periods": settle_periods,
                        "calibration": [c.value for c in cal], "mass": m.value}, md,
                       dimensions=[(["gain"], "primary")])
    values = DerivedValues("summary")

    def body(rec):
        yield from reach_state(app, chk.needs)
        steps: list[tuple[float, list[dict]]] = []
        totals: list[float] = []
        rises = 0
        for g in gs:
            yield from set_feedback(app, g)
            yield from wait_lab(app, settle_periods / g)
            n0 = len(rec.fits)
            for _ in range(records_per_step):
                yield from rec.record()
            yield from rec.flush()
            fits = rec.fits[n0:]  # the clean records of this gain
            if not fits:
                continue
            steps.append((g, fits))
            total = sum(np.nanmean([f[f"occupation_{a}"] for f in fits]) for a in stop_axes)
            if totals and total > totals[-1]:
                rises += 1
            else:
                rises = 0
            totals.append(float(total))
            if rises >= stop_after_rises:
                break
        yield from set_feedback(app, gs[0])  # leaves a known state: the first gain
        pressure = float(np.nanmean([r["pressure"] for r in rec.primaries]))
        values.update(_summarize_gain(app, steps, pressure))
        values.put("calibration_source", "setup" if calibration is None else "measured", "")
        values.put("steps_done", len(steps), "")
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


def _summarize_gain(app: Apparatus, steps, pressure: float) -> dict:
    out: dict = {"pressure": (pressure, "Pa")}
    fitted = {}
    for axis in AXES:
        g, n, e = [], [], []
        for gain, fits in steps:
            ok = [f for f in fits if f.get(f"fit_status_{axis}") == "ok"]
            if not ok:
                continue
            mean, err = weighted_mean([f[f"occupation_{axis}"] for f in ok],
                                      [f[f"occupation_{axis}_stderr"] for f in ok])
            if math.isfinite(mean):
                g.append(gain)
                n.append(mean)
                e.append(err)
        nan = Estimate(math.nan, math.nan)
        try:
            fit = fit_cold_damping(g, n, e)
            fitted[axis] = fit
            out[f"optimal_gain_{axis}"] = (fit.optimal_gain, "1/s")
            out[f"min_occupation_{axis}"] = (fit.min_occupation, "quanta")
            out[f"measurement_rate_{axis}"] = (fit.measurement_rate, "1/s")
            out[f"decoherence_rate_{axis}"] = (fit.decoherence_rate, "quanta/s")
        except (InputError, ValueError, RuntimeError) as exc:
            out[f"optimal_gain_{axis}"] = (nan, "1/s")
            out[f"min_occupation_{axis}"] = (nan, "quanta")
            out[f"fit_status_{axis}"] = (f"{type(exc).__name__}: {exc}"[:300], "")
        else:
            out[f"fit_status_{axis}"] = ("ok", "")
        if n:
            # the lowest occupation measured: an upper bound of the minimum in any case
            k = int(np.argmin(n))
            out[f"lowest_occupation_{axis}"] = (Estimate(n[k], e[k]), "quanta")
    pred = predicted_cold_damping(app, pressure) if math.isfinite(pressure) else {}
    for axis, (dec, meas) in pred.items():
        g_opt, n_min = cold_damping_optimum(0.0, 0.0, meas, dec)
        out[f"predicted_optimal_gain_{axis}"] = (g_opt, "1/s")
        out[f"predicted_min_occupation_{axis}"] = (n_min, "quanta")
    out["optimal_gain"] = (_total_optimum(fitted), "1/s")
    return out


def _total_optimum(fitted: dict) -> Estimate:
    """Gain minimising the summed occupation of the fitted per-axis models (error by
    drawing the model parameters from their fitted errors)."""
    if not fitted:
        return Estimate(math.nan, math.nan)
    grid = np.geomspace(1.0, 1e7, 4000)

    def best(params):
        total = sum(cold_damping_occupation(grid, 0.0, 0.0, meas, dec) for dec, meas in params)
        return float(grid[int(np.argmin(total))])

    central = [(f.decoherence_rate.value, f.measurement_rate.value) for f in fitted.values()]
    rng = np.random.default_rng(0)
    draws = []
    for _ in range(200):
        params = [(max(rng.normal(f.decoherence_rate.value, f.decoherence_rate.stderr), 1e-9),
                   max(rng.normal(f.measurement_rate.value, f.measurement_rate.stderr), 1e-9))
                  for f in fitted.values()]
        draws.append(best(params))
    return Estimate(best(central), float(np.std(draws, ddof=1)))
