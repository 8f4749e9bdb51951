"""Line search with a stated false-alarm rate (Gamma law of the Welch estimate with its
number of averages) and a width test: noise is taken for a line at most at the stated
rate, a single high bin is no line, a real line is found."""

from __future__ import annotations

import math

import numpy as np
import pytest

from quietwell.analysis import fit_psd, oscillator_peak, welch_psd
from quietwell.analysis._fit import (
    _as_spectrum,
    _band_bins,
    _find_peaks,
    _floor_estimate,
    _search_options,
)

TWO_PI = 2.0 * math.pi


def _lines(spectrum, false_alarm):
    spec = _as_spectrum(spectrum)
    _, f, p = _band_bins(spec, None)
    floor = _floor_estimate(p, spec.k)
    return _find_peaks(f, p, spec.k, spec.r, floor, None, **_search_options(spec),
                       false_alarm=false_alarm)


def _rate_bounds(alpha, n):
    # binomial: at most alpha + 3 sigma; the union bound over bins makes the rate lower
    # than alpha, but not by more than a factor of 10 (a threshold far too high fails)
    return alpha / 10.0, alpha + 3.0 * math.sqrt(alpha * (1 - alpha) / n)


@pytest.mark.parametrize("nperseg", [1024, 8192])
def test_false_alarm_rate_on_welch_noise(nperseg):
    alpha, n = 0.3, 150
    hits = 0
    for seed in range(n):
        x = np.random.default_rng(seed).normal(size=2**16)
        psd = welch_psd(x, 1e6, nperseg=nperseg, noverlap=nperseg // 2, workers=1)
        hits += bool(_lines(psd, alpha))
    lo, hi = _rate_bounds(alpha, n)
    assert lo <= hits / n <= hi, hits / n


@pytest.mark.parametrize("k", [1, 4, 50])
def test_false_alarm_rate_on_gamma_bins(k):
    # Independent Gamma(K) bins: the exact law of a K-fold average of periodogram bins
    # of Gaussian noise (Rev. Sci. Instrum. 81, 075103 (2010))
    alpha, n = 0.3, 300
    f = np.arange(1, 4001) * 10.0
    rng = np.random.default_rng(k)
    hits = sum(bool(_lines((f, rng.gamma(k, 1.0 / k, f.size), k), alpha)) for _ in range(n))
    lo, hi = _rate_bounds(alpha, n)
    assert lo <= hits / n <= hi, hits / n


def test_single_high_bin_is_no_line():
    # issue 14: one high bin 5 kHz away from the real line must not become a "peak"
    fs, n = 1e6, 2**18
    rng = np.random.default_rng(3)
    t = np.arange(n) / fs
    f_line, gamma, area, floor = 100e3, TWO_PI * 800.0, 1e-6, 1e-12
    fk = np.fft.rfftfreq(n, 1 / fs)
    s = oscillator_peak(fk, f_line, gamma, area) + floor
    coef = np.sqrt(s * fs * n / 4.0) * (rng.normal(size=fk.size) + 1j * rng.normal(size=fk.size))
    x = np.fft.irfft(coef, n)
    nperseg = 4096
    f_tone = round(105e3 / (fs / nperseg)) * (fs / nperseg)  # exactly on a bin
    x += math.sqrt(2 * 50 * floor * fs / nperseg) * np.sin(TWO_PI * f_tone * t)
    psd = welch_psd(x, fs, nperseg=nperseg, noverlap=nperseg // 2)
    i_tone = int(np.argmin(np.abs(psd.frequency - f_tone)))
    assert psd.psd[i_tone] > 20 * floor  # far above the noise
    fit = fit_psd(psd)
    (pk,) = fit.peaks
    assert abs(pk.f0 - f_line) < 5 * pk.f0_stderr
