"""Spectra and fits of several channels in threads with numba's cache empty.

A fresh clone (as in CI) has no compiled kernels on disk.  The threads of
``welch_psd`` and ``fit_channels`` must then not compile a kernel at the same
time as numba loads the extensions of other installed packages (tiled installs
awkward and sparse, which register some): that failed with
``internal error: KeyError: (int64,)``.  Each run below is a fresh interpreter
with its own empty ``NUMBA_CACHE_DIR``; it also records which threads compiled
anything, which must be the calling thread only.  The first run is in the quick
suite; the repeats (a race need not show every time) are marked slow.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

ROOT = Path(__file__).resolve().parents[1]
FS = 1e6
N = 2**16
F0 = (45e3, 130e3, 160e3)  # one resonance per channel, Hz

# What `quietwell analyze` does (welch_psd, then fit_channels), with three
# threads asked for explicitly so that a machine with fewer cores runs threads too.
SCRIPT = """
import json, sys, threading
import numpy as np
from numba.core import event

compiled_in = set()


class WhereCompiled(event.Listener):
    def on_start(self, ev):
        compiled_in.add(threading.current_thread().name)

    def on_end(self, ev):
        pass


event.register("numba:compile", WhereCompiled())

from quietwell.analysis import fit_channels, welch_psd
from quietwell.analysis._resolution import segment_length

x = np.load(sys.argv[1])
nperseg = segment_length(x.shape[-1])
psd = welch_psd(x, float(sys.argv[2]), nperseg=nperseg, noverlap=nperseg // 2, workers=3)
fits = fit_channels(psd, peaks=1, workers=3)
print(json.dumps({
    "f0_hz": [fit.peaks[0].f0 for fit in fits],
    "compiled_in": sorted(compiled_in),
    "main": threading.main_thread().name,
}))
"""


def resonator(f0: float, linewidth: float, seed: int) -> np.ndarray:
    """White noise through a two-pole resonator (poles r exp(+-i 2 pi f0/FS)).

    The spectral line sits at the pole angle and is about ``(1 - r) FS / pi`` wide
    (common practice, no source); a white floor is added.
    """
    r = 1.0 - math.pi * linewidth / FS
    a = [1.0, -2.0 * r * math.cos(2.0 * math.pi * f0 / FS), r * r]
    rng = np.random.default_rng(seed)
    return scipy.signal.lfilter([1.0], a, rng.normal(size=N)) + 3.0 * rng.normal(size=N)


@pytest.fixture(scope="module")
def record_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("rec") / "three_channels.npy"
    x = np.array([resonator(f0, 1.5e3, seed) for seed, f0 in enumerate(F0)], dtype=np.float32)
    np.save(path, x)
    return path


@pytest.mark.parametrize("run", [0, *(pytest.param(i, marks=pytest.mark.slow) for i in (1, 2, 3))])
def test_threads_compile_nothing_with_a_cold_cache(run, record_file, tmp_path):
    cache = tmp_path / "numba_cache"
    cache.mkdir()  # empty: every kernel is compiled in this run
    env = {
        **os.environ,
        "NUMBA_CACHE_DIR": str(cache),
        "PYTHONPATH": os.pathsep.join([str(ROOT / "src"), os.environ.get("PYTHONPATH", "")]),
    }
    res = subprocess.run(
        [sys.executable, "-c", SCRIPT, str(record_file), str(FS)],
        capture_output=True, text=True, timeout=300, env=env, cwd=ROOT,
    )  # fmt: skip
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    # The kernels were compiled (the cache was cold), and only by the calling thread.
    assert out["compiled_in"] == [out["main"]], out
    assert any(cache.rglob("*.nbi")), "numba wrote no cache"
    for f0, found in zip(F0, out["f0_hz"], strict=True):
        assert found == pytest.approx(f0, rel=0.01), out
