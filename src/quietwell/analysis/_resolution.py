"""One rule for the Welch segment length: the resolution is chosen from the record.

The command line and the live fits use :func:`segment_length` (and the command line
:func:`choose_segment_length`, which measures the lines first), so that a record is
cut the same way wherever it is fitted.

The rule
--------
1. Without knowledge of the lines (a first pass, or a live fit set up before any
   record exists): ``max(shortest, n // 8)`` samples, about 15 Hann segments at
   50 % overlap (K of about 14): the finest resolution that still averages enough
   to find lines.
2. With the widths (FWHM in Hz) of the lines to fit, the shortest segment (a power
   of two, at least 256 samples) in which the narrowest line spans
   ``LINE_BINS`` = 10 bins, as long as at least ``MIN_SEGMENTS`` = 16 segments fit
   in the record (the likelihood then has K of about 30 averages per bin). Wherever
   leakage or aliasing would bias the plain model's parameters by more than a tenth of
   their errors, the fit polishes with the window-exact model (``_fit._POLISH_ABOVE_BIAS``).
3. Where 10 bins would leave fewer than 16 segments, the longest segment that still
   leaves 16, as long as the line spans at least ``SAFE_LINE_BINS`` = 4.5 bins there:
   1.5 times the fit's refusal limit ``MIN_LINE_BINS`` = 3, so that a first-pass width
   up to 1.5 times too large (noise in a K of about 14 spectrum) still leaves the line
   3 bins or more (before, 3 bins of the estimate: a line estimated a little too wide
   was refused at 2.7 bins).
4. Otherwise the shortest segment in which the line spans 4.5 bins, down to one
   segment of the whole record (a Hann-windowed periodogram, K = 1: the window-exact
   model and the Gamma likelihood hold for any K).
5. Where 4.5 bins would need more than the record, the whole record as one segment
   (the finest resolution it has), as long as the line spans 3 bins there. Only a line
   narrower than 3 bins of the whole record is refused, with the record length that
   would resolve it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from quietwell._errors import InputError, UnresolvedPeakError

__all__ = [
    "LINE_BINS",
    "MIN_LINE_BINS",
    "MIN_SEGMENTS",
    "SAFE_LINE_BINS",
    "SegmentChoice",
    "choose_segment_length",
    "segment_length",
]

#: Bins per linewidth (FWHM) above which the plain model is unbiased.
LINE_BINS = 10.0
#: Fewest bins per linewidth the fit accepts (``fit_psd(min_linewidth_bins=3)``).
MIN_LINE_BINS = 3.0
#: Bins per estimated linewidth the rule keeps where it can (1.5 x ``MIN_LINE_BINS``:
#: room for the first pass's width error).
SAFE_LINE_BINS = 4.5
#: Segments wanted in the record for the likelihood (31 with 50 % overlap).
MIN_SEGMENTS = 16
#: First pass: segments of ``n // DETECT_DIVISOR`` samples.
DETECT_DIVISOR = 8
#: Shortest segment the rule picks for broad lines.
SHORTEST_FOR_LINES = 256


def _pow2_ceil(x: float) -> int:
    return 1 << max(0, math.ceil(math.log2(max(x, 1.0))))


def _pow2_floor(x: float) -> int:
    return 1 << max(0, math.floor(math.log2(max(x, 1.0))))


def required_samples(linewidth_hz: float, sample_rate: float) -> int:
    """Record length in samples whose single segment spans ``MIN_LINE_BINS`` bins
    per ``linewidth_hz`` (Hz) at ``sample_rate`` (Hz)."""
    return math.ceil(MIN_LINE_BINS * sample_rate / linewidth_hz)


def segment_length(
    n: int,
    sample_rate: float | None = None,
    linewidths_hz: Sequence[float] = (),
    *,
    shortest: int = 1024,
) -> int:
    """Welch segment length in samples for a record of ``n`` samples (see module rule).

    Parameters
    ----------
    n : int
        Samples in the record (per channel).
    sample_rate : float, optional
        Sample rate in Hz; needed with ``linewidths_hz``.
    linewidths_hz : sequence of float
        FWHM of the lines to fit in Hz (``gamma / 2 pi``); empty: the first-pass length.
    shortest : int
        Smallest first-pass segment (samples), capped at ``n``.

    Returns
    -------
    int
        ``nperseg`` in samples, ``<= n``.

    Raises
    ------
    UnresolvedPeakError
        A line narrower than ``MIN_LINE_BINS`` bins of one segment of the whole record;
        the message gives the record length that would resolve it.
    """
    n = int(n)
    if n < 2:
        raise InputError(f"record of {n=} samples is too short for a spectrum; give at least 256")
    widths = [float(w) for w in linewidths_hz]
    if not widths:
        return max(min(shortest, n), n // DETECT_DIVISOR)
    if sample_rate is None or not (math.isfinite(sample_rate) and sample_rate > 0):
        raise InputError(f"{sample_rate=} Hz must be finite and > 0 to resolve lines")
    narrowest = min(widths)
    if not (math.isfinite(narrowest) and narrowest > 0):
        raise InputError(f"linewidth {narrowest!r} Hz must be finite and > 0")
    longest_averaged = _pow2_floor(n / MIN_SEGMENTS)
    need_unbiased = _pow2_ceil(LINE_BINS * sample_rate / narrowest)
    if need_unbiased <= longest_averaged:
        return min(n, max(need_unbiased, SHORTEST_FOR_LINES))
    need_safe = math.ceil(SAFE_LINE_BINS * sample_rate / narrowest)
    if need_safe <= longest_averaged:
        return longest_averaged
    if need_safe <= n:
        return min(n, _pow2_ceil(need_safe))
    if required_samples(narrowest, sample_rate) <= n:
        return n
    needed = required_samples(narrowest, sample_rate)
    raise UnresolvedPeakError(
        f"a line of width {narrowest:.3g} Hz is narrower than the whole record resolves "
        f"({MIN_LINE_BINS:g} bins of {sample_rate / n:.3g} Hz: {n} samples at "
        f"{sample_rate:.6g} Hz); a record of at least {needed} samples "
        f"({needed / sample_rate:.3g} s) would resolve it"
    )


@dataclass(frozen=True)
class SegmentChoice:
    """The segment length chosen for one channel, and the lines that chose it.

    Attributes
    ----------
    nperseg : int
        Samples per segment.
    lines : tuple of (float, float)
        ``(f0, fwhm)`` in Hz of the lines found by the first pass (the width from its
        likelihood fit where the record is short for the lines).
    psd : PSDResult or None
        The first pass's PSD when it has the chosen length (not computed twice).
    """

    nperseg: int
    lines: tuple[tuple[float, float], ...]
    psd: object = None


def choose_segment_length(
    x: np.ndarray,
    sample_rate: float,
    *,
    peaks: int | Sequence[float] | None = None,
    band: tuple[float, float] | None = None,
) -> SegmentChoice:
    """Segment length from the record: a first pass finds the lines and their widths.

    Parameters
    ----------
    x : numpy.ndarray
        One channel, shape ``(n,)`` (units of the record).
    sample_rate : float
        Sample rate in Hz.
    peaks, band
        As for :func:`quietwell.analysis.fit_psd`.

    Returns
    -------
    SegmentChoice
        The segment length of :func:`segment_length` for the measured widths.

    Raises
    ------
    UnresolvedPeakError
        A line narrower than the whole record resolves (the message gives the record
        length that would resolve it).
    """
    from quietwell.analysis._fit import _line_widths
    from quietwell.analysis._welch import welch_psd

    n = int(np.shape(x)[-1])
    first = segment_length(n)
    psd = welch_psd(x, sample_rate, nperseg=first, noverlap=first // 2, workers=1)
    lines = _line_widths(psd, peaks=peaks, band=band, narrow=True)
    if not lines:
        return SegmentChoice(nperseg=first, lines=(), psd=psd)
    narrow = min(w for _, w in lines)
    if narrow < MIN_LINE_BINS * psd.resolution_hz and first < n:
        # Possibly limited by the first pass's resolution: measure on the whole record.
        whole = welch_psd(x, sample_rate, nperseg=n, noverlap=0, workers=1)
        # Only lines wider than the whole record's resolution count (a single high
        # bin or a pure tone is no damped line); those narrower than 3 bins are refused.
        lines = _line_widths(whole, peaks=peaks, band=band)
        if not lines:
            return SegmentChoice(nperseg=first, lines=(), psd=psd)
    widths = [w for _, w in lines]
    nperseg = segment_length(n, sample_rate, widths)
    if nperseg > first or min(widths) < LINE_BINS * sample_rate / nperseg:
        # The record is short for these lines: the choice rests on the first pass's
        # width, which its half-maximum crossing measures to a bin and biases high
        # (-20 % .. +70 % for a line of 6 bins, K of about 14). Measure it again by the
        # likelihood fit of the same spectrum (a few per cent) before choosing.
        widths = _fitted_widths(psd, lines, widths)
        lines = [(f0, w) for (f0, _), w in zip(lines, widths, strict=True)]
        nperseg = segment_length(n, sample_rate, widths)
    return SegmentChoice(nperseg=nperseg, lines=tuple(lines), psd=psd if nperseg == first else None)


def _fitted_widths(psd, lines, widths: list[float]) -> list[float]:
    """FWHM in Hz of ``lines`` from the likelihood fit of ``psd`` (the first pass),
    each no wider than its first-pass estimate in ``widths``; the estimates where the
    fit fails."""
    from quietwell._errors import QuietwellError
    from quietwell.analysis._fit import fit_psd

    try:
        fit = fit_psd(psd, peaks=[f0 for f0, _ in lines], min_linewidth_bins=1.0,
                      min_significance=0.0)
    except QuietwellError:
        return widths
    fitted = sorted((pk.f0, pk.linewidth_hz) for pk in fit.peaks)
    order = sorted(range(len(lines)), key=lambda i: lines[i][0])
    out = list(widths)
    for i, (_, w) in zip(order, fitted, strict=True):
        if math.isfinite(w) and w > 0:
            out[i] = min(out[i], w)
    return out
