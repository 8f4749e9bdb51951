"""The regimes in which the fit's error bars are checked, and the measurement itself.

Used by ``tests/test_fit_coverage.py`` and ``bench/fit_coverage.py``. Records come
from :func:`oscillator_records.record_from_spectrum` (an inverse FFT of the known
spectrum with random phases and chi-square amplitudes, written independently of the
fitter and of the simulated laboratory); each goes through quietwell's Welch PSD with
the segment length of the project's rule for its lines (as ``quietwell analyze``
cuts it) and :func:`quietwell.analysis.fit_psd` started from the true centre
frequencies (the error bars are checked here, not the line search).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from oscillator_records import oscillator_spectrum, periodogram_fisher, record_from_spectrum

from quietwell.analysis import fit_psd, welch_psd
from quietwell.analysis._resolution import segment_length

TWO_PI = 2.0 * math.pi
FS = 1e5
N = 2**17

#: name: lines (f0 Hz, FWHM Hz, area), floor per Hz. Areas in units**2 (1e-6: a peak
#: 4 A / gamma of 2e-9 per Hz over a 1 kHz line, far above the 1e-12 floor).
REGIMES: dict[str, tuple[list[tuple[float, float, float]], float]] = {
    # 30 Hz: 4 bins of the 2**14-sample segments the rule picks (window-exact polish)
    "narrow": ([(20e3, 30.0, 1e-6)], 1e-12),
    "broad": ([(20e3, 3000.0, 1e-6)], 1e-12),
    # peak height 4 A / gamma equal to the floor (twice the record: a width to 6 %)
    "weak_on_floor": ([(15e3, 1500.0, 0.25 * TWO_PI * 1500.0 * 1e-10)], 1e-10),
    # 3 linewidths apart
    "two_close": ([(20e3, 200.0, 1e-6), (20.6e3, 200.0, 1e-6)], 1e-12),
    "near_dc": ([(800.0, 150.0, 1e-6)], 1e-12),
    "near_nyquist": ([(48.5e3, 300.0, 1e-6)], 1e-12),
}


#: records of the regimes, samples (the weak line needs a longer one to be measured)
LENGTH = {name: 2 * N if name == "weak_on_floor" else N for name in REGIMES}


def lines_of(name: str) -> list[tuple[float, float, float]]:
    """The regime's lines as ``(f0 Hz, gamma 1/s, area)``."""
    return [(f0, TWO_PI * fwhm, area) for f0, fwhm, area in REGIMES[name][0]]


@dataclass
class Measured:
    """Per fitted spectrum and line: estimates, standard errors (columns f0, gamma,
    area), the true values, and the Cramer-Rao variances of the full periodogram."""

    values: np.ndarray  # (spectra, lines, 3)
    errors: np.ndarray  # (spectra, lines, 3)
    truth: np.ndarray  # (lines, 3)
    crb_variance: np.ndarray  # (lines, 3)
    nperseg: int
    failed: int

    def pulls(self) -> np.ndarray:
        return (self.values - self.truth) / self.errors

    def coverage(self, z: float) -> np.ndarray:
        return np.mean(np.abs(self.pulls()) < z, axis=0)

    def crb_ratio(self) -> np.ndarray:
        """Variance of the estimates over the Cramer-Rao bound, per line and parameter."""
        return np.var(self.values, axis=0, ddof=1) / self.crb_variance


def measure(name: str, n_spectra: int, seed: int = 0, **fit_options) -> Measured:
    """Fit ``n_spectra`` records of the regime ``name`` (seeds ``seed`` onwards)."""
    lines = lines_of(name)
    floor = REGIMES[name][1]
    n = LENGTH[name]
    s = oscillator_spectrum(FS, n, lines, floor)
    nperseg = segment_length(n, FS, [g / TWO_PI for _, g, _ in lines])
    values = np.empty((n_spectra, len(lines), 3))
    errors = np.empty_like(values)
    failed = 0
    rng = np.random.default_rng(seed)
    i = 0
    while i < n_spectra:
        x = record_from_spectrum(s, FS, rng)
        psd = welch_psd(x, FS, nperseg=nperseg, noverlap=nperseg // 2, workers=1)
        try:
            fit = fit_psd(psd, peaks=[f0 for f0, _, _ in lines], **fit_options)
        except Exception:  # noqa: BLE001 - counted and reported, the spectrum replaced
            failed += 1
            if failed > n_spectra // 10:
                raise
            continue
        for j, pk in enumerate(fit.peaks):
            values[i, j] = pk.f0, pk.gamma, pk.area
            errors[i, j] = pk.f0_stderr, pk.gamma_stderr, pk.area_stderr
        i += 1
    crb = np.linalg.inv(periodogram_fisher(FS, n, lines, floor))
    crb_var = np.diag(crb)[:-1].reshape(len(lines), 3)
    return Measured(values, errors, np.array(lines), crb_var, nperseg, failed)
