"""Motion detectors: records of the particle's motion, written as external HDF5.

.. caution::
   The detection path carries light from the trap laser. Work on it follows your
   local laser-safety codes and the instructions of the lab's laser-safety officer.

Both detectors are ophyd-async ``StandardDetector``\\ s with their own trigger,
acquire and data logic (the pattern of ophyd-async's sim blob detector). Each
``trigger()`` acquires one record through the backend and appends it to one HDF5
file per stage. The documents are those the tiled HDF5 consolidator expects:

* ``describe()``: ``trace_<channel>`` (dtype ``array``, shape ``[record_length]``,
  units ``V``, ``external: "STREAM:"``) and the scalars below;
* ``read()``: scalars only, ``sample_rate`` (Hz, as used by the digitiser),
  ``record_start_time`` (s, backend clock), ``clipped_samples`` (count of samples on
  any channel at or beyond the input range) and ``intensity_mean`` (V);
* ``collect_asset_docs()``: one ``stream_resource`` per file and data key, then one
  ``stream_datum`` per record.

Between records, the signal ``intensity`` (V, not part of ``read()``) asks the
backend for the total-intensity level now (``read_intensity``), so that a monitor can
poll it at any time: ``yield from bps.rd(detector.intensity)``.

Every data key can carry a ``key_prefix`` so that two detectors can share a run.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Sequence
from contextlib import suppress
from pathlib import Path
from typing import Any

import numpy as np
from bluesky.protocols import Reading
from event_model import DataKey
from ophyd_async.core import (
    DetectorAcquireLogic,
    DetectorDataLogic,
    DetectorTriggerLogic,
    PathProvider,
    ReadableDataProvider,
    SignalR,
    SoftSignalBackend,
    StandardDetector,
    StreamableDataProvider,
    StreamResourceDataProvider,
    StreamResourceInfo,
    TriggerInfo,
    soft_signal_r_and_setter,
)

from .._errors import InputError, LimitError, QuietwellError
from ._checked_signal import checked_signal_rw, const_signal
from ._checks import check_choice, check_int, check_real
from ._records import HeterodyneBackend, HeterodyneRecord, MotionBackend, RecordData
from ._trace_file import TraceFile

__all__ = ["MotionDetector", "HeterodyneDetector", "BackendDataError"]


#: Samples per chunk of the clipping count (its scratch buffers stay in the cache).
_CHUNK = 1 << 16


def _count_at_or_beyond(trace: np.ndarray, limit: float) -> int:
    """Samples with ``|x| >= limit``, counted chunk by chunk into reused buffers.

    No temporary of the record's size: allocating and freeing those per record (32 MB
    per channel at 2**23 samples) made the next HDF5 write up to 3x slower.
    """
    mag = np.empty(min(_CHUNK, trace.size), dtype=trace.dtype)
    hit = np.empty(mag.size, dtype=bool)
    total = 0
    for start in range(0, trace.size, _CHUNK):
        part = trace[start : start + _CHUNK]
        m, h = mag[: part.size], hit[: part.size]
        np.abs(part, out=m)
        np.greater_equal(m, limit, out=h)
        total += int(np.count_nonzero(h))
    return total


class BackendDataError(QuietwellError, RuntimeError):
    """A backend returned a record that breaks its protocol (length, dtype, rate)."""


class _TraceDetector(StandardDetector):
    """Common machinery of :class:`MotionDetector` and :class:`HeterodyneDetector`."""

    _record_type: type = RecordData

    def __init__(
        self,
        backend: MotionBackend | HeterodyneBackend,
        path_provider: PathProvider,
        *,
        max_sample_rate_hz: float,
        max_record_length: int,
        input_ranges_v: Sequence[float],
        sample_rate_hz: float,
        record_length: int,
        input_range_v: float,
        key_prefix: str = "",
        name: str = "",
    ) -> None:
        check_real("max_sample_rate_hz", max_sample_rate_hz, 1e-9, math.inf, "Hz")
        check_int("max_record_length", max_record_length, 1, 2**40, "samples")
        if not input_ranges_v or not all(
            isinstance(r, int | float) and not isinstance(r, bool) and r > 0
            for r in input_ranges_v
        ):
            raise InputError(
                f"input_ranges_v={input_ranges_v!r} must list the digitiser's positive "
                "full-scale ranges in V, e.g. (0.2, 1.0, 5.0)"
            )
        if not isinstance(key_prefix, str):
            raise InputError(f"key_prefix={key_prefix!r} must be a str (may be empty)")
        self._backend = backend
        self._path_provider = path_provider
        self._prefix = key_prefix
        self._channels: tuple[str, ...] = self._record_type.CHANNELS
        self._max_rate = float(max_sample_rate_hz)
        self._file: TraceFile | None = None
        self._n_exposures = 1  # records per start_acquiring, set by prepare
        self._length_now = int(record_length)
        ranges = tuple(sorted(float(r) for r in input_ranges_v))

        async def _configure_rate(rate: float) -> None:
            await backend.configure(rate, await self.input_range.get_value())

        async def _configure_range(rng: float) -> None:
            await backend.configure(await self.sample_rate.get_value(), rng)

        async def _nothing(_: int) -> None:
            return None  # the length is passed with every record() call

        self.sample_rate, _ = checked_signal_rw(
            float, sample_rate_hz, units="Hz", check=self._check_rate, apply=_configure_rate
        )
        self.record_length, _ = checked_signal_rw(
            int,
            record_length,
            units="samples",
            check=lambda v: self._check_length(v, int(max_record_length)),
            apply=_nothing,
        )
        self.input_range, _ = checked_signal_rw(
            float,
            input_range_v,
            units="V",
            check=lambda v: check_choice("input_range", v, ranges, "V"),
            apply=_configure_range,
        )
        self.max_sample_rate = const_signal(self._max_rate, "Hz")
        # Results of the last record, shown in read() under the brief's key names.
        self.last_sample_rate, self._set_last_rate = soft_signal_r_and_setter(
            float, math.nan, units="Hz"
        )
        self.record_start_time, self._set_start = soft_signal_r_and_setter(
            float, math.nan, units="s"
        )
        self.clipped_samples, self._set_clipped = soft_signal_r_and_setter(int, 0, units="count")
        self.intensity_mean, self._set_mean = soft_signal_r_and_setter(float, math.nan, units="V")
        self.records_written, self._set_written = soft_signal_r_and_setter(int, 0, units="count")
        # Read on demand from the backend (every read asks it): for monitors.
        self.intensity = SignalR(
            backend=SoftSignalBackend(float, math.nan, units="V", getter=lambda: backend.read_intensity())
        )
        self.add_detector_logics(
            _TraceTriggerLogic(self),
            _TraceAcquireLogic(self),
            _TraceDataLogic(self),
            _ScalarDataLogic(self),
        )
        self.add_config_signals(
            self.sample_rate, self.record_length, self.input_range, self.max_sample_rate
        )
        super().__init__(name=name)

    # -- validation -------------------------------------------------------------------
    def _check_rate(self, value: Any) -> float:
        return check_real("sample_rate", value, 1e-9, self._max_rate, "Hz")

    def _check_length(self, value: Any, max_length: int) -> int:
        n = check_int("record_length", value, 1, max_length, "samples")
        if self._file is not None and n != self._file.record_length:
            raise InputError(
                f"record_length={n} cannot change while the detector is staged (file "
                f"{self._file.path.name} holds {self._file.record_length}-sample rows); "
                "unstage first"
            )
        return n

    # -- acquisition ------------------------------------------------------------------
    def key(self, field: str) -> str:
        """The data key of ``field`` (e.g. ``"trace_x"``) with this detector's prefix."""
        return f"{self._prefix}{field}"

    def _open_file(self) -> tuple[TraceFile, str]:
        info = self._path_provider(self.name)
        filename = f"{info.filename}.h5"
        tf = TraceFile(Path(info.directory_path) / filename, self._channels, self._length_now)
        self._file = tf
        self._set_written(0)
        return tf, f"{info.directory_uri}{filename}"

    def _close_file(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None

    async def _push_settings(self) -> None:
        await self._backend.configure(
            await self.sample_rate.get_value(), await self.input_range.get_value()
        )

    async def _acquire(self, n_records: int) -> None:
        for _ in range(n_records):
            await self._acquire_one()

    async def _acquire_one(self) -> None:
        tf = self._file
        if tf is None:
            raise RuntimeError(f"{self.name}: no HDF5 file open; prepare() or trigger() first")
        n = tf.record_length
        rec = await self._backend.record(n)
        traces = self._validated(rec, n)
        rng = await self.input_range.get_value()
        clipped = sum(_count_at_or_beyond(t, rng) for t in traces.values())
        tf.append(traces, float(rec.start_time_s), float(rec.sample_rate_hz))
        self._set_last_rate(float(rec.sample_rate_hz))
        self._set_start(float(rec.start_time_s))
        self._set_clipped(clipped)
        self._set_mean(float(np.mean(traces["intensity"], dtype=np.float64)))
        # Last: StandardDetector.trigger() waits on this counter.
        self._set_written(tf.records_written)

    def _validated(self, rec: Any, n: int) -> dict[str, np.ndarray]:
        if not isinstance(rec, self._record_type):
            raise BackendDataError(
                f"{self.name}: backend returned {type(rec).__name__}, expected "
                f"{self._record_type.__name__}; fix the backend's record()"
            )
        rate = rec.sample_rate_hz
        if not (isinstance(rate, int | float) and math.isfinite(rate) and rate > 0):
            raise BackendDataError(f"{self.name}: backend sample_rate_hz={rate!r} is not > 0")
        traces = {}
        for ch in self._channels:
            a = getattr(rec, ch)
            if not isinstance(a, np.ndarray) or a.dtype != np.float32 or a.shape != (n,):
                got = (
                    f"{a.dtype}{list(a.shape)}" if isinstance(a, np.ndarray) else type(a).__name__
                )
                raise BackendDataError(
                    f"{self.name}: backend channel {ch!r} is {got}, expected float32[{n}]; "
                    "fix the backend's record()"
                )
            traces[ch] = a
        return traces


class _TraceTriggerLogic(DetectorTriggerLogic):
    def __init__(self, det: _TraceDetector) -> None:
        self._det = det

    async def prepare_internal(self, num: int, livetime: float, deadtime: float) -> None:
        if livetime or deadtime:
            raise InputError(
                f"{self._det.name}: livetime={livetime} s and deadtime={deadtime} s are "
                "not settings of this detector; set sample_rate and record_length instead"
            )
        self._det._n_exposures = num

    async def default_trigger_info(self) -> TriggerInfo:
        return TriggerInfo()


class _TraceAcquireLogic(DetectorAcquireLogic):
    def __init__(self, det: _TraceDetector) -> None:
        self._det = det
        self._task: asyncio.Task | None = None

    async def ensure_ready(self) -> None:
        await self.ensure_stopped()
        # Every stage brings the digitiser to the device's settings.
        await self._det._push_settings()

    async def start_acquiring(self) -> None:
        n = self._det._n_exposures
        if n == 1:
            # Step scans: record inline so a backend error reaches the plan at once.
            await self._det._acquire(1)
        else:
            self._task = asyncio.create_task(self._det._acquire(n))

    async def wait_for_idle(self) -> None:
        if self._task is not None:
            await self._task
            self._task = None

    async def ensure_stopped(self) -> None:
        if self._task is not None:
            self._task.cancel()
            with suppress(asyncio.CancelledError):
                await self._task
            self._task = None


class _TraceStreamProvider(StreamResourceDataProvider):
    """Adds units and the plain ``[record_length]`` shape to ophyd-async's provider."""

    def __init__(self, *args: Any, record_length: int, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._n = record_length

    async def make_datakeys(self, collections_per_event: int) -> dict[str, DataKey]:
        keys = await super().make_datakeys(collections_per_event)
        shape = [self._n] if collections_per_event == 1 else [collections_per_event, self._n]
        for k in keys.values():
            k["shape"] = shape
            k["dtype"] = "array"
            k["units"] = "V"
        return keys


class _TraceDataLogic(DetectorDataLogic):
    datakey_suffix = "-traces"

    def __init__(self, det: _TraceDetector) -> None:
        self._det = det

    async def prepare_unbounded(self, datakey_name: str) -> StreamableDataProvider:
        det = self._det
        det._length_now = await det.record_length.get_value()
        tf, uri = det._open_file()
        n = tf.record_length
        resources = [
            StreamResourceInfo(
                data_key=det.key(f"trace_{ch}"),
                shape=(n,),
                chunk_shape=(1, n),
                dtype_numpy=np.dtype(np.float32).str,
                parameters={"dataset": tf.dataset_path(ch)},
            )
            for ch in det._channels
        ]
        return _TraceStreamProvider(
            uri=uri,
            resources=resources,
            mimetype="application/x-hdf5",
            collections_written_signal=det.records_written,
            record_length=n,
        )

    async def stop(self) -> None:
        self._det._close_file()


class _ScalarProvider(ReadableDataProvider):
    def __init__(self, det: _TraceDetector) -> None:
        self._signals: dict[str, SignalR] = {
            det.key("sample_rate"): det.last_sample_rate,
            det.key("record_start_time"): det.record_start_time,
            det.key("clipped_samples"): det.clipped_samples,
            det.key("intensity_mean"): det.intensity_mean,
        }

    async def make_datakeys(self) -> dict[str, DataKey]:
        out = {}
        for key, sig in self._signals.items():
            (dk,) = (await sig.describe()).values()
            out[key] = dk
        return out

    async def make_readings(self) -> dict[str, Reading]:
        out = {}
        for key, sig in self._signals.items():
            (r,) = (await sig.read(cached=False)).values()
            out[key] = r
        return out


class _ScalarDataLogic(DetectorDataLogic):
    datakey_suffix = "-scalars"

    def __init__(self, det: _TraceDetector) -> None:
        self._det = det

    async def prepare_single(self, datakey_name: str) -> ReadableDataProvider:
        return _ScalarProvider(self._det)

    def get_hinted_fields(self, datakey_name: str) -> Sequence[str]:
        return [self._det.key("intensity_mean")]


class MotionDetector(_TraceDetector):
    """Split (position-sensitive) detection of x, y, z and the total intensity.

    Parameters
    ----------
    backend : MotionBackend
        Digitiser (hardware or simulation).
    path_provider : ophyd_async.core.PathProvider
        Where each staged run's HDF5 file goes (the directory must exist; the tiled
        server must list it in ``readable_storage``).
    max_sample_rate_hz : float
        Largest allowed sampling rate in Hz.
    max_record_length : int
        Largest allowed record length in samples.
    input_ranges_v : sequence of float
        The digitiser's full-scale ranges (+/- V); ``input_range`` must be one of them.
    sample_rate_hz, record_length, input_range_v
        Initial settings (checked like every later set; sent to the backend at stage).
    key_prefix : str
        Prefix of every data key (default none: ``trace_x``, ``sample_rate``, ...).
    name : str
        Device name; also the name passed to the path provider.

    Notes
    -----
    Settings (configuration, each a ``SignalRW``): ``sample_rate`` (Hz),
    ``record_length`` (samples; fixed while staged), ``input_range`` (V). External
    data keys ``trace_x``, ``trace_y``, ``trace_z``, ``trace_intensity`` map to the
    HDF5 datasets ``/traces/x`` ... ``/traces/intensity``, each
    ``(n_records, record_length)`` float32.

    ``intensity`` (V) is the total-intensity level now, read from the backend on
    every read (``bps.rd(detector.intensity)``); it is not part of ``read()``, and
    ``intensity_mean`` (V) stays the mean over the last record.
    """

    _record_type = RecordData

    def __init__(self, backend: MotionBackend, path_provider: PathProvider, **kwargs: Any):
        super().__init__(backend, path_provider, **kwargs)


class HeterodyneDetector(_TraceDetector):
    """Heterodyne detection: one beat-note channel plus an intensity monitor.

    Takes the parameters of :class:`MotionDetector` (with a :class:`HeterodyneBackend`)
    plus

    carrier_frequency_hz : float
        Frequency offset between local oscillator and signal, in Hz; must stay below
        the Nyquist frequency ``sample_rate/2`` (checked on every sample-rate set).
    lo_offset_sign : int
        +1 if the local oscillator is shifted up in frequency relative to the signal,
        -1 if down. It fixes on which side of the carrier each mode's Stokes sideband
        appears.

    Both are configuration (``carrier_frequency`` in Hz, ``lo_offset_sign`` in 1).
    External data keys: ``trace_beat`` and ``trace_intensity`` (V), datasets
    ``/traces/beat`` and ``/traces/intensity``. The ``read()`` scalars are those of
    :class:`MotionDetector`.
    """

    _record_type = HeterodyneRecord

    def __init__(
        self,
        backend: HeterodyneBackend,
        path_provider: PathProvider,
        *,
        carrier_frequency_hz: float,
        lo_offset_sign: int,
        **kwargs: Any,
    ):
        check_real("carrier_frequency_hz", carrier_frequency_hz, 1e-9, math.inf, "Hz")
        if isinstance(lo_offset_sign, bool) or lo_offset_sign not in (1, -1):
            raise InputError(
                f"lo_offset_sign={lo_offset_sign!r} must be +1 (LO above the signal) "
                "or -1 (LO below)"
            )
        self._carrier = float(carrier_frequency_hz)
        super().__init__(backend, path_provider, **kwargs)
        self.carrier_frequency = const_signal(self._carrier, "Hz")
        self.lo_offset_sign = const_signal(int(lo_offset_sign), "1")
        self.add_config_signals(self.carrier_frequency, self.lo_offset_sign)
        # Children added after Device.__init__ need their names set again.
        self.set_name(self.name)

    def _check_rate(self, value: Any) -> float:
        rate = super()._check_rate(value)
        if self._carrier >= rate / 2:
            raise LimitError(
                f"sample_rate={rate:g} Hz puts the carrier {self._carrier:g} Hz at or above "
                f"the Nyquist frequency {rate / 2:g} Hz; sample faster than "
                f"{2 * self._carrier:g} Hz"
            )
        return rate
