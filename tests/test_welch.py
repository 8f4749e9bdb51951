"""Welch PSD: equal to scipy.signal.welch, Parseval, overlap statistics, bad input."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
import scipy.integrate
import scipy.signal

from quietwell import InputError
from quietwell.analysis import (
    bin_correlation_factor,
    welch_effective_averages,
    welch_psd,
)

CASES = [
    # window, nperseg, noverlap, detrend
    ("hann", 1024, 512, "constant"),
    ("hamming", 1000, 250, "linear"),
    ("boxcar", 777, 0, False),
    (("kaiser", 8.0), 2048, 1536, "constant"),
    ("blackmanharris", 512, 384, "none"),
    ("hamming", 640, 320, "constant"),
    ("blackman", 257, 128, "constant"),
]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("shape", [(50_000,), (3, 40_000)])
@pytest.mark.parametrize("window, nperseg, noverlap, detrend", CASES)
def test_equals_scipy_signal_welch(dtype, shape, window, nperseg, noverlap, detrend):
    # Reference library: scipy.signal.welch, density scaling, mean average.
    rng = np.random.default_rng(11)
    x = (rng.normal(size=shape) + 3.0 + 1e-4 * np.arange(shape[-1])).astype(dtype)
    ours = welch_psd(x, 2.5e4, nperseg=nperseg, noverlap=noverlap, window=window, detrend=detrend)
    ref_detrend = False if detrend == "none" else detrend
    # float32 is compared with scipy's double-precision result of the same
    # samples: scipy's own float32 path differs from it by up to ~1e-5 in the
    # bins where detrending cancels most of the power.
    f, ref = scipy.signal.welch(
        x.astype(np.float64),
        2.5e4,
        window=window,
        nperseg=nperseg,
        noverlap=noverlap,
        detrend=ref_detrend,
        scaling="density",
        average="mean",
    )
    np.testing.assert_allclose(ours.frequency, f, rtol=1e-12)
    np.testing.assert_allclose(ours.psd, ref, rtol=1e-5, atol=0)
    assert ours.psd.dtype == dtype
    assert ours.psd.shape == ref.shape
    assert ours.n_segments == (shape[-1] - noverlap) // (nperseg - noverlap)


@pytest.mark.parametrize("window", ["hann", "hamming", "blackman", "boxcar"])
@pytest.mark.parametrize("detrend", ["constant", "none"])
def test_numpy_fallback_of_the_frequency_window_equals_scipy(monkeypatch, window, detrend):
    # Without numba the window is convolved along frequency by numpy: the same
    # result as scipy.signal.welch (reference library), odd and even lengths.
    from quietwell.analysis import _welch

    monkeypatch.setattr(_welch, "_taps_power", _welch._taps_power_numpy)
    rng = np.random.default_rng(5)
    x = rng.normal(size=(2, 30_000)) + 0.5
    for nperseg in (1024, 999):
        ours = welch_psd(x, 1e4, nperseg=nperseg, noverlap=nperseg // 2, window=window, detrend=detrend)
        _, ref = scipy.signal.welch(
            x, 1e4, window=window, nperseg=nperseg, noverlap=nperseg // 2,
            detrend=False if detrend == "none" else detrend,
        )
        keep = ref > 1e-12 * ref.max()  # the DC bin of a detrended boxcar is ~0
        np.testing.assert_allclose(ours.psd[keep], ref[keep], rtol=1e-9)


def test_non_finite_sample_is_named_on_the_frequency_path():
    x = np.random.default_rng(6).normal(size=2**15).astype(np.float32)
    x[12345] = np.nan
    with pytest.raises(InputError, match="12345"):
        welch_psd(x, 1e3, nperseg=1024, noverlap=512)


@pytest.mark.parametrize("offset", [0.0, 30.0, 1000.0])
def test_float32_with_a_large_offset(offset):
    # A DC level far above the fluctuations (as from a photodiode) costs no
    # precision: equal to scipy.signal.welch of the same samples in double.
    rng = np.random.default_rng(12)
    x = (rng.normal(size=2**17) + offset).astype(np.float32)
    for detrend in ("constant", "linear"):
        ours = welch_psd(x, 1e3, nperseg=4096, noverlap=2048, detrend=detrend)
        _, ref = scipy.signal.welch(x.astype(np.float64), 1e3, nperseg=4096, detrend=detrend)
        np.testing.assert_allclose(ours.psd, ref, rtol=1e-5)


def test_float32_equals_scipy_float32_path():
    # Same record through scipy.signal.welch in single precision: equal to 1e-5.
    rng = np.random.default_rng(2)
    x = rng.normal(size=(2, 2**16)).astype(np.float32)
    ours = welch_psd(x, 1e6, nperseg=4096, noverlap=2048)
    _, ref = scipy.signal.welch(x, 1e6, nperseg=4096, noverlap=2048)
    assert ref.dtype == np.float32
    np.testing.assert_allclose(ours.psd, ref, rtol=1e-5)


def test_parseval_sinusoid_plus_noise():
    # Parseval's theorem: the integral of a one-sided PSD per Hz is the variance,
    # here a**2/2 of the sinusoid plus sigma**2 of the white noise (common
    # practice, no source).  Integrated with scipy.integrate.trapezoid.
    fs, n, a, sigma = 1e5, 2**18, 0.3, 0.05
    t = np.arange(n) / fs
    rng = np.random.default_rng(5)
    x = a * np.sin(2 * np.pi * 12_345.6 * t) + rng.normal(scale=sigma, size=n)
    r = welch_psd(x, fs, nperseg=4096, noverlap=2048)
    area = scipy.integrate.trapezoid(r.psd, r.frequency)
    assert area == pytest.approx(a**2 / 2 + sigma**2, rel=5e-3)


def test_parseval_is_exact_for_boxcar_without_overlap():
    # With a boxcar window, no overlap and no detrending the PSD sums to the
    # mean square of the segments exactly (Parseval's theorem, common practice).
    rng = np.random.default_rng(6)
    x = rng.normal(size=10 * 1000)
    r = welch_psd(x, 2e3, nperseg=1000, noverlap=0, window="boxcar", detrend="none")
    assert np.sum(r.psd) * r.resolution_hz == pytest.approx(np.mean(x**2), rel=1e-12)


def test_overlap_correlation_matches_published_table():
    # Overlap correlation sum(w w_shifted)/sum(w**2) of the Hann window: 16.7 % at
    # 50 % and 65.9 % at 75 % overlap (Proc. IEEE 66, 51 (1978), Table I; from
    # memory).  With K = 2 segments Welch's formula gives K_eff = 2/(1 + rho).
    w = scipy.signal.get_window("hann", 4096)
    for step, corr in ((2048, 0.167), (1024, 0.659)):
        rho = 2.0 / welch_effective_averages(w, 2, step) - 1.0
        assert np.sqrt(rho) == pytest.approx(corr, abs=1e-3)


def test_equivalent_degrees_of_freedom_hann_half_overlap():
    # Equivalent degrees of freedom of Hann at 50 % overlap with K segments:
    # nu = 36 K**2 / (19 K - 1) (Spectral Analysis for Physical Applications,
    # Cambridge University Press (1993), eq. (292b); from memory).  K_eff = nu/2.
    w = scipy.signal.get_window("hann", 1024)
    for k in (2, 10, 511):
        assert welch_effective_averages(w, k, 512) == pytest.approx(18 * k**2 / (19 * k - 1))
    boxcar = np.ones(1024)
    assert welch_effective_averages(boxcar, 40, 1024) == 40


def test_bin_correlation_factor_hann():
    # N sum(w**4)/sum(w**2)**2 for the periodic Hann window: (35/128)/(3/8)**2
    # = 35/18 (computed from the averages of sin**8 and sin**4).
    assert bin_correlation_factor(scipy.signal.get_window("hann", 4096)) == pytest.approx(35 / 18)
    assert bin_correlation_factor(np.ones(64)) == pytest.approx(1.0)


def test_bin_scatter_matches_effective_averages():
    # For white noise each averaged bin has relative variance 1/K_eff (Welch,
    # IEEE Trans. Audio Electroacoust. 15, 70 (1967)); at 75 % overlap K_eff is
    # about half the number of segments, which this Monte Carlo resolves.
    rng = np.random.default_rng(8)
    x = rng.normal(size=(24, 2**15))
    r = welch_psd(x, 1.0, nperseg=256, noverlap=192)
    rel = r.psd[:, 2:-2] / 2.0 - 1.0  # white noise of unit variance: S = 2 per Hz
    measured = np.var(rel)
    assert measured == pytest.approx(1.0 / r.effective_averages, rel=0.08)
    assert abs(measured * r.n_segments - 1.0) > 0.5


def test_no_record_sized_allocation():
    # The record is processed in blocks: the largest traced allocation stays far
    # below the size of the record (the design goal of the block accumulation).
    x = np.random.default_rng(0).normal(size=2**23).astype(np.float32)
    # Warm-up on a short slice: the first call may compile the numba kernel,
    # whose one-off allocations are not the accumulation's.
    welch_psd(x[: 2**16], 1e6, nperseg=2**14, noverlap=2**13)
    tracemalloc.start()
    try:
        welch_psd(x, 1e6, nperseg=2**14, noverlap=2**13)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < x.nbytes / 4


def test_two_dimensional_rows_are_independent_channels():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(2, 8192))
    both = welch_psd(x, 1e3, nperseg=512, noverlap=256)
    one = welch_psd(x[1], 1e3, nperseg=512, noverlap=256)
    np.testing.assert_array_equal(both.channel(1).psd, one.psd)
    assert both.n_channels == 2


@pytest.mark.parametrize(
    "x, kwargs, words",
    [
        (np.zeros(100), {"nperseg": 200, "noverlap": 0}, ["nperseg=200", "n=100"]),
        (np.zeros(100), {"nperseg": 50, "noverlap": 50}, ["noverlap=50", "nperseg=50"]),
        (np.zeros((2, 2, 50)), {"nperseg": 10, "noverlap": 0}, ["ndim=3"]),
        (np.r_[np.zeros(60), np.nan, np.zeros(39)], {"nperseg": 10, "noverlap": 0}, ["index 60"]),
        (np.zeros(100), {"nperseg": 10, "noverlap": 0, "window": "nosuchwindow"}, ["window"]),
        (np.zeros(100), {"nperseg": 10, "noverlap": 0, "detrend": "quadratic"}, ["detrend"]),
    ],
)
def test_bad_input_is_refused_with_the_value(x, kwargs, words):
    with pytest.raises(InputError) as info:
        welch_psd(x, 1e3, **kwargs)
    msg = str(info.value)
    assert "\n" not in msg
    for word in words:
        assert word in msg


@pytest.mark.parametrize("rate", [0.0, -1.0, float("nan")])
def test_bad_sample_rate(rate):
    with pytest.raises(InputError, match="sample_rate"):
        welch_psd(np.zeros(100), rate, nperseg=10, noverlap=0)
