"""Compiled inner loops of the likelihood fit in :mod:`quietwell.analysis._fit`.

Each evaluation of the fit needs, over the fitted bins, the model ``S``, its
derivatives ``J_a = dS/dtheta_a``, the Gamma deviance terms
``P/S - ln(P/S) - 1``, the score ``sum J_a (S - P)/S**2`` and the Fisher
information ``sum J_a J_b / S**2``.  Written with whole-array numpy operations
(the fallback in ``_fit``) that is a dozen passes over the bins and a dozen
temporaries, all under the interpreter lock; here it is one compiled call of a few
tight loops, run without the lock, so channels fitted in threads run in parallel.

numba is an optional accelerator: without it ``AVAILABLE`` is False and ``_fit``
uses its numpy expressions, which the tests compare with these loops.
"""

from __future__ import annotations

import math

import numpy as np

try:  # numba compiles the loops below; numpy is the fallback in _fit
    import numba as _numba
except Exception:  # pragma: no cover - numba missing or broken
    _numba = None

__all__ = ["AVAILABLE", "plain_stats", "prominences_into", "windowed_rows", "windowed_stats"]

#: Lags between exact complex exponentials in :func:`windowed_rows`; in between,
#: each lag is the previous times one step (rounding error below 64 ulp).
_ANCHOR = 64


def _finish(jac, s, p, g, h):  # pragma: no cover - compiled by numba
    """Deviance sum, score and Fisher information from the model ``s`` and ``jac``.

    ``inf`` (and ``g``, ``h`` unset) where ``s`` is not positive and finite;
    ``jac`` is overwritten with ``jac / s``.
    """
    n_par, nb = jac.shape
    for i in range(nb):
        if not (s[i] > 0.0 and s[i] < math.inf):
            return math.inf
    total = 0.0
    for i in range(nb):
        ratio = p[i] / s[i]
        total += ratio - math.log(ratio) - 1.0
    for a in range(n_par):
        acc = 0.0
        for i in range(nb):
            inv = 1.0 / s[i]
            v = jac[a, i] * inv
            acc += v * (1.0 - p[i] * inv)
            jac[a, i] = v
        g[a] = acc
    for a in range(n_par):
        for b in range(a + 1):
            acc = 0.0
            for i in range(nb):
                acc += jac[a, i] * jac[b, i]
            h[a, b] = acc
            h[b, a] = acc
    return total


def _plain_stats_loop(om, p, om0, gamma, area, b, du, g, h):  # pragma: no cover - numba
    """Deviance sum of the plain model (``inf`` where S <= 0 or not finite).

    ``theta = [u_j, ln gamma_j, ln a_j, ..., ln b]`` with ``dOmega0/du = du``;
    fills the score ``g`` and the Fisher information ``h`` (both without the
    factor K).  The same expressions as ``_Problem.model_and_jacobian``.
    """
    n_pk = om0.size
    nb = om.size
    jac = np.empty((3 * n_pk + 1, nb))
    s = np.full(nb, b)
    jac[3 * n_pk, :] = b
    for j in range(n_pk):
        w0 = om0[j]
        w0sq = w0 * w0
        gj = gamma[j]
        g2 = gj * gj
        c4 = 4.0 * gj * w0sq * area[j]
        two_w0 = 2.0 / w0
        four_w0 = 4.0 * w0
        for i in range(nb):
            o2 = om[i] * om[i]
            diff = w0sq - o2
            inv_d = 1.0 / (diff * diff + g2 * o2)
            peak = c4 * inv_d
            s[i] += peak
            jac[3 * j, i] = peak * (two_w0 - four_w0 * diff * inv_d) * du
            jac[3 * j + 1, i] = peak * (1.0 - 2.0 * g2 * o2 * inv_d)
            jac[3 * j + 2, i] = peak
    return _finish(jac, s, p, g, h)


