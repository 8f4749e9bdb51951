"""Welch power spectral density, accumulated block by block.

The record is never copied whole: a strided view of the record is cut into
blocks of a few dozen segments, each block is transformed with
:func:`scipy.fft.rfft` (single precision for ``float32`` input) and its squared
magnitude is added to a running sum.  Peak extra memory is therefore a few
blocks, independent of the record length.

For a window whose spectrum has only a few non-zero bins (the cosine-sum
windows: Hann, Hamming, Blackman, boxcar) the raw segments are transformed and
the window is applied afterwards as a short convolution along frequency,
``Y[k] = sum_j c_j X[k - j]`` with ``c_j = rfft(w)[|j|] / N``, fused with the
squared magnitude and the accumulation in one pass (compiled with numba where
it is installed).  Removing the segment mean is then exact and free: it is
``X[0] = 0`` before the convolution.  Other windows, and linear detrending,
are applied to the samples before the transform.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import as_strided
from numpy.typing import ArrayLike

from quietwell._errors import InputError
from quietwell.analysis._compile_once import compile_once

__all__ = ["PSDResult", "welch_psd", "welch_effective_averages", "bin_correlation_factor"]

try:  # numba compiles the fused window-convolution / power kernel; numpy is the fallback
    import numba as _numba
except Exception:  # pragma: no cover - numba missing or broken
    _numba = None

#: Target size of one block of windowed segments in bytes.  Small enough to
#: stay in the processor cache between the detrend, window, FFT and
#: accumulation passes; large enough that the per-call overhead is negligible.
_BLOCK_BYTES = 1 << 21

_DETRENDS = ("constant", "linear", "none")


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Dot product without BLAS.

    OpenBLAS runs long dot products in threads that keep spinning after the
    call and then compete with the threads that compute the spectra.
    """
    return float(np.sum(np.multiply(a, b, dtype=np.float64)))


@dataclass(frozen=True)
class PSDResult:
    """A one-sided Welch power spectral density and how it was made.

    Attributes
    ----------
    frequency : numpy.ndarray
        Bin frequencies in Hz, shape ``(nperseg // 2 + 1,)``.
    psd : numpy.ndarray
        One-sided PSD per Hz in ``units**2/Hz`` (units of the record), shape
        ``(n_freq,)`` for a 1-D record or ``(n_channels, n_freq)``.
        ``sum(psd) * resolution_hz`` is the variance of the (detrended) record.
    sample_rate : float
        Sample rate in Hz.
    n_segments : int
        Number of averaged segments K.
    nperseg : int
        Samples per segment.
    noverlap : int
        Samples shared by consecutive segments.
    window : str
        Name (or description) of the window.
    detrend : str
        ``"constant"``, ``"linear"`` or ``"none"``.
    resolution_hz : float
        Bin spacing ``sample_rate / nperseg`` in Hz.
    enbw_hz : float
        Equivalent noise bandwidth of the window in Hz,
        ``sample_rate * sum(w**2) / sum(w)**2``.
    effective_averages : float
        Equivalent number of independent averages of each bin,
        half the equivalent degrees of freedom (Welch's overlap formula, see
        :func:`welch_effective_averages`).  Equals ``n_segments`` without overlap.
    bin_correlation : float
        Variance inflation from the correlation of neighbouring bins caused by
        the window, ``nperseg * sum(w**4) / sum(w**2)**2`` (1 for a boxcar,
        35/18 for Hann); see :func:`bin_correlation_factor`.
    window_values : numpy.ndarray
        The window itself, length ``nperseg`` (dimensionless); the fit uses it to
        model leakage exactly.
    """

    frequency: np.ndarray
    psd: np.ndarray
    sample_rate: float
    n_segments: int
    nperseg: int
    noverlap: int
    window: str
    detrend: str
    resolution_hz: float
    enbw_hz: float
    effective_averages: float
    bin_correlation: float
    window_values: np.ndarray = field(repr=False)

    @property
    def n_samples(self) -> int:
        """Samples of the record used by the segments (per channel)."""
        return (self.n_segments - 1) * (self.nperseg - self.noverlap) + self.nperseg

    @property
    def n_channels(self) -> int:
        """Number of channels (1 for a 1-D record)."""
        return 1 if self.psd.ndim == 1 else self.psd.shape[0]

    def channel(self, index: int) -> PSDResult:
        """The 1-D result of one channel ``index`` of a 2-D result."""
        if self.psd.ndim == 1:
            if index != 0:
                raise InputError(f"channel {index=} does not exist: the PSD has one channel (0)")
            return self
        if not -self.psd.shape[0] <= index < self.psd.shape[0]:
            raise InputError(f"channel {index=} does not exist: allowed 0..{self.psd.shape[0] - 1}")
        return PSDResult(**{**self.__dict__, "psd": self.psd[index]})


