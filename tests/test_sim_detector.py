"""Detector, ADC and heterodyne models of the simulated laboratory."""

from __future__ import annotations

import math

import numpy as np
import pytest
from quietwell_sim import Detector, DetectorParams, HeterodyneDetector, HeterodyneParams
from quietwell_sim._detector import adc
from scipy import signal

from quietwell import InputError
from quietwell import physics as ph


def test_adc_quantizes_and_counts_clipping():
    # An ideal ADC: step 2 V_fs/2**bits, saturation at +-V_fs (common practice, no source).
    v = np.linspace(-1.5, 1.5, 30001)
    out, clipped = adc(v, 1.0, 12)
    lsb = 2.0 / 4096
    assert clipped == np.count_nonzero(np.abs(v) > 1.0) > 0
    assert out.dtype == np.float32
    assert np.max(np.abs(out)) <= 1.0 + 1e-6
    inside = np.abs(v) < 0.99
    assert np.max(np.abs(out[inside] - v[inside])) <= 0.5 * lsb * (1 + 1e-5)
    np.testing.assert_allclose(
        np.unique(out[inside]) / lsb, np.rint(np.unique(out[inside]) / lsb), atol=1e-3
    )


def test_imprecision_floor_and_crosstalk():
    # Floor: S_VV = c**2 S_imp (one-sided, PHYSICS.md section 1). Crosstalk: a tone on x
    # appears on y with amplitude C_yx c_x A.
    p = DetectorParams(sample_rate=1e6)
    det = Detector(p, np.random.default_rng(1))
    n = 1 << 20
    t = np.arange(n) / p.sample_rate
    a = 1e-8
    pos = np.zeros((3, n))
    pos[0] = a * np.cos(2 * np.pi * 100e3 * t)
    volts, clipped = det.convert(pos)
    assert set(volts) == {"x", "y", "z", "intensity"} and not any(clipped.values())
    f, s = signal.welch(volts["z"], fs=p.sample_rate, nperseg=4096)
    c = np.asarray(p.calibration)
    mix = np.asarray(p.crosstalk)
    expect = sum((mix[2, j] * c[j]) ** 2 * p.s_imp[j] for j in range(3))
    band = (f > 10e3) & (f < 90e3)
    k = n // 4096 * 2 - 1
    assert abs(s[band].mean() / expect - 1) < 5 / math.sqrt(k * band.sum())
    amp_y = 2 * abs(np.mean(volts["y"] * np.exp(-2j * np.pi * 100e3 * t)))
    assert abs(amp_y / (mix[1, 0] * c[0] * a) - 1) < 0.02


def test_intensity_drops_when_lost():
    p = DetectorParams(sample_rate=1e6)
    det = Detector(p, np.random.default_rng(2))
    volts, _ = det.convert(np.zeros((3, 1000)), lost_from=400)
    i = volts["intensity"]
    assert abs(i[:400].mean() - p.intensity_level) < 1e-3
    assert abs(i[400:].mean() - p.lost_intensity_level) < 1e-3


def _sideband_areas(v, fs, st, ast, width_hz, floor_band):
    f, s = signal.welch(v, fs=fs, nperseg=1 << 14)
    df = f[1] - f[0]
    floor = s[(f > floor_band[0]) & (f < floor_band[1])].mean()

    def area(f0):
        sel = np.abs(f - f0) < 15 * width_hz
        return float(np.sum(s[sel] - floor) * df)

    return area(st), area(ast)


@pytest.mark.parametrize("lo_sign", [1, -1])
def test_heterodyne_sideband_ratio_is_n_over_n_plus_1(lo_sign):
    # A_antiStokes/A_Stokes = n/(n+1) (PHYSICS.md section 5; Phys. Rev. Lett. 124, 013603
    # (2020)); which sideband is above the carrier follows the LO offset sign.
    fs = 4e6
    hp = HeterodyneParams(
        carrier_frequency=1e6, lo_sign=lo_sign, sideband_gain=(1e-6, 0.0, 0.0), floor=1e-13
    )
    het = HeterodyneDetector(hp, np.random.default_rng(3))
    n_occ = np.array([2.0, 0.0, 0.0])
    freqs = np.array([150e3, 170e3, 50e3])
    width = np.array([2 * np.pi * 500.0, 1.0, 1.0])
    v, clipped = het.record(1 << 22, fs, 0.0, n_occ, freqs, width)
    assert clipped == 0
    st, ast = het.sideband_frequencies(freqs)
    # local oscillator above the signal (+1): the Stokes sideband beats above the carrier
    assert (ast[0] > hp.carrier_frequency) == (lo_sign == -1)
    a_s, a_as = _sideband_areas(v, fs, st[0], ast[0], 500.0, (1.3e6, 1.5e6))
    ratio = a_as / a_s
    assert abs(ratio - n_occ[0] / (n_occ[0] + 1)) < 0.03
    n_est = ph.sideband_occupation(ratio, 0.01).value
    assert abs(n_est - n_occ[0]) < 0.3


def test_heterodyne_refuses_sidebands_above_nyquist():
    het = HeterodyneDetector(HeterodyneParams(carrier_frequency=1.9e6), np.random.default_rng(0))
    with pytest.raises(InputError, match="sample_rate"):
        het.record(100, 4e6, 0.0, np.ones(3), np.array([150e3, 170e3, 50e3]), np.ones(3))