def _windowed_rows_loop(a, w1, om0, area, du, lag, fs, rows):  # pragma: no cover - numba
    """Window-weighted autocovariance of each peak and its two derivatives.

    Row ``3 j + 2``: ``R_j(t) c(t)`` with ``R = A exp(-a t)(cos w1 t + (a/w1) sin w1 t)``;
    rows ``3 j + 1`` and ``3 j``: its derivatives by ln gamma and by u, as in
    ``_Problem._windowed`` (where the algebra is written out).
    """
    n = lag.size
    for j in range(a.size):
        aj = a[j]
        wj = w1[j]
        q = aj / wj
        amp = area[j]
        c_g = aj * amp * (1.0 + q * q)
        c_u = amp * om0[j] / wj * du
        rate = complex(-aj, wj) / fs
        step = np.exp(rate)
        for t0 in range(0, n, _ANCHOR):
            z = np.exp(rate * t0)
            for t in range(t0, min(t0 + _ANCHOR, n)):
                tt = t / fs
                c = z.real
                s = z.imag
                tc = tt * c
                lw = lag[t]
                rows[3 * j + 2, t] = amp * (c + q * s) * lw
                rows[3 * j + 1, t] = c_g * (s / wj - tc) * lw
                rows[3 * j, t] = c_u * (q * tc - tt * s - (q / wj) * s) * lw
                z *= step


def _windowed_stats_loop(spec, bins, row0, scale, p, b, g, h):  # pragma: no cover - numba
    """Deviance sum of the window-exact model from the rfft ``spec`` of the rows.

    ``dS/dtheta_a`` at bin ``bins[i]`` is ``(2 Re spec[a, bins[i]] - row0[a]) scale``
    (the even extension of each row over ``|tau| < N``); ``S`` is the sum of the
    area rows plus ``b``.
    """
    n_rows = spec.shape[0]
    nb = bins.size
    jac = np.empty((n_rows + 1, nb))
    s = np.full(nb, b)
    jac[n_rows, :] = b
    for r in range(n_rows):
        for i in range(nb):
            jac[r, i] = (2.0 * spec[r, bins[i]].real - row0[r]) * scale
    for j in range(n_rows // 3):
        for i in range(nb):
            s[i] += jac[3 * j + 2, i]
    return _finish(jac, s, p, g, h)


def _lowest_back_to_higher(x, first, stop, step, out, stack, low):  # pragma: no cover - numba
    """``out[i]``: the lowest of ``x`` from ``i`` back (against ``step``) to the nearest
    sample higher than ``x[i]``, exclusive, or to the end; ``stack``, ``low``: scratch."""
    top = 0
    for i in range(first, stop, step):
        m = x[i]
        while top > 0 and x[stack[top - 1]] <= x[i]:
            top -= 1
            if low[top] < m:
                m = low[top]
        out[i] = m
        stack[top] = i
        low[top] = m
        top += 1


def _prominences_loop(x, peaks, out):  # pragma: no cover - compiled by numba
    """Prominence of each of ``peaks`` in ``x``, as ``scipy.signal.peak_prominences``.

    SciPy walks from each peak to either side until a higher sample (or the end)
    and takes the lowest sample on the way, so its cost grows with the distance to
    the next higher sample, which for the many small maxima on the flank of a broad
    line is most of the spectrum.  Here one pass to the right (and one to the left)
    keeps a stack of the samples not yet exceeded, each with the lowest sample
    between it and the stack entry below it: popping the entries a new sample
    exceeds joins their stretches, so every sample's lowest sample back to the
    nearest higher one comes in O(n) for all samples together.
    """
    n = x.size
    left = np.empty(n)
    right = np.empty(n)
    stack = np.empty(n, np.int64)
    low = np.empty(n)
    _lowest_back_to_higher(x, 0, n, 1, left, stack, low)
    _lowest_back_to_higher(x, n - 1, -1, -1, right, stack, low)
    for j in range(peaks.size):
        k = peaks[j]
        out[j] = x[k] - max(left[k], right[k])


if _numba is not None:
    AVAILABLE = True
    # FMA contraction and reassociated sums (so the reductions vectorise); no flag
    # that assumes finite values, so an invalid model still shows as a non-finite
    # S and the step is refused.
    _jit = _numba.njit(nogil=True, cache=True, fastmath={"contract", "reassoc"})
    _finish = _jit(_finish)
    plain_stats = _jit(_plain_stats_loop)
    windowed_rows = _jit(_windowed_rows_loop)
    windowed_stats = _jit(_windowed_stats_loop)
    _lowest_back_to_higher = _numba.njit(nogil=True, cache=True)(_lowest_back_to_higher)
    prominences_into = _numba.njit(nogil=True, cache=True)(_prominences_loop)
else:  # pragma: no cover - numba missing
    AVAILABLE = False
    plain_stats = windowed_rows = windowed_stats = prominences_into = None
