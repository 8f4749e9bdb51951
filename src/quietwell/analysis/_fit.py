"""Maximum-likelihood fit of damped-oscillator peaks to an averaged PSD.

A bin of a spectrum averaged over K independent periodograms is Gamma
distributed with shape K and mean S(f).  The fit minimises the Gamma deviance
``2 K sum[(P - S)/S - ln(P/S)]`` (the negative log-likelihood up to a constant)
with a trust-region Newton method whose Hessian is the analytic Fisher
information ``K sum (dS/dtheta_j)(dS/dtheta_k)/S**2``.  A least-squares fit of
the same data is biased; see Rev. Sci. Instrum. 81, 075103 (2010).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.ndimage
import scipy.special
from numpy.typing import ArrayLike

from quietwell._errors import FitError, InputError, QuietwellError, UnresolvedPeakError
from quietwell.analysis import _fit_kernels
from quietwell.analysis._compile_once import compile_once
from quietwell.analysis._welch import PSDResult, _dot

__all__ = [
    "PeakFit",
    "GoodnessOfFit",
    "SpectrumFit",
    "oscillator_peak",
    "spectrum_model",
    "fit_psd",
    "fit_channels",
]

_TWO_PI = 2.0 * math.pi


def oscillator_peak(f_hz: ArrayLike, f0: float, gamma: float, area: float) -> np.ndarray:
    """One-sided PSD of a damped harmonic oscillator, normalised to its area.

    ``S(f) = 4 gamma Omega0**2 A / ((Omega0**2 - Omega**2)**2 + gamma**2 Omega**2)``
    with ``Omega = 2 pi f`` and ``Omega0 = 2 pi f0``; ``integral_0^inf S df = A``.

    Parameters
    ----------
    f_hz : array_like
        Frequencies in Hz.
    f0 : float
        Undamped resonance frequency in Hz.
    gamma : float
        Energy damping rate in 1/s (full width at half maximum in rad/s).
    area : float
        Integral of the peak over f >= 0 in ``units**2`` (the mode variance).

    Returns
    -------
    numpy.ndarray
        PSD in ``units**2/Hz``.

    References
    ----------
    The thermal spectrum ``S_xx = (4 gamma k_B T/m)/((Omega0**2 - Omega**2)**2
    + gamma**2 Omega**2)`` with area ``k_B T/(m Omega0**2)``, rewritten in
    terms of its area; see PHYSICS.md section 1 and Rev. Sci. Instrum. 89,
    033111 (2018).
    """
    om = _TWO_PI * np.asarray(f_hz, dtype=np.float64)
    om0 = _TWO_PI * f0
    return 4.0 * gamma * om0**2 * area / ((om0**2 - om**2) ** 2 + gamma**2 * om**2)


@dataclass(frozen=True)
class PeakFit:
    """One fitted peak and the flat background of its channel.

    Attributes
    ----------
    f0, f0_stderr : float
        Resonance frequency and its standard error in Hz.
    gamma, gamma_stderr : float
        Energy damping rate (FWHM in rad/s) and its standard error in 1/s.
    area, area_stderr : float
        Peak area (mode variance) and its standard error in ``units**2``.
    background, background_stderr : float
        Flat floor of the channel and its standard error in ``units**2/Hz``
        (shared by all peaks of the channel).
    """

    f0: float
    f0_stderr: float
    gamma: float
    gamma_stderr: float
    area: float
    area_stderr: float
    background: float
    background_stderr: float

    @property
    def linewidth_hz(self) -> float:
        """Full width at half maximum in Hz, ``gamma / (2 pi)``."""
        return self.gamma / _TWO_PI

    @property
    def height(self) -> float:
        """Peak value above the floor at ``f0`` in ``units**2/Hz``, ``4 area / gamma``."""
        return 4.0 * self.area / self.gamma

    def as_dict(self) -> dict[str, float]:
        """The fit as the JSON object the ``quietwell analyze --json`` command prints."""
        return {
            "f0_hz": self.f0,
            "f0_hz_stderr": self.f0_stderr,
            "gamma": self.gamma,
            "gamma_stderr": self.gamma_stderr,
            "area": self.area,
            "area_stderr": self.area_stderr,
            "background": self.background,
            "background_stderr": self.background_stderr,
        }


@dataclass(frozen=True)
class GoodnessOfFit:
    """Deviance of the Gamma likelihood and what it means.

    Attributes
    ----------
    deviance : float
        ``2 K sum[(P - S)/S - ln(P/S)]`` over the fitted bins (dimensionless).
    dof : int
        Bins minus free parameters.
    reduced : float
        ``deviance / (dof * m_K)``, with ``m_K = 2 K (ln K - digamma(K))`` the
        mean deviance of one bin (-> 1 for large K); about 1 for a good fit.
    p_value : float
        Probability of a deviance at least this large if the model is right
        (chi-square approximation, widened for correlated bins).
    """

    deviance: float
    dof: int
    reduced: float
    p_value: float


@dataclass(frozen=True)
class SpectrumFit:
    """The fit of one channel: its peaks, floor, covariance and goodness.

    Attributes
    ----------
    peaks : tuple of PeakFit
        Fitted peaks in order of increasing ``f0``.
    background, background_stderr : float
        Flat floor in ``units**2/Hz``.
    goodness : GoodnessOfFit
        Deviance, degrees of freedom, reduced deviance and p-value.
    n_bins : int
        Bins in the fitted band.
    band : tuple of float
        Lowest and highest fitted bin frequency in Hz.
    covariance : numpy.ndarray
        Covariance of ``parameter_names`` (linear parameters, SI units as in
        :class:`PeakFit`).
    parameter_names : tuple of str
        ``("f0_0", "gamma_0", "area_0", ..., "background")``.
    effective_averages : float
        Gamma shape K used for the bins.
    bin_correlation : float
        Factor by which the parameter variance was widened for correlated bins.
    n_iterations : int
        Optimiser iterations.
    window_exact : bool
        True when the optimum is that of the window-exact model of a Welch spectrum
        (leakage and aliasing modelled), False for the plain model (see
        :func:`fit_psd`).
    """

    peaks: tuple[PeakFit, ...]
    background: float
    background_stderr: float
    goodness: GoodnessOfFit
    n_bins: int
    band: tuple[float, float]
    covariance: np.ndarray = field(repr=False)
    parameter_names: tuple[str, ...]
    effective_averages: float
    bin_correlation: float
    n_iterations: int
    window_exact: bool = False

    def model(self, f_hz: ArrayLike) -> np.ndarray:
        """Fitted spectrum in ``units**2/Hz`` at frequencies ``f_hz`` (Hz)."""
        return spectrum_model(f_hz, [(p.f0, p.gamma, p.area) for p in self.peaks], self.background)


def spectrum_model(
    f_hz: ArrayLike, peaks: Sequence[tuple[float, float, float]], background: float
) -> np.ndarray:
    """Sum of damped-oscillator peaks plus a flat floor.

    Parameters
    ----------
    f_hz : array_like
        Frequencies in Hz.
    peaks : sequence of (f0, gamma, area)
        Each peak's resonance in Hz, damping in 1/s and area in ``units**2``.
    background : float
        Flat floor in ``units**2/Hz``.

    Returns
    -------
    numpy.ndarray
        PSD in ``units**2/Hz``.
    """
    s = np.full(np.shape(f_hz), float(background))
    for f0, gamma, area in peaks:
        s += oscillator_peak(f_hz, f0, gamma, area)
    return s


# --------------------------------------------------------------------------
# Internal parametrisation.  theta = [u_0, ln g_0, ln a_0, u_1, ..., ln b] with
# f0_k = f_ref_k + u_k * df, gamma_k = exp(ln g_k), area_k = exp(ln a_k) * scale_a
# and background = exp(ln b) * scale_b, so every component is of order one.
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Problem:
    om: np.ndarray  # angular frequencies of the bins, rad/s
    p: np.ndarray  # data in units of the initial floor estimate
    k: float
    df: float
    f_ref: np.ndarray
    scale_a: float  # unit of the internal area: floor * df
    # Set for a Welch spectrum: the window's normalised autocorrelation
    # c(tau) = sum_n w[n] w[n + tau] / sum w**2 for tau = 0..N-1, the sample
    # rate in Hz and the indices of the fitted bins in the rfft grid.
    lag_window: np.ndarray | None = None
    sample_rate: float = 0.0
    bins: np.ndarray | slice | None = None
    lag_times: np.ndarray | None = None  # tau / fs in s for tau = 0..N-1
    r: float = 1.0  # bin correlation the standard errors are widened by

    @functools.cached_property
    def bin_index(self) -> np.ndarray:
        """``bins`` as an int64 index array (for the compiled loops)."""
        if isinstance(self.bins, slice):
            return np.arange(self.bins.start, self.bins.stop, dtype=np.int64)
        return np.asarray(self.bins, dtype=np.int64)

    def unpack(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
        q = theta[:-1].reshape(-1, 3)
        f0 = self.f_ref + q[:, 0] * self.df
        return f0, np.exp(q[:, 1]), np.exp(q[:, 2]) * self.scale_a, float(np.exp(theta[-1]))

    def model_and_jacobian(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if self.lag_window is not None:
            return self._windowed(theta)
        f0, gamma, area, b = self.unpack(theta)
        om0 = (_TWO_PI * f0)[:, None]
        g = gamma[:, None]
        om2 = self.om**2
        diff = om0**2 - om2
        d = diff**2 + g**2 * om2
        peak = 4.0 * g * om0**2 * area[:, None] / d
        # d peak / d u: via Omega0, d Omega0 / d u = 2 pi df
        d_om0 = peak * (2.0 / om0 - 4.0 * om0 * diff / d) * (_TWO_PI * self.df)
        d_lng = peak * (1.0 - 2.0 * g**2 * om2 / d)
        jac = np.empty((theta.size, self.om.size))
        jac[0:-1:3] = d_om0
        jac[1:-1:3] = d_lng
        jac[2:-1:3] = peak
        jac[-1] = b
        return peak.sum(axis=0) + b, jac

    def deviance_stats(self, theta: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """Compiled: ``(sum of P/S - ln(P/S) - 1, score, Fisher information)``, both
        without the factor K; the sum is ``inf`` where the model is not positive."""
        f0, gamma, area, b = self.unpack(theta)
        om0 = _TWO_PI * f0
        du = _TWO_PI * self.df
        g = np.empty(theta.size)
        h = np.empty((theta.size, theta.size))
        if self.lag_window is None:
            total = _fit_kernels.plain_stats(self.om, self.p, om0, gamma, area, b, du, g, h)
            return total, g, h
        a = 0.5 * gamma
        w1sq = om0**2 - a**2
        if np.any(w1sq <= 0):
            return math.inf, g, h
        rows = np.empty((3 * f0.size, self.lag_window.size))
        _fit_kernels.windowed_rows(
            a, np.sqrt(w1sq), om0, area, du, self.lag_window, self.sample_rate, rows
        )
        spec = scipy.fft.rfft(rows, axis=1, workers=1)
        total = _fit_kernels.windowed_stats(
            spec, self.bin_index, rows[:, 0].copy(), 2.0 / self.sample_rate, self.p, b, g, h
        )
        return total, g, h

    def _windowed(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Expected Welch bins: the window-weighted autocovariance, Fourier transformed.

        ``E[P_k] = (2/fs) sum_|tau|<N R(tau/fs) c(tau) exp(-2 pi i k tau/N)`` for
        the sampled process, so leakage of the window and aliasing are exact.
        The damped oscillator of area A has ``R(t) = A exp(-a t) (cos w1 t +
        (a/w1) sin w1 t)``, ``a = gamma/2``, ``w1 = sqrt(Omega0**2 - a**2)``.
        """
        f0, gamma, area, b = self.unpack(theta)
        n_peaks = f0.size
        n = self.lag_window.size
        n_bins = self.om.size
        om0 = _TWO_PI * f0
        a = 0.5 * gamma
        w1sq = om0**2 - a**2
        if np.any(w1sq <= 0):
            return np.full(n_bins, np.nan), np.full((theta.size, n_bins), np.nan)
        w1 = np.sqrt(w1sq)
        q = a / w1
        t = self.lag_times
        rows = np.empty((3 * n_peaks, n))
        for j in range(n_peaks):
            # exp(-a t) cos(w1 t) and exp(-a t) sin(w1 t) from one complex exponential
            z = np.exp((-a[j] + 1j * w1[j]) * t)
            c, s = z.real, z.imag
            tc = t * c
            amp = area[j]
            # R and its derivatives by ln gamma (a d/da, a proportional to gamma)
            # and by u (d Omega0/du = 2 pi df); simplified by hand from
            # R = A exp(-a t) (cos w1 t + (a/w1) sin w1 t), w1 = sqrt(Omega0**2 - a**2).
            rows[3 * j + 2] = amp * (c + q[j] * s)
            rows[3 * j + 1] = (a[j] * amp * (1.0 + q[j] ** 2)) * (s / w1[j] - tc)
            rows[3 * j] = (amp * om0[j] / w1[j] * _TWO_PI * self.df) * (
                q[j] * tc - t * s - (q[j] / w1[j]) * s
            )
        rows *= self.lag_window
        # Even in tau: sum over |tau| < N of h(tau) exp(-i k tau) = 2 Re rfft(h)_k - h(0).
        spec = scipy.fft.rfft(rows, axis=1, workers=1)[:, self.bins].real
        spec *= 2.0
        spec -= rows[:, :1]
        spec *= 2.0 / self.sample_rate
        jac = np.empty((theta.size, n_bins))
        jac[:-1] = spec
        jac[-1] = b
        return jac[2:-1:3].sum(axis=0) + b, jac


