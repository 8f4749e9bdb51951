"""The embedded store: a tiled server that quietwell starts in a local data directory.

Layout of a data directory::

    DIR/catalog/   tiled's SQLite catalog (catalog.db), event tables and logs
    DIR/raw/       HDF5 files of the raw traces, registered as external assets
    DIR/backup/    JSON-lines copies of runs the writer could not deliver
    DIR/journal/   every document of every run, flushed as it is emitted

Documents go through ``bluesky_tiled_plugins.TiledWriter``. Each catalog write costs
HTTP round trips of tens of milliseconds (about 0.2 s per 4-channel record with
``batch_size=1``, see bench/RESULTS-store.md), so

* the server runs in its own process (:mod:`quietwell.store._serve`), on the other
  core and with its own interpreter lock;
* the writer runs there too and batches ``batch_size`` rows: the acquisition only
  journals each document and passes the same JSON line to that process;
* the journal keeps every document on local disk as it is emitted, so a run whose
  process dies is rebuilt with :meth:`EmbeddedStore.recover` and nothing completed is
  lost;
* at each stop document the acquisition waits until the catalog holds the whole run,
  so a run is readable from the catalog as soon as the plan returns.

The server lists ``DIR/raw`` in its readable storage (without it, registration succeeds
but every read fails).
"""

from __future__ import annotations

import atexit
import json
import os
import queue
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

from .._errors import InputError, QuietwellError
from ._journal import Journal, _jsonable

__all__ = ["EmbeddedStore", "open_catalog"]


class EmbeddedStore:
    """A tiled server on a local data directory, with the writer that fills it.

    Use it as a context manager (the server runs in a non-daemon thread, which must be
    closed even when a run fails)::

        with EmbeddedStore("quietwell-data") as store:
            RE.subscribe(store.writer)
            ...
            run = store.client[uid]
    """

    def __init__(self, data_dir: str | Path, *, batch_size: int = 100) -> None:
        self.data_dir = Path(data_dir).expanduser().resolve()
        self.raw_dir = self.data_dir / "raw"
        self.catalog_dir = self.data_dir / "catalog"
        self.backup_dir = self.data_dir / "backup"
        self.journal_dir = self.data_dir / "journal"
        if isinstance(batch_size, bool) or not isinstance(batch_size, int) or batch_size < 1:
            raise InputError(f"{batch_size=} must be an integer >= 1 (1 writes every row at "
                             "once; larger batches are faster, the journal keeps them safe)")
        self.batch_size = batch_size
        self._server: Any = None
        self.client: Any = None
        self.writer: Any = None

    def open(self) -> EmbeddedStore:
        """Start the server and the writer (idempotent)."""
        if self._server is not None:
            return self
        if self.data_dir.exists() and not self.data_dir.is_dir():
            raise InputError(f"--data-dir {self.data_dir} is a file, not a directory; "
                             "give a directory (it is created if missing)")
        try:
            for d in (self.raw_dir, self.catalog_dir, self.backup_dir, self.journal_dir):
                d.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"--data-dir {self.data_dir}: cannot create it ({exc.strerror}); "
                             "choose a writable directory") from None
        from bluesky_tiled_plugins import TiledWriter
        from tiled.client import from_uri

        self._server = _CatalogProcess(self.catalog_dir, self.raw_dir, self.backup_dir,
                                       self.batch_size)
        self._uri = self._server.uri
        atexit.register(self.close)
        self.client = from_uri(self._uri)
        # In this process only for recovery from the journal.
        self._writer_factory = lambda: TiledWriter(self.client, batch_size=self.batch_size,
                                                   backup_directory=str(self.backup_dir))
        self.writer = _StoreWriter(Journal(self.journal_dir), self._server, self.data_dir)
        return self

    def recover(self) -> list[str]:
        """Rebuild in the catalog every run whose journal has no stop document.

        Returns the uids of the recovered runs (their stop says ``exit_status="abort"``).
        """
        from ._journal import replay_journal, unfinished_runs

        uids = []
        for path in unfinished_runs(self.journal_dir):
            uids.append(replay_journal(path, self.client, self._writer_factory))
            path.rename(path.with_suffix(".recovered.jsonl"))
        return uids

    @property
    def uri(self) -> str:
        """The server's URI (with its API key) while it runs."""
        if self._server is None:
            raise RuntimeError("the store is not open")
        return self._uri

    def close(self) -> None:
        """Finish the catalog writes and stop the server (idempotent)."""
        server, self._server = self._server, None
        if server is not None:
            server.stop()

    def __enter__(self) -> EmbeddedStore:
        return self.open()

    def __exit__(self, *exc: object) -> None:
        self.close()


#: Seconds to wait for the catalog process to start / to finish and exit.
_START_TIMEOUT_S = 120.0
_STOP_TIMEOUT_S = 120.0


