"""Thermal spectrum of a damped harmonic oscillator (PHYSICS.md section 1)."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ._conventions import HBAR, K_B, angular

__all__ = [
    "sphere_mass",
    "thermal_psd",
    "thermal_variance",
    "peak_psd",
    "lorentzian_psd",
    "zero_point_width",
]


def sphere_mass(radius: ArrayLike, density: ArrayLike) -> np.ndarray:
    """Mass in kg of a sphere of ``radius`` (m) and ``density`` (kg/m**3)."""
    return 4.0 / 3.0 * np.pi * np.asarray(density) * np.asarray(radius) ** 3


def thermal_psd(
    f_hz: ArrayLike,
    mass: float,
    omega0: float,
    gamma: float,
    temperature: float,
) -> np.ndarray:
    """One-sided displacement PSD in m**2/Hz of a thermally driven damped oscillator.

    Exact form (not the high-Q Lorentzian) of ``m x'' + m gamma x' + m Omega0**2 x = F``
    with a white force of one-sided PSD ``4 m gamma k_B T``::

        S_xx(f) = (4 gamma k_B T / m) / ((Omega0**2 - Omega**2)**2 + gamma**2 Omega**2)

    Parameters
    ----------
    f_hz : array_like
        Frequencies in Hz (>= 0).
    mass : float
        Oscillator mass in kg.
    omega0 : float
        Undamped angular frequency in rad/s.
    gamma : float
        Energy damping rate in 1/s (FWHM in rad/s).
    temperature : float
        Bath temperature in K.

    Returns
    -------
    ndarray
        ``S_xx`` in m**2/Hz; its integral over f >= 0 is ``k_B T/(m Omega0**2)``.

    Examples
    --------
    >>> import numpy as np
    >>> m = sphere_mass(50e-9, 2200.0)
    >>> s = thermal_psd(1e5, m, 2*np.pi*1e5, 2*np.pi*1e3, 295.0)
    >>> f"{float(s):.5e}"
    '5.70170e-18'
    """
    w = angular(f_hz)
    num = 4.0 * gamma * K_B * temperature / mass
    return num / ((omega0**2 - w**2) ** 2 + gamma**2 * w**2)


def lorentzian_psd(
    f_hz: ArrayLike, mass: float, omega0: float, gamma: float, temperature: float
) -> np.ndarray:
    """High-Q Lorentzian approximation of :func:`thermal_psd` in m**2/Hz.

    ``(Omega0**2 - Omega**2)**2 ~ 4 Omega0**2 (Omega0 - Omega)**2`` and
    ``gamma**2 Omega**2 ~ gamma**2 Omega0**2``; same peak height and area for Q >> 1.
    Kept only to quantify how far it is from the exact form; fits use the exact form.
    """
    w = angular(f_hz)
    num = 4.0 * gamma * K_B * temperature / mass
    return num / (omega0**2 * (4.0 * (omega0 - w) ** 2 + gamma**2))


def thermal_variance(mass: ArrayLike, omega0: ArrayLike, temperature: ArrayLike) -> np.ndarray:
    """Thermal position variance ``k_B T/(m Omega0**2)`` in m**2 (equipartition)."""
    return K_B * np.asarray(temperature) / (np.asarray(mass) * np.asarray(omega0) ** 2)


def peak_psd(mass: float, omega0: float, gamma: float, temperature: float) -> float:
    """Height of :func:`thermal_psd` at ``f0``: ``4 k_B T/(m gamma Omega0**2)`` in m**2/Hz."""
    return 4.0 * K_B * temperature / (mass * gamma * omega0**2)


def zero_point_width(mass: ArrayLike, omega0: ArrayLike) -> np.ndarray:
    """Zero-point width ``x_zpf = sqrt(hbar/(2 m Omega0))`` in m."""
    return np.sqrt(HBAR / (2.0 * np.asarray(mass) * np.asarray(omega0)))