_LN_FLOOR_WIDTH = 10.0
#: Polish a Welch spectrum with the window-exact model when the plain model's predicted
#: bias (:func:`_plain_model_bias`: window leakage and aliasing, from the plain fit's
#: parameters) exceeds this fraction of a line parameter's standard error. A bias of
#: 0.1 standard errors lowers the coverage of 68 % intervals by 0.3 % and of 95 % ones
#: by 0.1 %. Before issue 14 only lines narrower than 10 bins were polished; there a
#: broad line with many averages kept a bias of 0.8 standard errors in its width, and a
#: line near Nyquist several (bench/fit_coverage.py). Infinite: never for the bias.
_POLISH_ABOVE_BIAS = 0.1
#: Lines narrower than this many bins are always polished (the rule before issue 14:
#: 10; the split test sets it back together with ``_POLISH_ABOVE_BIAS = inf``). At
#: 0 the predicted bias alone decides.
_POLISH_BELOW_BINS = 0.0
#: Widen the covariance for the correlation of neighbouring bins of *overlapping*
#: segments too (see :func:`_overlap_variance_factor`); False: as before issue 14.
_CROSS_SEGMENT_CORRELATION = True


def _objective(prob: _Problem):
    """``fun, jac, hess`` of the negative log-likelihood with the floor's weak prior."""
    if _fit_kernels.AVAILABLE:
        return _compiled_objective(prob)
    return _numpy_objective(prob)


#: Curvature of the weak Gaussian prior on ln(background), see _numpy_objective.
_PRIOR_W2 = 1.0 / _LN_FLOOR_WIDTH**2


def _compiled_objective(prob: _Problem):
    """The same as :func:`_numpy_objective`, from one compiled pass per point."""
    cache: dict[bytes, tuple[float, np.ndarray, np.ndarray]] = {}

    def get(theta):
        key = theta.tobytes()
        if key not in cache:
            cache.clear()
            total, g, h = prob.deviance_stats(theta)
            if math.isfinite(total):
                g *= prob.k
                g[-1] += _PRIOR_W2 * theta[-1]
                h *= prob.k
                h[-1, -1] += _PRIOR_W2
                total = prob.k * total + 0.5 * _PRIOR_W2 * theta[-1] ** 2
            else:
                total = math.inf
            cache[key] = (float(total), g, h)
        return cache[key]

    def fun(theta):
        return get(theta)[0]

    def jac(theta):
        return get(theta)[1].copy()

    def hess(theta):
        return get(theta)[2].copy()

    return fun, jac, hess


