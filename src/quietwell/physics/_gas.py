"""Gas damping and gas heating of a sphere (PHYSICS.md section 2).

Mean free path: quietwell uses the **viscosity definition**
``l = (eta/P) sqrt(pi k_B T/(2 m_gas))``, the one for which the Knudsen
interpolation reduces to Epstein's diffuse-reflection result at high Kn.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from ._conventions import K_B, N_A, thermal_occupation

__all__ = [
    "Gas",
    "GASES",
    "N2",
    "mean_speed",
    "viscosity",
    "mean_free_path",
    "knudsen_number",
    "epstein_damping",
    "gas_damping",
    "damping_slope",
    "gas_heating_rate",
    "radius_from_damping_slope",
    "DIFFUSE",
    "SPECULAR",
]

#: Accommodation factor delta of Epstein's drag for diffuse reflection, full accommodation.
DIFFUSE: float = 1.0 + np.pi / 8.0
#: Accommodation factor delta for specular reflection.
SPECULAR: float = 1.0


@dataclass(frozen=True)
class Gas:
    """A background gas.

    Attributes
    ----------
    name : str
        Chemical formula, e.g. ``"N2"``.
    molar_mass : float
        kg/mol.
    sutherland_eta0 : float
        Reference viscosity in Pa s at ``sutherland_t0``.
    sutherland_t0 : float
        Reference temperature in K.
    sutherland_s : float
        Sutherland constant in K.
    ion_sensitivity : float
        Ionization-gauge sensitivity relative to N2 (dimensionless).
    """

    name: str
    molar_mass: float
    sutherland_eta0: float
    sutherland_t0: float
    sutherland_s: float
    ion_sensitivity: float

    @property
    def molecule_mass(self) -> float:
        """Mass of one molecule in kg."""
        return self.molar_mass / N_A


# Sutherland data: N2 from the CRC Handbook (PHYSICS.md section 2, published).
# Other gases: viscosities are approximate handbook values (memory), Sutherland
# constants from the same tables (memory); only N2 is used for the checks.
GASES: dict[str, Gas] = {
    "N2": Gas("N2", 28.0134e-3, 17.81e-6, 300.55, 111.0, 1.0),
    "He": Gas("He", 4.002602e-3, 19.0e-6, 273.0, 79.4, 0.18),
    "Ne": Gas("Ne", 20.1797e-3, 29.7e-6, 273.0, 56.0, 0.31),
    "Ar": Gas("Ar", 39.948e-3, 20.7e-6, 273.0, 144.0, 1.4),
    "H2": Gas("H2", 2.01588e-3, 8.76e-6, 293.85, 72.0, 0.43),
    "H2O": Gas("H2O", 18.01528e-3, 9.8e-6, 293.0, 1064.0, 0.93),
    "CO2": Gas("CO2", 44.0095e-3, 14.8e-6, 293.15, 240.0, 1.4),
    "O2": Gas("O2", 31.9988e-3, 20.18e-6, 292.25, 127.0, 0.96),
    "CO": Gas("CO", 28.0101e-3, 17.2e-6, 288.15, 118.0, 1.0),
}
N2: Gas = GASES["N2"]


def mean_speed(temperature: ArrayLike, gas: Gas = N2) -> np.ndarray:
    """Mean molecular speed ``sqrt(8 k_B T/(pi m_gas))`` in m/s."""
    return np.sqrt(8.0 * K_B * np.asarray(temperature) / (np.pi * gas.molecule_mass))


def viscosity(temperature: ArrayLike, gas: Gas = N2) -> np.ndarray:
    """Dynamic viscosity in Pa s from Sutherland's law (pressure-independent)."""
    t = np.asarray(temperature, dtype=float)
    t0, s = gas.sutherland_t0, gas.sutherland_s
    return gas.sutherland_eta0 * (t0 + s) / (t + s) * (t / t0) ** 1.5


