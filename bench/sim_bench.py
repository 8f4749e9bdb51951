"""Speed of the simulated laboratory, measured as ratios against a baseline run side by side.

Run ``python bench/sim_bench.py``; prints a table with goals and PASS/FAIL and writes
bench/RESULTS-sim.md. One function per section. Every figure is the best of a few
repeats, so a busy machine inflates both sides of a ratio alike as far as possible.
"""

from __future__ import annotations

import platform
import time
from pathlib import Path

import numpy as np
from quietwell_sim import LabParams, SimLab, sample_linear
from quietwell_sim._exact import HAVE_NUMBA

N_SEG = 1 << 22
REPEATS = 3


def _best(fn, repeats: int = REPEATS) -> float:
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def segment_vs_floor() -> dict:
    """3 axes x 2**22 samples of one exact linear segment vs drawing its normals."""
    rng = np.random.Generator(np.random.SFC64(1))
    w = 2 * np.pi * np.array([152e3, 171e3, 48e3])
    state = np.array([1e-9, 1e-4])
    out = np.empty(N_SEG)

    def sim():
        for wi in w:
            sample_linear(state, wi, 5e3, 1.0, 1e-7, N_SEG, rng, out=out)

    def floor():
        for _ in w:
            rng.standard_normal((2, N_SEG))

    sim()  # compile and warm caches
    t_sim, t_floor = _best(sim), _best(floor)
    ratio = t_sim / t_floor
    return {
        "name": "3 x 2**22 exact segment / normals floor",
        "value": ratio,
        "goal": "<= 3",
        "pass": ratio <= 3.0,
        "detail": f"sim {t_sim:.3f} s, floor {t_floor:.3f} s",
    }


def realtime_motion() -> dict:
    """1 s of 3-axis motion at 10 MS/s: wall time / simulated time."""
    lab = SimLab(LabParams())
    lab.particle.sample(1000, 1e-7)
    t = _best(lambda: lab.particle.sample(10_000_000, 1e-7), 2)
    return {
        "name": "1 s of 3-axis motion at 10 MS/s, wall/sim",
        "value": t,
        "goal": "< 1",
        "pass": t < 1.0,
        "detail": f"{t:.3f} s wall per 1 s simulated",
    }


def realtime_record() -> dict:
    """Full record (motion + detector + ADC + intensity) of 1 s at 10 MS/s: wall/sim."""
    lab = SimLab(LabParams())
    lab.record(1000)
    t = _best(lambda: lab.record(10_000_000), 2)
    return {
        "name": "1 s full 4-channel record at 10 MS/s, wall/sim",
        "value": t,
        "goal": "info (< 1 would be real time)",
        "pass": None,
        "detail": f"{t:.3f} s wall per 1 s simulated",
    }


def pump_down() -> dict:
    """Eight hours of pump-down with feedback on: wall seconds (no sleeping)."""
    lab = SimLab(LabParams())
    lab.set_feedback_damping(2e3)
    t = time.perf_counter()
    lab.advance(8 * 3600.0)
    wall = time.perf_counter() - t
    return {
        "name": "8 h pump-down (sim) wall/sim",
        "value": wall / (8 * 3600.0),
        "goal": "info (seconds of wall time)",
        "pass": None,
        "detail": f"{wall:.3f} s wall, final {lab.pressure / 100:.2e} mbar",
    }


def main() -> None:
    rows = [segment_vs_floor(), realtime_motion(), realtime_record(), pump_down()]
    head = f"{'benchmark':<50} {'figure':>10} {'goal':>30} {'result':>7}"
    print(head)
    print("-" * len(head))
    lines = [
        "# Simulated-laboratory benchmark (bench/sim_bench.py)",
        "",
        f"Machine: {platform.processor() or platform.machine()}, Python "
        f"{platform.python_version()}, numpy {np.__version__}, numba kernels: {HAVE_NUMBA}. "
        "Ratios measured side by side in one run, best of repeats; one core.",
        "",
        "| benchmark | figure | goal | result | detail |",
        "|---|---|---|---|---|",
    ]
    for r in rows:
        res = "info" if r["pass"] is None else ("PASS" if r["pass"] else "FAIL")
        print(f"{r['name']:<50} {r['value']:>10.3g} {r['goal']:>30} {res:>7}")
        lines.append(f"| {r['name']} | {r['value']:.3g} | {r['goal']} | {res} | {r['detail']} |")
    out = Path(__file__).with_name("RESULTS-sim.md")
    out.write_text("\n".join(lines) + "\n")
    print(f"written {out}")


if __name__ == "__main__":
    main()