def _numpy_objective(prob: _Problem):
    cache: dict[bytes, tuple[np.ndarray, np.ndarray]] = {}

    def get(theta):
        key = theta.tobytes()
        if key not in cache:
            cache.clear()
            cache[key] = prob.model_and_jacobian(theta)
        return cache[key]

    # A weak Gaussian prior on ln(background) (centred on the initial floor estimate,
    # which is 1 in the internal units, width _LN_FLOOR_WIDTH) keeps the problem
    # regular when a broad peak hides the floor everywhere in the band: the
    # likelihood is then flat as the floor goes to 0 and ln B would run off. Where
    # the data see the floor, the prior's pull is negligible (its curvature is
    # 1/_LN_FLOOR_WIDTH**2 against the data's K * n_bins).
    w2 = _PRIOR_W2

    def fun(theta):
        s, _ = get(theta)
        if not np.all(s > 0) or not np.all(np.isfinite(s)):
            return np.inf
        ratio = prob.p / s
        return float(prob.k * np.sum(ratio - np.log(ratio) - 1.0) + 0.5 * w2 * theta[-1] ** 2)

    def jac(theta):
        s, j = get(theta)
        # einsum, not BLAS: OpenBLAS threads would spin and compete with the
        # threads that fit other channels or compute spectra.
        g = prob.k * np.einsum("ij,j->i", j, (s - prob.p) / s**2)
        g[-1] += w2 * theta[-1]
        return g

    def hess(theta):
        s, j = get(theta)
        js = j / s
        h = prob.k * np.einsum("ik,jk->ij", js, js)
        h[-1, -1] += w2
        return h

    return fun, jac, hess


@dataclass(frozen=True)
class _Result:
    x: np.ndarray
    fun: float
    success: bool
    nit: int
    message: str


def _fisher_scoring(fun, jac, hess, theta: np.ndarray, maxiter: int = 100) -> _Result:
    """Minimise by Fisher scoring with Levenberg-Marquardt damping.

    Each step solves ``(F + lam diag F) step = -grad`` with the Fisher
    information ``F``; ``lam`` shrinks after a step that lowers the objective
    and grows tenfold until one does.  Converged when the Newton decrement
    ``grad F**-1 grad`` (twice the expected further gain of log-likelihood)
    is below 1e-10.
    """
    theta = np.asarray(theta, dtype=np.float64).copy()
    f = fun(theta)
    if not math.isfinite(f):
        return _Result(theta, f, False, 0, "the objective is not finite at the start")
    lam = 1e-3
    for it in range(1, maxiter + 1):
        g = jac(theta)
        h = hess(theta)
        if h[-1, -1] < 10.0 / _LN_FLOOR_WIDTH**2:
            # The data hardly see the floor (a broad peak dominates the whole band):
            # ln(floor) is held by its weak prior alone and would only slow the other
            # parameters down. Keep it where it is; its error still comes from the
            # full information at the end.
            g = g.copy()
            g[-1] = 0.0
            h = h.copy()
            h[-1, :] = 0.0
            h[:, -1] = 0.0
            h[-1, -1] = 1.0
        try:
            decrement = float(g @ np.linalg.solve(h, g))
        except np.linalg.LinAlgError:
            decrement = math.inf
        if decrement < 1e-6:
            return _Result(theta, f, True, it - 1, "converged")
        d = np.diag(h).copy()
        d[d <= 0] = 1.0
        while True:
            try:
                step = -np.linalg.solve(h + lam * np.diag(d), g)
            except np.linalg.LinAlgError:
                step = None
            if step is not None:
                trial = theta + step
                f_trial = fun(trial)
                if math.isfinite(f_trial) and f_trial <= f:
                    break
            lam *= 10.0
            if lam > 1e12:
                return _Result(theta, f, False, it, "no step lowers the objective")
        gain = f - f_trial
        theta, f = trial, f_trial
        if decrement < 1e-5 and lam <= 1e-2:
            # A nearly undamped Newton step from a decrement this small leaves one
            # of order decrement**2: converged without evaluating again.
            return _Result(theta, f, True, it, "converged")
        lam = max(lam / 10.0, 1e-9)
        if gain <= 1e-13 * max(1.0, abs(f)) and decrement < 1e-6:
            return _Result(theta, f, True, it, "converged (rounding level)")
    # Slow progress along a direction the data hardly constrain (typically the floor
    # under a broad peak, held only by its weak prior): a decrement below 1e-3 puts
    # every parameter within about 0.03 standard errors of the optimum.
    g = jac(theta)
    try:
        decrement = float(g @ np.linalg.solve(hess(theta), g))
    except np.linalg.LinAlgError:
        decrement = math.inf
    if decrement < 1e-3:
        return _Result(theta, f, True, maxiter, "converged to within 0.03 standard errors")
    return _Result(theta, f, False, maxiter, f"no convergence in {maxiter} iterations")


def _as_slice(idx: np.ndarray) -> np.ndarray | slice:
    """A slice for contiguous indices (cheaper to take), else the indices."""
    if idx.size and idx[-1] - idx[0] + 1 == idx.size:
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


_LAG_WINDOWS: dict[tuple[int, int], np.ndarray] = {}


def _lag_window(w: np.ndarray) -> np.ndarray:
    """``c(tau) = sum_n w[n] w[n + tau] / sum w**2`` for tau = 0..N-1 (cached per window)."""
    key = (w.size, hash(w.tobytes()))
    lag = _LAG_WINDOWS.get(key)
    if lag is None:
        # autocorrelation by FFT (zero-padded to 2N: no wrap-around), as
        # scipy.signal.correlate(w, w, method="fft") without importing scipy.signal
        n_fft = scipy.fft.next_fast_len(2 * w.size)
        spec = scipy.fft.rfft(w, n_fft)
        full = scipy.fft.irfft(spec.real**2 + spec.imag**2, n_fft)[: w.size]
        lag = full / _dot(w, w)
        lag.setflags(write=False)
        if len(_LAG_WINDOWS) > 16:
            _LAG_WINDOWS.clear()
        _LAG_WINDOWS[key] = lag
    return lag


def _smooth_width(k: float) -> int:
    """Odd box width in bins that brings the relative noise of the bins to ~1/3."""
    half = max(1, math.ceil(4.0 / k))
    return 2 * half + 1


def _floor_estimate(p: np.ndarray, k: float) -> float:
    """Flat floor from the lower quartile of the bins, corrected for Gamma(K) noise."""
    q = 0.25
    gamma_q = float(scipy.special.gammaincinv(k, q)) / k  # Gamma(k, 1/k) quantile
    return float(np.quantile(p, q) / gamma_q)


def _initial_peak(
    f: np.ndarray, smooth: np.ndarray, i: int, floor: float, width: int
) -> tuple[float, float, float]:
    """(f0, gamma, area) from the peak position, height and half-maximum width."""
    df = f[1] - f[0]
    height = smooth[i] - floor
    if height <= 0:
        height = smooth[i]
    half = floor + 0.5 * height
    lo = i
    while lo > 0 and smooth[lo] > half:
        lo -= 1
    hi = i
    while hi < smooth.size - 1 and smooth[hi] > half:
        hi += 1
    fwhm_bins = float(hi - lo)
    fwhm_bins = math.sqrt(max(fwhm_bins**2 - (width - 1) ** 2, 1.0))
    fwhm_hz = fwhm_bins * df
    return float(f[i]), _TWO_PI * fwhm_hz, 0.5 * math.pi * height * fwhm_hz


