"""Physics core against the check values of the reference and independent derivations.

Check values are those of the project's physics reference (shared PHYSICS.md),
computed there from the formulas with CODATA 2018 constants; the formulas'
published sources are named beside each test. Constants here come only from
scipy.constants, never from quietwell.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants as sc
from scipy import integrate

from quietwell import InputError
from quietwell import physics as qp

# Test particle of the reference: R = 50 nm, rho = 2200 kg/m^3, T = 295 K,
# Omega0 = 2 pi 100 kHz, gamma = 2 pi 1 kHz.
R, RHO, T = 50e-9, 2200.0, 295.0
W0, GAM = 2 * np.pi * 100e3, 2 * np.pi * 1e3
MASS = 4 / 3 * np.pi * RHO * R**3


def digits(value, expected, sig):
    """Assert ``value`` rounds to ``expected`` at ``sig`` significant digits."""
    assert float(f"{float(value):.{sig - 1}e}") == pytest.approx(expected, rel=1e-12), value


# --- section 1: thermal spectrum (equation of motion with white force 4 m gamma kB T) ---


def test_thermal_spectrum_check_values():
    digits(qp.sphere_mass(R, RHO), 1.15192e-18, 6)
    digits(qp.thermal_variance(MASS, W0, T), 8.95621e-15, 6)
    digits(qp.thermal_psd(100e3, MASS, W0, GAM, T), 5.70170e-18, 6)
    digits(qp.peak_psd(MASS, W0, GAM, T), 5.70170e-18, 6)


def test_psd_integral_equals_equipartition_by_quadrature():
    # Equipartition k_B T/(m Omega0^2): a fact of statistical mechanics, integrated
    # numerically (scipy.integrate.quad), not from the closed form.
    f0 = W0 / (2 * np.pi)
    width = GAM / (2 * np.pi)
    pieces = [0, f0 - 50 * width, f0 - width, f0 + width, f0 + 50 * width, 10 * f0, np.inf]
    total = sum(
        integrate.quad(lambda f: qp.thermal_psd(f, MASS, W0, GAM, T), a, b, limit=500)[0]
        for a, b in zip(pieces, pieces[1:], strict=False)
    )
    assert total == pytest.approx(sc.k * T / (MASS * W0**2), rel=1e-7)


def test_lorentzian_differs_by_about_1_percent_one_linewidth_from_peak_at_q100():
    # Reference section 1: at Q = 100 the high-Q Lorentzian is 1.2 % off the exact
    # form one linewidth from the peak.
    gamma = W0 / 100
    f = (W0 + gamma) / (2 * np.pi)
    exact = qp.thermal_psd(f, MASS, W0, gamma, T)
    lor = qp.lorentzian_psd(f, MASS, W0, gamma, T)
    assert abs(lor / exact - 1) == pytest.approx(0.012, abs=0.002)


# --- section 2: gas damping ---


def test_gas_check_values():
    # Phys. Rev. 23, 710 (1924) (Epstein); J. Fluid Mech. 219, 405 (1990) (interpolation).
    p = 100.0  # 1 mbar
    digits(qp.mean_speed(T), 472.19, 5)
    digits(qp.viscosity(T) * 1e6, 17.556, 5)
    digits(qp.mean_free_path(p, T) * 1e6, 65.11, 4)
    digits(qp.epstein_damping(R, RHO, p, T), 6827.9, 5)
    digits(qp.epstein_damping(R, RHO, p, T) / (2 * np.pi), 1086.7, 5)
    digits(qp.epstein_damping(R, RHO, p, T, delta=qp.SPECULAR), 4902.7, 5)
    digits(qp.gas_damping(R, RHO, p, T), 6826.6, 5)
    digits(qp.damping_slope(R, RHO, T), 68.279, 5)
    digits(qp.thermal_occupation(W0, T), 6.1468e7, 5)
    g1 = qp.epstein_damping(R, RHO, p, T)
    digits(qp.gas_heating_rate(g1, W0, T), 4.197e11, 4)
    g2 = qp.epstein_damping(R, RHO, 1e-8 * 100, T)
    digits(qp.gas_heating_rate(g2, W0, T), 4.197e3, 4)


def test_n2_viscosity_matches_handbook_at_300k():
    # CRC Handbook: N2 viscosity 17.9 uPa s at 300 K (published, table value).
    assert qp.viscosity(300.0) == pytest.approx(17.9e-6, rel=0.01)


def test_knudsen_interpolation_tends_to_epstein_at_high_knudsen():
    # Reference section 2: with the viscosity definition of the mean free path the
    # interpolation reduces to Epstein's diffuse result as Kn -> infinity. The
    # published constant 0.619 is rounded: the limit is 18*0.619/(8 + pi) = 1.0000365.
    pressures = np.array([1e-2, 1e-4, 1e-6])
    ratio = qp.gas_damping(R, RHO, pressures, T) / qp.epstein_damping(R, RHO, pressures, T)
    assert ratio == pytest.approx(18 * 0.619 / (8 + np.pi), rel=1e-6)
    assert np.all(np.abs(ratio - 1) < 1e-4)
    # and differs from it in the continuum regime (Kn << 1): Stokes drag instead.
    assert qp.knudsen_number(R, 1e5, T) < 1.5
    stokes = 6 * np.pi * qp.viscosity(T) * R / MASS
    assert qp.gas_damping(R, RHO, 1e9, T) == pytest.approx(stokes, rel=1e-3)


def test_hard_sphere_mean_free_path_gives_smaller_damping():
    # Reference section 2: the hard-sphere mean free path (kinetic diameter 3.64 A)
    # gives a gamma about 6 % smaller at high Kn. Recomputed here from kinetic theory.
    d = 3.64e-10
    p = 1.0
    ell_hs = sc.k * T / (np.sqrt(2) * np.pi * d**2 * p)
    kn = ell_hs / R
    ck = 0.31 * kn / (0.785 + 1.152 * kn + kn**2)
    g_hs = 6 * np.pi * qp.viscosity(T) * R / MASS * 0.619 / (0.619 + kn) * (1 + ck)
    assert g_hs / qp.gas_damping(R, RHO, p, T) == pytest.approx(0.94, abs=0.02)


def test_radius_and_mass_from_slope_invert_the_damping():
    slope = float(qp.damping_slope(R, RHO, T))
    r = qp.radius_from_slope(slope, 0.01 * slope, RHO, T)
    assert r.value == pytest.approx(R, rel=1e-12)
    assert r.relative == pytest.approx(0.01)
    m = qp.mass_from_slope(slope, 0.01 * slope, RHO, T)
    assert m.value == pytest.approx(MASS, rel=1e-12)
    # A gauge error in P enters the mass three times over (reference section 2).
    assert m.relative == pytest.approx(0.03)


# --- section 3: photon recoil ---


def _dipole_average(g):
    """<g(n)> over the dipole pattern (3/8pi)(1 - n_x^2), by scipy.integrate.dblquad."""

    def integrand(theta, phi):
        nx = np.sin(theta) * np.cos(phi)
        ny = np.sin(theta) * np.sin(phi)
        nz = np.cos(theta)
        return g(nx, ny, nz) * 3 / (8 * np.pi) * (1 - nx**2) * np.sin(theta)

    val, _ = integrate.dblquad(integrand, 0, 2 * np.pi, 0, np.pi, epsabs=1e-12)
    return val


def test_recoil_factors_from_quadrature_of_the_dipole_pattern():
    # Reference section 3 derivation: A_i = C_i/2 with C_x = <n_x^2>, C_y = <n_y^2>,
    # C_z = <(1 - n_z)^2> (the incident photon's momentum along z included).
    assert _dipole_average(lambda x, y, z: 1.0) == pytest.approx(1.0, abs=1e-10)
    cx = _dipole_average(lambda x, y, z: x**2)
    cy = _dipole_average(lambda x, y, z: y**2)
    cz = _dipole_average(lambda x, y, z: (1 - z) ** 2)
    assert qp.RECOIL_FACTORS["x"] == pytest.approx(cx / 2, abs=1e-9)
    assert qp.RECOIL_FACTORS["y"] == pytest.approx(cy / 2, abs=1e-9)
    assert qp.RECOIL_FACTORS["z"] == pytest.approx(cz / 2, abs=1e-9)


def test_recoil_perpendicular_to_polarization_uses_one_fifth():
    # Phys. Rev. Lett. 116, 243601 (2016) uses 1/5 along the axis perpendicular to
    # the polarization (common practice as well).
    ps, wl = 1e-6, 1064e-9
    g = qp.recoil_heating_rate(ps, wl, MASS, W0, "y")
    omega_l = 2 * np.pi * sc.c / wl
    assert g == pytest.approx(0.2 * ps * omega_l / (MASS * sc.c**2 * W0), rel=1e-12)


def test_sellmeier_index_of_fused_silica():
    # J. Opt. Soc. Am. 55, 1205 (1965), values computed from the published fit.
    digits(qp.silica_index(1064e-9), 1.44963, 6)
    digits(qp.silica_index(1550e-9), 1.44402, 6)


def test_rayleigh_and_recoil_check_values():
    n = qp.silica_index(1064e-9)
    digits(qp.scattering_cross_section(R, n, 1064e-9), 1.14798e-17, 6)
    ps = qp.scattered_power(R, n, 1064e-9, 0.1, 1.0e-6)
    digits(ps, 7.30828e-7, 6)
    base = ps * (2 * np.pi * sc.c / 1064e-9) / (MASS * sc.c**2 * W0)
    digits(base, 1.98898e4, 6)
    for axis, expected, sig in zip("xyz", (1989.0, 3978.0, 13922.9), (5, 5, 6), strict=True):
        digits(qp.recoil_heating_rate(ps, 1064e-9, MASS, W0, axis), expected, sig)


def test_recoil_rejects_unknown_axis():
    with pytest.raises(InputError, match="axis='w'"):
        qp.recoil_heating_rate(1e-6, 1064e-9, MASS, W0, "w")


# --- section 1/4: zero-point width and feedback ---


def test_zero_point_width_check_value_and_order_of_magnitude():
    digits(qp.zero_point_width(MASS, W0), 8.53537e-12, 6)
    # Fact of the trade (common practice, no source): a ~100 nm diameter silica
    # sphere at ~145 kHz has a zero-point width of order 10 pm (factor of two).
    x = qp.zero_point_width(qp.sphere_mass(50e-9, 2200.0), 2 * np.pi * 145e3)
    assert 5e-12 < x < 20e-12


def test_cold_damping_check_values():
    # Nature 524, 325 (2015) for the form; check values computed in the reference.
    gm = qp.measurement_rate(MASS, W0, 1e-26)
    digits(gm, 3642.6, 5)
    g = 2 * np.pi * 1e3
    digits(qp.cold_damping_occupation(g, 0.0, 0.0, gm, g) + 0.5, 1.10781, 6)
    g_opt, n_min = qp.cold_damping_optimum(0.0, 0.0, float(gm), g)
    digits(g_opt, 1.91363e4, 6)
    digits(n_min + 0.5, 0.656678, 6)


def test_cold_damping_optimum_is_the_numerical_minimum():
    # Independent check with scipy.optimize over gamma_fb, with finite gas damping.
    from scipy import optimize

    gm, gamma, nth, gba = 3642.6, 1e-2, 6.1e7, 4e3
    res = optimize.minimize_scalar(
        lambda lg: qp.cold_damping_occupation(np.exp(lg), gamma, nth, gm, gba),
        bounds=(0, 20),
        method="bounded",
        options={"xatol": 1e-10},
    )
    g_opt, n_min = qp.cold_damping_optimum(gamma, nth, gm, gba)
    assert np.exp(res.x) == pytest.approx(g_opt, rel=1e-4)
    assert res.fun == pytest.approx(n_min, rel=1e-8)


def test_steady_state_occupation_is_heating_over_cooling():
    # Fact of the trade (common practice, no source): the steady-state occupation is
    # total heating over total cooling. The cold-damping formula at zero imprecision
    # must agree with it.
    gamma, nth, g_fb, g_ba = 10.0, 6.1e7, 2e3, 5e3
    n = qp.cold_damping_occupation(g_fb, gamma, nth, np.inf, g_ba)
    assert n == pytest.approx(
        qp.steady_state_occupation(gamma * (nth + 0.5) + g_ba, gamma + g_fb), rel=1e-12
    )


def test_parametric_mean_energy_check_value_and_quadrature():
    kt = sc.k * T
    digits(qp.parametric_mean_energy(100.0 / kt, 1.0, T) / kt, 0.0762617, 6)
    # Independent: moments of the stationary distribution by scipy.integrate.quad,
    # across the small-a series branch and the closed form.
    for a in (1e-6, 1e-3, 0.5, 50.0):
        beta = 2 * a / kt  # a = beta kT/(2 gamma) with gamma = 1
        w = lambda e, a=a: np.exp(-e - a * e**2)  # noqa: E731
        z = integrate.quad(w, 0, np.inf)[0]
        mean = integrate.quad(lambda e, w=w: e * w(e), 0, np.inf)[0] / z
        assert qp.parametric_mean_energy(beta, 1.0, T) / kt == pytest.approx(mean, rel=1e-8)


def test_parametric_beta_from_cycle_average():
    # beta = eta/(2 m Omega0) from averaging the power -m eta Omega0 x^2 xdot^2 over
    # one cycle of x = A cos(Omega0 t), done here numerically.
    eta, amp = 1e14, 1e-8
    t = np.linspace(0, 2 * np.pi / W0, 20001)
    power = -MASS * eta * W0 * (amp * np.cos(W0 * t)) ** 2 * (amp * W0 * np.sin(W0 * t)) ** 2
    mean_power = integrate.simpson(power, x=t) / t[-1]
    energy = 0.5 * MASS * W0**2 * amp**2
    assert -mean_power / energy**2 == pytest.approx(qp.parametric_beta(eta, MASS, W0), rel=1e-6)


def test_reheating_curve_linear_and_exponential_regimes():
    n0, heat, gamma = 3.0, 1e4, 1e-3
    t = np.array([0.0, 1e-3, 1.0, 10.0])
    n = qp.reheating_curve(t, n0, heat, gamma)
    assert n[0] == pytest.approx(n0)
    # t << 1/gamma: n0 + (Gamma - gamma (n0 + 1/2)) t, second order (gamma t)^2
    assert n[1] == pytest.approx(n0 + (heat - gamma * 3.5) * 1e-3, rel=1e-6)
    assert n[2] == pytest.approx(n0 + heat * 1.0, rel=2e-3)
    # long times: n -> Gamma/gamma - 1/2
    assert qp.reheating_curve(1e6, n0, heat, gamma) == pytest.approx(heat / gamma - 0.5, rel=1e-9)
    # gamma = 0 is exactly linear
    assert qp.reheating_curve(t, n0, heat, 0.0) == pytest.approx(n0 + heat * t)
    # solves dn/dt = -gamma (n + 1/2) + Gamma (scipy.integrate.solve_ivp)
    sol = integrate.solve_ivp(
        lambda _t, y: -gamma * (y + 0.5) + heat,
        (0, 5000),
        [n0],
        rtol=1e-11,
        atol=1e-6,
        t_eval=[100.0, 5000.0],
    )
    assert qp.reheating_curve(sol.t, n0, heat, gamma) == pytest.approx(sol.y[0], rel=1e-8)


def test_occupation_energy_round_trip_and_ground_state():
    e0 = 0.5 * sc.hbar * W0
    assert qp.occupation_from_energy(e0, W0) == pytest.approx(0.0, abs=1e-12)
    assert qp.energy_from_occupation(2.0, W0) == pytest.approx(2.5 * sc.hbar * W0)
    # high-temperature limit: n_th ~ kB T/(hbar Omega0)
    assert qp.thermal_occupation(W0, T) == pytest.approx(sc.k * T / (sc.hbar * W0), rel=1e-6)


# --- section 5: sideband thermometry ---


@pytest.mark.parametrize(("ratio", "n"), [(1 / 3, 0.5), (0.5, 1.0), (0.8, 4.0)])
def test_sideband_check_values(ratio, n):
    # Phys. Rev. Lett. 124, 013603 (2020); Phys. Rev. Lett. 108, 033602 (2012).
    assert qp.sideband_occupation(ratio, 0.0).value == pytest.approx(n)


def test_sideband_error_propagation():
    est = qp.sideband_occupation(0.8, 0.01)
    assert est.stderr == pytest.approx(0.25)
    # first-order propagation matches a numerical derivative
    d = qp.sideband_occupation(0.8 + 1e-7, 0).value - qp.sideband_occupation(0.8 - 1e-7, 0).value
    assert est.stderr == pytest.approx(d / 2e-7 * 0.01, rel=1e-5)


def test_sideband_ratio_out_of_range_is_refused():
    with pytest.raises(InputError, match="ratio=1.2"):
        qp.sideband_occupation(1.2, 0.01)


# --- section 6: calibration and mass ---


def test_thermal_calibration_recovers_the_factor():
    # Rev. Sci. Instrum. 89, 033111 (2018): c = sqrt(D m/(4 gamma kB T)).
    c_true = 2.3e6  # V/m
    area_v = c_true**2 * sc.k * T / (MASS * W0**2)
    est = qp.thermal_calibration(area_v, 0.02 * area_v, MASS, 0.0, W0, T)
    assert est.value == pytest.approx(c_true, rel=1e-12)
    assert est.relative == pytest.approx(0.01)
    d = 4 * GAM * W0**2 * area_v
    assert qp.calibration_from_psd_numerator(d, MASS, GAM, T) == pytest.approx(c_true, rel=1e-12)


def test_coulomb_drive_check_value():
    x0 = qp.drive_amplitude(10 * sc.e, 1e3, MASS, W0, GAM, 2 * np.pi * 90e3)
    digits(x0 * 1e9, 18.522, 5)
    digits(qp.drive_amplitude(sc.e, 1e3, MASS, W0, GAM, 2 * np.pi * 90e3) * 1e9, 1.8522, 5)


def test_drive_line_area_in_psd_is_half_amplitude_squared():
    # A sinusoid of amplitude x0 has mean square x0^2/2 (Parseval, scipy.signal.welch).
    from scipy import signal

    fs, fd, x0 = 1e6, 90e3, 2e-8
    t = np.arange(2**18) / fs
    f, p = signal.welch(x0 * np.cos(2 * np.pi * fd * t), fs, nperseg=4096)
    assert integrate.trapezoid(p, f) == pytest.approx(x0**2 / 2, rel=1e-3)


def test_mass_from_drive_independent_of_density_and_calibration():
    q, e0, wd = 7 * sc.e, 500.0, 2 * np.pi * 90e3
    c = 1.7e6
    x0 = qp.drive_amplitude(q, e0, MASS, W0, GAM, wd)
    drive_area = c**2 * x0**2 / 2
    thermal_area = c**2 * sc.k * T / (MASS * W0**2)
    est = qp.mass_from_drive(
        drive_area, 0.03 * drive_area, thermal_area, 0.04 * thermal_area, q, e0, W0, GAM, wd, T
    )
    assert est.value == pytest.approx(MASS, rel=1e-12)
    assert est.relative == pytest.approx(0.05)


# --- section 7: gauges ---


@pytest.mark.parametrize(
    ("gas", "sensitivity"),
    [
        ("He", 0.18),
        ("Ne", 0.31),
        ("Ar", 1.4),
        ("H2", 0.43),
        ("H2O", 0.93),
        ("CO2", 1.4),
        ("O2", 0.96),
        ("CO", 1.0),
        ("N2", 1.0),
    ],
)
def test_ion_gauge_correction(gas, sensitivity):
    # CRC Handbook table of ionization-gauge sensitivity relative to N2 (published).
    assert qp.ion_gauge_true_pressure(1e-6, qp.GASES[gas]) == pytest.approx(1e-6 / sensitivity)


def test_constants_are_codata_from_scipy():
    assert qp.K_B == sc.k and qp.HBAR == sc.hbar and qp.C_LIGHT == sc.c
    assert math.isclose(qp.N2.molecule_mass, 28.0134e-3 / sc.N_A, rel_tol=1e-9)