def mean_free_path(pressure: ArrayLike, temperature: ArrayLike, gas: Gas = N2) -> np.ndarray:
    """Mean free path in m, viscosity definition ``(eta/P) sqrt(pi k_B T/(2 m_gas))``.

    ``pressure`` in Pa, ``temperature`` in K.
    """
    t = np.asarray(temperature, dtype=float)
    return (
        viscosity(t, gas)
        / np.asarray(pressure)
        * np.sqrt(np.pi * K_B * t / (2.0 * gas.molecule_mass))
    )


def knudsen_number(
    radius: ArrayLike, pressure: ArrayLike, temperature: ArrayLike, gas: Gas = N2
) -> np.ndarray:
    """Knudsen number ``Kn = l/R`` (dimensionless)."""
    return mean_free_path(pressure, temperature, gas) / np.asarray(radius)


def epstein_damping(
    radius: ArrayLike,
    density: ArrayLike,
    pressure: ArrayLike,
    temperature: ArrayLike,
    gas: Gas = N2,
    delta: float = DIFFUSE,
) -> np.ndarray:
    """Free-molecular (Epstein) energy damping ``8 delta P/(pi rho R v_mean)`` in 1/s.

    References
    ----------
    Phys. Rev. 23, 710 (1924).
    """
    v = mean_speed(temperature, gas)
    return (
        8.0 * delta * np.asarray(pressure) / (np.pi * np.asarray(density) * np.asarray(radius) * v)
    )


def gas_damping(
    radius: ArrayLike,
    density: ArrayLike,
    pressure: ArrayLike,
    temperature: ArrayLike,
    gas: Gas = N2,
) -> np.ndarray:
    """Energy damping in 1/s across Knudsen numbers (interpolation formula).

    ``gamma = (6 pi eta R/m) 0.619/(0.619 + Kn) (1 + c_K)``,
    ``c_K = 0.31 Kn/(0.785 + 1.152 Kn + Kn**2)``, with ``Kn`` from the viscosity
    definition of the mean free path, so that it tends to
    :func:`epstein_damping` (diffuse) at high Kn.

    References
    ----------
    J. Fluid Mech. 219, 405 (1990); Phys. Rev. Lett. 109, 103603 (2012).
    """
    r = np.asarray(radius, dtype=float)
    rho = np.asarray(density, dtype=float)
    eta = viscosity(temperature, gas)
    kn = knudsen_number(r, pressure, temperature, gas)
    ck = 0.31 * kn / (0.785 + 1.152 * kn + kn**2)
    m = 4.0 / 3.0 * np.pi * rho * r**3
    return 6.0 * np.pi * eta * r / m * 0.619 / (0.619 + kn) * (1.0 + ck)


def damping_slope(
    radius: ArrayLike,
    density: ArrayLike,
    temperature: ArrayLike,
    gas: Gas = N2,
    delta: float = DIFFUSE,
) -> np.ndarray:
    """Free-molecular slope ``d gamma/dP = 8 delta/(pi rho R v_mean)`` in 1/(s Pa)."""
    return epstein_damping(radius, density, 1.0, temperature, gas, delta)


def radius_from_damping_slope(
    slope: ArrayLike,
    density: ArrayLike,
    temperature: ArrayLike,
    gas: Gas = N2,
    delta: float = DIFFUSE,
) -> np.ndarray:
    """Radius in m from the damping slope ``s`` (1/(s Pa)): ``R = 8 delta/(pi rho v_mean s)``."""
    v = mean_speed(temperature, gas)
    return 8.0 * delta / (np.pi * np.asarray(density) * v * np.asarray(slope))


def gas_heating_rate(gamma: ArrayLike, omega0: ArrayLike, temperature: ArrayLike) -> np.ndarray:
    """Gas heating rate ``Gamma_gas = gamma (n_th + 1/2)`` in quanta/s.

    ``gamma`` in 1/s, ``omega0`` in rad/s, ``temperature`` in K.
    """
    return np.asarray(gamma) * (thermal_occupation(omega0, temperature) + 0.5)
