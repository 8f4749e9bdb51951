"""Sideband thermometry: occupation from the heterodyne sideband asymmetry.

``n = R/(1 - R)`` with ``R = A_antiStokes/A_Stokes`` (Phys. Rev. Lett. 124, 013603
(2020)); no detector calibration is needed. The motion detector is recorded in the
same events, so the calibrated occupation can be compared.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._errors import InputError
from ..live import CombinedAnalyzer, LiveFitter, ModeAnalyzer, SidebandAnalyzer
from ..physics import AXES, Estimate, sideband_occupation
from ._common import (
    Apparatus,
    check_gain,
    emit_summary,
    run_metadata,
    set_feedback,
    wait_lab,
)
from ._derived_device import DerivedValues
from ._runner import configure_detector, run_with_fitter

__all__ = ["sideband_thermometry"]


def sideband_thermometry(
    detectors: Sequence[Any],
    records: int,
    *,
    apparatus: Apparatus,
    axis: str = "z",
    feedback_gain: float | None = None,
    settle_periods: float = 30.0,
    input_range: float | None = None,
    md: dict | None = None,
):
    """Record ``records`` heterodyne records and derive the occupation of ``axis``.

    ``detectors`` must hold the heterodyne detector (key prefix ``het_``) and may hold
    the motion detector. With ``feedback_gain`` (1/s) the cold damping is set first.
    Summary: ``occupation`` (quanta) of ``axis`` with its error, from the ratio of the
    sideband areas summed over all records. Run name: ``sideband_thermometry``.
    """
    app = apparatus
    if app.heterodyne is None or app.heterodyne not in detectors:
        raise InputError("sideband_thermometry needs the heterodyne detector among detectors;"
                         " this setup has none" if app.heterodyne is None else
                         "pass apparatus.heterodyne in detectors")
    if axis not in AXES:
        raise InputError(f"axis={axis!r} must be one of x, y, z")
    if not isinstance(records, int) or records < 1:
        raise InputError(f"records={records!r} must be an integer >= 1")
    gain = None if feedback_gain is None else check_gain(app, feedback_gain, "feedback_gain")
    setup = app.setup
    het = app.heterodyne
    fs, n = yield from configure_detector(app, het, None, None, input_range)
    parts = [SidebandAnalyzer(setup.detector.heterodyne_carrier, setup.detector.lo_sign,
                              setup.trap.frequencies, nperseg=max(1024, n // 8), axis=axis)]
    if app.detector in detectors:
        _, n_m = yield from configure_detector(app, app.detector, None, None)
        parts.append(ModeAnalyzer(setup.trap.frequencies, nperseg=max(1024, n_m // 8)))
    fitter = LiveFitter(CombinedAnalyzer(parts))
    md_ = run_metadata(app, "sideband_thermometry",
                       {"records": records, "axis": axis, "feedback_gain": gain}, md)
    values = DerivedValues("summary")

    def body(rec):
        if gain is not None:
            yield from set_feedback(app, gain)
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
        yield from emit_summary(values)
        return values.values

    return (yield from run_with_fitter(app, detectors, fitter, md_, body))
