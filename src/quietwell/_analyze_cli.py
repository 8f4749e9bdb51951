"""The ``quietwell analyze`` subcommand: arguments, per-channel fits, table and JSON.

Kept out of :mod:`quietwell.cli` so that the command module stays small and this
path imports only what it needs (numpy, scipy.fft/special/ndimage/optimize, h5py).

Exit status: 0 every channel fitted; 3 some channels failed (each is reported in the
table and in ``--json`` with its reason; the others are printed); 2 bad input or no
channel could be fitted (one line on stderr).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import dataclass

__all__ = ["EXIT_SOME_FAILED", "add_arguments", "run"]

EXIT_OK = 0
EXIT_BAD_INPUT = 2
#: Some channels were fitted and printed, others failed (each with its reason).
EXIT_SOME_FAILED = 3


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} must be >= 1")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"{value} must be finite and > 0")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The arguments of ``quietwell analyze``."""
    parser.add_argument(
        "file", metavar="FILE", nargs="+",
        help=(".npy (1-D or channels x samples) or HDF5 (a quietwell raw file: every record "
              "of every trace); several files, folders or glob patterns are fitted in one "
              "process"),
    )
    parser.add_argument(
        "--sample-rate",
        type=_positive_float,
        metavar="HZ",
        help="sample rate in Hz (overrides a 'sample_rate' attribute of an HDF5 file)",
    )
    parser.add_argument("--dataset", metavar="PATH", help="dataset inside an HDF5 file")
    parser.add_argument(
        "--nperseg",
        type=_positive_int,
        metavar="N",
        help=(
            "samples per Welch segment (default: chosen per channel from the record: the "
            "shortest segment in which the narrowest line found spans 10 bins with at least "
            "16 segments, fewer bins (down to 4.5) or segments only where the record needs "
            "it); "
            "50%% overlap, Hann window"
        ),
    )
    parser.add_argument(
        "--peaks",
        type=_positive_int,
        metavar="N",
        help="peaks to fit per channel (default: every line above the detection threshold)",
    )
    parser.add_argument(
        "--band",
        type=float,
        nargs=2,
        metavar=("FMIN", "FMAX"),
        help="fit only this frequency band in Hz",
    )
    parser.add_argument("--units", default="V", metavar="U", help="units of the record's samples (default V)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


@dataclass(frozen=True)
class _Channel:
    index: int
    psd: object | None = None
    fit: object | None = None
    error: str | None = None
    error_type: str | None = None


def _fit_channel(row, rate: float, index: int, args) -> _Channel:
    from quietwell._errors import InputError, QuietwellError
    from quietwell.analysis import fit_psd, welch_psd
    from quietwell.analysis._resolution import choose_segment_length

    n = row.shape[-1]
    psd = None
    if args.nperseg is not None:
        nperseg = args.nperseg
        if nperseg > n:
            raise InputError(
                f"the record has {n} samples, too short for one segment of "
                f"{nperseg=}; give a longer record or --nperseg <= {n}"
            )
        if nperseg < 16:
            raise InputError(f"--nperseg {nperseg} must be >= 16")
    else:
        choice = choose_segment_length(row, rate, peaks=args.peaks, band=args.band)
        nperseg, psd = choice.nperseg, choice.psd
    if psd is None:
        psd = welch_psd(row, rate, nperseg=nperseg, noverlap=nperseg // 2)
    try:
        fit = fit_psd(psd, peaks=args.peaks, band=args.band)
    except InputError:
        raise
    except QuietwellError as exc:
        raise type(exc)(f"{exc} (nperseg={nperseg}, {psd.resolution_hz:.4g} Hz per bin)") from None
    return _Channel(index=index, psd=psd, fit=fit)


def _expand(patterns: list[str]) -> list[str]:
    """Files named by ``patterns``: a folder gives its .npy and HDF5 files, a pattern
    with ``*``, ``?`` or ``[`` its matches (sorted); anything else is taken as a file."""
    import glob
    from pathlib import Path

    from quietwell._errors import InputError
    from quietwell.analysis._io import HDF5_SUFFIXES

    out: list[str] = []
    for item in patterns:
        path = Path(item)
        if path.is_dir():
            found = sorted(str(q) for q in path.iterdir()
                           if q.is_file() and q.suffix.lower() in (".npy", *HDF5_SUFFIXES))
            if not found:
                raise InputError(
                    f"{item}: folder holds no .npy or HDF5 file; give files or a folder of records"
                )
            out += found
        elif any(c in item for c in "*?["):
            found = sorted(glob.glob(item))
            if not found:
                raise InputError(f"{item}: pattern matches no file; check the pattern")
            out += found
        else:
            out.append(item)
    return out


def _fit_trace(trace, args) -> list[_Channel]:
    from quietwell._errors import QuietwellError

    rows = trace.data if trace.data.ndim == 2 else trace.data[None]
    channels = []
    for i, row in enumerate(rows):
        try:
            channels.append(_fit_channel(row, trace.sample_rate, i, args))
        except QuietwellError as exc:
            # A channel fails alone: the others are still fitted and printed.
            channels.append(_Channel(index=i, error=" ".join(str(exc).split()),
                                     error_type=type(exc).__name__))
    return channels


def run(args: argparse.Namespace) -> int:
    """Run ``quietwell analyze``; returns the exit status."""
    from quietwell._errors import QuietwellError
    from quietwell.analysis._io import load_records

    files = _expand(list(args.file))
    results = []  # (source, trace or None, channels)
    for name in files:
        try:
            traces = load_records(name, dataset=args.dataset, sample_rate=args.sample_rate)
        except QuietwellError as exc:
            if len(files) == 1:
                raise
            results.append((name, None, [_Channel(index=0, error=" ".join(str(exc).split()),
                                                  error_type=type(exc).__name__)]))
            continue
        for trace in traces:
            results.append((trace.source, trace, _fit_trace(trace, args)))
    channels = [c for _, _, chans in results for c in chans]
    failed = [(src, c) for src, _, chans in results for c in chans if c.fit is None]
    if len(failed) == len(channels):
        src, c = failed[0]
        trace = results[0][1]
        where = f"{src}, channel {c.index}" if trace is not None and trace.data.ndim == 2 else src
        more = f" (and {len(failed) - 1} other channel(s) failed)" if len(failed) > 1 else ""
        raise _error_type(c.error_type)(f"{where}: {c.error}{more}")
    if args.json:
        if len(results) == 1:
            doc = {"channels": [_channel_json(c) for c in results[0][2]]}
        else:
            doc = {"files": [{"source": src, "channels": [_channel_json(c) for c in chans]}
                             for src, _, chans in results]}
        print(json.dumps(doc))
    else:
        print("\n".join(_table(src, trace, chans, args.units) for src, trace, chans in results))
    sys.stdout.flush()
    if failed:
        where = ", ".join(f"{src} channel {c.index}" for src, c in failed[:5])
        print(
            f"quietwell analyze: {len(failed)} of {len(channels)} channel(s) failed ({where}"
            f"{', ...' if len(failed) > 5 else ''}); see the reasons in the output",
            file=sys.stderr,
        )
        return EXIT_SOME_FAILED
    return EXIT_OK


def _error_type(name: str) -> type:
    from quietwell import _errors

    return getattr(_errors, name, _errors.QuietwellError)


def _channel_json(c: _Channel) -> dict:
    if c.fit is None:
        return {"index": c.index, "status": "failed", "error_type": c.error_type, "error": c.error}
    return {
        "index": c.index,
        "status": "ok",
        "nperseg": c.psd.nperseg,
        "resolution_hz": c.psd.resolution_hz,
        "peaks": [pk.as_dict() for pk in c.fit.peaks],
    }


def _pm(value: float, err: float) -> str:
    """``value ± err`` with the error to two significant digits and the value to match."""
    if not (math.isfinite(err) and err > 0 and math.isfinite(value)):
        return f"{value:.6g} ± {err:.2g}"
    if 1e-3 <= abs(value) < 1e7 and err >= 1e-6:
        digits = max(0, 1 - math.floor(math.log10(err)))
        return f"{value:.{digits}f} ± {err:.{digits}f}"
    exp = math.floor(math.log10(abs(value))) if value else 0
    digits = max(1, min(8, exp - math.floor(math.log10(err)) + 1))
    return f"{value:.{digits}e} ± {err:.1e}"


def _table(source, trace, channels, units: str) -> str:
    u2 = f"{units}**2"
    if trace is None:
        lines = [f"{source}: not read"]
    else:
        shape = " x ".join(str(s) for s in trace.data.shape)
        lines = [f"{source}: {shape} samples at {trace.sample_rate:.6g} Hz (units of the record: {units})"]
    head = f"  {'peak':>4}  {'f0 [Hz]':>24}  {'gamma [1/s]':>22}  {'area [' + u2 + ']':>24}"
    for c in channels:
        if c.fit is None:
            lines.append(f"channel {c.index}: FAILED ({c.error_type}): {c.error}")
            continue
        psd, fit = c.psd, c.fit
        g = fit.goodness
        lines.append(
            f"channel {c.index}: background {_pm(fit.background, fit.background_stderr)} "
            f"{u2}/Hz; band {fit.band[0]:.6g}..{fit.band[1]:.6g} Hz; "
            f"deviance/dof {g.reduced:.3f} (p = {g.p_value:.2g})"
        )
        lines.append(
            f"  Welch PSD: {psd.window} window, nperseg={psd.nperseg}, noverlap={psd.noverlap}, "
            f"{psd.n_segments} segments ({psd.effective_averages:.1f} effective), "
            f"{psd.resolution_hz:.4g} Hz per bin"
        )
        lines.append(head)
        for j, pk in enumerate(fit.peaks):
            lines.append(
                f"  {j:>4}  {_pm(pk.f0, pk.f0_stderr):>24}  "
                f"{_pm(pk.gamma, pk.gamma_stderr):>22}  "
                f"{_pm(pk.area, pk.area_stderr):>24}"
            )
    return "\n".join(lines)
