"""Sideband thermometry: occupation from the heterodyne sideband asymmetry.

``n = R/(1 - R)`` with ``R = A_antiStokes/A_Stokes`` (Phys. Rev. Lett. 124, 013603
(2020)); no detector calibration is needed. The motion detector is recorded in the
same events, so the calibrated occupation can be compared.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._errors import InputError
from ..analysis._resolution import segment_length
from ..live import CombinedAnalyzer, LiveFitter, ModeAnalyzer, SidebandAnalyzer
from ..physics import AXES, Estimate, sideband_occupation
from ..setup import Setup
from ._common import (
    Apparatus,
    emit_summary,
    run_metadata,
    wait_lab,
)
from ._derived_device import DerivedValues
from ._runner import clean_detector, configure_detector, run_with_fitter, take
from ._state import (
    ON,
    Checked,
    LabState,
    clean_gain,
    clean_int,
    clean_positive,
    clean_pressure,
    reach_state,
    record_seconds,
)

__all__ = ["sideband_thermometry", "validate_sideband_thermometry"]


def validate_sideband_thermometry(setup: Setup, params: Mapping[str, Any]) -> Checked:
    """Clean the parameters of :func:`sideband_thermometry` (no device is opened)."""
    a = take(params, "sideband_thermometry", required=("records",),
             optional={"axis": "z", "pressure": None, "feedback_gain": None,
                       "settle_periods": 30.0, "input_range": None})
    if setup.detector.heterodyne_carrier <= 0:
        raise InputError(f"sideband_thermometry needs a heterodyne detector, and setup "
                         f"{setup.name!r} has none ([detector] heterodyne_carrier = 0); "
                         "remove the step or use a setup with heterodyne detection")
    if a["axis"] not in AXES:
        raise InputError(f"axis={a['axis']!r} must be one of x, y, z", key="axis")
    a["records"] = clean_int(a["records"], "records", 1)
    if a["pressure"] is not None:
        a["pressure"] = clean_pressure(setup, a["pressure"])
    gain = None
    if a["feedback_gain"] is not None:
        gain = a["feedback_gain"] = clean_gain(setup, a["feedback_gain"], "feedback_gain")
    a["settle_periods"] = clean_positive(a["settle_periods"], "settle_periods", "damping times",
                                         allow_zero=True)
    clean_detector(setup, a)
    t = a["records"] * record_seconds(setup, None, None) + (
        a["settle_periods"] / gain if gain else 0.0)
    state = (LabState(pressure=a["pressure"], feedback=ON, gain=gain, needs_charge=True)
             if gain is not None else LabState(pressure=a["pressure"]))
    return Checked("sideband_thermometry", a, t, needs=state, leaves=state)


def sideband_thermometry(
    detectors: Sequence[Any],
    records: int,
    *,
    apparatus: Apparatus,
    axis: str = "z",
    pressure: float | None = None,
    feedback_gain: float | None = None,
    settle_periods: float = 30.0,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Record ``records`` heterodyne records and derive the occupation of ``axis``.

    ``detectors`` must hold the heterodyne detector (key prefix ``het_``) and may hold
    the motion detector. With ``feedback_gain`` (1/s) the cold damping is set first, then
    the pressure is moved to ``pressure`` (Pa; default: the present one).
    Summary: ``occupation`` (quanta) of ``axis`` with its error, from the ratio of the
    sideband areas summed over all records. Run name: ``sideband_thermometry``.
    """
    app = apparatus
    if app.heterodyne is None or app.heterodyne not in detectors:
        raise InputError("sideband_thermometry needs the heterodyne detector among detectors;"
                         " this setup has none" if app.heterodyne is None else
                         "pass apparatus.heterodyne in detectors")
    chk = validate_sideband_thermometry(app.setup, dict(
        records=records, pressure=pressure, axis=axis, feedback_gain=feedback_gain,
        settle_periods=settle_periods, input_range=input_range))
    records, axis, gain = chk.params["records"], chk.params["axis"], chk.params["feedback_gain"]
    settle_periods = chk.params["settle_periods"]
    setup = app.setup
    het = app.heterodyne
    fs, n = yield from configure_detector(app, het, None, None, input_range)
    parts = [SidebandAnalyzer(setup.detector.heterodyne_carrier, setup.detector.lo_sign,
                              setup.trap.frequencies, nperseg=segment_length(n), axis=axis)]
    if app.detector in detectors:
        _, n_m = yield from configure_detector(app, app.detector, None, None)
        parts.append(ModeAnalyzer(setup.trap.frequencies, nperseg=segment_length(n_m)))
    fitter = LiveFitter(CombinedAnalyzer(parts))
    md_ = run_metadata(app, "sideband_thermometry",
                       {"records": records, "axis": axis, "feedback_gain": gain,
                        "pressure": chk.params["pressure"]}, md)
    values = DerivedValues("summary")

    def body(rec):
        yield from reach_state(app, chk.needs)
        if gain is not None:
            yield from wait_lab(app, settle_periods / gain)
        for _ in range(records):
            yield from rec.record()
        yield from rec.flush()
        ok = [f for f in rec.fits if f.get(f"sideband_status_{axis}") == "ok"]
        if len(ok) >= 2:
            a_s = np.array([f[f"stokes_area_{axis}"] for f in ok])
            a_as = np.array([f[f"antistokes_area_{axis}"] for f in ok])
            # ratio of the mean areas; its error from the scatter of the records
            ratio = float(a_as.mean() / a_s.mean())
            rel = math.hypot(a_as.std(ddof=1) / a_as.mean(), a_s.std(ddof=1) / a_s.mean())
            r_err = ratio * rel / math.sqrt(len(ok))
            try:
                occ = sideband_occupation(ratio, r_err)
            except InputError:
                occ = Estimate(math.nan, math.nan)
            values.put("sideband_ratio", Estimate(ratio, r_err), "1")
            # a hot mode's ratio is close to 1, where n = R/(1 - R) is ill-determined:
            # the one-sided 97.7 % lower bound from R - 2 sigma_R is still informative
            r_lo = ratio - 2.0 * r_err
            values.put("occupation_lower_bound",
                       r_lo / (1.0 - r_lo) if 0.0 <= r_lo < 1.0 else 0.0, "quanta")
        else:
            occ = Estimate(math.nan, math.nan)
        values.put("occupation", occ, "quanta")
        values.put("axis", axis, "")
        values.put("records_ok", len(ok), "")
        yield from emit_summary(values, rec)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))