class _CatalogProcess:
    """The child process of :mod:`quietwell.store._serve`: server, writer, replies."""

    def __init__(self, catalog_dir: Path, raw_dir: Path, backup_dir: Path, batch_size: int):
        self.log_path = catalog_dir / "server.log"
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "quietwell.store._serve", str(catalog_dir),
                 str(raw_dir), str(backup_dir), str(batch_size)],
                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=log, text=True,
                env={**os.environ, "PYTHONUNBUFFERED": "1"},
            )
        self._replies: queue.Queue = queue.Queue()
        self._reader = threading.Thread(target=self._read, name="quietwell-catalog-replies",
                                        daemon=True)
        self._reader.start()
        self.uri = self._expect("uri", _START_TIMEOUT_S)

    def _read(self) -> None:
        for line in self.proc.stdout:
            self._replies.put(line.rstrip("\n"))
        self._replies.put(None)  # the process ended

    def _expect(self, word: str, timeout: float | None) -> str:
        try:
            line = self._replies.get(timeout=timeout)
        except queue.Empty:
            line = None
        if line is None or not line.startswith(word + " "):
            self.stop()
            tail = self.log_path.read_text(errors="replace").strip().splitlines()[-1:]
            raise QuietwellError(
                f"the catalog process ended or did not answer ({' '.join(tail) or 'no output'}); "
                f"see {self.log_path}"
            )
        return line[len(word) + 1 :]

    def send(self, line: str) -> None:
        try:
            self.proc.stdin.write(line)
        except (BrokenPipeError, ValueError):
            raise QuietwellError(f"the catalog process has ended; see {self.log_path}") from None

    def wait_for_run(self, uid: str) -> str | None:
        """Block until the process has written run ``uid``; None, or why it failed."""
        try:
            self.proc.stdin.flush()
        except (BrokenPipeError, ValueError):
            raise QuietwellError(f"the catalog process has ended; see {self.log_path}") from None
        while True:
            line = self._replies.get()
            if line is None:
                raise QuietwellError(f"the catalog process ended while writing run {uid}; "
                                     f"see {self.log_path}")
            word, _, rest = line.partition(" ")
            got, _, reason = rest.partition(" ")
            if got == uid:
                return None if word == "done" else reason or "unknown error"

    def stop(self) -> None:
        try:
            self.proc.stdin.close()
        except OSError:
            pass
        try:
            self.proc.wait(timeout=_STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


class _StoreWriter:
    """Journal first, then the document to the catalog process; wait at each stop.

    The acquisition pays for one JSON serialisation per document, written to the
    journal and to the pipe. At a stop document it waits until the catalog process has written the
    whole run; if the catalog could not take the run, its journal is left unfinished
    (so :meth:`EmbeddedStore.recover` rebuilds it) and the stop raises a
    :class:`QuietwellError` saying so.
    """

    def __init__(self, journal: Journal, catalog: _CatalogProcess, data_dir: Path) -> None:
        self.journal, self._catalog, self._data_dir = journal, catalog, data_dir

    def __call__(self, name: str, doc: dict) -> None:
        line = json.dumps([name, doc], default=_jsonable)  # serialised once, for both
        uid = self.journal(name, doc, finish=False, line=line)
        self._catalog.send(f"{uid or ''}\t{line}\n")
        if name == "stop":
            uid = doc.get("run_start")
            error = self._catalog.wait_for_run(uid)
            if error is not None:
                raise QuietwellError(
                    f"the catalog could not take run {uid} ({error}); every document is in "
                    f"the journal {self.journal.directory}: rebuild the run with `quietwell "
                    f"recover --data-dir {self._data_dir}`"
                )
            self.journal.finish(uid)


_OPEN: dict[Path, EmbeddedStore] = {}


def open_catalog(dir_or_uri: str | Path) -> Any:
    """The tiled client of a quietwell store.

    Parameters
    ----------
    dir_or_uri : str or Path
        A data directory written by quietwell (an embedded server is started on it and
        stopped at exit), or the URI of a running tiled server (``http://...``).

    Returns
    -------
    tiled.client container
        ``client[uid]["primary"]``, ``["fits"]``, ``["summary"]`` of each run.
    """
    text = str(dir_or_uri)
    if text.startswith(("http://", "https://")):
        from tiled.client import from_uri

        return from_uri(text)
    path = Path(text).expanduser().resolve()
    if not (path / "catalog" / "catalog.db").exists():
        raise InputError(f"{path} is not a quietwell data directory (no catalog/catalog.db); "
                         "give the --data-dir of a run, or a tiled server URI")
    store = _OPEN.get(path)
    if store is None:
        store = _OPEN[path] = EmbeddedStore(path).open()
    return store.client
