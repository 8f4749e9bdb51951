"""Follow a run's documents and hand each record's traces to a consumer.

Raw traces travel as external HDF5 assets (``stream_resource`` + ``stream_datum``),
never inline. :class:`TraceFeed` resolves them: when a ``primary`` event arrives it
reads the slices its stream datums named (SWMR, as the writer is still appending) and
calls ``consumer(seq_num, traces, data)``. It works the same for any
detector that emits the standard documents, and for replays of stored runs.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from urllib.parse import unquote, urlparse

import h5py
import numpy as np
from event_model import DocumentRouter

__all__ = ["TraceFeed"]

Consumer = Callable[[int, dict[str, np.ndarray], dict], None]


def _path_of(uri: str) -> Path:
    parsed = urlparse(uri)
    return Path(unquote(parsed.path)) if parsed.scheme in ("file", "") else Path(uri)


class TraceFeed(DocumentRouter):
    """Document router that delivers the traces of each ``primary`` event.

    Parameters
    ----------
    consumer : callable
        ``consumer(seq_num, traces, data)``: ``traces`` maps each external data key
        (``"trace_x"``, ..., ``"het_trace_beat"``) to its array in V, ``data`` is the
        event's scalar data (``sample_rate`` in Hz, ...).
    marker : str
        Only data keys containing ``marker`` are read (``"trace_"``).
    """

    def __init__(
        self, consumer: Consumer, marker: str = "trace_", stream_name: str = "primary"
    ) -> None:
        super().__init__()
        self.consumer, self.marker, self.stream_name = consumer, marker, stream_name
        self._reset()

    def _reset(self) -> None:
        self._resources: dict[str, dict] = {}
        self._pending: dict[str, tuple[dict, int, int]] = {}
        self._descriptors: set[str] = set()
        self._files: dict[Path, h5py.File] = {}

    def start(self, doc):
        self._close_files()
        self._reset()
        return doc

    def descriptor(self, doc):
        if doc.get("name") == self.stream_name:
            self._descriptors.add(doc["uid"])
        return doc

    def stream_resource(self, doc):
        if self.marker in str(doc.get("data_key", "")):
            self._resources[doc["uid"]] = doc
        return doc

    def stream_datum(self, doc):
        res = self._resources.get(doc["stream_resource"])
        if res is not None:
            idx = doc["indices"]
            self._pending[res["data_key"]] = (res, int(idx["start"]), int(idx["stop"]))
        return doc

    def event(self, doc):
        if doc["descriptor"] not in self._descriptors or not self._pending:
            return doc
        traces = {
            key: self._read(res, start, stop) for key, (res, start, stop) in self._pending.items()
        }
        self._pending = {}
        self.consumer(int(doc["seq_num"]), traces, dict(doc["data"]))
        return doc

    def stop(self, doc):
        self._close_files()
        return doc

    def _read(self, res: dict, start: int, stop: int) -> np.ndarray:
        path = _path_of(res["uri"])
        f = self._files.get(path)
        if f is None:
            f = self._files[path] = h5py.File(path, "r", libver="latest", swmr=True)
        dset = f[res["parameters"]["dataset"]]
        dset.refresh()
        return np.asarray(dset[start:stop]).reshape(-1)

    def _close_files(self) -> None:
        for f in getattr(self, "_files", {}).values():
            try:
                f.close()
            except Exception:  # noqa: BLE001 - a closed or vanished file is fine here
                pass
