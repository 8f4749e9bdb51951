"""Detector calibration from thermal motion, and charge and mass from a Coulomb drive.

* Thermal calibration: ``c = sqrt(A m Omega0**2/(k_B T))`` from the area ``A`` (V**2)
  of a thermalized peak, Rev. Sci. Instrum. 89, 033111 (2018).
* Charge calibration: a drive tone off resonance while the charge is changed in steps;
  the signed response falls in equal steps per elementary charge, which gives the
  integer charge; referenced to the thermal area of the same records it gives the mass
  without assuming a density (PHYSICS.md section 6).
"""

from __future__ import annotations

import cmath
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._errors import InputError, LimitError
from ..analysis._derived import fit_integer_charge
from ..analysis._resolution import segment_length
from ..live import CombinedAnalyzer, DriveAnalyzer, LiveFitter, ModeAnalyzer
from ..physics import AXES, E_CHARGE, Estimate, mass_from_drive, thermal_calibration
from ..setup import Setup
from ._common import (
    Apparatus,
    emit_summary,
    run_metadata,
    wait_lab,
    weighted_mean,
)
from ._derived_device import DerivedValues
from ._runner import (
    DETECTOR_DEFAULTS,
    clean_detector,
    configure_detector,
    nominal_mass,
    run_with_fitter,
    take,
)
from ._state import (
    OFF,
    Checked,
    LabState,
    clean_estimate,
    clean_int,
    clean_positive,
    clean_pressure,
    reach_state,
    record_seconds,
)

__all__ = ["thermal_calibration_plan", "charge_calibration", "validate_thermal_calibration",
           "validate_charge_calibration"]


def _thermal_pressure(setup: Setup, pressure: Any, plan: str) -> float:
    p = clean_pressure(setup, pressure, "pressure")
    if p < setup.trap.loss_pressure:
        raise LimitError(f"{plan} needs feedback off, so pressure={p:g} Pa must be at or "
                         f"above the setup's loss pressure {setup.trap.loss_pressure:g} Pa;"
                         " choose a higher pressure", key="pressure")
    return p


