"""Fit one detector record: per axis f0, gamma, area, background and occupation.

The same code path serves the live fitter, the summaries and re-analysis of a stored
run. A fit that fails is reported in the fields (``nan`` values and a status message),
never raised into the RunEngine.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .._errors import QuietwellError
from ..analysis import fit_psd, welch_psd
from ..analysis._derived import occupation_from_area
from ..physics import AXES

__all__ = ["RecordAnalyzer", "FIT_QUANTITIES"]

#: per-axis quantity -> units of its data key (the ``_stderr`` twin has the same units)
FIT_QUANTITIES: dict[str, str] = {
    "f0": "Hz",
    "gamma": "1/s",
    "area": "V**2",
    "background": "V**2/Hz",
    "occupation": "quanta",
}


@dataclass
class RecordAnalyzer:
    """Fits the x, y, z channels of one record around the modes of the setup.

    Parameters
    ----------
    mode_frequencies : sequence of 3 floats
        Expected x, y, z frequencies in Hz (setup); each channel is fitted in a band
        of ``band_fraction`` around its own mode, with every mode inside the band
        (crosstalk peaks) fitted too.
    calibration : sequence of 3 floats or None
        V/m per axis, with ``calibration_stderr``; with ``mass`` (kg) it gives the
        occupation of each mode.
    nperseg : int
        Welch segment length (50 % overlap, Hann window).
    """

    mode_frequencies: Sequence[float]
    nperseg: int
    calibration: Sequence[float] | None = None
    calibration_stderr: Sequence[float] | None = None
    mass: float | None = None
    band_fraction: float = 0.12

    def describe(self, prefix: str = "") -> dict[str, dict]:
        """Data keys of :meth:`analyze`'s fields, each with ``units``."""
        out: dict[str, dict] = {}
        for axis in AXES:
            for q, units in FIT_QUANTITIES.items():
                for suffix in ("", "_stderr"):
                    out[f"{prefix}{q}_{axis}{suffix}"] = {
                        "dtype": "number", "shape": [], "units": units,
                        "source": "quietwell.live"}
            out[f"{prefix}fit_status_{axis}"] = {"dtype": "string", "shape": [], "units": "",
                                                 "source": "quietwell.live"}
        return out

    def analyze(self, channels: Mapping[str, np.ndarray], sample_rate: float) -> dict:
        """Fields of one record: ``{f0_x: .., f0_x_stderr: .., ..., fit_status_x: 'ok'}``."""
        out: dict[str, float | str] = {}
        for i, axis in enumerate(AXES):
            fields = {f"{q}_{axis}{s}": math.nan for q in FIT_QUANTITIES for s in ("", "_stderr")}
            try:
                fields.update(self._fit_axis(i, axis, np.asarray(channels[axis]), sample_rate))
                fields[f"fit_status_{axis}"] = "ok"
            except (QuietwellError, ValueError, np.linalg.LinAlgError) as exc:
                fields[f"fit_status_{axis}"] = f"{type(exc).__name__}: {exc}"[:400]
            out.update(fields)
        return out

    def _fit_axis(self, i: int, axis: str, trace: np.ndarray, fs: float) -> dict[str, float]:
        f_own = float(self.mode_frequencies[i])
        lo, hi = f_own * (1 - self.band_fraction), f_own * (1 + self.band_fraction)
        guesses = sorted(f for f in self.mode_frequencies if lo < f < hi)
        psd = welch_psd(trace, fs, nperseg=self.nperseg, noverlap=self.nperseg // 2)
        fit = fit_psd(psd, peaks=guesses, band=(lo, hi))
        peak = min(fit.peaks, key=lambda p: abs(p.f0 - f_own))
        res = {
            f"f0_{axis}": peak.f0, f"f0_{axis}_stderr": peak.f0_stderr,
            f"gamma_{axis}": peak.gamma, f"gamma_{axis}_stderr": peak.gamma_stderr,
            f"area_{axis}": peak.area, f"area_{axis}_stderr": peak.area_stderr,
            f"background_{axis}": peak.background,
            f"background_{axis}_stderr": peak.background_stderr,
        }
        if self.calibration is not None and self.mass is not None:
            c_err = 0.0 if self.calibration_stderr is None else self.calibration_stderr[i]
            n = occupation_from_area(peak.area, peak.area_stderr, self.calibration[i], c_err,
                                     self.mass, peak.f0)
            res[f"occupation_{axis}"] = n.value
            res[f"occupation_{axis}_stderr"] = n.stderr
        return res
