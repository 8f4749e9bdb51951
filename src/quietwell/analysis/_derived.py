"""Derived quantities of a characterisation: energy envelopes, heating rates,
damping-versus-pressure slopes, the cold-damping model, drive phasors and the
integer charge.

Pure numpy/scipy. Every function states the units of what it takes and returns;
derived values come back as :class:`~quietwell.physics.Estimate` (value, stderr).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize

from quietwell._errors import FitError, InputError
from quietwell.physics import (
    Estimate,
    cold_damping_occupation,
    cold_damping_optimum,
    occupation_from_energy,
    reheating_curve,
)

__all__ = [
    "EnergyEnvelope",
    "energy_envelope",
    "HeatingRateFit",
    "fit_heating_rate",
    "LinearFit",
    "fit_line",
    "ColdDampingFit",
    "fit_cold_damping",
    "drive_phasor",
    "IntegerChargeFit",
    "fit_integer_charge",
    "occupation_from_area",
]


@dataclass(frozen=True)
class EnergyEnvelope:
    """Occupation of one mode versus time from a demodulated record.

    Attributes
    ----------
    time : ndarray
        Centre of each averaging window in s from the record start.
    occupation : ndarray
        ``n(t) = E/(hbar Omega0) - 1/2`` with the imprecision floor subtracted
        (single windows can be negative; their mean is unbiased).
    bandwidth_hz : float
        Width of the averaging window, 1/(window duration) in Hz.
    """

    time: np.ndarray
    occupation: np.ndarray
    bandwidth_hz: float


def energy_envelope(
    trace_v: ArrayLike,
    sample_rate: float,
    f0: float,
    calibration: float,
    mass: float,
    *,
    window_samples: int,
    floor_v2_per_hz: float = 0.0,
) -> EnergyEnvelope:
    """Demodulate a record at the mode frequency and return ``n(t)``.

    ``x = trace/c`` is multiplied by ``exp(-i Omega0 t)`` and averaged over
    consecutive windows of ``window_samples``; for ``x = A cos(Omega0 t + phi)`` the
    average is ``A e^{i phi}/2``, so ``E = m Omega0**2 A**2/2 = 2 m Omega0**2 |z|**2``.
    A white floor of one-sided PSD ``S`` (m**2/Hz) adds ``S fs/(2L)`` to ``|z|**2``
    on average, which is subtracted.

    Parameters
    ----------
    trace_v : array_like
        One channel in V.
    sample_rate : float
        Hz.
    f0 : float
        Mode frequency in Hz (from a fit).
    calibration : float
        V/m.
    mass : float
        kg.
    window_samples : int
        Samples per averaging window (sets the bandwidth ``fs/L``).
    floor_v2_per_hz : float
        White detection floor in V**2/Hz (one-sided) to subtract.
    """
    x = np.asarray(trace_v, dtype=np.float64) / calibration
    n_win = x.size // window_samples
    if n_win < 1:
        raise InputError(f"{window_samples=} must be <= the record length {x.size}; use a shorter window")
    x = x[: n_win * window_samples]
    t = np.arange(x.size) / sample_rate
    omega0 = 2.0 * np.pi * f0
    z = (x * np.exp(-1j * omega0 * t)).reshape(n_win, window_samples).mean(axis=1)
    s_floor = floor_v2_per_hz / calibration**2
    mean_sq = np.abs(z) ** 2 - s_floor * sample_rate / (2.0 * window_samples)
    energy = 2.0 * mass * omega0**2 * mean_sq
    centres = (np.arange(n_win) + 0.5) * window_samples / sample_rate
    return EnergyEnvelope(centres, occupation_from_energy(energy, omega0), sample_rate / window_samples)


def occupation_from_area(
    area_v2: float,
    area_v2_stderr: float,
    calibration: float,
    calibration_stderr: float,
    mass: float,
    f0: float,
) -> Estimate:
    """Occupation from a calibrated peak area: ``n = m Omega0 <x**2>/hbar - 1/2``.

    ``area_v2`` in V**2, ``calibration`` in V/m, ``mass`` in kg, ``f0`` in Hz.
    """
    omega0 = 2.0 * np.pi * f0
    var = area_v2 / calibration**2
    n = float(occupation_from_energy(mass * omega0**2 * var, omega0))
    rel = math.hypot(area_v2_stderr / area_v2, 2.0 * calibration_stderr / calibration)
    return Estimate(n, (n + 0.5) * rel)


@dataclass(frozen=True)
class LinearFit:
    """``y = slope x + intercept`` with standard errors and their covariance."""

    slope: Estimate
    intercept: Estimate
    covariance: float
    reduced_chi2: float


def fit_line(x: ArrayLike, y: ArrayLike, sigma: ArrayLike) -> LinearFit:
    """Weighted least-squares line through ``(x, y)`` with one-sigma errors ``sigma``.

    Errors are scaled by ``sqrt(reduced chi2)`` when it exceeds 1 (scatter larger than
    the stated errors is not hidden), never shrunk.
    """
    x, y, s = (np.asarray(a, dtype=float) for a in (x, y, sigma))
    if x.size < 3:
        raise InputError(f"a line needs at least 3 points, got {x.size}; measure more steps")
    if np.any(~np.isfinite(s)) or np.any(s <= 0):
        raise InputError("every point of a weighted line fit needs a finite error > 0")
    w = 1.0 / s**2
    a = np.vstack([x, np.ones_like(x)]).T
    cov = np.linalg.inv(a.T @ (a * w[:, None]))
    slope, intercept = cov @ (a.T @ (w * y))
    chi2 = float(np.sum(w * (y - slope * x - intercept) ** 2) / (x.size - 2))
    inflate = max(1.0, chi2)
    cov = cov * inflate
    return LinearFit(
        Estimate(float(slope), float(np.sqrt(cov[0, 0]))),
        Estimate(float(intercept), float(np.sqrt(cov[1, 1]))),
        float(cov[0, 1]),
        chi2,
    )


@dataclass(frozen=True)
class HeatingRateFit:
    """Heating rate of one mode from an ensemble of reheating cycles.

    Attributes
    ----------
    linear : Estimate
        ``Gamma`` in quanta/s from ``n = n0 + Gamma t`` (bootstrap error over cycles).
    exponential : Estimate
        ``Gamma`` in quanta/s from the exponential form with damping ``gamma``.
    n0 : Estimate
        Initial occupation of the linear model.
    mean : ndarray
        Ensemble mean ``n(t)``; ``spread`` its standard deviation across cycles.
    n_cycles : int
    """

    linear: Estimate
    exponential: Estimate
    n0: Estimate
    time: np.ndarray
    mean: np.ndarray
    spread: np.ndarray
    n_cycles: int


def _fit_rates(t: np.ndarray, mean: np.ndarray, sem: np.ndarray, gamma: float):
    lin = fit_line(t, mean, sem)
    n0 = lin.intercept.value
    # exponential form with the (known) damping that stays with feedback off

    def model(tt, n0_, rate):
        return reheating_curve(tt, n0_, rate, gamma)

    try:
        popt, _ = optimize.curve_fit(
            model, t, mean, p0=(n0, max(lin.slope.value, 1e-12)), sigma=sem, absolute_sigma=True, maxfev=2000
        )
        rate_exp = float(popt[1])
    except RuntimeError as exc:
        raise FitError(f"exponential reheating model did not converge ({exc})") from None
    return lin.slope.value, rate_exp, n0


def fit_heating_rate(
    time: ArrayLike,
    occupations: ArrayLike,
    *,
    gamma: float,
    n_boot: int = 400,
    seed: int = 0,
) -> HeatingRateFit:
    """Heating rate from many reheating cycles, with a bootstrap error over cycles.

    One cycle is one stochastic path: the models are fitted to the **ensemble mean**
    ``n(t)`` (weighted by its standard error at each time), and the error of the rate
    is the standard deviation of the rate refitted on cycles resampled with
    replacement.

    Parameters
    ----------
    time : array_like
        Times after feedback off in s, shape ``(n_t,)``.
    occupations : array_like
        ``n`` per cycle and time, shape ``(n_cycles, n_t)``.
    gamma : float
        Damping that remains with feedback off (gas), 1/s, for the exponential model.
    n_boot : int
        Bootstrap resamples.
    seed : int
        Seed of the resampling (reproducible errors).
    """
    t = np.asarray(time, dtype=float)
    n = np.asarray(occupations, dtype=float)
    if n.ndim != 2 or n.shape[1] != t.size:
        raise InputError(f"occupations must have shape (n_cycles, {t.size}), got {n.shape}")
    if n.shape[0] < 3:
        raise InputError(f"a heating rate needs at least 3 cycles, got {n.shape[0]}")

    def stats(sample):
        m = sample.mean(axis=0)
        sem = sample.std(axis=0, ddof=1) / math.sqrt(sample.shape[0])
        return m, np.maximum(sem, 1e-12 * (np.abs(m).max() + 1.0))

    mean, sem = stats(n)
    lin, expo, n0 = _fit_rates(t, mean, sem, gamma)
    rng = np.random.default_rng(seed)
    boot = np.empty((n_boot, 3))
    for i in range(n_boot):
        pick = n[rng.integers(0, n.shape[0], n.shape[0])]
        boot[i] = _fit_rates(t, *stats(pick), gamma)
    err = boot.std(axis=0, ddof=1)
    return HeatingRateFit(
        Estimate(lin, float(err[0])),
        Estimate(expo, float(err[1])),
        Estimate(n0, float(err[2])),
        t,
        mean,
        n.std(axis=0, ddof=1),
        n.shape[0],
    )


@dataclass(frozen=True)
class ColdDampingFit:
    """The cold-damping model fitted to occupation versus feedback damping.

    Attributes
    ----------
    decoherence_rate : Estimate
        ``Gamma_dec = gamma (n_th + 1/2) + Gamma_ba`` in quanta/s.
    measurement_rate : Estimate
        ``Gamma_meas`` in 1/s.
    optimal_gain : Estimate
        ``gamma_fb`` at the minimum, 1/s.
    min_occupation : Estimate
        ``n`` at the optimum.
    reduced_chi2 : float
    """

    decoherence_rate: Estimate
    measurement_rate: Estimate
    optimal_gain: Estimate
    min_occupation: Estimate
    reduced_chi2: float


def fit_cold_damping(
    gain: ArrayLike, occupation: ArrayLike, sigma: ArrayLike, *, gamma: float = 0.0
) -> ColdDampingFit:
    """Fit ``n(gamma_fb)`` of :func:`quietwell.physics.cold_damping_occupation`.

    Free parameters: ``Gamma_dec`` and ``Gamma_meas`` (fitted in logs so they stay
    positive); ``gamma`` (gas damping, 1/s) is fixed. The optimum and its error follow
    from the parameter covariance (first-order propagation with a numerical Jacobian).
    """
    g, n, s = (np.asarray(a, dtype=float) for a in (gain, occupation, sigma))
    if g.size < 3:
        raise InputError(f"the cold-damping model needs at least 3 gains, got {g.size}")

    def model(gg, log_dec, log_meas):
        return cold_damping_occupation(gg, gamma, 0.0, np.exp(log_meas), np.exp(log_dec) - gamma * 0.5)

    # closed-form start: at the smallest gain heating dominates, at the largest noise
    i_lo, i_hi = int(np.argmin(g)), int(np.argmax(g))
    dec0 = max((n[i_lo] + 0.5) * (gamma + g[i_lo]), 1e-9)
    meas0 = max(g[i_hi] ** 2 / (16.0 * max((n[i_hi] + 0.5) * (gamma + g[i_hi]), 1e-9)), 1e-9)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", optimize.OptimizeWarning)
            popt, pcov = optimize.curve_fit(
                model, g, n, p0=(math.log(dec0), math.log(meas0)), sigma=s, absolute_sigma=True,
                maxfev=5000,
            )
    except RuntimeError as exc:
        raise FitError(f"cold-damping model did not converge ({exc})") from None
    chi2 = float(np.sum(((n - model(g, *popt)) / s) ** 2) / max(g.size - 2, 1))
    pcov = pcov * max(1.0, chi2)

    def optimum(p):
        return cold_damping_optimum(gamma, 0.0, math.exp(p[1]), math.exp(p[0]) - gamma * 0.5)

    g_opt, n_min = optimum(popt)
    if not (math.isfinite(g_opt) and g_opt <= 1.5 * float(np.max(g))):
        raise FitError(f"the optimum gain {g_opt:.3g} 1/s lies beyond the largest swept gain "
                       f"{float(np.max(g)):.3g} 1/s, so the measurement rate is not determined; "
                       "extend the sweep to higher gains")
    if not np.all(np.isfinite(pcov)):
        raise FitError("the cold-damping model is not determined by these gains (no curvature "
                       "of the occupation); sweep across the optimum")
    jac = np.empty((2, 2))
    for j in range(2):
        h = np.zeros(2)
        h[j] = 1e-6
        jac[:, j] = (np.array(optimum(popt + h)) - np.array(optimum(popt - h))) / 2e-6
    cov_opt = jac @ pcov @ jac.T
    dec, meas = math.exp(popt[0]), math.exp(popt[1])
    return ColdDampingFit(
        Estimate(dec, dec * math.sqrt(pcov[0, 0])),
        Estimate(meas, meas * math.sqrt(pcov[1, 1])),
        Estimate(g_opt, math.sqrt(cov_opt[0, 0])),
        Estimate(n_min, math.sqrt(cov_opt[1, 1])),
        chi2,
    )


def drive_phasor(trace_v: ArrayLike, sample_rate: float, f_drive: float, phase_ref: float = 0.0) -> complex:
    """Complex amplitude (V) of the line at ``f_drive`` (Hz), relative to a
    ``cos(Omega_d t + phase_ref)`` reference starting at the first sample.

    A coherent tone ``a cos(Omega_d t + phi)`` returns ``a e^{i (phi - phase_ref)}``;
    uncorrelated noise averages down as ``1/sqrt(N)``. A sign change of the charge
    flips the phase by pi.
    """
    x = np.asarray(trace_v, dtype=np.float64)
    t = np.arange(x.size) / sample_rate
    return complex(2.0 * np.mean(x * np.exp(-1j * (2.0 * np.pi * f_drive * t + phase_ref))))


@dataclass(frozen=True)
class IntegerChargeFit:
    """Charge counting: amplitudes that change in equal steps with the charge.

    Attributes
    ----------
    charge : int
        Charge at the first step, in elementary charges (sign included).
    per_charge : Estimate
        Response per elementary charge, in the amplitude's units.
    residual : float
        Largest distance of a measured ``N`` from its integer, in charges.
    unrounded : Estimate
        ``N0 = intercept/slope`` before rounding, with its first-order error: how sure
        the integer is (an error well below 1/2 makes it exact).
    """

    charge: int
    per_charge: Estimate
    residual: float
    unrounded: Estimate


def fit_integer_charge(
    amplitudes: Sequence[float], amplitude_errors: Sequence[float], steps: Sequence[int]
) -> IntegerChargeFit:
    """Integer charge from signed drive amplitudes measured after known charge changes.

    ``a_k = alpha (N0 + steps_k)``: a weighted line through ``(steps, a)`` gives
    ``alpha`` (slope) and ``N0 = intercept/slope``, rounded to the nearest integer;
    then ``alpha`` is refitted with ``N0`` fixed. ``steps`` are the cumulative charge
    changes (``-1`` after removing one elementary charge, ...).
    """
    a, e, k = (np.asarray(v, dtype=float) for v in (amplitudes, amplitude_errors, steps))
    line = fit_line(k, a, e)
    if abs(line.slope.value) < 3 * line.slope.stderr:
        raise FitError(
            "the drive response does not change with the charge steps "
            f"(slope {line.slope.value:.3g} ± {line.slope.stderr:.3g}); "
            "check the discharge control and the drive tone"
        )
    n0 = line.intercept.value / line.slope.value
    charge = int(round(n0))
    counts = charge + k
    w = 1.0 / e**2
    alpha = float(np.sum(w * a * counts) / np.sum(w * counts**2))
    alpha_err = float(1.0 / math.sqrt(np.sum(w * counts**2)))
    residual = float(np.max(np.abs(a / alpha - counts)))
    b, sl = line.intercept.value, line.slope.value
    var = ((line.intercept.stderr / sl) ** 2 + (b * line.slope.stderr / sl**2) ** 2
           - 2 * b / sl**3 * line.covariance)
    n0_err = math.sqrt(max(var, 0.0))
    return IntegerChargeFit(charge, Estimate(alpha, alpha_err), residual, Estimate(n0, n0_err))
