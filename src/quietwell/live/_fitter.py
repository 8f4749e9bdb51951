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

import atexit
import math
import multiprocessing
import threading
import time
from collections import deque
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
from ophyd.status import Status

from .._lifeline import THIS_PROCESS, worker_init
from .._plain import plain
from ._feed import TraceFeed
from ._record_fit import RecordAnalyzer

__all__ = ["LiveFitter"]

_POOL: ProcessPoolExecutor | None = None
_POOL_LOCK = threading.Lock()


def _process_pool() -> ProcessPoolExecutor:
    """One fitting process shared by every fitter of this interpreter.

    Fits run in a separate process so that they use the second core instead of
    competing for the interpreter lock with the RunEngine and the catalog writer
    ("spawn": the parent runs threads, which a fork must not copy). A clean exit shuts
    the pool down (atexit); the initializer ends the fitting process at once if this
    process dies otherwise (killed: no atexit), which also lets multiprocessing's
    resource tracker, waiting for both, end.
    """
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ProcessPoolExecutor(max_workers=1,
                                        mp_context=multiprocessing.get_context("spawn"),
                                        initializer=worker_init,
                                        initargs=(THIS_PROCESS,))
            atexit.register(_POOL.shutdown, wait=False, cancel_futures=True)
        return _POOL


def _run_analysis(analyzer, traces: dict, data: dict) -> tuple[dict | None, str, float]:
    t0 = time.perf_counter()
    try:
        return analyzer.analyze(traces, data), "", time.perf_counter() - t0
    except Exception as exc:  # noqa: BLE001 - a failed fit is recorded, never raised
        return None, f"{type(exc).__name__}: {exc}", time.perf_counter() - t0


class LiveFitter:
    """Fits each record of the run's ``primary`` stream; read it into a ``fits`` stream.

    Parameters
    ----------
    analyzer : RecordAnalyzer
        What to fit (modes, segment length, calibration and mass for occupations).
    name : str
        Device name (``"fitter"``); data keys are ``f0_x``, ``f0_x_stderr``, ...
    """

    def __init__(self, analyzer: RecordAnalyzer, *, name: str = "fitter",
                 in_process: bool = False) -> None:
        self.name = name
        self.parent = None
        self.analyzer = analyzer
        self.feed = TraceFeed(self.submit)
        self._in_process = in_process
        self._pool = (ThreadPoolExecutor(max_workers=1, thread_name_prefix="quietwell-fit")
                      if in_process else None)
        self._lock = threading.Lock()
        self._queue: deque[tuple[int, Future]] = deque()
        #: The record whose fit the next ``trigger()`` reads (None: the oldest one). The
        #: recorder sets it, so a trigger cut short by an interruption is read again.
        self.want: int | None = None
        self._reading: dict = self._empty("no record yet")

    # --- fed by the documents ---
    def submit(self, seq_num: int, traces: dict[str, np.ndarray], data: dict) -> None:
        """Start fitting one record (called by :attr:`feed` for each ``primary`` event)."""
        pool = self._pool if self._in_process else _process_pool()
        fut = pool.submit(_run_analysis, self.analyzer, traces, data)
        with self._lock:
            self._queue.append((seq_num, fut))

    def _finish(self, seq_num: int, fut: Future) -> dict:
        try:
            fields, error, seconds = fut.result()
        except Exception as exc:  # noqa: BLE001 - e.g. the fitting process died
            fields, error, seconds = None, f"{type(exc).__name__}: {exc}", 0.0
        if fields is None:
            fields = self._empty(error)
        fields["record_seq_num"] = seq_num
        fields["fit_seconds"] = seconds
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
            if self.want is None:
                oldest = self._queue.popleft() if self._queue else None
            else:
                # keep the wanted record's fit queued until read, drop older ones
                while self._queue and self._queue[0][0] < self.want:
                    self._queue.popleft()
                oldest = (self._queue[0] if self._queue and self._queue[0][0] == self.want
                          else None)
        if oldest is None:
            self._reading = self._empty("no new record since the last fit")
            status.set_finished()
            return status

        seq_num, fut = oldest

        def done(f: Future) -> None:
            self._reading = self._finish(seq_num, f)
            status.set_finished()

        fut.add_done_callback(done)
        return status

    def forget(self, seq_num: int) -> None:
        """Drop the queued fit of record ``seq_num`` once it has been read (see ``want``)."""
        with self._lock:
            if self._queue and self._queue[0][0] == seq_num:
                self._queue.popleft()

    @property
    def pending(self) -> int:
        """Records submitted whose fits have not been read yet."""
        with self._lock:
            return len(self._queue)

    def read(self) -> dict:
        now = time.time()
        return {k: {"value": plain(v), "timestamp": now} for k, v in self._reading.items()}

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
        """Stop this fitter's worker thread (the shared fitting process stays)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True)
