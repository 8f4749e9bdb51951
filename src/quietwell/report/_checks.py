"""Consistency checks of a campaign: do the numbers agree with each other?

* thermalization: the feedback-off peak areas of the pressure sweep agree (reduced
  chi-square of their scatter), and the calibration they give agrees with the thermal
  calibration step's;
* goodness of the fits: reduced deviance of the spectral fits of the representative
  record and of the sidebands, reduced chi-square of the cold-damping model and of the
  heating-rate line;
* predictions: measured heating rates beside the predicted ones, the minimum occupation
  beside its prediction.

A reduced chi-square is judged by its p-value from ``scipy.special.chdtrc`` (the
chi-square survival function; ``ok`` above 0.01); a difference by its size in combined
standard errors (``ok`` within 2, ``check`` within 3, ``disagrees`` beyond: common
practice, no source).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..physics import AXES
from . import _streams

__all__ = ["Check", "chi2_verdict", "z_verdict"]


@dataclass(frozen=True)
class Check:
    """One row of the checks table; ``value`` is the number judged (a reduced chi-square,
    a deviance, or a difference in standard errors ``z``)."""

    group: str
    what: str
    measured: str
    expected: str
    value: float
    kind: str  # "chi2", "z", "ratio"
    verdict: str
    uid: str = ""


def chi2_verdict(reduced: float, dof: int) -> str:
    """``ok`` when a reduced chi-square this large has probability > 0.01 (``chi2`` with
    ``dof`` degrees of freedom), ``check`` otherwise; ``n/a`` without degrees of freedom."""
    from scipy.special import chdtrc  # chi2.sf without importing scipy.stats

    if not (math.isfinite(reduced) and dof >= 1):
        return "n/a"
    p = float(chdtrc(dof, reduced * dof))
    return "ok" if p > 0.01 else "check"


def z_verdict(z: float) -> str:
    """``ok`` within 2 standard errors, ``check`` within 3, ``disagrees`` beyond."""
    if not math.isfinite(z):
        return "n/a"
    return "ok" if abs(z) < 2 else "check" if abs(z) < 3 else "disagrees"


def _z(a: float, ea: float, b: float, eb: float) -> float:
    err = math.hypot(ea if math.isfinite(ea) else 0.0, eb if math.isfinite(eb) else 0.0)
    return (a - b) / err if err > 0 else math.nan


def _num(s: Mapping[str, Any], key: str) -> float:
    try:
        return float(s.get(key, math.nan))
    except (TypeError, ValueError):
        return math.nan


def _pm(v: float, e: float, unit: str = "") -> str:
    if not math.isfinite(v):
        return "—"
    text = f"{v:.4g}" if not math.isfinite(e) or e == 0 else f"{v:.4g} ± {e:.2g}"
    return f"{text} {unit}".strip()


def thermalization_checks(sweep: Any, thermal: Any | None) -> list[Check]:
    """From a pressure sweep's summary, and the thermal calibration's when there is one."""
    s, t = sweep.summary, thermal.summary if thermal is not None else {}
    out = []
    n_off = None
    for axis in AXES:
        chi2 = _num(s, f"thermalization_chi2_{axis}")
        if math.isfinite(chi2):
            if n_off is None:
                n_off = _feedback_off_records(sweep)
            dof = max(n_off - 1, 1)
            out.append(Check("thermalization", f"peak areas {axis}, feedback off (reduced χ²)",
                             f"{chi2:.3g}", f"≈ 1 ({dof} dof)", chi2, "chi2",
                             chi2_verdict(chi2, dof), sweep.uid))
        c, ce = _num(s, f"thermal_calibration_{axis}"), _num(s, f"thermal_calibration_{axis}_stderr")
        c0, c0e = _num(t, f"calibration_{axis}"), _num(t, f"calibration_{axis}_stderr")
        if math.isfinite(c) and math.isfinite(c0):
            z = _z(c, ce, c0, c0e)
            out.append(Check("thermalization", f"calibration {axis}: pressure sweep vs thermal "
                             "calibration (z)", _pm(c, ce, "V/m"), _pm(c0, c0e, "V/m"), z, "z",
                             z_verdict(z), sweep.uid))
    return out


def _feedback_off_records(sweep: Any) -> int:
    """Records of the sweep at or above the loss pressure (taken with feedback off)."""
    start = sweep.start
    loss = float((start.get("setup_description") or {}).get("trap", {}).get("loss_pressure",
                                                                             math.nan))
    try:
        p = _streams.primary_column(sweep.client, "pressure").astype(float)
    except Exception:  # noqa: BLE001 - only the degrees of freedom are lost
        return 0
    return int(np.sum(p >= loss)) if math.isfinite(loss) else int(p.size)


def spectrum_checks(spectra: Mapping[str, Any], uid: str, what: str) -> list[Check]:
    out = []
    for axis, sp in spectra.items():
        if sp.fit is None:
            out.append(Check("fits", f"{what} {axis}", "no fit", "a fit", math.nan, "chi2",
                             "check", uid))
            continue
        g = sp.fit.goodness
        out.append(Check("fits", f"{what} {axis} (reduced deviance)", f"{g.reduced:.3g}",
                         f"≈ 1 ({g.dof} dof)", g.reduced, "chi2",
                         "ok" if g.p_value > 0.01 else "check", uid))
    return out


def cold_damping_checks(run: Any) -> list[Check]:
    from ..analysis._derived import fit_cold_damping
    from ._plots import gain_points

    out = []
    s = run.summary
    for axis in AXES:
        g, n, e = gain_points(run.client, axis)
        if g.size >= 3 and s.get(f"fit_status_{axis}") == "ok":
            try:
                fit = fit_cold_damping(g, n, e)
            except Exception:  # noqa: BLE001 - the summary says why; shown as n/a
                continue
            dof = g.size - 2
            out.append(Check("fits", f"cold-damping model {axis} (reduced χ²)",
                             f"{fit.reduced_chi2:.3g}", f"≈ 1 ({dof} dof)", fit.reduced_chi2,
                             "chi2", chi2_verdict(fit.reduced_chi2, dof), run.uid))
        m, me = _num(s, f"min_occupation_{axis}"), _num(s, f"min_occupation_{axis}_stderr")
        pm = _num(s, f"predicted_min_occupation_{axis}")
        if math.isfinite(m) and math.isfinite(pm):
            z = _z(m, me, pm, 0.0)
            out.append(Check("predictions", f"minimum occupation {axis}: measured vs predicted "
                             "(z)", _pm(m, me), f"{pm:.4g}", z, "z", z_verdict(z), run.uid))
    return out


def heating_checks(runs: list[Any], table: Any) -> list[Check]:
    from ._plots import heating_line

    out = []
    for r in runs:
        s = r.summary
        p = _num(s, "pressure")
        for axis in AXES:
            m, me = _num(s, f"heating_rate_{axis}"), _num(s, f"heating_rate_{axis}_stderr")
            q, qe = (_num(s, f"predicted_heating_rate_{axis}"),
                     _num(s, f"predicted_heating_rate_{axis}_stderr"))
            if math.isfinite(m) and math.isfinite(q):
                z = _z(m, me, q, qe)
                out.append(Check("predictions", f"heating rate {axis} at {p:.3g} Pa: measured "
                                 "vs predicted (z)", _pm(m, me, "/s"), _pm(q, qe, "/s"), z, "z",
                                 z_verdict(z), r.uid))
    if len(table) >= 3:
        for axis in AXES:
            try:
                line = heating_line(table, axis)
            except Exception:  # noqa: BLE001 - too few finite points: no check
                continue
            dof = int(np.isfinite(table[f"heating_rate_{axis}"]).sum()) - 2
            out.append(Check("fits", f"heating rate vs pressure {axis}, line a·P + b (reduced "
                             "χ²)", f"{line.reduced_chi2:.3g}", f"≈ 1 ({dof} dof)",
                             line.reduced_chi2, "chi2", chi2_verdict(line.reduced_chi2, dof)))
    return out


def sideband_checks(spectrum: Any, uid: str) -> list[Check]:
    out = []
    for name, (_, fit) in (("Stokes", spectrum.stokes), ("anti-Stokes", spectrum.antistokes)):
        if fit is None:
            continue
        g = fit.goodness
        out.append(Check("fits", f"{name} sideband of {spectrum.axis} (reduced deviance)",
                         f"{g.reduced:.3g}", f"≈ 1 ({g.dof} dof)", g.reduced, "chi2",
                         "ok" if g.p_value > 0.01 else "check", uid))
    return out