def validate_thermal_calibration(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`thermal_calibration_plan` (no device is opened)."""
    a = take(params, "thermal_calibration", required=("pressure",),
             optional={"records": 4, "mass": None, "settle_time": 1.0, **DETECTOR_DEFAULTS})
    p = _thermal_pressure(setup, a["pressure"], "thermal_calibration")
    a["pressure"] = p
    a["records"] = clean_int(a["records"], "records", 1)
    a["settle_time"] = clean_positive(a["settle_time"], "settle_time", "s", allow_zero=True)
    if a["mass"] is not None:
        a["mass"] = clean_estimate(a["mass"], "mass")
    clean_detector(setup, a)
    t = a["records"] * record_seconds(setup, a["sample_rate"], a["record_length"])
    state = LabState(pressure=p, feedback=OFF)
    return Checked("thermal_calibration", a, t + a["settle_time"], needs=state, leaves=state)


def validate_charge_calibration(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`charge_calibration` (no device is opened)."""
    a = take(params, "charge_calibration",
             required=("charge_steps", "pressure", "drive_frequency", "drive_amplitude"),
             optional={"records_per_step": 3, "settle_time": 0.5, **DETECTOR_DEFAULTS})
    p = _thermal_pressure(setup, a["pressure"], "charge_calibration")
    a["pressure"] = p
    steps = a["charge_steps"]
    if (isinstance(steps, str) or not isinstance(steps, Sequence) or len(steps) < 3
            or any(isinstance(s, bool) or not isinstance(s, int) for s in steps)):
        raise InputError(f"charge_steps={steps!r} must be at least 3 integers (elementary "
                         "charges changed before each step, e.g. [0, -1, -1, -1])",
                         key="charge_steps")
    a["charge_steps"] = [int(s) for s in steps]
    amp = clean_positive(a["drive_amplitude"], "drive_amplitude", "V")
    if amp > setup.limits.electrode_voltage_max:
        raise LimitError(f"drive_amplitude={amp:g} V is outside (0, "
                         f"{setup.limits.electrode_voltage_max:g}] V, the setup "
                         f"{setup.name!r} limit; lower it", key="drive_amplitude")
    a["drive_amplitude"] = amp
    fd = clean_positive(a["drive_frequency"], "drive_frequency", "Hz")
    f_modes = setup.trap.frequencies
    if any(abs(fd - f) < 0.05 * f for f in f_modes):
        raise InputError(f"drive_frequency={fd:g} Hz is within 5 % of a mode "
                         f"({', '.join(f'{f:g}' for f in f_modes)} Hz); drive off resonance,"
                         " more than 5 % away from every mode", key="drive_frequency")
    a["drive_frequency"] = fd
    a["records_per_step"] = clean_int(a["records_per_step"], "records_per_step", 1)
    a["settle_time"] = clean_positive(a["settle_time"], "settle_time", "s", allow_zero=True)
    clean_detector(setup, a)
    blocks = 1 + len(a["charge_steps"])
    t = blocks * (a["records_per_step"] * record_seconds(setup, a["sample_rate"],
                                                         a["record_length"]) + a["settle_time"])
    needs = LabState(pressure=p, feedback=OFF, needs_charge=True)
    leaves = LabState(pressure=p, feedback=OFF, charge_change=sum(a["charge_steps"]))
    return Checked("charge_calibration", a, t, needs=needs, leaves=leaves)


def _mean_area(fits: Sequence[dict], axis: str) -> tuple[float, float, float, float]:
    ok = [f for f in fits if f.get(f"fit_status_{axis}") == "ok"]
    if not ok:
        return (math.nan,) * 4
    area, area_err = weighted_mean([f[f"area_{axis}"] for f in ok],
                                   [f[f"area_{axis}_stderr"] for f in ok])
    f0 = float(np.mean([f[f"f0_{axis}"] for f in ok]))
    gamma = float(np.mean([f[f"gamma_{axis}"] for f in ok]))
    return area, area_err, f0, gamma


def thermal_calibration_plan(
    detectors: Sequence[Any],
    pressure: float,
    *,
    apparatus: Apparatus,
    records: int = 4,
    mass: Estimate | float | None = None,
    settle_time: float = 1.0,
    sample_rate: float | None = None,
    record_length: int | None = None,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Calibrate the detector (V/m per axis) on thermal motion at ``pressure`` (Pa).

    Feedback is switched off, so ``pressure`` must be at or above the loss pressure.
    ``mass`` (kg) comes from a pressure sweep or a charge calibration; without it the
    setup's nominal radius and density are used, and the summary says which
    (``mass_source``). Run name: ``thermal_calibration``.
    """
    app = apparatus
    chk = validate_thermal_calibration(app.setup, dict(
        pressure=pressure, records=records, mass=mass, settle_time=settle_time,
        sample_rate=sample_rate, record_length=record_length, input_range=input_range))
    p, records, settle_time = chk.params["pressure"], chk.params["records"], chk.params["settle_time"]
    m = nominal_mass(app) if mass is None else chk.params["mass"]
    source = "setup" if mass is None else "measured"
    motion = detectors[0]
    fs, n = yield from configure_detector(app, motion, sample_rate, record_length,
                                         input_range)
    fitter = LiveFitter(ModeAnalyzer(app.setup.trap.frequencies, nperseg=segment_length(n)))
    md_ = run_metadata(app, "thermal_calibration",
                       {"pressure": p, "records": records, "mass": m.value,
                        "mass_source": source}, md)
    values = DerivedValues("summary")
    temperature = app.setup.temperature

    def body(rec):
        yield from reach_state(app, chk.needs)  # pressure first, then feedback off
        yield from wait_lab(app, settle_time)
        for _ in range(records):
            yield from rec.record()
        yield from rec.flush()
        for axis in AXES:
            area, err, f0, _ = _mean_area(rec.fits, axis)
            if math.isfinite(area):
                c = thermal_calibration(area, err, m.value, m.stderr, 2 * math.pi * f0,
                                        temperature)
            else:
                c = Estimate(math.nan, math.nan)
            values.put(f"calibration_{axis}", c, "V/m")
        values.put("mass", m, "kg")
        values.put("mass_source", source, "")
        values.put("pressure", float(np.nanmean([r["pressure"] for r in rec.primaries])), "Pa")
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


def charge_calibration(
    detectors: Sequence[Any],
    charge_steps: Sequence[int],
    *,
    apparatus: Apparatus,
    pressure: float,
    drive_frequency: float,
    drive_amplitude: float,
    records_per_step: int = 3,
    settle_time: float = 0.5,
    sample_rate: float | None = None,
    record_length: int | None = None,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Count the charge and weigh the particle with a Coulomb drive along x.

    Parameters
    ----------
    charge_steps : sequence of int
        Charge change (elementary charges) applied before each step; the first is
        usually 0. E.g. ``[0, -1, -1, -1]`` removes one charge per step.
    pressure : float
        Pa, at or above the loss pressure (feedback off, motion thermal).
    drive_frequency : float
        Hz, off resonance and away from every mode.
    drive_amplitude : float
        V on the electrodes (checked against the setup's voltage limit).

    The drive tone is taken to be phase-locked to the setup clock (its phase is
    ``Omega_d t`` at setup time ``t``, as when the drive generator and the digitiser
    share a time base), so the phasors of all records share one reference and a sign
    change of the charge shows as a phase flip by pi.

    The first ``records_per_step`` records are taken with the drive off: their thermal
    area is the reference of the mass. Summary: ``charge`` (elementary charges, integer,
    at the first step), ``mass`` (kg, from the drive referenced to that thermal area, no
    density assumed), the response
    per charge and the field per volt used. Run name: ``charge_calibration``.
    """
    app = apparatus
    setup = app.setup
    chk = validate_charge_calibration(setup, dict(
        charge_steps=charge_steps, pressure=pressure, drive_frequency=drive_frequency,
        drive_amplitude=drive_amplitude, records_per_step=records_per_step,
        settle_time=settle_time, sample_rate=sample_rate, record_length=record_length,
        input_range=input_range))
    p, steps = chk.params["pressure"], chk.params["charge_steps"]
    records_per_step, settle_time = chk.params["records_per_step"], chk.params["settle_time"]
    drive_frequency, drive_amplitude = chk.params["drive_frequency"], chk.params["drive_amplitude"]
    f_modes = setup.trap.frequencies
    motion = detectors[0]
    fs, n = yield from configure_detector(app, motion, sample_rate, record_length,
                                         input_range)
    analyzer = CombinedAnalyzer([ModeAnalyzer(f_modes, nperseg=segment_length(n)),
                                 DriveAnalyzer(drive_frequency, axis="x")])
    fitter = LiveFitter(analyzer)
    md_ = run_metadata(app, "charge_calibration",
                       {"charge_steps": steps, "pressure": p, "drive_frequency": drive_frequency,
                        "drive_amplitude": drive_amplitude, "records_per_step": records_per_step},
                       md)
    values = DerivedValues("summary")
    field = setup.electrodes.geometry_factor * drive_amplitude / setup.electrodes.distance

    def body(rec):
        import bluesky.plan_stubs as bps

        yield from reach_state(app, chk.needs)  # pressure first, then feedback off
        el = app.electrodes
        # the thermal reference with the drive off: a line inside the fitted band would
        # bias the thermal area, and with it the mass
        yield from bps.mv(el.drive_enabled, False)
        yield from wait_lab(app, settle_time)
        for _ in range(records_per_step):
            yield from rec.record()
        yield from rec.flush()
        thermal_fits = list(rec.fits)
        yield from bps.mv(el.drive_frequency, float(drive_frequency),
                          el.drive_amplitude, float(drive_amplitude))
        yield from bps.mv(el.drive_enabled, True)
        cumulative, per_step = 0, []
        try:
            for s in steps:
                if s:
                    yield from bps.mv(app.charge.steps, s)
                cumulative += s
                yield from wait_lab(app, settle_time)
                n0 = len(rec.pairs())
                for _ in range(records_per_step):
                    yield from rec.record()
                yield from rec.flush()
                pairs = rec.pairs()[n0:]  # the clean records of this charge
                if pairs:
                    per_step.append((cumulative, pairs))
        finally:
            yield from bps.mv(el.drive_enabled, False)
        values.update(_summarize_charge(per_step, thermal_fits, field, drive_frequency,
                                        setup.temperature))
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))


