"""Rayleigh scattering and photon-recoil heating (PHYSICS.md section 3)."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ._conventions import C_LIGHT, EPS0

__all__ = [
    "RECOIL_FACTORS",
    "silica_index",
    "polarizability",
    "scattering_cross_section",
    "focus_intensity",
    "scattered_power",
    "recoil_heating_rate",
]

#: Recoil factors A_i (x along polarization, y perpendicular, z along propagation)
#: of a dipole scatterer in a plane wave, for ``A_i P_scat omega_L/(m c**2 Omega_i)``.
RECOIL_FACTORS: dict[str, float] = {"x": 1.0 / 10.0, "y": 1.0 / 5.0, "z": 7.0 / 10.0}

# Sellmeier coefficients of fused silica (J. Opt. Soc. Am. 55, 1205 (1965)),
# wavelengths in micrometres.
_SELLMEIER_B = (0.6961663, 0.4079426, 0.8974794)
_SELLMEIER_C = (0.0684043, 0.1162414, 9.896161)


def silica_index(wavelength: ArrayLike) -> np.ndarray:
    """Refractive index of fused silica at ``wavelength`` (m), Sellmeier fit.

    References
    ----------
    J. Opt. Soc. Am. 55, 1205 (1965).

    Examples
    --------
    >>> f"{float(silica_index(1064e-9)):.5f}"
    '1.44963'
    """
    lam2 = (np.asarray(wavelength, dtype=float) * 1e6) ** 2
    n2 = 1.0
    for b, c in zip(_SELLMEIER_B, _SELLMEIER_C, strict=True):
        n2 = n2 + b * lam2 / (lam2 - c**2)
    return np.sqrt(n2)


def polarizability(radius: ArrayLike, index: ArrayLike) -> np.ndarray:
    """Clausius–Mossotti polarizability ``4 pi eps0 R**3 (eps-1)/(eps+2)`` in C m**2/V.

    ``radius`` in m, ``index`` the (real) refractive index; ``eps = index**2``.
    """
    eps = np.asarray(index, dtype=float) ** 2
    return 4.0 * np.pi * EPS0 * np.asarray(radius) ** 3 * (eps - 1.0) / (eps + 2.0)


def scattering_cross_section(
    radius: ArrayLike, index: ArrayLike, wavelength: ArrayLike
) -> np.ndarray:
    """Rayleigh scattering cross-section ``k**4 |alpha|**2/(6 pi eps0**2)`` in m**2."""
    k = 2.0 * np.pi / np.asarray(wavelength)
    a = polarizability(radius, index)
    return k**4 * a**2 / (6.0 * np.pi * EPS0**2)


def focus_intensity(power: ArrayLike, waist: ArrayLike) -> np.ndarray:
    """Peak intensity ``2P/(pi w0**2)`` in W/m**2 of a Gaussian focus (P in W, w0 in m)."""
    return 2.0 * np.asarray(power) / (np.pi * np.asarray(waist) ** 2)


def scattered_power(
    radius: ArrayLike, index: ArrayLike, wavelength: ArrayLike, power: ArrayLike, waist: ArrayLike
) -> np.ndarray:
    """Scattered power ``sigma I0`` in W of a sphere at the focus."""
    return scattering_cross_section(radius, index, wavelength) * focus_intensity(power, waist)


def recoil_heating_rate(
    p_scat: ArrayLike, wavelength: ArrayLike, mass: ArrayLike, omega: ArrayLike, axis: str
) -> np.ndarray:
    """Photon-recoil heating rate in quanta/s along ``axis`` ('x', 'y' or 'z').

    ``Gamma_i = A_i P_scat omega_L/(m c**2 Omega_i)`` with ``A`` from
    :data:`RECOIL_FACTORS`. ``p_scat`` in W, ``wavelength`` in m, ``mass`` in kg,
    ``omega`` the mode's angular frequency in rad/s.

    References
    ----------
    Phys. Rev. Lett. 116, 243601 (2016) (factor 1/5 perpendicular to the
    polarization); Phys. Rev. A 100, 043821 (2019) (tight focus lowers A_z).
    """
    try:
        a = RECOIL_FACTORS[axis]
    except KeyError:
        from .._errors import InputError

        raise InputError(f"{axis=} is not an axis; use one of 'x', 'y', 'z'") from None
    omega_l = 2.0 * np.pi * C_LIGHT / np.asarray(wavelength)
    return a * np.asarray(p_scat) * omega_l / (np.asarray(mass) * C_LIGHT**2 * np.asarray(omega))
