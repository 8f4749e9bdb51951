"""Benchmarks of quietwell, measured as ratios of paths run side by side.

    python bench/run.py                 # every section
    python bench/run.py --only analysis_speed --repeat 7
    python bench/run.py --list

Each section is a function ``section(ctx) -> list[Row]`` registered in
``SECTIONS``; a row is one ratio with its goal.  Timings are the minimum over
``--repeat`` interleaved runs (ours, theirs, ours, theirs, ...), so both paths
see the same machine state.  Results are printed as a table and, with
``--write``, written to ``bench/RESULTS-<group>.md``.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "src"))

import scipy  # noqa: E402
import scipy.fft  # noqa: E402
import scipy.optimize  # noqa: E402
import scipy.signal  # noqa: E402

from quietwell.analysis import fit_channels, oscillator_peak, welch_psd  # noqa: E402

# ---------------------------------------------------------------- framework


@dataclass
class Row:
    """One measured ratio and its goal."""

    name: str
    value: float
    goal: str
    passed: bool
    detail: str = ""
    note: str = ""


@dataclass
class Context:
    """Shared inputs of the sections (built lazily, once)."""

    repeat: int
    cache: dict = field(default_factory=dict)

    def get(self, key: str, build: Callable[[], object]):
        if key not in self.cache:
            self.cache[key] = build()
        return self.cache[key]


#: name -> (group, function); the group names the RESULTS file.
SECTIONS: dict[str, tuple[str, Callable[[Context], list[Row]]]] = {}


def section(name: str, group: str):
    def register(func):
        SECTIONS[name] = (group, func)
        return func

    return register


def interleaved_min(funcs: dict[str, Callable[[], object]], repeat: int) -> dict[str, float]:
    """Minimum wall time in s of each function over ``repeat`` interleaved runs.

    Also ``"<name>:cpu"``: the process CPU time (all threads) of that fastest
    run, which other jobs on the machine disturb less than the wall time.
    """
    best = dict.fromkeys(funcs, math.inf)
    cpu = dict.fromkeys(funcs, math.inf)
    for _ in range(repeat):
        for name, func in funcs.items():
            c0, t0 = time.process_time(), time.perf_counter()
            func()
            wall, used = time.perf_counter() - t0, time.process_time() - c0
            if wall < best[name]:
                best[name], cpu[name] = wall, used
    return {**best, **{f"{k}:cpu": v for k, v in cpu.items()}}


# ------------------------------------------------------- analysis: the data

FS = 1e6
N_SAMPLES = 2**22
NPERSEG = 2**14
NOVERLAP = NPERSEG // 2
#: (f0 Hz, gamma 1/s, area V**2, floor V**2/Hz) of the three channels.
MODES = [
    (45e3, 2 * math.pi * 600.0, 1e-4, 1e-12),
    (130e3, 2 * math.pi * 1500.0, 5e-5, 2e-12),
    (160e3, 2 * math.pi * 1200.0, 3e-5, 1e-12),
]


def make_record() -> np.ndarray:
    """Three channels x 2**22 float32 samples (V), one damped mode each plus floor.

    Gaussian Fourier coefficients with the one-sided spectrum of each mode plus
    a white floor, transformed in place one channel at a time.
    """
    rng = np.random.default_rng(20260101)
    fk = np.fft.rfftfreq(N_SAMPLES, 1.0 / FS)
    out = np.empty((len(MODES), N_SAMPLES), dtype=np.float32)
    for i, (f0, gamma, area, floor) in enumerate(MODES):
        s = oscillator_peak(fk, f0, gamma, area) + floor
        coef = np.sqrt(s * FS * N_SAMPLES / 4.0) * (rng.normal(size=fk.size) + 1j * rng.normal(size=fk.size))
        coef[0] = 0.0
        out[i] = scipy.fft.irfft(coef, N_SAMPLES)
    return out


def ours(x: np.ndarray):
    """The analyze path: Welch PSD, then the maximum-likelihood fits of the channels."""
    psd = welch_psd(x, FS, nperseg=NPERSEG, noverlap=NOVERLAP)
    return fit_channels(psd)


def _model(f, f0, gamma, area, b):
    return oscillator_peak(f, f0, gamma, area) + b


def baseline(x: np.ndarray):
    """Hand-written: scipy.signal.welch (default detrending) + curve_fit, same model."""
    f, p = scipy.signal.welch(x, FS, window="hann", nperseg=NPERSEG, noverlap=NOVERLAP)
    sel = slice(2, -1)
    f, p = f[sel], p[:, sel].astype(np.float64)
    fits = []
    for row in p:
        # closed-form start: position and height of the maximum, half-maximum width
        b0 = float(np.median(row))
        i = int(np.argmax(row))
        half = b0 + 0.5 * (row[i] - b0)
        above = np.flatnonzero(row > half)
        fwhm = max(f[above[-1]] - f[above[0]], f[1] - f[0])
        p0 = [f[i], 2 * math.pi * fwhm, 0.5 * math.pi * (row[i] - b0) * fwhm, b0]
        fits.append(scipy.optimize.curve_fit(_model, f, row, p0=p0, maxfev=20000)[0])
    return fits


def floor_path(segments: np.ndarray):
    """Bare scipy.fft.rfft of the already windowed segments, nothing else."""
    for chan in segments:
        for s0 in range(0, chan.shape[0], 64):
            scipy.fft.rfft(chan[s0 : s0 + 64], axis=1, workers=-1)


def windowed_segments(x: np.ndarray) -> np.ndarray:
    """All windowed segments of all channels (float32), built outside any timing."""
    w = scipy.signal.get_window("hann", NPERSEG).astype(np.float32)
    step = NPERSEG - NOVERLAP
    n_seg = (x.shape[-1] - NOVERLAP) // step
    view = np.lib.stride_tricks.sliding_window_view(x, NPERSEG, axis=-1)[:, ::step][:, :n_seg]
    return view * w


@section("analysis_speed", group="analysis")
def analysis_speed(ctx: Context) -> list[Row]:
    x = ctx.get("record", make_record)
    # Both paths agree before they are timed.
    got, ref = ours(x), baseline(x)
    for fit, popt, (f0, *_rest) in zip(got, ref, MODES, strict=True):
        assert len(fit.peaks) == 1 and abs(fit.peaks[0].f0 - f0) < 100, fit.peaks
        assert abs(popt[0] - f0) < 100, popt
    t = interleaved_min({"ours": lambda: ours(x), "baseline": lambda: baseline(x)}, ctx.repeat)
    ratio = t["baseline"] / t["ours"]
    return [
        Row(
            "analyze path: baseline time / ours",
            ratio,
            ">= 4",
            ratio >= 4,
            f"ours {t['ours'] * 1e3:.0f} ms, baseline {t['baseline'] * 1e3:.0f} ms "
            f"(CPU {t['ours:cpu'] * 1e3:.0f} ms vs {t['baseline:cpu'] * 1e3:.0f} ms, "
            f"ratio {t['baseline:cpu'] / t['ours:cpu']:.2f})",
        )
    ]


@section("analysis_floor", group="analysis")
def analysis_floor(ctx: Context) -> list[Row]:
    x = ctx.get("record", make_record)
    segs = windowed_segments(x)
    t = interleaved_min(
        {
            "ours": lambda: ours(x),
            "floor": lambda: floor_path(segs),
            "psd": lambda: welch_psd(x, FS, nperseg=NPERSEG, noverlap=NOVERLAP),
        },
        ctx.repeat,
    )
    segs = None  # free the 100 MB of windowed segments before the next timing
    psd_only = t["psd"]
    ratio = t["ours"] / t["floor"]
    return [
        Row(
            "PSD + fits: ours / bare rfft of the windowed segments",
            ratio,
            "<= 1.5",
            ratio <= 1.5,
            f"ours {t['ours'] * 1e3:.0f} ms (PSD alone {psd_only * 1e3:.0f} ms), "
            f"rfft floor {t['floor'] * 1e3:.0f} ms (CPU {t['ours:cpu'] * 1e3:.0f} ms vs "
            f"{t['floor:cpu'] * 1e3:.0f} ms, ratio {t['ours:cpu'] / t['floor:cpu']:.2f}); "
            f"PSD alone / floor {psd_only / t['floor']:.2f}",
            note=(
                "The floor is pocketfft on both cores with nothing else. Our PSD transforms "
                "the raw segments and adds one compiled pass per block that applies the "
                "window along frequency (3 taps for Hann), removes the mean (X[0] = 0) and "
                "sums |X|**2. The fits add about 2 ms per channel: the initial guess in numpy, "
                "the peak search's prominences in one compiled O(n) pass, the likelihood's "
                "score and Fisher information in one compiled call per evaluation, a predicted "
                "bias of the plain model (leakage and aliasing, no FFT, about 0.5 ms), and "
                "where that bias exceeds 0.1 standard errors of a line parameter the "
                "window-exact model (an N-point FFT of the windowed autocovariance per "
                "parameter row and evaluation). Here the 1.2 kHz line's width would be "
                "biased by 0.19 standard errors (aliased tails) and is polished; the "
                "others stay plain."
            ),
        )
    ]


@section("analysis_floor_serial", group="analysis")
def analysis_floor_serial(ctx: Context) -> list[Row]:
    """The same comparison on one thread each: less sensitive to other jobs."""
    x = ctx.get("record", make_record)
    segs = windowed_segments(x)

    def ours_serial():
        psd = welch_psd(x, FS, nperseg=NPERSEG, noverlap=NOVERLAP, workers=1)
        return fit_channels(psd, workers=1)

    def floor_serial():
        for chan in segs:
            for s0 in range(0, chan.shape[0], 64):
                scipy.fft.rfft(chan[s0 : s0 + 64], axis=1, workers=1)

    t = interleaved_min({"ours": ours_serial, "floor": floor_serial}, ctx.repeat)
    segs = None
    ratio = t["ours"] / t["floor"]
    return [
        Row(
            "PSD + fits on one thread: ours / bare rfft on one thread",
            ratio,
            "<= 1.5",
            ratio <= 1.5,
            f"ours {t['ours'] * 1e3:.0f} ms, rfft floor {t['floor'] * 1e3:.0f} ms",
            note="See analysis_floor.",
        )
    ]


_MEMORY_CHILD = r"""
import sys, tracemalloc
sys.path.insert(0, {src!r}); sys.path.insert(0, {bench!r})
import numpy as np
import run as bench
def status(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
x = np.load({path!r})
x.sum()  # touch every page
path = {{"ours": bench.ours, "baseline": bench.baseline}}[{which!r}]
path(x[:, : 2**17])  # warm up imports and FFT plans outside the measurement
before = status("VmRSS")
with open("/proc/self/clear_refs", "w") as fh:
    fh.write("5")  # reset the peak resident set (VmHWM) to the current one
path(x)
peak = status("VmHWM")
tracemalloc.start()
path(x)
traced = tracemalloc.get_traced_memory()[1]
tracemalloc.stop()
print(max(peak - before, 0), traced, x.nbytes)
"""


def _child_memory(path: Path, which: str) -> tuple[int, int, int]:
    code = _MEMORY_CHILD.format(src=str(ROOT / "src"), bench=str(ROOT / "bench"), path=str(path), which=which)
    res = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=600
    )
    extra, traced, nbytes = (int(v) for v in res.stdout.split())
    return extra, traced, nbytes


@section("live_fit_realtime", group="live")
def live_fit_realtime(ctx: Context) -> list[Row]:
    """The live fitter keeps up: 1 s of 3 channels at 10 MS/s fitted in under 1 s."""
    from quietwell.live import ModeAnalyzer

    fs, n = 10e6, 10_000_000
    rng = np.random.default_rng(7)
    fk = np.fft.rfftfreq(n, 1.0 / fs)
    modes = (152e3, 171e3, 48e3)
    traces = {}
    for axis, f0 in zip("xyz", modes, strict=True):
        s = oscillator_peak(fk, f0, 2 * math.pi * 3000.0, 1e-6) + 1e-15
        coef = np.sqrt(s * fs * n / 4.0) * (rng.normal(size=fk.size) + 1j * rng.normal(size=fk.size))
        coef[0] = 0.0
        traces[f"trace_{axis}"] = scipy.fft.irfft(coef, n).astype(np.float32)
    # a feedback-cooled trap: 3 kHz lines; 2**15 segments give 305 Hz bins (10 per line)
    analyzer = ModeAnalyzer(modes, nperseg=2**15)
    fields = analyzer.analyze(traces, {"sample_rate": fs})
    assert all(fields[f"fit_status_{a}"] == "ok" for a in "xyz"), fields
    t = interleaved_min({"fit": lambda: analyzer.analyze(traces, {"sample_rate": fs})},
                        ctx.repeat)
    ratio = t["fit"] / (n / fs)
    return [Row("live fit of 1 s of 3 x 10 MS/s: wall time / record duration", ratio, "< 1",
                ratio < 1, f"{t['fit'] * 1e3:.0f} ms wall, {t['fit:cpu'] * 1e3:.0f} ms CPU per "
                "1 s record (one worker, as the live fitter runs)")]


@section("analysis_memory", group="analysis")
def analysis_memory(ctx: Context) -> list[Row]:
    x = ctx.get("record", make_record)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "record.npy"
        np.save(path, x)
        ours_extra, ours_traced, nbytes = _child_memory(path, "ours")
        base_extra, base_traced, _ = _child_memory(path, "baseline")
    ratio = (nbytes + ours_extra) / nbytes
    return [
        Row(
            "peak memory of our path (record + extra RSS) / record size",
            ratio,
            "< 2",
            ratio < 2,
            f"record {nbytes / 2**20:.0f} MiB; extra peak RSS ours {ours_extra / 2**20:.1f} MiB "
            f"(numpy-traced {ours_traced / 2**20:.1f} MiB), baseline "
            f"{base_extra / 2**20:.0f} MiB (traced {base_traced / 2**20:.0f} MiB)",
        )
    ]


# --------------------------------------------------------------------- main


def _results_markdown(group: str, rows: list[tuple[str, Row]], argv: list[str]) -> str:
    lines = [
        f"# Benchmark results: {group}",
        "",
        f"Command: `python bench/run.py {' '.join(argv)}`".rstrip(),
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}.",
        f"Record: {len(MODES)} channels x 2**22 float32 samples at {FS:.0e} S/s; Welch "
        f"nperseg={NPERSEG}, noverlap={NOVERLAP}, Hann; one peak fitted per channel.",
        "",
        "| section | ratio | goal | result | details |",
        "|---|---|---|---|---|",
    ]
    for sec, r in rows:
        verdict = "PASS" if r.passed else "FAIL"
        lines.append(f"| {sec}: {r.name} | {r.value:.2f} | {r.goal} | {verdict} | {r.detail} |")
    notes = [f"- {sec}: {r.note}" for sec, r in rows if r.note and not r.passed]
    if notes:
        lines += ["", "Notes on goals missed:", "", *notes]
    lines += [
        "",
        "Method: times are the minimum of interleaved runs in one process (other jobs share",
        "the 2 cores, so single timings scatter; the minimum is the least disturbed run).",
        "Memory is measured in a fresh subprocess per path: the kernel's peak resident set",
        "(`VmHWM`, reset through `/proc/self/clear_refs` just before the path, after loading",
        "the record and a warm-up run on a short slice) minus the resident set at that",
        "moment; numpy's own allocations are also traced with `tracemalloc` in a second run.",
        "",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="+", metavar="SECTION", choices=sorted(SECTIONS))
    parser.add_argument("--repeat", type=int, default=5, help="interleaved runs (default 5)")
    parser.add_argument("--write", action="store_true", help="write bench/RESULTS-<group>.md")
    parser.add_argument("--list", action="store_true", help="list the sections")
    args = parser.parse_args(argv)
    if args.list:
        for name, (group, func) in SECTIONS.items():
            print(f"{name:20s} [{group}] {func.__doc__ or ''}".rstrip())
        return 0
    ctx = Context(repeat=args.repeat)
    names = args.only or list(SECTIONS)
    results: dict[str, list[tuple[str, Row]]] = {}
    print(f"{'section':18s} {'ratio':>8s} {'goal':>7s} {'result':6s} what / details")
    for name in names:
        group, func = SECTIONS[name]
        for row in func(ctx):
            results.setdefault(group, []).append((name, row))
            verdict = "PASS" if row.passed else "FAIL"
            print(f"{name:18s} {row.value:8.2f} {row.goal:>7s} {verdict:6s} {row.name}")
            print(f"{'':42s}{row.detail}")
    if args.write:
        for group, rows in results.items():
            out = ROOT / "bench" / f"RESULTS-{group}.md"
            out.write_text(_results_markdown(group, rows, sys.argv[1:] if argv is None else argv))
            print(f"wrote {out.relative_to(ROOT)}")
    all_passed = all(r.passed for rows in results.values() for _, r in rows)
    return 0 if all_passed else 1


if __name__ == "__main__":
    sys.exit(main())
