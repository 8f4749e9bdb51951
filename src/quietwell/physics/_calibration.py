"""Detector calibration, Coulomb drive, sideband thermometry and the particle's mass
(PHYSICS.md sections 2, 5 and 6).

Functions that take measured inputs with standard errors return an
:class:`~quietwell.physics.Estimate`; errors are propagated to first order
(uncorrelated inputs unless stated).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from ._conventions import K_B
from ._estimate import Estimate
from ._gas import DIFFUSE, N2, Gas, mean_speed
from ._oscillator import sphere_mass

__all__ = [
    "thermal_calibration",
    "calibration_from_psd_numerator",
    "drive_amplitude",
    "drive_response",
    "mass_from_drive",
    "sideband_occupation",
    "radius_from_slope",
    "mass_from_slope",
    "ion_gauge_true_pressure",
]


def thermal_calibration(
    area_v2: float,
    area_v2_stderr: float,
    mass: float,
    mass_stderr: float,
    omega0: float,
    temperature: float,
) -> Estimate:
    """Calibration factor ``c`` in V/m from the area of a thermalized peak.

    The voltage peak's area is ``c**2 k_B T/(m Omega0**2)``, hence
    ``c = sqrt(A m Omega0**2/(k_B T))``; equivalent to
    ``c = sqrt(D m/(4 gamma k_B T))`` of Rev. Sci. Instrum. 89, 033111 (2018)
    with ``D = 4 gamma Omega0**2 A``.

    ``area_v2`` in V**2, ``mass`` in kg, ``omega0`` in rad/s, ``temperature`` in K.
    """
    c = math.sqrt(area_v2 * mass * omega0**2 / (K_B * temperature))
    rel = 0.5 * math.hypot(area_v2_stderr / area_v2, mass_stderr / mass)
    return Estimate(c, c * rel)


def calibration_from_psd_numerator(
    d: float, mass: float, gamma: float, temperature: float
) -> float:
    """Calibration factor in V/m from the numerator ``D`` of a fitted voltage PSD.

    ``S_VV = D/((Omega0**2 - Omega**2)**2 + gamma**2 Omega**2) + B`` gives
    ``c = sqrt(D m/(4 gamma k_B T))``. ``d`` in V**2/(s**4 Hz), ``mass`` in kg,
    ``gamma`` in 1/s, ``temperature`` in K.

    References
    ----------
    Rev. Sci. Instrum. 89, 033111 (2018).
    """
    return math.sqrt(d * mass / (4.0 * gamma * K_B * temperature))


def drive_response(omega0: ArrayLike, gamma: ArrayLike, omega_d: ArrayLike) -> np.ndarray:
    """``|Omega0**2 - Omega_d**2 + i gamma Omega_d|`` in rad**2/s**2.

    The modulus of the inverse mechanical susceptibility times the mass.
    """
    w0 = np.asarray(omega0, dtype=float)
    wd = np.asarray(omega_d, dtype=float)
    return np.sqrt((w0**2 - wd**2) ** 2 + np.asarray(gamma) ** 2 * wd**2)


def drive_amplitude(
    charge: ArrayLike,
    field: ArrayLike,
    mass: ArrayLike,
    omega0: ArrayLike,
    gamma: ArrayLike,
    omega_d: ArrayLike,
) -> np.ndarray:
    """Amplitude ``x0`` in m of the steady response to a Coulomb force ``q E0 cos(Omega_d t)``.

    ``x0 = (q E0/m)/sqrt((Omega0**2 - Omega_d**2)**2 + gamma**2 Omega_d**2)``; in a
    one-sided PSD the line has area ``x0**2/2``. ``charge`` in C, ``field`` in V/m.
    """
    return (
        np.asarray(charge)
        * np.asarray(field)
        / (np.asarray(mass) * drive_response(omega0, gamma, omega_d))
    )


def mass_from_drive(
    drive_area: float,
    drive_area_stderr: float,
    thermal_area: float,
    thermal_area_stderr: float,
    charge: float,
    field: float,
    omega0: float,
    gamma: float,
    omega_d: float,
    temperature: float,
) -> Estimate:
    """Mass in kg from a Coulomb-driven line referenced to the thermal peak.

    Both areas are in the same detector units (V**2), so the calibration cancels:
    ``drive/thermal = (x0**2/2)/(k_B T/(m Omega0**2))`` with ``x0 = qE0/(m H)`` gives
    ``m = q**2 E0**2 Omega0**2/(2 H**2 k_B T r)`` without assuming a density.
    ``charge`` in C (``N e``), ``field`` in V/m, rates in 1/s, angular frequencies in rad/s.
    """
    h = float(drive_response(omega0, gamma, omega_d))
    r = drive_area / thermal_area
    m = charge**2 * field**2 * omega0**2 / (2.0 * h**2 * K_B * temperature * r)
    rel = math.hypot(drive_area_stderr / drive_area, thermal_area_stderr / thermal_area)
    return Estimate(m, m * rel)


def sideband_occupation(ratio: float, ratio_stderr: float) -> Estimate:
    """Occupation from the heterodyne sideband ratio ``R = A_antiStokes/A_Stokes``.

    ``n = R/(1 - R)``, ``sigma_n = (n + 1)**2 sigma_R``.

    References
    ----------
    Phys. Rev. Lett. 124, 013603 (2020); Phys. Rev. Lett. 108, 033602 (2012).
    """
    if not 0.0 <= ratio < 1.0:
        from .._errors import InputError

        raise InputError(
            f"sideband ratio {ratio=} must be in [0, 1): the anti-Stokes sideband (n) is "
            "weaker than the Stokes one (n+1); check the local-oscillator offset sign"
        )
    n = ratio / (1.0 - ratio)
    return Estimate(n, (n + 1.0) ** 2 * ratio_stderr)


def radius_from_slope(
    slope: float,
    slope_stderr: float,
    density: float,
    temperature: float,
    gas: Gas = N2,
    delta: float = DIFFUSE,
) -> Estimate:
    """Radius in m from the free-molecular damping slope ``s`` (1/(s Pa)).

    ``R = 8 delta/(pi rho v_mean s)``. A relative gauge error ``e`` in ``P`` enters
    ``R`` once and the mass three times.

    References
    ----------
    Phys. Rev. 23, 710 (1924).
    """
    r = 8.0 * delta / (np.pi * density * float(mean_speed(temperature, gas)) * slope)
    return Estimate(float(r), float(r) * slope_stderr / abs(slope))


def mass_from_slope(
    slope: float,
    slope_stderr: float,
    density: float,
    temperature: float,
    gas: Gas = N2,
    delta: float = DIFFUSE,
) -> Estimate:
    """Mass in kg ``(4 pi/3) rho R**3`` with ``R`` from :func:`radius_from_slope`."""
    r = radius_from_slope(slope, slope_stderr, density, temperature, gas, delta)
    m = float(sphere_mass(r.value, density))
    return Estimate(m, 3.0 * m * r.relative)


def ion_gauge_true_pressure(indicated: ArrayLike, gas: Gas) -> np.ndarray:
    """True pressure of ``gas`` from an N2-calibrated ionization-gauge reading.

    ``p_true = p_indicated/S`` with ``S`` the gas's sensitivity relative to N2
    (CRC Handbook table; terms as in ISO 27894:2009). Any pressure unit in, same out.
    """
    return np.asarray(indicated) / gas.ion_sensitivity