def welch_effective_averages(window: np.ndarray, n_segments: int, step: int) -> float:
    """Equivalent number of independent averages of overlapping Welch segments.

    Parameters
    ----------
    window : numpy.ndarray
        Window values, length ``nperseg`` (dimensionless).
    n_segments : int
        Number of averaged segments K.
    step : int
        Samples between segment starts, ``nperseg - noverlap``.

    Returns
    -------
    float
        ``K / (1 + 2 sum_j (1 - j/K) rho_j)`` with the overlap correlation
        ``rho_j = (sum_n w[n] w[n + j*step])**2 / (sum_n w[n]**2)**2``; half the
        equivalent degrees of freedom of a bin of a locally flat spectrum.
        For Hann at 50 % overlap this is ``18 K**2 / (19 K - 1)``, about 0.95 K.

    References
    ----------
    IEEE Trans. Audio Electroacoust. 15, 70 (1967), eqs. for the variance of
    the averaged modified periodogram with overlapping segments.
    """
    w = np.asarray(window, dtype=np.float64)
    n = w.size
    norm = float(_dot(w, w))
    total = 0.0
    j = 1
    while j < n_segments and j * step < n:
        shift = j * step
        rho = (float(_dot(w[: n - shift], w[shift:])) / norm) ** 2
        total += (1.0 - j / n_segments) * rho
        j += 1
    return n_segments / (1.0 + 2.0 * total)


def bin_correlation_factor(window: np.ndarray) -> float:
    """Variance inflation of smooth-parameter estimates from correlated bins.

    For a locally white process the periodogram bins ``k`` and ``k + m`` of a
    windowed segment have correlation ``|c_m|**2`` with
    ``c_m = sum_n w[n]**2 exp(-2 pi i m n / N) / sum_n w[n]**2``; by Parseval
    ``sum_m |c_m|**2 = N sum w**4 / (sum w**2)**2``.  A fit whose model varies
    slowly over a few bins sees its parameter variance multiplied by this factor
    relative to independent bins.

    Parameters
    ----------
    window : numpy.ndarray
        Window values, length ``nperseg`` (dimensionless).

    Returns
    -------
    float
        ``N sum(w**4) / sum(w**2)**2`` (dimensionless, >= 1; 35/18 for Hann).
    """
    w2 = np.asarray(window, dtype=np.float64) ** 2
    return float(w2.size * _dot(w2, w2) / np.sum(w2) ** 2)


def _window_array(window: str | tuple | ArrayLike, nperseg: int) -> tuple[np.ndarray, str]:
    if isinstance(window, str) and window in ("hann", "hanning"):
        # scipy.signal.get_window("hann", N) (periodic), the same operations, without
        # importing scipy.signal (and scipy.stats with it) on the analysis path
        fac = np.linspace(-np.pi, np.pi, nperseg + 1)[:-1]
        w = np.zeros(nperseg)
        for k, a in enumerate((0.5, 0.5)):
            w += a * np.cos(k * fac)
        return w, window
    if isinstance(window, (str, tuple)):
        import scipy.signal

        try:
            w = scipy.signal.get_window(window, nperseg, fftbins=True)
        except (ValueError, TypeError) as exc:
            raise InputError(
                f"{window=} is not a window scipy.signal.get_window knows ({exc}); "
                "use e.g. 'hann', 'hamming', 'boxcar' or ('kaiser', 8.0)"
            ) from None
        return np.asarray(w, dtype=np.float64), str(window)
    w = np.asarray(window, dtype=np.float64)
    if w.shape != (nperseg,):
        raise InputError(f"window array has shape {w.shape}; it must have shape ({nperseg=},)")
    if not np.all(np.isfinite(w)) or not np.any(w):
        raise InputError("window array must be finite and not all zero")
    return w, "custom array"


