"""Feedback cooling, its limits, and reheating (PHYSICS.md section 4).

Parametric-feedback normalisation used by quietwell: the force is
``-m eta Omega0 x**2 x'`` (``eta`` in 1/m**2), whose cycle average gives
``dE/dt = -gamma (E - k_B T) - beta E**2`` with ``beta = eta/(2 m Omega0)``
in 1/(J s).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from ._conventions import K_B
from ._oscillator import zero_point_width

__all__ = [
    "measurement_rate",
    "cold_damping_occupation",
    "cold_damping_optimum",
    "parametric_beta",
    "parametric_mean_energy",
    "reheating_curve",
    "steady_state_occupation",
]


def measurement_rate(mass: ArrayLike, omega0: ArrayLike, s_imp: ArrayLike) -> np.ndarray:
    """Measurement rate ``Gamma_meas = x_zpf**2/(2 S_imp)`` in 1/s.

    ``s_imp`` is the one-sided white imprecision PSD in m**2/Hz.
    """
    return zero_point_width(mass, omega0) ** 2 / (2.0 * np.asarray(s_imp))


def cold_damping_occupation(
    gamma_fb: ArrayLike,
    gamma: ArrayLike,
    n_th: ArrayLike,
    gamma_meas: ArrayLike,
    gamma_ba: ArrayLike = 0.0,
) -> np.ndarray:
    """Steady-state occupation ``n`` under cold damping (velocity feedback).

    ``n + 1/2 = [gamma (n_th + 1/2) + Gamma_ba + gamma_fb**2/(16 Gamma_meas)]
    / (gamma + gamma_fb)``, weak coupling, white imprecision, negligible delay.

    Parameters
    ----------
    gamma_fb : array_like
        Feedback damping in 1/s.
    gamma : array_like
        Gas (bath) damping in 1/s.
    n_th : array_like
        Bath occupation.
    gamma_meas : array_like
        Measurement rate in 1/s (:func:`measurement_rate`).
    gamma_ba : array_like
        Heating by backaction and other non-gas sources (e.g. photon recoil), quanta/s.

    References
    ----------
    Nature 524, 325 (2015) (the 1/2 bookkeeping of this form is re-derived; see PHYSICS.md).
    """
    g = np.asarray(gamma_fb, dtype=float)
    heat = np.asarray(gamma) * (np.asarray(n_th) + 0.5) + np.asarray(gamma_ba)
    return (heat + g**2 / (16.0 * np.asarray(gamma_meas))) / (np.asarray(gamma) + g) - 0.5


def cold_damping_optimum(
    gamma: float, n_th: float, gamma_meas: float, gamma_ba: float = 0.0
) -> tuple[float, float]:
    """Optimal feedback damping (1/s) and the minimum occupation ``n`` it reaches.

    Minimising :func:`cold_damping_occupation` over ``gamma_fb`` gives
    ``gamma_fb,opt = -gamma + sqrt(gamma**2 + 16 Gamma_meas Gamma_dec)`` and
    ``(n + 1/2)_min = gamma_fb,opt/(8 Gamma_meas)``, with
    ``Gamma_dec = gamma (n_th + 1/2) + Gamma_ba``. For ``gamma -> 0`` these are
    ``4 sqrt(Gamma_meas Gamma_dec)`` and ``sqrt(Gamma_dec/Gamma_meas)/2``.
    """
    dec = gamma * (n_th + 0.5) + gamma_ba
    g_opt = -gamma + np.sqrt(gamma**2 + 16.0 * gamma_meas * dec)
    return float(g_opt), float(g_opt / (8.0 * gamma_meas) - 0.5)


def steady_state_occupation(total_heating: ArrayLike, total_damping: ArrayLike) -> np.ndarray:
    """Occupation ``n`` at balance: ``n + 1/2 = Gamma_total/gamma_total``.

    ``total_heating`` in quanta/s (all sources, including the 1/2 of the bath),
    ``total_damping`` in 1/s.
    """
    return np.asarray(total_heating) / np.asarray(total_damping) - 0.5


def parametric_beta(eta: ArrayLike, mass: ArrayLike, omega0: ArrayLike) -> np.ndarray:
    """Cycle-averaged non-linear damping ``beta = eta/(2 m Omega0)`` in 1/(J s)."""
    return np.asarray(eta) / (2.0 * np.asarray(mass) * np.asarray(omega0))


def parametric_mean_energy(
    beta: ArrayLike, gamma: ArrayLike, temperature: ArrayLike
) -> np.ndarray:
    """Mean energy in J under parametric feedback, from the stationary distribution.

    ``rho(E) ~ exp(-E/k_B T - beta E**2/(2 gamma k_B T))``. With ``eps = E/k_B T``
    and ``a = beta k_B T/(2 gamma)``, ``Z = sqrt(pi/(4a)) erfcx(1/(2 sqrt a))`` and
    ``<eps> = (1 - Z)/(2 a Z)``; ``a -> 0`` gives ``k_B T``.
    """
    kt = K_B * np.asarray(temperature, dtype=float)
    a = np.asarray(beta, dtype=float) * kt / (2.0 * np.asarray(gamma, dtype=float))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.sqrt(np.pi / (4.0 * a)) * special.erfcx(1.0 / (2.0 * np.sqrt(a)))
        eps = (1.0 - z) / (2.0 * a * z)
    # For a << 1 the closed form loses digits; its series is 1 - 4a + 40 a**2.
    eps = np.where(a < 1e-4, 1.0 - 4.0 * a + 40.0 * a**2, eps)
    return eps * kt


def reheating_curve(t: ArrayLike, n0: float, heating_rate: float, gamma: float) -> np.ndarray:
    """Mean occupation ``n(t)`` after feedback is switched off at ``t = 0``.

    ``n + 1/2 = (n0 + 1/2) e^{-gamma t} + (Gamma/gamma)(1 - e^{-gamma t})``, with
    ``Gamma`` the total heating rate (quanta/s, the bath's 1/2 included, e.g.
    ``gamma (n_th + 1/2) + Gamma_recoil``) and ``gamma`` the damping (1/s) that
    remains with feedback off. For ``gamma t << 1``:
    ``n ~ n0 + (Gamma - gamma (n0 + 1/2)) t``, i.e. ``n0 + Gamma t`` for a cold start.
    ``gamma = 0`` gives the exactly linear ``n0 + Gamma t``.
    """
    t = np.asarray(t, dtype=float)
    if gamma == 0.0:
        return n0 + heating_rate * t
    decay = -np.expm1(-gamma * t)  # 1 - e^{-gamma t}, exact for small gamma t
    return (n0 + 0.5) * (1.0 - decay) + heating_rate / gamma * decay - 0.5
