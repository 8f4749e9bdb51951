"""Validation of the simulated particle against the physics core and scipy references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from quietwell_sim import (
    Particle,
    ParticleParams,
    TrapParams,
    electrode_field,
    exact_step,
    noise_covariance,
    propagate_linear,
    sample_linear,
    sample_parametric,
    transition_matrix,
)
from scipy import integrate, linalg, signal, stats

from quietwell import InputError, LimitError
from quietwell import physics as ph

CASES = [
    (2 * np.pi * 152e3, 5.4e-5, 1e-7),  # ultra-high vacuum, 10 MS/s: gamma h ~ 5e-12
    (2 * np.pi * 48e3, 4e4, 1e-6),  # 10 mbar, 1 MS/s
    (1e3, -0.05, 1e-2),  # anti-damped (instability model)
    (1e3, 1e4, 1e-3),  # overdamped
]


def _a(w0, g):
    return np.array([[0.0, 1.0], [-w0 * w0, -g]])


@pytest.mark.parametrize(("w0", "g", "h"), CASES)
def test_transition_matrix_is_scipy_expm(w0, g, h):
    # Reference: scipy.linalg.expm of the drift matrix.
    ref = linalg.expm(_a(w0, g) * h)
    np.testing.assert_allclose(
        transition_matrix(w0, g, h), ref, rtol=1e-12, atol=1e-13 * np.abs(ref).max()
    )


@pytest.mark.parametrize(("w0", "g", "h"), CASES)
def test_noise_covariance_is_the_integral(w0, g, h):
    # Reference: Q = int_0^h e^{As} D e^{A^T s} ds by scipy.integrate.quad_vec.
    a, d = _a(w0, g), np.diag([0.0, 3.0])
    ref = integrate.quad_vec(
        lambda s: linalg.expm(a * s) @ d @ linalg.expm(a * s).T, 0, h, epsrel=1e-13
    )[0]
    q = noise_covariance(w0, g, 3.0, h)
    scale = np.sqrt(np.outer(np.diag(ref), np.diag(ref)))
    assert np.max(np.abs(q - ref) / scale) < 1e-9


def test_sampler_is_the_exact_vector_recursion():
    # The ARMA(2,1) sampler equals the AR(1) vector recursion s <- Phi s + L g with Phi from
    # scipy.linalg.expm and L the Cholesky factor of the quadrature covariance, same normals.
    w0, g, s2, h, n = 2 * np.pi * 150e3, 300.0, 2.0, 1e-7, 3000
    a = _a(w0, g)
    phi = linalg.expm(a * h)
    q = integrate.quad_vec(
        lambda s: linalg.expm(a * s) @ np.diag([0, s2]) @ linalg.expm(a * s).T, 0, h, epsrel=1e-13
    )[0]
    chol = np.linalg.cholesky(q)
    s0 = np.array([2e-9, 1e-3])
    x, s_end = sample_linear(s0, w0, g, s2, h, n, np.random.default_rng(11))
    gg = np.random.default_rng(11).standard_normal((2, n))
    s, ref = s0.copy(), np.empty(n)
    for k in range(n):
        ref[k] = s[0]
        s = phi @ s + chol @ gg[:, k]
    assert np.max(np.abs(x - ref)) < 1e-9 * np.abs(ref).max()
    np.testing.assert_allclose(s_end, s, rtol=1e-8)


def test_long_gap_jump_has_exact_mean_and_covariance():
    # Ensemble of O(1) jumps over 1 s at 1e-8 mbar: sample covariance vs Q (quadrature),
    # tested with a Wishart-free check: each entry within 4 standard errors.
    w0, g, s2, h = 2 * np.pi * 48e3, 5.4e-5, 1.0, 1.0
    q = exact_step(w0, g, s2, h).q
    rng = np.random.default_rng(5)
    s0 = np.array([1e-9, 0.0])
    phi = transition_matrix(w0, g, h)
    draws = np.array([propagate_linear(s0, w0, g, s2, h, rng) for _ in range(20000)])
    dev = draws - phi @ s0
    cov = dev.T @ dev / len(dev)
    se = np.sqrt((q[0, 0] * q[1, 1] + q[0, 1] ** 2) / len(dev))
    assert abs(cov[0, 0] - q[0, 0]) < 4 * math.sqrt(2 / len(dev)) * q[0, 0]
    assert abs(cov[1, 1] - q[1, 1]) < 4 * math.sqrt(2 / len(dev)) * q[1, 1]
    assert abs(cov[0, 1] - q[0, 1]) < 4 * se


def _particle(pressure, seed=1, **trap):
    return Particle(
        ParticleParams(), TrapParams(**trap), np.random.default_rng(seed), pressure=pressure
    )


def test_equipartition_variance_within_two_percent():
    # k_B T/(m Omega0**2) (PHYSICS.md section 1; equipartition). At 10 mbar the gas
    # dominates all heating by 1e6. Expected relative statistical error of <x**2> over a
    # duration T: sqrt(2/(gamma T)) (correlation time of x**2 is 1/gamma).
    p = _particle(1000.0)
    fs, n, k = 1e6, 1 << 20, 4
    xs = np.concatenate([p.sample(n, 1 / fs) for _ in range(k)], axis=1)
    t = ParticleParams().temperature
    ref = ph.thermal_variance(p.mass, p.omega0(), t)
    gamma = float(ph.gas_damping(75e-9, 1850.0, 1000.0, t))
    stat = math.sqrt(2.0 / (gamma * k * n / fs))
    assert stat < 0.005
    rel = xs.var(axis=1) / ref - 1.0
    assert np.all(np.abs(rel) < 0.02), rel
    assert np.all(np.abs(rel) < 4 * stat), (rel, stat)


def _aliased_psd(f, m, w0, gamma, t, fs):
    # The spectrum of the sampled process is the continuous one folded at fs/2.
    return sum(ph.thermal_psd(np.abs(f + j * fs), m, w0, gamma, t) for j in range(-30, 31))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_welch_spectrum_matches_thermal_psd_chi_square(seed):
    # Welch bins of K non-overlapping Hann segments are Gamma(K, 1/K)-distributed around the
    # exact spectrum (physics.thermal_psd, PHYSICS.md section 1); every third bin is taken so
    # neighbours are independent. Chi-square test, rejection at significance 1e-3.
    fs, nseg = 1e6, 1 << 12
    p = _particle(1000.0, seed=seed)
    x = np.concatenate([p.sample(1 << 20, 1 / fs)[2] for _ in range(2)])  # z, continued
    f, s = signal.welch(x, fs=fs, window="hann", nperseg=nseg, noverlap=0)
    k = len(x) // nseg
    t = ParticleParams().temperature
    gamma = float(ph.gas_damping(75e-9, 1850.0, 1000.0, t))
    w0 = float(p.omega0()[2])
    sel = slice(4, int(0.45 * nseg), 3)

    def chi2(g):
        ref = _aliased_psd(f[sel], p.mass, w0, g, t, fs)
        z = (s[sel] / ref - 1.0) * math.sqrt(k)
        return float(np.sum(z**2)), z.size

    stat, dof = chi2(gamma)
    assert stats.chi2.sf(stat, dof) > 1e-3
    bad, _ = chi2(1.1 * gamma)  # the test can fail: a 10 % wrong damping is rejected
    assert stats.chi2.sf(bad, dof) < 1e-3


def _cold_ensemble(p, gains, n_draw, settle):
    out = []
    for g in gains:
        p.set_feedback_damping(g)
        p.propagate(settle / g)
        e = np.empty((n_draw, 3))
        for i in range(n_draw):
            p.propagate(settle / g)
            e[i] = p.energy()
        out.append(ph.occupation_from_energy(e, p.omega0()))
    return np.array(out)


def test_cold_damping_occupation_follows_formula_including_imprecision_rise():
    # physics.cold_damping_occupation (PHYSICS.md section 4, Nature 524, 325 (2015)) with
    # Gamma_ba = photon recoil, at 1e-8 mbar. Independent draws every 10/gamma_fb.
    p = _particle(1e-6, seed=4)
    s_imp = np.full(3, (3e-13) ** 2)
    p.set_imprecision(s_imp)
    gains = [300.0, 3e3, 3e4, 3e5]
    n = _cold_ensemble(p, gains, 1500, 10.0)
    t, w = ParticleParams().temperature, p.omega0()
    g_gas = float(ph.gas_damping(75e-9, 1850.0, 1e-6, t))
    idx = float(ph.silica_index(1064e-9))
    p_scat = float(ph.scattered_power(75e-9, idx, 1064e-9, 0.3, 0.8e-6))
    rec = np.array(
        [ph.recoil_heating_rate(p_scat, 1064e-9, p.mass, w[i], a) for i, a in enumerate(ph.AXES)]
    )
    meas = ph.measurement_rate(p.mass, w, s_imp)
    for j, g in enumerate(gains):
        ref = ph.cold_damping_occupation(g, g_gas, ph.thermal_occupation(w, t), meas, rec)
        mean = n[j].mean(axis=0)
        se = n[j].std(axis=0, ddof=1) / math.sqrt(len(n[j]))
        assert np.all(np.abs(mean - ref) < 4 * se), (g, mean, ref, se)
    # The rise at high gain from injected imprecision (x axis: optimum near 4e3 1/s).
    assert n[3, :, 0].mean() > 3 * n[2, :, 0].mean()


def test_reheating_follows_gas_plus_recoil_heating():
    # n(t) = n0 + Gamma t with Gamma = gamma_gas (n_th + 1/2) + Gamma_recoil from the physics
    # core (PHYSICS.md sections 2-4), and the exponential form physics.reheating_curve.
    # 1000 cycles, state read at chosen times by the exact O(1) jump.
    p = _particle(1e-6, seed=8)
    times = np.array([0.0, 2e-4, 5e-4, 1e-3])
    n_cyc = 1000
    occ = np.empty((n_cyc, len(times), 3))
    for c in range(n_cyc):
        p.set_feedback_damping(5e3)
        p.propagate(2e-3)
        p.set_feedback_damping(0.0)
        for j, dt in enumerate(np.diff(times, prepend=0.0)):
            p.propagate(dt)
            occ[c, j] = ph.occupation_from_energy(p.energy(), p.omega0())
    t, w = ParticleParams().temperature, p.omega0()
    g_gas = float(ph.gas_damping(75e-9, 1850.0, 1e-6, t))
    idx = float(ph.silica_index(1064e-9))
    p_scat = float(ph.scattered_power(75e-9, idx, 1064e-9, 0.3, 0.8e-6))
    heat = ph.gas_heating_rate(g_gas, w, t) + np.array(
        [ph.recoil_heating_rate(p_scat, 1064e-9, p.mass, w[i], a) for i, a in enumerate(ph.AXES)]
    )
    slope = (occ[:, -1] - occ[:, 0]) / times[-1]
    se = slope.std(axis=0, ddof=1) / math.sqrt(n_cyc)
    assert np.all(np.abs(slope.mean(axis=0) - heat) < 3 * se), (slope.mean(0), heat, se)
    gamma_off = p.truth().total_damping  # instability model below the loss pressure
    n0 = occ[:, 0].mean(axis=0)
    for j, tt in enumerate(times[1:], start=1):
        for i in range(3):
            ref = ph.reheating_curve(tt, n0[i], heat[i], gamma_off[i])
            d = occ[:, j, i] - occ[:, 0, i]
            assert abs(occ[:, j, i].mean() - ref) < 3 * d.std(ddof=1) / math.sqrt(n_cyc)


def test_loss_without_feedback_below_loss_pressure_takes_minutes():
    # Phenomenological model: energy grows as exp(t/tau) from k_B T to the trap depth,
    # with the capped gas heating E ~ k_B T (2 e^{t/tau} - 1), so the loss time is about
    # tau ln(T_depth/(2 T)) (that it is minutes is common practice, no source).
    p = _particle(50.0, seed=2)  # below the 100 Pa loss pressure, no feedback
    tr = TrapParams()
    p.propagate(3600.0)
    assert p.lost
    expect = tr.instability_time * math.log(tr.trap_depth / (2 * ParticleParams().temperature))
    assert 0.5 * expect < p.lost_time < 2.0 * expect
    assert np.all(p.sample(100, 1e-6) == 0.0)
    q = _particle(50.0, seed=2)
    q.set_feedback_damping([2e3, 2e3, 2e3])
    q.propagate(3600.0)
    assert not q.lost
    r = _particle(200.0, seed=2)  # above the loss pressure: stays thermal
    r.propagate(3600.0)
    assert not r.lost


def test_drive_response_and_charge_steps():
    # Coulomb drive amplitude x0 = (qE0/m)/|Omega0**2 - Omega_d**2 + i gamma Omega_d|
    # (physics.drive_amplitude, PHYSICS.md section 6); equal steps A/N when discharging and a
    # phase flip of pi through zero charge (common practice, no source).
    fs, n = 1e6, 1 << 18
    p = _particle(1e-6, seed=3)
    p.set_feedback_damping(2e3)
    p.propagate(0.01)
    f_d = 140e3
    e0 = electrode_field(10.0, 2e-3, 0.8)
    p.set_drive(f_d, [e0, 0.0, 0.0])
    w_d = 2 * np.pi * f_d

    def lockin():
        t0 = p.time
        x = p.sample(n, 1 / fs)[0]
        ref = np.exp(-1j * w_d * (t0 + np.arange(n) / fs))
        return 2 * np.mean(x * ref)

    amps = []
    for _ in range(3):
        amps.append(lockin())
        p.discharge(-1)
    tr = p.truth()
    for k, a in enumerate(amps):
        q = (7 - k) * ph.E_CHARGE
        ref = ph.drive_amplitude(q, e0, p.mass, tr.omega0[0], tr.total_damping[0], w_d)
        assert abs(abs(a) / ref - 1) < 0.01
    p.discharge(-7)  # 4 -> -3
    neg = lockin()
    assert abs(abs(np.angle(neg / amps[0])) - np.pi) < 0.05
    with pytest.raises(InputError, match="integer"):
        p.discharge(0.5)


@pytest.mark.slow
@pytest.mark.parametrize("omega_h", [0.1, 0.3, 1.0, 2.0])
def test_parametric_mean_energy_vs_step(omega_h):
    # physics.parametric_mean_energy (PHYSICS.md section 4; stationary rho(E) of the
    # cycle-averaged Fokker-Planck equation). Batch means give the statistical error.
    m = float(ph.sphere_mass(50e-9, 2200.0))
    w0, t = 2 * np.pi * 1e5, 295.0
    g = 1e-3 * w0
    beta = 100 * g / (ph.K_B * t)
    eta = 2 * m * w0 * beta
    e_ref = float(ph.parametric_mean_energy(beta, g, t))
    sigma2 = 2 * g * ph.K_B * t / m
    h = omega_h / w0
    rng = np.random.default_rng(7)
    st = np.array([math.sqrt(e_ref / (m * w0**2)), 0.0])
    _, st = sample_parametric(st, w0, g, sigma2, h, 1 << 16, eta, rng)
    x, _ = sample_parametric(st, w0, g, sigma2, h, 1 << 22, eta, rng)
    e = m * w0**2 * x**2
    b = e.reshape(64, -1).mean(axis=1)
    dev = b.mean() / e_ref - 1
    se = b.std(ddof=1) / math.sqrt(len(b)) / e_ref
    assert abs(dev) < 3 * se + 0.005, (dev, se)
    assert e_ref < 0.1 * ph.K_B * t  # the feedback really cools: far from k_B T


def test_parametric_record_cools_in_particle():
    p = _particle(1e-6, seed=6)
    p.set_feedback_damping([0.0, 0.0, 0.0])
    p.set_parametric([3e13, 3e13, 3e13])
    assert not np.any(p.rates().unstable)
    x = p.sample(1 << 16, 1e-7)
    assert x.shape == (3, 1 << 16) and np.all(np.isfinite(x))
    assert np.all(np.isfinite(p.truth().steady_occupation))


def test_errors_name_the_value():
    p = _particle(1.0)
    with pytest.raises(LimitError, match="laser power=2.0 W"):
        p.set_laser_power(2.0)
    with pytest.raises(LimitError, match="gamma_fb"):
        p.set_feedback_damping(-1.0)
    with pytest.raises(InputError, match="pressure"):
        p.set_pressure(0.0)
    with pytest.raises(InputError, match="radius"):
        ParticleParams(radius=-1.0)
