"""One HDF5 file of traces per staged run, appended record by record (SWMR)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import h5py
import numpy as np

from .._errors import InputError

__all__ = ["TraceFile", "TRACE_GROUP"]

#: Group holding one ``(n_records, record_length)`` float32 dataset per channel.
TRACE_GROUP = "/traces"


class TraceFile:
    """Writer of ``/traces/<channel>`` (V) plus ``/records/start_time`` (s) and
    ``/records/sample_rate`` (Hz), one row per record.

    The file is created fresh (an existing file is never overwritten), switched to
    single-writer-multiple-reader mode, and flushed after every record so a reader
    (the tiled server) sees complete rows only.
    """

    def __init__(self, path: Path, channels: Sequence[str], record_length: int) -> None:
        if not path.parent.is_dir():
            raise InputError(
                f"HDF5 directory {str(path.parent)!r} does not exist; create it or point "
                "the detector's path provider at an existing directory"
            )
        if path.exists():
            raise InputError(
                f"HDF5 file {str(path)!r} already exists and is never overwritten; use a "
                "path provider that makes a new file name per run (e.g. UUIDFilenameProvider)"
            )
        self.path = path
        self.channels = tuple(channels)
        self.record_length = int(record_length)
        self.records_written = 0
        self._file = h5py.File(path, "w", libver="latest")
        n = self.record_length
        self._traces = {
            ch: self._file.create_dataset(
                f"{TRACE_GROUP}/{ch}",
                shape=(0, n),
                maxshape=(None, n),
                chunks=(1, n),
                dtype=np.float32,
            )
            for ch in self.channels
        }
        for ds in self._traces.values():
            ds.attrs["units"] = "V"
        self._start = self._file.create_dataset(
            "/records/start_time", shape=(0,), maxshape=(None,), chunks=(1024,), dtype="f8"
        )
        self._start.attrs["units"] = "s"
        self._rate = self._file.create_dataset(
            "/records/sample_rate", shape=(0,), maxshape=(None,), chunks=(1024,), dtype="f8"
        )
        self._rate.attrs["units"] = "Hz"
        # Datasets must exist before SWMR mode is switched on.
        self._file.swmr_mode = True

    def dataset_path(self, channel: str) -> str:
        return f"{TRACE_GROUP}/{channel}"

    def append(
        self, traces: Mapping[str, np.ndarray], start_time_s: float, sample_rate_hz: float
    ) -> None:
        """Append one record (every channel, already validated) and flush."""
        i = self.records_written
        for ch, ds in self._traces.items():
            ds.resize(i + 1, axis=0)
            ds[i] = traces[ch]
            ds.flush()
        for ds, value in ((self._start, start_time_s), (self._rate, sample_rate_hz)):
            ds.resize(i + 1, axis=0)
            ds[i] = value
            ds.flush()
        self.records_written = i + 1

    def close(self) -> None:
        self._file.close()