def _raise_non_finite(row: np.ndarray, channel: int | None, dtype: np.dtype):
    """Name the first non-finite sample of ``row`` (scanned in chunks, no big temporaries)."""
    where = f"channel {channel}, " if channel is not None else ""
    chunk = 1 << 20
    for start in range(0, row.size, chunk):
        bad = np.flatnonzero(~np.isfinite(row[start : start + chunk]))
        if bad.size:
            i = start + int(bad[0])
            raise InputError(
                f"record has a non-finite sample ({row[i]!r} at {where}index {i}); "
                "all samples must be finite: remove or interpolate them"
            )
    big = float(np.max(np.abs(row)))
    raise InputError(
        f"record {where}has samples too large for {dtype} spectra (max |x| = {big:.3g}); "
        "convert the record to float64 or rescale it"
    )


#: A window whose spectrum has at most this many non-negligible bins (and no
#: imaginary part: a periodic, symmetric window) is applied along frequency.
_MAX_WINDOW_BINS = 16
#: ... as long as the segment means are at most this many times the rms of
#: the detrended samples; larger offsets lose float32 precision in the FFT of
#: the raw segment, and such a block is redone with the mean removed first.
_MAX_OFFSET_RATIO = 10.0


def _window_taps(w64: np.ndarray) -> np.ndarray | None:
    """``c_j = rfft(w)[j] / N`` for ``j = 0..h`` if the window's spectrum is real and
    has only these bins (``h < _MAX_WINDOW_BINS``), else None."""
    n = w64.size
    spec = np.fft.rfft(w64)
    scale = abs(spec[0])
    if scale == 0.0 or np.max(np.abs(spec.imag)) > 1e-9 * scale:
        return None
    big = np.flatnonzero(np.abs(spec.real) > 1e-9 * scale)
    h = int(big[-1])
    if h >= _MAX_WINDOW_BINS or n < 2 * h + 2:
        return None
    return np.ascontiguousarray(spec.real[: h + 1] / n)


def _taps_power_loop(spec, taps, n, acc):  # pragma: no cover - compiled by numba
    """``acc[k] += sum_rows |sum_j c_|j| X[k - j]|**2`` over the one-sided bins.

    ``X[-m] = conj(X[m])`` and ``X[m] = conj(X[n - m])`` beyond the last bin, so the
    convolution is the exact spectrum of the windowed segment.
    """
    rows, m = spec.shape
    h = taps.size - 1
    if h == 1:  # Hann, Hamming: the common case; the interior loop vectorises
        c0 = taps[0]
        c1 = taps[1]
        for i in range(rows):
            x0 = spec[i, 0]
            x1 = spec[i, 1]
            yr = c0 * x0.real + 2.0 * c1 * x1.real  # X[-1] = conj(X[1])
            yi = c0 * x0.imag
            acc[0] += yr * yr + yi * yi
            for k in range(1, m - 1):
                a = spec[i, k - 1]
                c = spec[i, k]
                d = spec[i, k + 1]
                yr = c0 * c.real + c1 * (a.real + d.real)
                yi = c0 * c.imag + c1 * (a.imag + d.imag)
                acc[k] += yr * yr + yi * yi
            a = spec[i, m - 2]
            c = spec[i, m - 1]
            d = spec[i, n - m]  # X[m] = conj(X[n - m])
            yr = c0 * c.real + c1 * (a.real + d.real)
            yi = c0 * c.imag + c1 * (a.imag - d.imag)
            acc[m - 1] += yr * yr + yi * yi
        return
    for i in range(rows):
        for k in range(m):
            yr = 0.0
            yi = 0.0
            if k >= h and k + h < m:
                for j in range(-h, h + 1):
                    c = taps[abs(j)]
                    v = spec[i, k - j]
                    yr += c * v.real
                    yi += c * v.imag
            else:
                for j in range(-h, h + 1):
                    c = taps[abs(j)]
                    idx = k - j
                    if idx < 0:
                        v = spec[i, -idx]
                        yr += c * v.real
                        yi -= c * v.imag
                    elif idx >= m:
                        v = spec[i, n - idx]
                        yr += c * v.real
                        yi -= c * v.imag
                    else:
                        v = spec[i, idx]
                        yr += c * v.real
                        yi += c * v.imag
            acc[k] += yr * yr + yi * yi


