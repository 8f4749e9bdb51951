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
