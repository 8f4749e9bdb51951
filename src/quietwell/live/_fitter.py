"""The live fitter: a readable device whose events form the ``fits`` stream of a run.

Its :class:`~quietwell.live.TraceFeed` (subscribe it to the RunEngine) sees each
record as it is stored and starts the fit at once in a worker thread, so the fit of
record k runs while the plan moves on; ``trigger()`` returns a Status that finishes
when the fit of the latest record is done, without blocking the RunEngine's loop
(pause and suspenders keep working). ``bps.trigger_and_read([fitter], name="fits")``
then writes one event per record into the same run.
"""

from __future__ import annotations

import math
import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor

import numpy as np
from ophyd.status import Status

from ._feed import TraceFeed
from ._record_fit import RecordAnalyzer

__all__ = ["LiveFitter"]


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
        self._latest: tuple[int, Future] | None = None
        self._reading: dict = self._empty("no record yet")

    # --- fed by the documents ---
    def submit(self, seq_num: int, channels: dict[str, np.ndarray], sample_rate: float) -> None:
        """Start fitting one record (called by :attr:`feed` for each ``primary`` event)."""
        fut = self._pool.submit(self._analyze, seq_num, channels, sample_rate)
        with self._lock:
            self._latest = (seq_num, fut)

    def _analyze(self, seq_num: int, channels, sample_rate: float) -> dict:
        t0 = time.perf_counter()
        try:
            fields = self.analyzer.analyze(channels, sample_rate)
        except Exception as exc:  # noqa: BLE001 - a failed fit is recorded, never raised
            fields = self._empty(f"{type(exc).__name__}: {exc}")
        fields["record_seq_num"] = seq_num
        fields["fit_seconds"] = time.perf_counter() - t0
        return fields

    def _empty(self, why: str) -> dict:
        out: dict = {}
        for key, desc in self.analyzer.describe().items():
            out[key] = why if desc["dtype"] == "string" else math.nan
        out["record_seq_num"] = -1
        out["fit_seconds"] = 0.0
        return out

    # --- bluesky protocols ---
    def trigger(self) -> Status:
        status = Status(obj=self, timeout=None)
        with self._lock:
            latest = self._latest
            self._latest = None
        if latest is None:
            self._reading = self._empty("no new record since the last fit")
            status.set_finished()
            return status

        def done(fut: Future) -> None:
            self._reading = fut.result()
            status.set_finished()

        latest[1].add_done_callback(done)
        return status

    def read(self) -> dict:
        now = time.time()
        return {k: {"value": (float(v) if isinstance(v, float | np.floating) else v),
                    "timestamp": now} for k, v in self._reading.items()}

    def describe(self) -> dict:
        d = self.analyzer.describe()
        d["record_seq_num"] = {"dtype": "integer", "shape": [], "units": "",
                               "source": "quietwell.live"}
        d["fit_seconds"] = {"dtype": "number", "shape": [], "units": "s",
                            "source": "quietwell.live"}
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