def _taps_power_numpy(spec: np.ndarray, taps: np.ndarray, n: int, acc: np.ndarray) -> None:
    """The same as :func:`_taps_power_loop` with whole-array numpy operations."""
    m = spec.shape[1]
    h = taps.size - 1
    y = taps[0] * spec.astype(np.complex128)
    if h:
        left = np.conj(spec[:, h:0:-1])
        right = np.conj(spec[:, n - (m + np.arange(h))])
        ext = np.concatenate([left, spec, right], axis=1)
        for j in range(1, h + 1):
            y += taps[j] * (ext[:, h - j : h - j + m] + ext[:, h + j : h + j + m])
    acc += np.einsum("ij,ij->j", y.real, y.real) + np.einsum("ij,ij->j", y.imag, y.imag)


if _numba is not None:
    # FMA contraction only: no flag that lets the compiler assume finite values, so
    # a NaN or inf sample still reaches the sum and is reported.
    _taps_power = _numba.njit(nogil=True, cache=True, fastmath={"contract"})(_taps_power_loop)
else:  # pragma: no cover - numba missing
    _taps_power = _taps_power_numpy


def _taps_power_first_call(dtype: np.dtype) -> None:
    """Call :func:`_taps_power` once with the argument types of the ``dtype`` records.

    ``spec`` is an rfft output (C-contiguous, writeable, complex of ``dtype``), the
    taps and the accumulator float64, ``n`` a Python int, as in
    :func:`_accumulate_range`; see :mod:`quietwell.analysis._compile_once`.
    """
    spec = scipy.fft.rfft(np.zeros((1, 4), dtype=dtype), axis=1, workers=1)
    _taps_power(spec, np.zeros(2), 4, np.zeros(3))


def _power_sum(b: np.ndarray) -> np.ndarray:
    """Per-bin sums over rows of |rfft(rows)|**2, in double precision.

    One read pass of the transform and no temporary of its size; einsum sums
    over rows without BLAS.
    """
    spec = scipy.fft.rfft(b, axis=1, workers=1)
    re_im = spec.view(spec.real.dtype)
    col = np.einsum("ij,ij->j", re_im, re_im, dtype=np.float64)
    return col[0::2] + col[1::2]


def _samples_block(
    view: np.ndarray, b: np.ndarray, w: np.ndarray, detrend: str, trend: tuple | None
) -> np.ndarray:
    """Power of one block, detrended and windowed in the time domain (into ``b``)."""
    if detrend == "none":
        np.multiply(view, w, out=b)
        return _power_sum(b)
    # Mean in double precision and subtracted in double (cast on output), so a
    # large offset costs no float32 precision.
    mean64 = view.sum(axis=1, dtype=np.float64) / view.shape[1]
    np.subtract(view, mean64[:, np.newaxis], out=b, casting="unsafe")
    if detrend == "linear":
        t, t_norm = trend
        slope = np.einsum("ij,j->i", b, t_norm)  # not BLAS: no spinning threads
        b -= slope[:, np.newaxis] * t
    b *= w
    return _power_sum(b)


def _accumulate_range(
    segs: np.ndarray,
    begin: int,
    end: int,
    w: np.ndarray,
    block: int,
    detrend: str,
    taps: np.ndarray | None,
) -> np.ndarray:
    """Sum over segments ``begin..end`` of |rfft(window * detrended segment)|**2.

    Runs in one thread (FFT ``workers=1``); ranges run in parallel.  With
    ``taps`` (a window of few spectral bins) and ``detrend`` "constant" or
    "none", the raw segments are transformed and windowed along frequency; a
    block whose means are large against its fluctuations is redone in the
    time domain with the mean removed first, as float32 rounding would show.
    """
    dtype = segs.dtype
    nperseg = segs.shape[1]
    n_freq = nperseg // 2 + 1
    freq_path = taps is not None and detrend in ("constant", "none")
    # The time-domain buffer is made only when a block needs it.
    buf = None if freq_path else np.empty((block, nperseg), dtype=dtype)
    trend = None
    if detrend == "linear":
        t64 = np.arange(nperseg, dtype=np.float64) - (nperseg - 1) / 2.0
        trend = (t64.astype(dtype), (t64 / _dot(t64, t64)).astype(dtype))
    acc = np.zeros(n_freq, dtype=np.float64)
    if freq_path:
        w_norm = float(_dot(w.astype(np.float64), w.astype(np.float64)))
        part = np.empty(n_freq, dtype=np.float64)
    for s0 in range(begin, end, block):
        view = segs[s0 : min(s0 + block, end)]
        if not freq_path:
            acc += _samples_block(view, buf[: view.shape[0]], w, detrend, trend)
            continue
        spec = scipy.fft.rfft(view, axis=1, workers=1)
        if detrend == "constant":
            offset = float(np.max(np.abs(spec[:, 0].real))) / nperseg
            spec[:, 0] = 0.0
        part[:] = 0.0
        _taps_power(spec, taps, nperseg, part)
        del spec  # freed before the next block's transform is allocated
        if detrend == "constant":
            # mean square of the windowed, detrended samples of the block (Parseval)
            total = 2.0 * float(part.sum()) - float(part[0]) - float(part[-1])
            mean_square = total / (nperseg * w_norm * view.shape[0])
            if not offset**2 <= _MAX_OFFSET_RATIO**2 * mean_square:
                if buf is None:
                    buf = np.empty((block, nperseg), dtype=dtype)
                acc += _samples_block(view, buf[: view.shape[0]], w, detrend, trend)
                continue
        acc += part
    return acc


