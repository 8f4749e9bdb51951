"""Records of a thermally driven damped oscillator, written independently of the fitter
and of the simulated laboratory.

The sampled oscillator is an exact discretisation of ``x'' + gamma x' + Omega0**2 x =
F/m`` with white force: the state ``s = (x, v)`` obeys ``s[n+1] = A s[n] + w[n]`` with
``A = expm(M dt)`` (scipy.linalg.expm) and ``Cov(w) = P - A P A^T``, ``P = diag(var,
Omega0**2 var)`` the stationary covariance (equipartition). Writing ``w = L xi`` (Cholesky)
makes ``x`` the sum of two IIR filters (scipy.signal.lfilter) of independent white noise,
denominator ``1 - 2 r cos(w1 dt) z**-1 + r**2 z**-2``, ``r = exp(-gamma dt / 2)``. Its
autocovariance is that of the continuous oscillator sampled exactly (no aliasing error):
the exact discretisation of a linear stochastic differential equation (common practice,
no source).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg
import scipy.signal

TWO_PI = 2.0 * math.pi


def oscillator_record(
    n: int,
    fs: float,
    f0: float,
    gamma: float,
    area: float,
    floor: float,
    rng: np.random.Generator,
    dtype=np.float64,
) -> np.ndarray:
    """``n`` samples at ``fs`` Hz of a damped oscillator (resonance ``f0`` Hz, energy damping
    ``gamma`` 1/s, variance ``area``) plus white noise of one-sided PSD ``floor`` per Hz."""
    dt = 1.0 / fs
    om0 = TWO_PI * f0
    m = np.array([[0.0, 1.0], [-(om0**2), -gamma]])
    a = scipy.linalg.expm(m * dt)
    p = np.diag([area, om0**2 * area])
    q = p - a @ p @ a.T
    q = 0.5 * (q + q.T)
    chol = np.linalg.cholesky(q)
    # impulse responses h_j[k] = (A**k L)[0, j] for k = 0, 1 give the numerators
    h0 = chol[0]
    h1 = (a @ chol)[0]
    den = np.array([1.0, -np.trace(a), np.linalg.det(a)])
    burn = int(min(50.0 / (gamma * dt), 4 * n)) + 16
    xi = rng.standard_normal((2, n + burn))
    x = np.zeros(n + burn)
    for j in range(2):
        num = np.array([h0[j], h1[j] + den[1] * h0[j]])
        x += scipy.signal.lfilter(num, den, xi[j])
    x = x[burn:]
    # white floor: one-sided PSD `floor` per Hz is variance floor * fs / 2 per sample
    x += rng.standard_normal(n) * math.sqrt(floor * fs / 2.0)
    return x.astype(dtype)


def oscillator_spectrum(fs: float, n: int, lines, floor: float) -> np.ndarray:
    """One-sided PSD per Hz on the ``n``-point rfft grid of damped oscillators sampled
    at ``fs`` Hz plus a white floor: each line ``(f0 Hz, gamma 1/s, area)`` is the exact
    form ``4 gamma Omega0**2 A / ((Omega0**2 - Omega**2)**2 + gamma**2 Omega**2)``
    (PHYSICS.md section 1), folded into 0..fs/2 (aliasing: ``sum_m S(|f + m fs|)``)."""
    fk = np.fft.rfftfreq(n, 1.0 / fs)
    s = np.full(fk.size, float(floor))
    for m in range(-40, 41):
        om = TWO_PI * np.abs(fk + m * fs)
        for f0, gamma, area in lines:
            om0 = TWO_PI * f0
            s += 4.0 * gamma * om0**2 * area / ((om0**2 - om**2) ** 2 + gamma**2 * om**2)
    return s


def record_from_spectrum(s: np.ndarray, fs: float, rng: np.random.Generator) -> np.ndarray:
    """Gaussian record of ``2 (len(s) - 1)`` samples whose one-sided PSD is ``s`` per Hz:
    an inverse FFT of independent complex normal coefficients (random phases,
    chi-square amplitudes) with ``E|X_k|**2 = S_k fs n / 2`` (numpy's irfft
    normalisation), so that the periodogram ordinates of the record are independent
    and exponentially distributed with mean ``S_k`` (the DC bin is set to 0, the
    Nyquist bin is real)."""
    n = 2 * (s.size - 1)
    coef = np.sqrt(s * fs * n / 4.0) * (rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size))
    coef[0] = 0.0
    coef[-1] = coef[-1].real * math.sqrt(2.0)
    return np.fft.irfft(coef, n)


def periodogram_fisher(fs: float, n: int, lines, floor: float, rel_step: float = 1e-6) -> np.ndarray:
    """Fisher information of ``(f0, gamma, area)`` per line and the floor from the
    full-length periodogram of a record of ``n`` samples (bins 1 .. n/2 - 1):
    ``I_ij = sum_k dS_k/dtheta_i dS_k/dtheta_j / S_k**2``, the information of
    independent exponential ordinates with means ``S_k`` (the Whittle likelihood;
    from memory, no source re-read). Derivatives by central differences."""
    params = [v for line in lines for v in line] + [floor]

    def spectrum(theta):
        ls = [tuple(theta[3 * j : 3 * j + 3]) for j in range(len(lines))]
        return oscillator_spectrum(fs, n, ls, theta[-1])[1:-1]

    s = spectrum(params)
    grads = []
    for i, v in enumerate(params):
        h = rel_step * abs(v)
        up = list(params)
        dn = list(params)
        up[i] = v + h
        dn[i] = v - h
        grads.append((spectrum(up) - spectrum(dn)) / (2.0 * h))
    g = np.array(grads) / s
    return g @ g.T