def _running_median(x: np.ndarray, width: int) -> np.ndarray:
    """Median over about ``width`` bins around each bin, from medians of short chunks.

    Medians of chunks of ``width // 16`` bins, a running median of 17 of them,
    linearly interpolated back to every bin: a cheap stand-in for a full
    running median that is as insensitive to peaks narrower than ``width / 4``.
    """
    chunk = max(1, width // 16)
    n_chunks = x.size // chunk
    if n_chunks < 3:
        return np.full(x.size, float(np.median(x)))
    med = np.median(x[: n_chunks * chunk].reshape(n_chunks, chunk), axis=1)
    size = min(17, n_chunks if n_chunks % 2 else n_chunks - 1)
    med = scipy.ndimage.median_filter(med, size=size, mode="nearest")
    centres = (np.arange(n_chunks) + 0.5) * chunk
    return np.interp(np.arange(x.size), centres, med)


#: Default false-alarm rate of the automatic line search: the probability that a
#: spectrum of pure noise yields at least one line.
FALSE_ALARM = 1e-3
#: Per-bin tail probability when a number of lines is asked for (one-sided 3 sigma).
_WANTED_TAIL = 1.35e-3


def _smoothed_shape(k: float, width: int, rho: np.ndarray | None) -> float:
    """Gamma shape of the mean of ``width`` neighbouring bins of a flat spectrum.

    Each bin is Gamma(K) with mean S; neighbours ``m`` apart are correlated by
    ``rho[m] = |c_m|**2`` (the window's, see :func:`bin_correlation_factor`), so the
    mean has relative variance ``sum_|m|<w (1 - |m|/w) rho_m / (K w)``; the Gamma law with
    the same mean and variance (moment matching) has the shape returned.
    """
    if rho is None:
        return k * width
    m = np.arange(1, width)
    lags = rho[1:width] if rho.size >= width else np.concatenate([rho[1:], np.zeros(width - rho.size)])
    total = 1.0 + 2.0 * float(np.sum((1.0 - m / width) * lags))
    return k * width / total


def _bin_correlations(window: np.ndarray | None) -> np.ndarray | None:
    """``rho_m = |c_m|**2`` for ``m = 0..15``, ``c_m`` the normalised DFT of ``w**2``."""
    if window is None:
        return None
    w2 = np.asarray(window, dtype=np.float64) ** 2
    c = np.fft.rfft(w2)[:16] / np.sum(w2)
    return np.abs(c) ** 2


def _detection_threshold(
    k: float, width: int, rho, n_bins: int, false_alarm: float | None
) -> tuple[float, float]:
    """Ratios a noise maximum exceeds at one bin with probability ``false_alarm /
    n_bins`` (so at most ``false_alarm`` per spectrum by the union bound; ``None``: the
    per-bin 3 sigma tail): of the smoothed spectrum to its mean, and of a maximum to
    the minimum beside it (its prominence).

    The smoothed spectrum of noise is Gamma distributed with the shape ``a`` of
    :func:`_smoothed_shape` (chi-square statistics of averaged periodograms, Rev. Sci.
    Instrum. 81, 075103 (2010); IEEE Trans. Audio Electroacoust. 15, 70 (1967)); the
    ratio of two independent such values is F distributed with (2a, 2a) degrees of
    freedom.
    """
    shape = _smoothed_shape(k, width, rho)
    tail = _WANTED_TAIL if false_alarm is None else false_alarm / n_bins
    level = float(scipy.special.gammainccinv(shape, tail)) / shape
    ratio = float(scipy.special.fdtri(2.0 * shape, 2.0 * shape, 1.0 - tail))
    return level, ratio


def _local_maxima(x: np.ndarray) -> np.ndarray:
    """Indices ``i`` with ``x[i - 1] < x[i] >= x[i + 1]`` (interior points)."""
    inner = x[1:-1]
    return np.flatnonzero((inner > x[:-2]) & (inner >= x[2:])) + 1


def _local_level(smooth: np.ndarray, i: int, box: int) -> float:
    """The level a candidate at ``i`` stands on: the higher of the lowest values within
    ``4 box + 4`` bins on either side (on the flank of a broad line, its uphill base)."""
    reach = 4 * box + 4
    left = smooth[max(0, i - reach) : i]
    right = smooth[i + 1 : i + 1 + reach]
    sides = [float(np.min(v)) for v in (left, right) if v.size]
    return max(sides) if sides else float(smooth[i])


def _half_width_bins(smooth: np.ndarray, i: int, level: float, box: int) -> float:
    """FWHM in bins of the line at ``i`` of ``smooth`` above ``level``, half crossings
    interpolated, the box of ``box`` bins removed in quadrature."""
    half = level + 0.5 * (smooth[i] - level)
    lo = i
    while lo > 0 and smooth[lo] > half:
        lo -= 1
    hi = i
    while hi < smooth.size - 1 and smooth[hi] > half:
        hi += 1

    def cross(a: int, b: int) -> float:  # fractional position of the half crossing
        da, db = smooth[a] - half, smooth[b] - half
        return a + (b - a) * (da / (da - db)) if da != db else float(a)

    left = cross(lo + 1, lo) if lo < i else float(lo)
    right = cross(hi - 1, hi) if hi > i else float(hi)
    measured = right - left
    return math.sqrt(max(measured**2 - box**2, 0.0))


def _find_peaks(
    f: np.ndarray,
    p: np.ndarray,
    k: float,
    r: float,
    floor: float,
    wanted: int | None,
    *,
    rho: np.ndarray | None = None,
    resolution_bins: float = 1.0,
    false_alarm: float = FALSE_ALARM,
) -> list[int]:
    """Indices of line candidates, most prominent first.

    A candidate is a local maximum of the smoothed spectrum that stands above both the
    floor and a wide running median of the spectrum (so a slope or the plateau below a
    resonance is no line) by the threshold of :func:`_detection_threshold`: pure noise
    gives a line with probability at most ``false_alarm`` per spectrum. It counts only
    if its half-maximum width is larger than ``resolution_bins`` (the window's
    equivalent noise bandwidth in bins): a single high bin is no line.
    """
    width = _smooth_width(k)
    smooth = scipy.ndimage.uniform_filter1d(p, width, mode="nearest")
    t, t_prominence = _detection_threshold(k, width, rho, p.size,
                                           None if wanted is not None else false_alarm)
    threshold = math.log(t)
    log_s = np.log(np.maximum(smooth, floor * 1e-12))
    baseline = np.log(_running_median(smooth, max(101, p.size // 4)))
    idx = _local_maxima(log_s)
    idx = idx[log_s[idx] >= math.log(floor) + threshold]
    idx = idx[log_s[idx] - baseline[idx] >= threshold]
    if _fit_kernels.AVAILABLE:
        prominence = np.empty(idx.size)
        _fit_kernels.prominences_into(log_s, idx.astype(np.int64), prominence)
    else:
        from scipy.signal import peak_prominences

        prominence = peak_prominences(log_s, idx)[0]
    keep = prominence >= math.log(t_prominence)
    idx, prominence = idx[keep], prominence[keep]
    if resolution_bins > 0:
        # Width measured on a spectrum smoothed to about 20 % relative noise (so that a
        # noise dip does not end the half-maximum walk early), the box removed again.
        box = min(15, max(width, 2 * math.ceil(12.5 * r / k) + 1))
        wider = scipy.ndimage.uniform_filter1d(p, box, mode="nearest")
        wide = np.array([_half_width_bins(wider, int(i), _local_level(wider, int(i), box), box)
                         > resolution_bins for i in idx], dtype=bool)
        idx, prominence = idx[wide], prominence[wide]
    idx = idx[np.argsort(prominence)[::-1]]
    if wanted is not None:
        idx = idx[:wanted]
    return [int(i) for i in idx]


def _kernels_first_call() -> None:
    """Call every compiled kernel once, through the code that calls it in a fit.

    A tiny plain and window-exact problem (16-sample window, bins 1..5 of its 9,
    one peak) and the prominence of one maximum pass the same argument types as a
    real fit; see :mod:`quietwell.analysis._compile_once`.
    """
    window = np.ones(16)
    n_bins = 5
    prob = _Problem(
        om=_TWO_PI * np.arange(1.0, n_bins + 1.0),
        p=np.ones(n_bins),
        k=1.0,
        df=1.0,
        f_ref=np.array([2.0]),
        scale_a=1.0,
        lag_window=_lag_window(window),
        sample_rate=float(window.size),
        bins=_as_slice(np.arange(1, n_bins + 1)),
        lag_times=np.arange(window.size) / float(window.size),
    )
    theta = np.zeros(4)
    prob.deviance_stats(theta)
    dataclasses.replace(prob, lag_window=None).deviance_stats(theta)
    _fit_kernels.prominences_into(np.array([0.0, 1.0, 0.0]), np.array([1], dtype=np.int64), np.empty(1))


def _compile_kernels() -> None:
    """Compile (or load) the kernels in this thread before any fit runs in a thread."""
    if _fit_kernels.AVAILABLE:
        compile_once("fit_kernels", _kernels_first_call)


@dataclass(frozen=True)
class _Spectrum:
    f: np.ndarray
    p: np.ndarray
    k: float
    r: float
    df: float
    nyquist: float | None = None
    window: np.ndarray | None = None
    n_samples: int | None = None
    n_segments: int = 1
    step: int = 0


def _as_spectrum(spectrum) -> _Spectrum:
    """The bins and their statistics from a PSDResult or an (f, p, K) tuple."""
    if isinstance(spectrum, PSDResult):
        if spectrum.psd.ndim != 1:
            raise InputError(
                f"the PSD has {spectrum.psd.shape[0]} channels; fit one at a time with "
                "fit_psd(result.channel(i))"
            )
        return _Spectrum(
            f=np.asarray(spectrum.frequency, dtype=np.float64),
            p=np.asarray(spectrum.psd, dtype=np.float64),
            k=float(spectrum.effective_averages),
            r=float(spectrum.bin_correlation),
            df=float(spectrum.resolution_hz),
            nyquist=spectrum.sample_rate / 2.0,
            window=spectrum.window_values,
            n_samples=spectrum.n_samples,
            n_segments=int(spectrum.n_segments),
            step=int(spectrum.nperseg - spectrum.noverlap),
        )
    try:
        f, p, k = spectrum
    except (TypeError, ValueError):
        raise InputError(
            "spectrum must be a PSDResult or a tuple (frequency_hz, psd, n_averages); "
            f"got {type(spectrum).__name__}"
        ) from None
    f = np.asarray(f, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    if f.ndim != 1 or p.shape != f.shape:
        raise InputError(f"frequency shape {f.shape} and psd shape {p.shape} must be equal and 1-D")
    if f.size < 3:
        raise InputError(f"spectrum has {f.size} bins; at least 3 are needed")
    steps = np.diff(f)
    df = float(steps[0])
    if not (df > 0 and np.allclose(steps, df, rtol=1e-6, atol=0)):
        raise InputError("frequency must be evenly spaced and increasing (a Welch grid)")
    k = float(k)
    if not (math.isfinite(k) and k >= 1):
        raise InputError(f"n_averages={k} must be >= 1 (segments averaged in each bin)")
    return _Spectrum(f=f, p=p, k=k, r=1.0, df=df)


def _band_bins(spec: _Spectrum, band) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The mask of the fitted bins in the spectrum's grid, their frequencies (Hz) and PSD."""
    f_all, p_all, df, nyquist = spec.f, spec.p, spec.df, spec.nyquist
    if band is None:
        mask = f_all > 0
        if nyquist is not None:
            mask &= (f_all >= 2 * df) & (f_all < nyquist)
    else:
        try:
            fmin, fmax = (float(v) for v in band)
        except (TypeError, ValueError):
            raise InputError(f"{band=} must be two frequencies (fmin, fmax) in Hz") from None
        if not fmin < fmax:
            raise InputError(f"{band=} must have fmin < fmax (Hz)")
        mask = (f_all >= fmin) & (f_all <= fmax) & (f_all > 0)
    f = f_all[mask]
    p = p_all[mask]
    if f.size < 10:
        raise InputError(
            f"the band {band=} holds {f.size} bins; at least 10 are needed: widen the band "
            "or use longer segments"
        )
    if not np.all(np.isfinite(p)):
        raise InputError("the PSD has non-finite values in the band; check the record")
    if not np.all(p > 0):
        raise InputError("the PSD has bins <= 0 in the band; a fit needs a positive floor (noise)")
    return mask, f, p


def _candidate_lines(
    f: np.ndarray,
    p: np.ndarray,
    k: float,
    r: float,
    floor: float,
    peaks,
    *,
    rho: np.ndarray | None = None,
    resolution_bins: float = 1.0,
    false_alarm: float = FALSE_ALARM,
) -> list[tuple[float, float, float]]:
    """Candidate lines: ``(f0, gamma, area)`` initial values, in order of ``f0``."""
    width = _smooth_width(k)
    smooth = scipy.ndimage.uniform_filter1d(p, width, mode="nearest")
    if peaks is None or isinstance(peaks, (int, np.integer)):
        wanted = None if peaks is None else int(peaks)
        if wanted is not None and wanted < 1:
            raise InputError(f"peaks={wanted} must be >= 1 (number of peaks to fit)")
        idx = _find_peaks(f, p, k, r, floor, wanted, rho=rho, resolution_bins=resolution_bins,
                          false_alarm=false_alarm)
        if not idx or (wanted is not None and len(idx) < wanted):
            narrow = [i for i in _find_peaks(f, p, k, r, floor, wanted, rho=rho, resolution_bins=0.0,
                                             false_alarm=false_alarm) if i not in idx]
            if narrow:
                where = ", ".join(f"{f[i]:.6g}" for i in sorted(narrow)[:5])
                raise UnresolvedPeakError(
                    f"found {len(idx)} peak(s) wider than the resolution ({resolution_bins:.3g} "
                    f"bins of {f[1] - f[0]:.3g} Hz) and {len(narrow)} narrower one(s) near "
                    f"{where} Hz; use longer segments (larger nperseg) to resolve them, or give "
                    "the peak frequencies"
                )
            raise UnresolvedPeakError(
                f"found {len(idx)} peak(s) wider than the resolution and above the floor "
                f"({floor:.3g} units**2/Hz; false-alarm rate {false_alarm:g} per spectrum) in "
                f"{f[0]:.6g}..{f[-1]:.6g} Hz, "
                + (f"asked for {wanted}; " if wanted is not None else "")
                + "use a longer record (more averages), a narrower band or give the "
                "peak frequencies"
            )
        return [_initial_peak(f, smooth, i, floor, width) for i in sorted(idx)]
    guesses = []
    for f0 in peaks:
        f0 = float(f0)
        if not f[0] < f0 < f[-1]:
            raise InputError(
                f"initial peak frequency {f0=} Hz is outside the fitted band {f[0]:.6g}..{f[-1]:.6g} Hz"
            )
        i = int(np.argmin(np.abs(f - f0)))
        lo, hi = max(0, i - width), min(f.size, i + width + 1)
        i = lo + int(np.argmax(smooth[lo:hi]))
        guesses.append(_initial_peak(f, smooth, i, floor, width))
    if not guesses:
        raise InputError("peaks is an empty list; give at least one frequency in Hz")
    guesses.sort()
    return guesses


def _longer_hint(spec: _Spectrum, linewidth_hz: float) -> str:
    """What resolves a narrow line: longer segments, or a longer record if the
    segment is already the whole record."""
    hint = "use longer segments (larger nperseg)"
    if spec.window is None or spec.nyquist is None or spec.n_samples is None:
        return hint
    if spec.window.size < spec.n_samples:
        return hint
    from quietwell.analysis._resolution import required_samples

    fs = 2.0 * spec.nyquist
    # a width the fit collapsed towards zero gives only a lower bound on the length
    needed = required_samples(max(linewidth_hz, 0.1 * spec.df), fs)
    return (f"the segment is the whole record: a record of at least {needed} samples "
            f"({needed / fs:.3g} s) would resolve it")


def _search_options(spec: _Spectrum) -> dict:
    """The window's bin correlations and resolution (equivalent noise bandwidth) in bins."""
    if spec.window is None:
        return {"rho": None, "resolution_bins": 1.0}
    w = np.asarray(spec.window, dtype=np.float64)
    return {"rho": _bin_correlations(w), "resolution_bins": w.size * _dot(w, w) / float(np.sum(w)) ** 2}


def _line_widths(
    psd: PSDResult, *, peaks=None, band=None, narrow: bool = False,
    false_alarm: float = FALSE_ALARM,
) -> list[tuple[float, float]]:
    """``(f0, fwhm)`` in Hz of the candidate lines of a 1-D PSD, from the same search
    and initial values as :func:`fit_psd`; empty where no line is found. With
    ``narrow`` also candidates narrower than the resolution (whose width a finer
    resolution must then measure)."""
    spec = _as_spectrum(psd)
    _, f, p = _band_bins(spec, band)
    floor = _floor_estimate(p, spec.k)
    options = _search_options(spec)
    if narrow:
        options["resolution_bins"] = 0.0
    try:
        guesses = _candidate_lines(f, p, spec.k, spec.r, floor, peaks, **options, false_alarm=false_alarm)
    except UnresolvedPeakError:
        return []
    out = []
    for f0, gamma, _ in guesses:
        i = int(np.argmin(np.abs(f - f0)))
        fwhm_bins = gamma / _TWO_PI / spec.df
        for _ in range(2):
            # The peak of a lightly smoothed spectrum sits on an upward noise excursion,
            # which narrows the half-maximum width: smooth over a third of the width found.
            box = max(3, 2 * int(fwhm_bins / 6.0) + 1)
            smooth = scipy.ndimage.uniform_filter1d(p, box, mode="nearest")
            lo, hi = max(0, i - box), min(p.size, i + box + 1)
            j = lo + int(np.argmax(smooth[lo:hi]))
            _, g, _ = _initial_peak(f, smooth, j, floor, box)
            fwhm_bins = g / _TWO_PI / spec.df
        out.append((float(f[j]), fwhm_bins * spec.df))
    return out


def fit_psd(
    spectrum: PSDResult | tuple[ArrayLike, ArrayLike, float],
    *,
    peaks: int | Sequence[float] | None = None,
    band: tuple[float, float] | None = None,
    min_linewidth_bins: float = 3.0,
    min_significance: float = 3.0,
    false_alarm: float = FALSE_ALARM,
) -> SpectrumFit:
    """Fit damped-oscillator peaks on a flat floor by maximum likelihood.

    Model: ``S(f) = sum_k 4 gamma_k Omega_k**2 A_k / ((Omega_k**2 - Omega**2)**2
    + gamma_k**2 Omega**2) + B`` (see :func:`oscillator_peak`).  The bins are
    taken as Gamma distributed with shape K and mean ``S(f)``.

    Parameters
    ----------
    spectrum : PSDResult or (frequency, psd, n_averages)
        A 1-D :class:`PSDResult` from :func:`welch_psd` (K is its
        ``effective_averages`` from Welch's overlap formula and the standard
        errors are widened by its ``bin_correlation``), or a tuple of bin
        frequencies in Hz, PSD in ``units**2/Hz`` and the number K of
        independent averages per bin (bins taken as independent).
    peaks : int or sequence of float, optional
        ``None``: every line found above the floor and the local level with a
        false-alarm rate of ``false_alarm`` per spectrum, and wider than the
        window's resolution;
        an int ``n``: the ``n`` most prominent peaks (3 sigma threshold);
        a sequence: initial resonance frequencies in Hz, one per peak.
    band : (float, float), optional
        Frequencies in Hz to fit, inclusive.  Default: all bins above 0 Hz
        (for a PSDResult, from the third bin, where per-segment detrending no
        longer distorts the spectrum, to below the Nyquist frequency).
    min_linewidth_bins : float, optional
        Smallest allowed ``gamma/(2 pi)`` in bins.
    min_significance : float, optional
        Smallest allowed ``area / area_stderr``.
    false_alarm : float, optional
        Probability that the automatic search (``peaks=None``) takes pure noise for
        a line, per spectrum: the threshold is the Gamma quantile of the smoothed
        Welch estimate with its number of averages, at ``false_alarm / bins``.

    Returns
    -------
    SpectrumFit
        Peaks (increasing ``f0``) with standard errors from the inverse Fisher
        information, the floor, covariance and goodness of fit.

    Raises
    ------
    InputError
        Bad spectrum, band or peak list.
    UnresolvedPeakError
        No peak found; a linewidth below ``min_linewidth_bins`` bins (use longer
        segments); or a peak not significant over the floor (use a longer record
        or more averages).
    FitError
        The optimiser did not converge or a peak is wider than the band.

    References
    ----------
    Gamma (chi-square with 2K degrees of freedom) statistics of averaged
    periodograms and the bias of least-squares fits: Rev. Sci. Instrum. 81,
    075103 (2010).  Equivalent degrees of freedom of overlapping segments:
    IEEE Trans. Audio Electroacoust. 15, 70 (1967).

    Examples
    --------
    >>> import numpy as np
    >>> f = np.arange(1, 2001) * 10.0                   # Hz
    >>> s = oscillator_peak(f, 10e3, 2 * np.pi * 300, 1e-6) + 1e-12
    >>> rng = np.random.default_rng(0)
    >>> p = rng.gamma(50, s / 50)                       # K = 50 averages
    >>> fit = fit_psd((f, p, 50), peaks=1)
    >>> pk = fit.peaks[0]
    >>> bool(abs(pk.f0 - 10e3) < 5 * pk.f0_stderr)
    True
    """
    spec = _as_spectrum(spectrum)
    mask, f, p = _band_bins(spec, band)
    _compile_kernels()
    floor = _floor_estimate(p, spec.k)
    guesses = _candidate_lines(f, p, spec.k, spec.r, floor, peaks, **_search_options(spec),
                       false_alarm=false_alarm)
    prob, theta0 = _initial_problem(spec, mask, f, p, floor, guesses)
    fitted = _fit_then_polish(prob, theta0, floor)
    _check_resolved(fitted, spec, f, p, min_linewidth_bins, min_significance)
    _check_converged(fitted, f)
    _check_inside_band(fitted, f)
    cov = _covariance(fitted, f, spec.r)
    if _CROSS_SEGMENT_CORRELATION:
        cov = cov * _overlap_variance_factor(spec)
    peak_fits = _peak_fits(fitted, cov, min_significance)
    return _spectrum_fit(fitted, peak_fits, cov, f, spec)


# ----------------------------------------------------------------------------
# The stages of fit_psd, in the order it calls them. Candidate lines and their
# initial values come from _candidate_lines (above), shared with the segment-length rule.
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class _Fitted:
    """The optimum of one fit, in the internal and in linear parameters.

    ``prob`` is the model the optimum belongs to (the plain or the window-exact one),
    ``jac`` and ``hess`` its score and Fisher information (the weak floor prior
    included), ``f0`` in Hz, ``gamma`` in 1/s, ``area`` in ``units**2``, ``background``
    in ``units**2/Hz``.
    """

    prob: _Problem
    res: _Result
    jac: object
    hess: object
    f0: np.ndarray
    gamma: np.ndarray
    area: np.ndarray
    background: float

    @property
    def theta(self) -> np.ndarray:
        return self.res.x

    @property
    def n_peaks(self) -> int:
        return self.f0.size


def _initial_problem(
    spec: _Spectrum, mask: np.ndarray, f: np.ndarray, p: np.ndarray, floor: float,
    guesses: list[tuple[float, float, float]],
) -> tuple[_Problem, np.ndarray]:
    """The likelihood problem in internal units (the data over the floor estimate;
    the window-exact model attached for a Welch spectrum) and its starting point
    ``theta0`` from the candidate lines' ``(f0, gamma, area)``."""
    df, nyquist = spec.df, spec.nyquist
    prob = _Problem(
        om=_TWO_PI * f,
        p=p / floor,
        k=spec.k,
        df=df,
        f_ref=np.array([g[0] for g in guesses]),
        scale_a=df,
        r=spec.r,
    )
    if spec.window is not None:
        prob = dataclasses.replace(
            prob,
            lag_window=_lag_window(spec.window),
            sample_rate=2.0 * nyquist,
            bins=_as_slice(np.flatnonzero(mask)),
            lag_times=np.arange(spec.window.size) / (2.0 * nyquist),
        )
    theta0 = np.empty(3 * len(guesses) + 1)
    for j, (_, gamma0, area0) in enumerate(guesses):
        theta0[3 * j : 3 * j + 3] = (0.0, math.log(gamma0), math.log(area0 / floor / df))
    theta0[-1] = 0.0
    return prob, theta0


def _fit_then_polish(prob: _Problem, theta0: np.ndarray, floor: float) -> _Fitted:
    """Fisher scoring with the plain model (cheap); for a Welch spectrum, a few more
    iterations with the window-exact model where the plain model would be biased: a
    line narrower than ``_POLISH_BELOW_BINS`` bins, or a predicted bias
    (:func:`_plain_model_bias`) above ``_POLISH_ABOVE_BIAS`` standard errors."""
    df = prob.df
    stages = [dataclasses.replace(prob, lag_window=None)] if prob.lag_window is not None else []
    stages.append(prob)
    theta_start = theta0
    res = None
    prob_used = stages[0]
    for i_stage, stage in enumerate(stages):
        if i_stage > 0 and res is not None and res.success:
            widths = np.exp(res.x[1:-1:3]) / _TWO_PI
            if np.all(widths >= _POLISH_BELOW_BINS * df):
                if not math.isfinite(_POLISH_ABOVE_BIAS):
                    break
                if _plain_model_bias(prob_used, stage, res.x) <= _POLISH_ABOVE_BIAS:
                    # The plain model's bias is a small fraction of every line
                    # parameter's error; the exact model (an FFT of the segment
                    # length per parameter row and evaluation) would only cost time.
                    break
        fun, jac, hess = _objective(stage)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            res = _fisher_scoring(fun, jac, hess, theta_start)
        theta_start = res.x
        prob_used = stage
    f0, gamma, area_n, b_n = prob_used.unpack(res.x)
    return _Fitted(prob=prob_used, res=res, jac=jac, hess=hess, f0=f0, gamma=gamma,
                   area=area_n * floor, background=b_n * floor)


def _plain_model_bias(plain: _Problem, windowed: _Problem, theta: np.ndarray) -> float:
    """Predicted bias of the plain model at its optimum ``theta``, in standard errors:
    the largest over the lines' ``(f0, gamma, area)`` (inf where it cannot be computed).

    The expected Welch bin is the sampled process's spectrum (the images
    ``S(|f + m fs|)``, ``m = +-1``: aliasing, which matters near Nyquist and for the far
    tails of broad lines fitted over a wide band) seen through the window's spectral
    kernel ``|W|**2``, whose second moment ``sigma_w**2 = fs**2 (1 - c(1)) / (2 pi**2)``
    (``c`` the window's normalised autocorrelation; ``df**2 / 3`` for Hann) broadens
    each line by ``(sigma_w**2 / 2) S''(f)`` to leading order (leakage: it matters when
    the window's resolution is not small against the linewidth, weighed by the number
    of averages). With ``delta`` that excess over the plain model at the plain optimum,
    the plain fit misses the exact one by ``b = F**-1 J^T diag(1/S**2) delta`` (one
    Gauss-Newton step of the Gamma likelihood; ``F`` the Fisher information without
    K, ``J`` the model's Jacobian), against standard errors ``sqrt(diag(F**-1) r / K)``.
    Cost: the plain model on the bins and a few more evaluations of the line shape, no
    FFT (about 0.5 ms for 8000 bins). Checked against the polished fit in
    tests/test_fit.py.
    """
    f0, gamma, area, _ = plain.unpack(theta)
    fs = windowed.sample_rate
    om = plain.om
    x = om * om
    # leakage: (sigma_w**2 / 2) d2S/df2 = (sigma_w**2 / 2) (2 pi)**2 d2S/dOmega2
    half_var = 0.5 * _TWO_PI**2 * fs**2 * max(0.0, 1.0 - float(windowed.lag_window[1])) / (
        2.0 * math.pi**2
    )
    images = [(_TWO_PI * fs - om) ** 2, (_TWO_PI * fs + om) ** 2]
    delta = np.zeros_like(om)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        for j in range(f0.size):
            w2 = (_TWO_PI * f0[j]) ** 2
            g2 = gamma[j] ** 2
            num = 4.0 * gamma[j] * w2 * area[j]
            # S = num / D, D = (w2 - x)**2 + g2 x; with x = Omega**2,
            # d2S/dOmega2 = 2 dS/dx + 4 x d2S/dx2, dS/dx = -S D'/D, d2S/dx2 = S (2 D'**2 - 2 D) / D**2
            d = (w2 - x) ** 2 + g2 * x
            d1 = g2 - 2.0 * (w2 - x)
            s = num / d
            delta += (half_var * 2.0) * (s / d) * (4.0 * x * (d1 * d1 - d) / d - d1)
            for xi in images:
                delta += num / ((w2 - xi) ** 2 + g2 * xi)
        s, jac = plain.model_and_jacobian(theta)
        if not (np.all(s > 0) and np.all(np.isfinite(s)) and np.all(np.isfinite(delta))):
            return math.inf
        js = jac / s
        fisher = np.einsum("ik,jk->ij", js, js)
        score = np.einsum("ij,j->i", js, delta / s)
        try:
            cov = np.linalg.inv(fisher)
        except np.linalg.LinAlgError:
            return math.inf
    shift = cov @ score
    sigma = np.sqrt(np.abs(np.diag(cov)) * (plain.r / plain.k))
    ratio = np.abs(shift[:-1]) / sigma[:-1]
    return float(np.max(ratio)) if np.all(np.isfinite(ratio)) else math.inf


def _check_resolved(
    fitted: _Fitted, spec: _Spectrum, f: np.ndarray, p: np.ndarray,
    min_linewidth_bins: float, min_significance: float,
) -> None:
    """Refuse a line narrower than ``min_linewidth_bins`` bins: a noise spike the fit
    collapsed onto (too little excess power in the five bins around it) or a real line
    that needs a finer resolution. Checked before convergence, since a line of one or
    two bins drives the width towards zero."""
    df, k, r = spec.df, spec.k, spec.r
    f0, gamma, background = fitted.f0, fitted.gamma, fitted.background
    for j in range(fitted.n_peaks):
        if gamma[j] / _TWO_PI < min_linewidth_bins * df:
            i = int(np.argmin(np.abs(f - f0[j])))
            near = slice(max(0, i - 2), i + 3)
            n_near = p[near].size
            excess = float(np.sum(p[near]) - n_near * background)
            noise = float(background) * math.sqrt(n_near * r / k)
            if excess < min_significance * noise:
                raise UnresolvedPeakError(
                    f"peak near f0={f0[j]:.6g} Hz is not significant over the floor "
                    f"(excess {excess / noise:.2g} standard deviations of the floor "
                    f"{background:.3g} units**2/Hz, below {min_significance:g}); use a longer "
                    "record (more averages)"
                )
            raise UnresolvedPeakError(
                f"peak near f0={f0[j]:.6g} Hz has linewidth gamma/2pi={gamma[j] / _TWO_PI:.3g} "
                f"Hz, below {min_linewidth_bins:g} bins ({min_linewidth_bins * df:.3g} Hz at "
                f"{df:.3g} Hz per bin); " + _longer_hint(spec, gamma[j] / _TWO_PI)
            )


def _check_converged(fitted: _Fitted, f: np.ndarray) -> None:
    """Converged when the Newton step would lower the negative log-likelihood by far
    less than one unit, whatever the optimiser's own verdict."""
    theta, res = fitted.theta, fitted.res
    grad = fitted.jac(theta)
    with np.errstate(all="ignore"):
        try:
            decrement = float(grad @ np.linalg.solve(fitted.hess(theta), grad))
        except np.linalg.LinAlgError:
            decrement = math.inf
    if not (res.success or decrement < 1e-6) or not np.all(np.isfinite(theta)):
        raise FitError(
            f"the likelihood fit of {fitted.n_peaks} peak(s) in {f[0]:.6g}..{f[-1]:.6g} Hz did "
            f"not converge ({res.message}); give initial peak frequencies or narrow the band"
        )


def _check_inside_band(fitted: _Fitted, f: np.ndarray) -> None:
    """Refuse a line wider than the band or centred outside it (the band then holds
    only a flank, and the fit is an extrapolation)."""
    span = f[-1] - f[0]
    f0, gamma = fitted.f0, fitted.gamma
    for j in range(fitted.n_peaks):
        if gamma[j] / _TWO_PI > span or not f[0] <= f0[j] <= f[-1]:
            raise FitError(
                f"fitted peak {j} (f0={f0[j]:.6g} Hz, gamma/2pi={gamma[j] / _TWO_PI:.3g} Hz) "
                f"is not inside the band {f[0]:.6g}..{f[-1]:.6g} Hz; widen the band or give "
                "initial peak frequencies"
            )


def _covariance(fitted: _Fitted, f: np.ndarray, r: float) -> np.ndarray:
    """Covariance of the linear parameters ``(f0, gamma, area)`` per peak and the
    floor: the inverse Fisher information, widened by the bin correlation ``r`` and
    carried to linear parameters by the derivatives of the parametrisation."""
    theta = fitted.theta
    fisher = fitted.hess(theta)
    try:
        cov_t = np.linalg.inv(fisher) * r
    except np.linalg.LinAlgError:
        raise FitError(
            f"the Fisher information of the fit in {f[0]:.6g}..{f[-1]:.6g} Hz is singular; "
            "peaks overlap too much to separate: fit fewer peaks"
        ) from None
    if not np.all(np.isfinite(cov_t)) or np.any(np.diag(cov_t) <= 0):
        raise FitError("the covariance of the fit is not positive definite; fit fewer peaks")
    # d(linear)/d(theta): f0 = f_ref + u df, gamma = e^lng, area = e^lna * df * floor, b = e^lnb * floor
    scale = np.empty(theta.size)
    scale[0:-1:3] = fitted.prob.df
    scale[1:-1:3] = fitted.gamma
    scale[2:-1:3] = fitted.area
    scale[-1] = fitted.background
    return cov_t * np.outer(scale, scale)


def _overlap_variance_factor(spec: _Spectrum) -> float:
    """Ratio of the variance of a smooth functional of a Welch spectrum to the
    ``r / K`` the covariance was widened by.

    For a locally white process, bins ``k`` and ``k + m`` of segments ``d`` samples
    apart have the correlation ``|C(d, m)|**2``, ``C(d, m) = sum_n w[n] w[n + d]
    exp(-2 pi i m n / N) / sum w**2``. A parameter that varies slowly over a few bins
    sees the bins' variance multiplied by ``V = sum_m |C(0, m)|**2 + 2 sum_j (1 - j/M)
    sum_m |C(j s, m)|**2`` (per average, M segments with step s); by Parseval ``sum_m
    |C(d, m)|**2 = N sum_n (w[n] w[n + d])**2 / (sum w**2)**2``. ``r / K`` (the
    bin correlation within one segment times Welch's same-bin overlap formula, IEEE
    Trans. Audio Electroacoust. 15, 70 (1967)) leaves out the neighbouring bins of
    overlapping segments: 2.111 against 2.052 for Hann at 50 % overlap (about 1.4 %
    in the standard errors). Derived here from the variance of averaged periodograms
    in that paper, with Parseval; checked by simulation in tests/test_fit_coverage.py.
    """
    if spec.window is None or spec.n_segments < 2 or spec.step <= 0:
        return 1.0
    w = np.asarray(spec.window, dtype=np.float64)
    n = w.size
    w2 = float(_dot(w, w))
    total = n * float(_dot(w * w, w * w)) / w2**2
    j = 1
    while j < spec.n_segments and j * spec.step < n:
        d = j * spec.step
        prod = w[: n - d] * w[d:]
        total += 2.0 * (1.0 - j / spec.n_segments) * n * float(_dot(prod, prod)) / w2**2
        j += 1
    return total / spec.n_segments * spec.k / spec.r


def _peak_fits(fitted: _Fitted, cov: np.ndarray, min_significance: float) -> list[PeakFit]:
    """One :class:`PeakFit` per line (in the fit's order); a line whose area is below
    ``min_significance`` standard errors is refused."""
    err = np.sqrt(np.diag(cov))
    f0, gamma, area, background = fitted.f0, fitted.gamma, fitted.area, fitted.background
    fits = []
    for j in range(fitted.n_peaks):
        if area[j] < min_significance * err[3 * j + 2]:
            raise UnresolvedPeakError(
                f"peak near f0={f0[j]:.6g} Hz is not significant over the floor: "
                f"area={area[j]:.3g} +- {err[3 * j + 2]:.3g} units**2, below "
                f"{min_significance:g} standard errors; use a longer record (more averages)"
            )
        fits.append(
            PeakFit(
                f0=float(f0[j]),
                f0_stderr=float(err[3 * j]),
                gamma=float(gamma[j]),
                gamma_stderr=float(err[3 * j + 1]),
                area=float(area[j]),
                area_stderr=float(err[3 * j + 2]),
                background=float(background),
                background_stderr=float(err[-1]),
            )
        )
    return fits


def _goodness(deviance: float, n_bins: int, n_params: int, k: float, r: float) -> GoodnessOfFit:
    """Reduced deviance and its p-value: the mean deviance of one Gamma(K) bin is
    ``m_K = 2 K (ln K - digamma(K))``; correlated bins make the deviance a chi-square
    of ``dof / r`` degrees of freedom scaled by ``r`` with the same mean
    (Satterthwaite)."""
    dof = int(n_bins - n_params)
    mean_dev = 2.0 * k * (math.log(k) - float(scipy.special.digamma(k)))
    c = mean_dev * r
    p_value = float(scipy.special.chdtrc(dof / r, deviance / c))  # chi-square survival
    return GoodnessOfFit(deviance=deviance, dof=dof, reduced=deviance / (dof * mean_dev), p_value=p_value)


def _spectrum_fit(
    fitted: _Fitted, peak_fits: list[PeakFit], cov: np.ndarray, f: np.ndarray, spec: _Spectrum
) -> SpectrumFit:
    """The result, peaks in order of increasing ``f0`` (the covariance permuted alike)."""
    theta = fitted.theta
    n_peaks = fitted.n_peaks
    err_background = float(np.sqrt(cov[-1, -1]))
    names = []
    for j in range(n_peaks):
        names += [f"f0_{j}", f"gamma_{j}", f"area_{j}"]
    names.append("background")
    order = np.argsort(fitted.f0, kind="stable")
    perm = np.concatenate([np.arange(3 * j, 3 * j + 3) for j in order] + [[theta.size - 1]])
    return SpectrumFit(
        peaks=tuple(peak_fits[j] for j in order),
        background=float(fitted.background),
        background_stderr=err_background,
        goodness=_goodness(2.0 * float(fitted.res.fun), f.size, theta.size, spec.k, spec.r),
        n_bins=int(f.size),
        band=(float(f[0]), float(f[-1])),
        covariance=cov[np.ix_(perm, perm)],
        parameter_names=tuple(names),
        effective_averages=spec.k,
        bin_correlation=spec.r,
        n_iterations=int(fitted.res.nit),
        window_exact=fitted.prob.lag_window is not None,
    )


def fit_channels(
    psd: PSDResult,
    *,
    peaks: int | Sequence[float] | None = None,
    band: tuple[float, float] | None = None,
    workers: int | None = None,
    **options,
) -> tuple[SpectrumFit, ...]:
    """Fit every channel of a Welch PSD with :func:`fit_psd`, channels in parallel.

    Parameters
    ----------
    psd : PSDResult
        1-D or 2-D result of :func:`welch_psd` (PSD in ``units**2/Hz``).
    peaks, band, **options
        As for :func:`fit_psd`, the same for every channel.
    workers : int, optional
        Threads fitting channels at the same time; default: all cores.

    Returns
    -------
    tuple of SpectrumFit
        One fit per channel, in channel order.

    Raises
    ------
    InputError, UnresolvedPeakError, FitError
        As :func:`fit_psd`, for the first failing channel; the message starts
        with ``channel <i>:``.
    """
    n = psd.n_channels
    workers = min(n, workers or os.cpu_count() or 1)

    def one(i: int) -> SpectrumFit:
        try:
            return fit_psd(psd.channel(i), peaks=peaks, band=band, **options)
        except QuietwellError as exc:
            raise type(exc)(f"channel {i}: {exc}") from None

    if workers <= 1:
        return tuple(one(i) for i in range(n))
    _compile_kernels()  # in this thread, before the channels go to threads
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return tuple(pool.map(one, range(n)))
