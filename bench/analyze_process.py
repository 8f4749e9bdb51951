"""Whole-process speed of ``quietwell analyze`` against a hand-written scipy script.

    PYTHONPATH=src:sim_devices nice -n 10 python bench/analyze_process.py [--repeat 3] [--write]

Both paths run as their own processes (interpreter start, imports, reading the file,
PSD, fits, printing), side by side, interleaved, and each time is the minimum over
``--repeat`` rounds (other jobs share the machine). The hand-written script is what a
user would write: ``scipy.signal.welch`` with 2**16-sample segments (Hann, 50 %
overlap) and ``scipy.optimize.curve_fit`` of the same model (the exact damped-
oscillator line plus a flat floor) from a peak-height/half-width start, per channel.

1. One file of 3 x 2**22 float32 samples (one line per channel), one call each.
2. 100 files of 3 x 2**19 float32 samples (smaller, so that 100 of them fit on the
   disk of the build machine): ``quietwell analyze`` once on the folder, against the
   script run once per file, each as its own process.

Records: inverse FFT of a known spectrum (``tests/oscillator_records.py``).
"""

from __future__ import annotations

import argparse
import math
import os
import pathlib
import platform
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = pathlib.Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT / "tests"))

from oscillator_records import oscillator_spectrum, record_from_spectrum  # noqa: E402

FS = 5e6
TWO_PI = 2.0 * math.pi
LINES = [(150e3, 900.0), (170e3, 1200.0), (60e3, 900.0)]  # (f0 Hz, FWHM Hz) per channel

SCRIPT = r'''
import sys
import numpy as np
import scipy.signal
import scipy.optimize

fs = float(sys.argv[2])
x = np.load(sys.argv[1])

def model(f, f0, gamma, area, b):
    om, om0 = 2 * np.pi * f, 2 * np.pi * f0
    return 4 * gamma * om0**2 * area / ((om0**2 - om**2) ** 2 + gamma**2 * om**2) + b

for ch in np.atleast_2d(x):
    f, p = scipy.signal.welch(ch, fs, nperseg=min(2**16, ch.size), noverlap=None)
    f, p = f[2:], p[2:]
    b0 = np.median(p)
    i = int(np.argmax(p))
    half = b0 + 0.5 * (p[i] - b0)
    lo, hi = i, i
    while lo > 0 and p[lo] > half:
        lo -= 1
    while hi < p.size - 1 and p[hi] > half:
        hi += 1
    gamma0 = 2 * np.pi * max(f[hi] - f[lo], f[1] - f[0])
    area0 = (p[i] - b0) * gamma0 / 4
    popt, pcov = scipy.optimize.curve_fit(model, f, p, p0=[f[i], gamma0, area0, b0])
    err = np.sqrt(np.diag(pcov))
    print(*popt, *err)
'''


def _record(n: int, rng: np.random.Generator) -> np.ndarray:
    out = np.empty((len(LINES), n), dtype=np.float32)
    for c, (f0, fwhm) in enumerate(LINES):
        s = oscillator_spectrum(FS, n, [(f0, TWO_PI * fwhm, 1e-6)], 1e-16)
        out[c] = record_from_spectrum(s, FS, rng)
    return out


def _time(cmd: list[str], env: dict) -> float:
    t0 = time.perf_counter()
    res = subprocess.run(cmd, env=env, capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    if res.returncode not in (0,):
        raise SystemExit(f"{' '.join(cmd[:4])} ... failed ({res.returncode}): {res.stderr[-400:]}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--files", type=int, default=100)
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), str(ROOT / "sim_devices")])
    py = sys.executable
    rng = np.random.default_rng(1)
    rows = []
    with tempfile.TemporaryDirectory(prefix="qw-analyze-bench-") as tmp:
        tmp = pathlib.Path(tmp)
        script = tmp / "by_hand.py"
        script.write_text(SCRIPT)
        big = tmp / "big.npy"
        np.save(big, _record(2**22, rng))
        ours_cmd = [py, "-m", "quietwell.cli", "analyze", str(big), "--sample-rate", str(FS)]
        theirs_cmd = [py, str(script), str(big), str(FS)]
        _time(ours_cmd, env)  # warm the numba cache and the page cache
        _time(theirs_cmd, env)
        ours, theirs = [], []
        for _ in range(args.repeat):
            ours.append(_time(ours_cmd, env))
            theirs.append(_time(theirs_cmd, env))
        rows.append(("one file, 3 x 2**22 float32", min(theirs), min(ours), 3.0))
        print(f"one file: script {min(theirs):.2f} s, quietwell analyze {min(ours):.2f} s, "
              f"ratio {min(theirs) / min(ours):.2f} (all: {theirs} / {ours})", flush=True)

        folder = tmp / "many"
        folder.mkdir()
        for i in range(args.files):
            np.save(folder / f"rec{i:03d}.npy", _record(2**19, rng))
        files = sorted(folder.glob("*.npy"))
        ours_cmd = [py, "-m", "quietwell.cli", "analyze", str(folder), "--sample-rate", str(FS)]
        _time(ours_cmd, env)
        ours, theirs = [], []
        for _ in range(max(1, args.repeat - 1)):
            ours.append(_time(ours_cmd, env))
            theirs.append(sum(_time([py, str(script), str(f), str(FS)], env) for f in files))
        rows.append((f"{args.files} files, 3 x 2**19 float32 each", min(theirs), min(ours), 8.0))
        print(f"{args.files} files: script per file {min(theirs):.2f} s, quietwell analyze "
              f"{min(ours):.2f} s, ratio {min(theirs) / min(ours):.2f}", flush=True)

        # what dominates one call: the interpreter with quietwell's imports alone
        imports = min(_time([py, "-c", "import quietwell.cli, quietwell._analyze_cli"], env)
                      for _ in range(3))
        bare = min(_time([py, "-c", "pass"], env) for _ in range(3))
    print(f"interpreter alone {bare:.2f} s; with quietwell.cli imported {imports:.2f} s")
    if args.write:
        out = [
            "# Benchmark results: `quietwell analyze` as a whole process",
            "",
            f"Command: `python bench/analyze_process.py --repeat {args.repeat} --write`",
            f"Machine: {platform.machine()}, {os.cpu_count()} cores shared with other jobs, "
            f"Python {platform.python_version()}, numpy {np.__version__}.",
            "Each time: wall time of the whole process, minimum over the rounds.",
            "",
            "| case | script (welch + curve_fit) | quietwell analyze | ratio | goal |",
            "|---|---|---|---|---|",
        ]
        for name, t_theirs, t_ours, goal in rows:
            ratio = t_theirs / t_ours
            out.append(f"| {name} | {t_theirs:.2f} s | {t_ours:.2f} s | {ratio:.2f} | >= {goal:g} "
                       f"({'pass' if ratio >= goal else 'missed'}) |")
        out += ["", f"Interpreter alone: {bare:.2f} s; interpreter with `quietwell.cli` and the "
                f"analyze module imported: {imports:.2f} s."]
        (HERE / "RESULTS-analyze-process.md").write_text("\n".join(out) + "\n")
        print("written to bench/RESULTS-analyze-process.md")


if __name__ == "__main__":
    main()
