"""The conventions of quietwell, fixed here once and imported everywhere else.

* Angular frequencies ``Omega`` are in rad/s, frequencies ``f`` in Hz,
  ``Omega = 2*pi*f``.
* ``gamma`` is the **energy** damping rate in 1/s: the full width at half
  maximum of the displacement PSD in rad/s.  The width in Hz is ``gamma/(2*pi)``.
* Heating rates ``Gamma`` are in quanta (phonons) per second.
* PSDs are one-sided and per Hz, so that ``integral_0^inf S(f) df = <x**2>``.
* Polarization of the trap light is along x, propagation along z.
* Occupation ``n = E/(hbar*Omega0) - 1/2`` (the ground state is 0) and the
  effective temperature is ``T_eff = E/k_B`` for one degree of freedom, with
  ``E = m * Omega0**2 * <x**2>``.

Constants come only from :mod:`scipy.constants` (CODATA 2018).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants as _c

__all__ = [
    "K_B",
    "HBAR",
    "C_LIGHT",
    "E_CHARGE",
    "EPS0",
    "AMU",
    "N_A",
    "AXES",
    "angular",
    "linewidth_hz",
    "occupation_from_energy",
    "energy_from_occupation",
    "effective_temperature",
    "energy_from_variance",
    "thermal_occupation",
    "MBAR",
]

K_B: float = _c.k
HBAR: float = _c.hbar
C_LIGHT: float = _c.c
E_CHARGE: float = _c.e
EPS0: float = _c.epsilon_0
AMU: float = _c.atomic_mass
N_A: float = _c.N_A
#: One millibar in pascals.
MBAR: float = 100.0

#: The axis names, in the order every per-axis array uses.
AXES: tuple[str, str, str] = ("x", "y", "z")


def angular(f_hz: ArrayLike) -> np.ndarray:
    """Angular frequency in rad/s of a frequency ``f_hz`` in Hz."""
    return 2.0 * np.pi * np.asarray(f_hz, dtype=float)


def linewidth_hz(gamma: ArrayLike) -> np.ndarray:
    """Full width at half maximum in Hz of an energy damping rate ``gamma`` in 1/s."""
    return np.asarray(gamma, dtype=float) / (2.0 * np.pi)


def energy_from_variance(mass: ArrayLike, omega0: ArrayLike, variance: ArrayLike) -> np.ndarray:
    """Mean energy in J of one mode, ``E = m Omega0**2 <x**2>``.

    ``mass`` in kg, ``omega0`` in rad/s, ``variance`` in m**2.
    """
    return np.asarray(mass) * np.asarray(omega0) ** 2 * np.asarray(variance)


def occupation_from_energy(energy: ArrayLike, omega0: ArrayLike) -> np.ndarray:
    """Occupation ``n = E/(hbar Omega0) - 1/2`` (dimensionless; ground state 0)."""
    return np.asarray(energy) / (HBAR * np.asarray(omega0)) - 0.5


def energy_from_occupation(n: ArrayLike, omega0: ArrayLike) -> np.ndarray:
    """Mean energy in J of occupation ``n`` at ``omega0`` (rad/s): ``hbar Omega0 (n + 1/2)``."""
    return HBAR * np.asarray(omega0) * (np.asarray(n) + 0.5)


def effective_temperature(energy: ArrayLike) -> np.ndarray:
    """Effective temperature in K of one degree of freedom, ``T_eff = E/k_B``."""
    return np.asarray(energy) / K_B


def thermal_occupation(omega0: ArrayLike, temperature: ArrayLike) -> np.ndarray:
    """Bose–Einstein occupation ``1/(exp(hbar Omega0/(k_B T)) - 1)``.

    ``omega0`` in rad/s, ``temperature`` in K.
    """
    x = HBAR * np.asarray(omega0, dtype=float) / (K_B * np.asarray(temperature, dtype=float))
    return 1.0 / np.expm1(x)
