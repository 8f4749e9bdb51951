"""The live fitter: a readable device whose events form the ``fits`` stream of a run.

Its :class:`~quietwell.live.TraceFeed` (subscribe it to the RunEngine) sees each
record as it is stored and starts the fit at once in a worker thread, so the fit of
record k runs while the plan acquires record k + 1; ``trigger()`` returns a Status that
finishes when the fit of the oldest record not yet read is done, without blocking the
RunEngine's loop
(pause and suspenders keep working). ``bps.trigger_and_read([fitter], name="fits")``
then writes one event per record into the same run.
"""

from __future__ import annotations

import math
import threading
import time
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor

import numpy as np
from ophyd.status import Status

from ._feed import TraceFeed
from ._record_fit import RecordAnalyzer

__all__ = ["LiveFitter"]


def _plain(v):
    """Python types only: the writer's JSON backup cannot hold numpy scalars."""
    if isinstance(v, np.ndarray):
        return [float(a) for a in v.ravel()]
    if isinstance(v, list):
        return [float(a) for a in v]
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, float | np.floating):
        return float(v)
    return v


class LiveFitter:
    """Fits each record of the run's ``primary`` stream; read it into a ``fits`` stream.

    Parameters
    ----------
    analyzer : RecordAnalyzer
        What to fit (modes, segment length, calibration and mass for occupations).
    name : str
        Device name (``"fitter"``); data keys are ``f0_x``, ``f0_x_stderr``, ...
    """

    def __init__(self, analyzer: RecordAnalyzer, *, name: str = "fitter") -> None:
        self.name = name
        self.parent = None
        self.analyzer = analyzer
        self.feed = TraceFeed(self.submit)
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="quietwell-fit")
        self._lock = threading.Lock()
        self._queue: deque[Future] = deque()
        self._reading: dict = self._empty("no record yet")

    # --- fed by the documents ---
    def submit(self, seq_num: int, traces: dict[str, np.ndarray], data: dict) -> None:
        """Start fitting one record (called by :attr:`feed` for each ``primary`` event)."""
        fut = self._pool.submit(self._analyze, seq_num, traces, data)
        with self._lock:
            self._queue.append(fut)

    def _analyze(self, seq_num: int, traces: dict, data: dict) -> dict:
        t0 = time.perf_counter()
        try:
            fields = self.analyzer.analyze(traces, data)
        except Exception as exc:  # noqa: BLE001 - a failed fit is recorded, never raised
            fields = self._empty(f"{type(exc).__name__}: {exc}")
        fields["record_seq_num"] = seq_num
        fields["fit_seconds"] = time.perf_counter() - t0
        return fields

    def _empty(self, why: str) -> dict:
        out: dict = {}
        for key, desc in self.analyzer.describe().items():
            if desc["dtype"] == "string":
                out[key] = why
            elif desc["dtype"] == "array":
                out[key] = [math.nan] * int(desc["shape"][0])
            else:
                out[key] = math.nan
        out["record_seq_num"] = -1
        out["fit_seconds"] = 0.0
        return out

    # --- bluesky protocols ---
    def trigger(self) -> Status:
        status = Status(obj=self, timeout=None)
        with self._lock:
            oldest = self._queue.popleft() if self._queue else None
        if oldest is None:
            self._reading = self._empty("no new record since the last fit")
            status.set_finished()
            return status

        def done(fut: Future) -> None:
            self._reading = fut.result()
            status.set_finished()

        oldest.add_done_callback(done)
        return status

    @property
    def pending(self) -> int:
        """Records submitted whose fits have not been read yet."""
        with self._lock:
            return len(self._queue)

    def read(self) -> dict:
        now = time.time()
        return {k: {"value": _plain(v), "timestamp": now} for k, v in self._reading.items()}

    def describe(self) -> dict:
        d = self.analyzer.describe()
        d["record_seq_num"] = {
            "dtype": "integer",
            "shape": [],
            "units": "",
            "source": "quietwell.live",
        }
        d["fit_seconds"] = {
            "dtype": "number",
            "shape": [],
            "units": "s",
            "source": "quietwell.live",
        }
        return d

    def read_configuration(self) -> dict:
        return {}

    def describe_configuration(self) -> dict:
        return {}

    @property
    def latest(self) -> dict:
        """Fields of the last fit that was read (plain values)."""
        return dict(self._reading)

    def close(self) -> None:
        """Stop the worker thread."""
        self._pool.shutdown(wait=True)
