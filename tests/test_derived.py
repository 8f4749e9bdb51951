"""Derived quantities: envelopes, heating rates, slopes, cold-damping model, charge."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants as sc

from quietwell import FitError
from quietwell import physics as qp
from quietwell.analysis._derived import (
    drive_phasor,
    energy_envelope,
    fit_cold_damping,
    fit_heating_rate,
    fit_integer_charge,
    fit_line,
    occupation_from_area,
)

MASS = qp.sphere_mass(75e-9, 1850.0)
F0 = 152e3
W0 = 2 * np.pi * F0


def test_envelope_of_a_pure_oscillation_gives_its_energy():
    # x = A cos(Omega0 t + phi): E = m Omega0^2 A^2/2 (textbook mechanics).
    fs, c, amp = 2e6, 1.2e6, 3e-10
    t = np.arange(2**16) / fs
    trace = c * amp * np.cos(W0 * t + 0.7)
    env = energy_envelope(trace, fs, F0, c, MASS, window_samples=2000)
    expected = 0.5 * MASS * W0**2 * amp**2 / (sc.hbar * W0) - 0.5
    assert env.occupation == pytest.approx(expected, rel=1e-3)
    assert env.bandwidth_hz == pytest.approx(1000.0)


def test_envelope_floor_subtraction_removes_the_imprecision_bias():
    # White noise of one-sided PSD S: variance S fs/2 (common practice, no source).
    fs, c, s_floor = 2e6, 1.0e6, 4e-26  # m^2/Hz
    rng = np.random.default_rng(3)
    x = rng.normal(0, np.sqrt(s_floor * fs / 2), 2**20)
    biased = energy_envelope(c * x, fs, F0, c, MASS, window_samples=1000)
    fixed = energy_envelope(c * x, fs, F0, c, MASS, window_samples=1000,
                            floor_v2_per_hz=s_floor * c**2)
    sem = fixed.occupation.std() / np.sqrt(fixed.occupation.size)
    assert abs(fixed.occupation.mean() + 0.5) < 4 * sem  # no motion: n + 1/2 -> 0
    assert biased.occupation.mean() + 0.5 > 20 * sem


def test_weighted_line_matches_numpy_polyfit():
    rng = np.random.default_rng(1)
    x = np.linspace(0, 10, 12)
    s = 0.1 + 0.05 * x
    y = 2.5 * x - 1.0 + rng.normal(0, s)
    fit = fit_line(x, y, s)
    (p, cov) = np.polyfit(x, y, 1, w=1 / s, cov="unscaled")
    assert fit.slope.value == pytest.approx(p[0], rel=1e-10)
    assert fit.intercept.value == pytest.approx(p[1], rel=1e-10)
    scale = max(1.0, fit.reduced_chi2)
    assert fit.slope.stderr == pytest.approx(np.sqrt(cov[0, 0] * scale), rel=1e-8)


def _cycles(rng, n_cycles, t, n0, rate, gamma):
    # A mode started in a thermal state stays thermal while it heats: its energy is
    # exponentially distributed with mean n(t) + 1/2 (common practice, no source).
    mean = qp.reheating_curve(t, n0, rate, gamma) + 0.5
    return rng.exponential(mean, size=(n_cycles, t.size)) - 0.5


def test_heating_rate_from_cycles_recovers_the_rate_with_honest_errors():
    rng = np.random.default_rng(11)
    t = np.linspace(0, 4e-3, 9)
    rate, gamma = 2.5e4, 5e-3
    pulls_lin, pulls_exp = [], []
    for _ in range(40):
        fit = fit_heating_rate(t, _cycles(rng, 200, t, 1.0, rate, gamma), gamma=gamma,
                               n_boot=150, seed=int(rng.integers(1 << 30)))
        pulls_lin.append((fit.linear.value - rate) / fit.linear.stderr)
        pulls_exp.append((fit.exponential.value - rate) / fit.exponential.stderr)
        assert fit.linear.relative < 0.1
    for pulls in (pulls_lin, pulls_exp):
        pulls = np.asarray(pulls)
        assert abs(pulls.mean()) < 0.5
        assert 0.6 < pulls.std() < 1.5


def test_cold_damping_fit_recovers_the_optimum():
    # Nature 524, 325 (2015) model; the data are drawn from it with 5 % errors.
    gm, dec = 3.4e3, 2.7e4
    gains = np.geomspace(2e3, 1.5e5, 12)
    n_true = qp.cold_damping_occupation(gains, 0.0, 0.0, gm, dec)
    rng = np.random.default_rng(5)
    sig = 0.05 * (n_true + 0.5)
    fit = fit_cold_damping(gains, n_true + rng.normal(0, sig), sig)
    g_opt, n_min = qp.cold_damping_optimum(0.0, 0.0, gm, dec)
    assert abs(fit.optimal_gain.value - g_opt) < 3 * fit.optimal_gain.stderr
    assert abs(fit.min_occupation.value - n_min) < 3 * fit.min_occupation.stderr
    assert fit.min_occupation.relative < 0.1


def test_drive_phasor_of_a_tone_and_a_sign_flip():
    fs, fd = 2e6, 130e3
    t = np.arange(2**16) / fs
    z = drive_phasor(0.02 * np.cos(2 * np.pi * fd * t + 0.3), fs, fd)
    assert abs(z) == pytest.approx(0.02, rel=1e-3)
    assert np.angle(z) == pytest.approx(0.3, abs=1e-3)
    z2 = drive_phasor(-0.02 * np.cos(2 * np.pi * fd * t + 0.3), fs, fd)
    assert np.angle(z2 / z) == pytest.approx(np.pi, abs=1e-3) or np.angle(
        z2 / z) == pytest.approx(-np.pi, abs=1e-3)


@pytest.mark.parametrize("charge", [7, -4, 1])
def test_integer_charge_from_equal_steps(charge):
    rng = np.random.default_rng(charge + 100)
    steps = -np.sign(charge) * np.arange(max(3, min(abs(charge), 4) + 1))
    alpha = 0.013
    amps = alpha * (charge + steps) + rng.normal(0, 2e-4, steps.size)
    fit = fit_integer_charge(amps, np.full(steps.size, 2e-4), steps)
    assert fit.charge == charge
    assert abs(fit.per_charge.value - alpha) < 4 * fit.per_charge.stderr
    assert fit.residual < 0.3


def test_integer_charge_refuses_a_flat_response():
    with pytest.raises(FitError, match="does not change"):
        fit_integer_charge([1.0, 1.0, 1.0], [0.1, 0.1, 0.1], [0, -1, -2])


def test_occupation_from_area_of_a_thermal_peak_is_n_th():
    c = 1.2e6
    area = c**2 * qp.thermal_variance(MASS, W0, 295.0)
    n = occupation_from_area(area, 0.01 * area, c, 0.0, MASS, F0)
    # k_B T/(hbar Omega0) - 1/2 is n_th to first order in hbar Omega0/k_B T
    assert n.value == pytest.approx(qp.thermal_occupation(W0, 295.0), rel=1e-6)