def _summarize_charge(per_step, thermal_fits, field, f_drive, temperature) -> dict:
    # the drive is phase-locked to the setup clock (phase Omega_d t at setup time t), so
    # a record starting at t_s sees the phasor turned by Omega_d t_s: turn it back
    wd = 2 * math.pi * f_drive
    phasors = [[complex(f["drive_re_x"], f["drive_im_x"])
                * cmath.exp(-1j * math.fmod(wd * p["record_start_time"], 2 * math.pi))
                for p, f in pairs] for _, pairs in per_step]
    ref = max((z for zs in phasors for z in zs), key=abs)
    phase = cmath.phase(ref)
    amps, errs, ks = [], [], []
    for (k, _), zs in zip(per_step, phasors, strict=True):
        proj = np.array([(z * cmath.exp(-1j * phase)).real for z in zs])
        amps.append(float(proj.mean()))
        errs.append(float(proj.std(ddof=1) / math.sqrt(proj.size)) if proj.size > 1 else math.nan)
        ks.append(k)
    errs = np.asarray(errs)
    floor = np.nanmedian(errs) if np.any(np.isfinite(errs)) else 1.0
    errs = np.where(np.isfinite(errs) & (errs > 0), errs, floor)
    # the reference phase is that of the largest response; if the charge crosses zero the
    # projection changes sign, which the integer fit handles
    fit = fit_integer_charge(amps, errs, ks)
    charge = fit.charge
    alpha = fit.per_charge
    area, area_err, f0, gamma = _mean_area(thermal_fits, "x")
    sign = 1 if charge >= 0 else -1
    drive_area = alpha.value**2 / 2.0
    m = mass_from_drive(drive_area, abs(alpha.value) * alpha.stderr, area, area_err,
                        E_CHARGE, field, 2 * math.pi * f0, gamma, 2 * math.pi * f_drive,
                        temperature)
    return {
        "charge": (int(charge), "e"),
        # error of the charge before rounding to the integer (well below 1/2: exact)
        "charge_stderr": (fit.unrounded.stderr, "e"),
        "charge_residual": (fit.residual, "e"),
        "mass": (m, "kg"),
        "response_per_charge": (Estimate(sign * alpha.value, alpha.stderr), "V"),
        "drive_field": (field, "V/m"),
    }