def _accumulate(
    rows: np.ndarray, w64: np.ndarray, n_segments: int, step: int, detrend: str, workers: int
) -> np.ndarray:
    """Sum of the segment periodograms of each row, shape ``(n_rows, nperseg//2 + 1)``.

    The segments of every row are split into ranges that ``workers`` threads
    process at the same time (numpy and pocketfft release the GIL).
    """
    nperseg = w64.size
    dtype = rows.dtype
    w = w64.astype(dtype)
    taps = _window_taps(w64) if detrend in ("constant", "none") else None
    if taps is not None and _numba is not None:
        # Compiled here, in the calling thread, before any range runs in a thread.
        compile_once(("taps_power", dtype), lambda: _taps_power_first_call(dtype))
    block = max(1, min(n_segments, _BLOCK_BYTES // (nperseg * dtype.itemsize)))
    per_row = max(1, min(workers, n_segments // (2 * block)))
    edges = np.linspace(0, n_segments, per_row + 1).astype(int)
    tasks = []
    for ch, row in enumerate(rows):
        segs = as_strided(
            row,
            shape=(n_segments, nperseg),
            strides=(step * row.strides[0], row.strides[0]),
            writeable=False,
        )
        tasks += [(ch, segs, lo, hi) for lo, hi in zip(edges[:-1], edges[1:], strict=True)]
    out = np.zeros((rows.shape[0], nperseg // 2 + 1), dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        if workers == 1 or len(tasks) == 1:
            for ch, segs, lo, hi in tasks:
                out[ch] += _accumulate_range(segs, lo, hi, w, block, detrend, taps)
            return out
        with ThreadPoolExecutor(max_workers=min(workers, len(tasks))) as pool:
            futures = [
                (ch, pool.submit(_accumulate_range, segs, lo, hi, w, block, detrend, taps))
                for ch, segs, lo, hi in tasks
            ]
            for ch, fut in futures:
                out[ch] += fut.result()
    return out


def welch_psd(
    x: ArrayLike,
    sample_rate: float,
    *,
    nperseg: int,
    noverlap: int,
    window: str | tuple | ArrayLike = "hann",
    detrend: str | bool = "constant",
    workers: int | None = None,
) -> PSDResult:
    """One-sided Welch PSD per Hz of a 1-D record or of each row of a 2-D record.

    Equal to ``scipy.signal.welch(x, sample_rate, window, nperseg, noverlap,
    detrend=detrend, scaling="density", average="mean")`` but accumulated
    segment block by segment block, so that no array of the record's size is
    created.  ``float32`` input is transformed in single precision and summed
    in double precision.

    Parameters
    ----------
    x : array_like
        Record in units of the signal (e.g. V), shape ``(n,)`` or
        ``(n_channels, n)``; ``float32`` or ``float64``; all samples finite.
    sample_rate : float
        Sample rate in Hz, > 0.
    nperseg : int
        Samples per segment, ``2 <= nperseg <= n``.
    noverlap : int
        Samples shared by consecutive segments, ``0 <= noverlap < nperseg``.
    window : str, tuple or array_like, optional
        A window name understood by :func:`scipy.signal.get_window` (periodic
        form, as ``scipy.signal.welch`` uses) or an array of length ``nperseg``.
    detrend : {"constant", "linear", "none", False}, optional
        Per-segment detrending before windowing.
    workers : int, optional
        Threads that process ranges of segments in parallel (each runs its own
        detrend, window, FFT and accumulation); default: all cores.

    Returns
    -------
    PSDResult
        Frequencies in Hz and PSD in ``units**2/Hz``, with the number of
        segments and the equivalent number of independent averages.

    Raises
    ------
    InputError
        Wrong ndim, non-finite samples, ``sample_rate <= 0``, ``nperseg`` or
        ``noverlap`` out of range.

    References
    ----------
    IEEE Trans. Audio Electroacoust. 15, 70 (1967).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1)
    >>> x = rng.normal(scale=2.0, size=2**16)      # white, variance 4 V**2
    >>> r = welch_psd(x, 1e3, nperseg=1024, noverlap=512)
    >>> bool(abs(r.psd.sum() * r.resolution_hz / 4.0 - 1) < 0.02)
    True
    """
    arr = np.asarray(x)
    if arr.ndim not in (1, 2):
        raise InputError(
            f"record has ndim={arr.ndim} (shape {arr.shape}); allowed: 1-D (samples,) "
            "or 2-D (channels, samples)"
        )
    if arr.dtype not in (np.float32, np.float64):
        if not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
            raise InputError(f"record has dtype {arr.dtype}; allowed: real float or integer")
        arr = arr.astype(np.float64)
    try:
        sample_rate = float(sample_rate)
    except (TypeError, ValueError):
        raise InputError(f"{sample_rate=} is not a number; give the sample rate in Hz") from None
    if not (math.isfinite(sample_rate) and sample_rate > 0):
        raise InputError(f"{sample_rate=} Hz must be finite and > 0")
    n = arr.shape[-1]
    if isinstance(nperseg, bool) or int(nperseg) != nperseg:
        raise InputError(f"{nperseg=} must be an integer")
    if isinstance(noverlap, bool) or int(noverlap) != noverlap:
        raise InputError(f"{noverlap=} must be an integer")
    nperseg, noverlap = int(nperseg), int(noverlap)
    if nperseg < 2:
        raise InputError(f"{nperseg=} must be >= 2")
    if nperseg > n:
        raise InputError(
            f"{nperseg=} must be <= {n=} (the record length); use a longer record or shorter segments"
        )
    if not 0 <= noverlap < nperseg:
        raise InputError(f"{noverlap=} must satisfy 0 <= noverlap < {nperseg=}")
    if detrend is False or detrend is None:
        detrend = "none"
    if detrend not in _DETRENDS:
        raise InputError(f"{detrend=} is not allowed; use one of {_DETRENDS}")
    w64, window_name = _window_array(window, nperseg)

    rows = arr[np.newaxis] if arr.ndim == 1 else arr
    step = nperseg - noverlap
    n_segments = (n - noverlap) // step
    dtype = arr.dtype
    if workers is None or workers < 1:
        workers = os.cpu_count() or 1
    out = _accumulate(rows, w64, n_segments, step, detrend, workers)
    for ch, row in enumerate(rows):
        if not np.all(np.isfinite(out[ch])):
            _raise_non_finite(row, ch if arr.ndim == 2 else None, dtype)
        # Samples after the last full segment are not used, but must be valid too.
        tail = row[(n_segments - 1) * step + nperseg :]
        if tail.size and not np.all(np.isfinite(tail)):
            _raise_non_finite(row, ch if arr.ndim == 2 else None, dtype)

    # Density scaling and one-sided doubling as scipy.signal.welch does.
    out *= 1.0 / (sample_rate * float(_dot(w64, w64)) * n_segments)
    if nperseg % 2 == 0:
        out[:, 1:-1] *= 2.0
    else:
        out[:, 1:] *= 2.0
    psd = out.astype(dtype)
    if arr.ndim == 1:
        psd = psd[0]
    return PSDResult(
        frequency=np.fft.rfftfreq(nperseg, d=1.0 / sample_rate),
        psd=psd,
        sample_rate=sample_rate,
        n_segments=n_segments,
        nperseg=nperseg,
        noverlap=noverlap,
        window=window_name,
        detrend=str(detrend),
        resolution_hz=sample_rate / nperseg,
        enbw_hz=sample_rate * float(_dot(w64, w64)) / float(np.sum(w64)) ** 2,
        effective_averages=welch_effective_averages(w64, n_segments, step),
        bin_correlation=bin_correlation_factor(w64),
        window_values=w64,
    )
