"""The embedded store: a tiled server that quietwell starts in a local data directory.

Layout of a data directory::

    DIR/catalog/   tiled's SQLite catalog (catalog.db), event tables and logs
    DIR/raw/       HDF5 files of the raw traces, registered as external assets
    DIR/backup/    JSON-lines copies of runs the writer could not deliver
    DIR/journal/   every document of every run, flushed as it is emitted

Documents go through ``bluesky_tiled_plugins.TiledWriter``. Each catalog write costs
an HTTP round trip of tens of milliseconds, and a run needs about 20 of them whatever
its length (nodes, data sources, the stop, closing the streams; see
bench/RESULTS-store.md), so

* the server runs in its own process (:mod:`quietwell.store._serve`), on the other
  core and with its own interpreter lock;
* the writer runs there too and batches ``batch_size`` rows: the acquisition only
  journals each document and passes the same JSON line to that process;
* the journal keeps every document on local disk as it is emitted, so a run whose
  process dies is rebuilt with :meth:`EmbeddedStore.recover` and nothing completed is
  lost;
* the acquisition never waits for the catalog: a plan returns as soon as its stop
  document is journalled and the catalog finishes the run on the other core, while
  the next run already acquires. Reading through the store waits for it:
  :attr:`EmbeddedStore.client` and :meth:`EmbeddedStore.wait` return once the
  catalog holds every run given to it, and :meth:`EmbeddedStore.close` finishes them
  all. A run the catalog could not take is reported there (and logged when it
  happens), with the command that rebuilds it from the journal.

The server lists ``DIR/raw`` in its readable storage (without it, registration succeeds
but every read fails).
"""

from __future__ import annotations

import atexit
import json
import logging
import os
import queue
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from .._errors import InputError, QuietwellError
from ._journal import Journal, _jsonable

__all__ = ["EmbeddedStore", "open_catalog", "close_catalog"]


class EmbeddedStore:
    """A tiled server on a local data directory, with the writer that fills it.

    Use it as a context manager (the catalog runs in a child process, which must be
    finished and stopped even when a run fails)::

        with EmbeddedStore("quietwell-data") as store:
            RE.subscribe(store.writer)
            (uid,) = RE(plan)
            run = store.client[uid]   # waits until the catalog holds the run
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
        self._server: _CatalogProcess | None = None
        self._client: Any = None
        self.writer: Any = None

    def open(self) -> EmbeddedStore:
        """Start the server and the writer (idempotent)."""
        if self._server is not None:
            return self
        make_store_dirs(self, "choose a writable directory")
        from bluesky_tiled_plugins import TiledWriter
        from tiled.client import from_uri

        journal = Journal(self.journal_dir)
        self._server = _CatalogProcess(
            self.catalog_dir, [str(self.catalog_dir), str(self.raw_dir), str(self.backup_dir),
                               str(self.batch_size)], on_done=journal.finish)
        self._uri = self._server.uri
        atexit.register(self.close)
        self._client = from_uri(self._uri)
        # In this process only for recovery from the journal.
        self._writer_factory = lambda: TiledWriter(self._client, batch_size=self.batch_size,
                                                   backup_directory=str(self.backup_dir))
        self.writer = _StoreWriter(journal, self._server)
        return self

    @property
    def client(self) -> Any:
        """The tiled client of the store, once the catalog holds every run given to it.

        Raises :class:`QuietwellError` (once) for a run the catalog could not take.
        """
        self.wait()
        return self._client

    def wait(self, timeout: float | None = None) -> None:
        """Block until the catalog holds every run whose documents it was given.

        Raises :class:`QuietwellError` if the catalog could not take some run since the
        last call (every document of it is in the journal; the message says how to
        rebuild it), if the catalog process has ended, or after ``timeout`` seconds.
        """
        if self._server is None:
            raise RuntimeError("the store is not open")
        failed = self._server.wait(timeout)
        if failed:
            raise QuietwellError(_refused(failed, self.journal_dir, self.data_dir))

    def recover(self) -> list[str]:
        """Rebuild in the catalog every run whose journal has no stop document.

        Returns the uids of the recovered runs (their stop says ``exit_status="abort"``).
        """
        from ._journal import replay_journal, unfinished_runs

        self.wait()
        uids = []
        for path in unfinished_runs(self.journal_dir):
            uids.append(replay_journal(path, self._client, self._writer_factory))
            path.rename(path.with_suffix(".recovered.jsonl"))
        return uids

    @property
    def uri(self) -> str:
        """The server's URI (with its API key) while it runs."""
        if self._server is None:
            raise RuntimeError("the store is not open")
        return self._uri

    def close(self) -> dict[str, str]:
        """Finish the catalog writes and stop the server (idempotent).

        Returns the runs the catalog could not take, ``{uid: reason}`` (also logged).
        """
        server, self._server = self._server, None
        if server is None:
            return {}
        failed = server.stop()
        if failed:
            _log.error(_refused(failed, self.journal_dir, self.data_dir))
        return failed

    def __enter__(self) -> EmbeddedStore:
        return self.open()

    def __exit__(self, exc_type: type | None, *exc: object) -> None:
        failed = self.close()
        if failed and exc_type is None:
            raise QuietwellError(_refused(failed, self.journal_dir, self.data_dir))


def make_store_dirs(store: Any, fix: str) -> None:
    """Create the folders of a store's data directory, or refuse in one line."""
    if store.data_dir.exists() and not store.data_dir.is_dir():
        raise InputError(f"--data-dir {store.data_dir} is a file, not a directory; "
                         "give a directory (it is created if missing)")
    try:
        for d in (store.raw_dir, store.catalog_dir, store.backup_dir, store.journal_dir):
            d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{exc.filename or store.data_dir}: cannot create it "
                         f"({exc.strerror}); {fix}") from None


def _refused(failed: dict[str, str], journal_dir: Path, data_dir: Path) -> str:
    runs = "; ".join(f"{uid} ({reason})" for uid, reason in failed.items())
    return (f"the catalog could not take run(s) {runs}; every document is in the journal "
            f"{journal_dir}: rebuild them with `quietwell recover --data-dir {data_dir}`")


_log = logging.getLogger("quietwell.store")

#: Seconds to wait for the catalog process to start / to finish and exit.
_START_TIMEOUT_S = 120.0
_STOP_TIMEOUT_S = 600.0


class _CatalogProcess:
    """The child process of :mod:`quietwell.store._serve`: server, writer, replies.

    Keeps the set of runs sent to it and not yet written. A reader thread takes the
    replies: ``done`` calls ``on_done(uid)`` (the journal marks the run complete),
    ``failed`` keeps the reason until :meth:`wait` reports it.
    """

    def __init__(self, catalog_dir: Path, args: list[str], on_done: Callable[[str], None],
                 env: dict[str, str] | None = None) -> None:
        self.log_path = catalog_dir / "server.log"
        self._on_done = on_done
        self._cond = threading.Condition()
        self._pending: set[str] = set()
        self._failed: dict[str, str] = {}
        self._ended = False
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "quietwell.store._serve", *args, str(os.getpid())],
                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=log, text=True,
                env={**os.environ, **(env or {}), "PYTHONUNBUFFERED": "1"},
            )
        self._uri: queue.Queue = queue.Queue()
        self._reader = threading.Thread(target=self._read, name="quietwell-catalog-replies",
                                        daemon=True)
        self._reader.start()
        try:
            self.uri = self._uri.get(timeout=_START_TIMEOUT_S)
        except queue.Empty:
            self.uri = None
        if self.uri is None:
            self.stop()
            tail = self._log_tail()
            if tail.startswith("quietwell: "):  # the process's own one-line diagnosis
                raise QuietwellError(tail.removeprefix("quietwell: "))
            raise QuietwellError(f"the catalog process ended or did not answer "
                                 f"({tail}); see {self.log_path}")

    def _log_tail(self) -> str:
        tail = self.log_path.read_text(errors="replace").strip().splitlines()[-1:]
        return " ".join(tail) or "no output"

    def _read(self) -> None:
        for line in self.proc.stdout:
            word, _, rest = line.rstrip("\n").partition(" ")
            if word == "uri":
                self._uri.put(rest)
                continue
            uid, _, reason = rest.partition(" ")
            if word == "done":
                try:
                    self._on_done(uid)
                except OSError as exc:  # the journal stays unfinished: recover redoes it
                    _log.error("journal of run %s not marked complete: %s", uid, exc)
            else:
                _log.error("the catalog could not take run %s (%s); its journal keeps it",
                           uid, reason)
            with self._cond:
                self._pending.discard(uid)
                if word != "done":
                    self._failed[uid] = reason or "unknown error"
                self._cond.notify_all()
        self._uri.put(None)  # the process ended (before its URI, if it never started)
        with self._cond:
            self._ended = True
            self._cond.notify_all()

    def send(self, line: str, *, start_of: str | None = None, flush: bool = False) -> None:
        """Pass one journal line on; ``start_of`` a run's uid, ``flush`` at its stop."""
        if start_of is not None:
            with self._cond:
                self._pending.add(start_of)
        try:
            self.proc.stdin.write(line)
            if flush:
                self.proc.stdin.flush()
        except (BrokenPipeError, ValueError, OSError):
            raise QuietwellError(f"the catalog process has ended; every document is in the "
                                 f"journal; see {self.log_path}") from None

    def wait(self, timeout: float | None = None) -> dict[str, str]:
        """Block until no run is pending; return (and forget) the runs that failed."""
        try:
            self.proc.stdin.flush()
        except (BrokenPipeError, ValueError, OSError):
            pass  # the process has ended: reported below
        with self._cond:
            if not self._cond.wait_for(lambda: not self._pending or self._ended, timeout):
                raise QuietwellError(
                    f"the catalog has not finished {len(self._pending)} run(s) after "
                    f"{timeout:g} s; see {self.log_path}")
            if self._pending:
                lost = ", ".join(sorted(self._pending))
                raise QuietwellError(f"the catalog process ended before writing run(s) "
                                     f"{lost} ({self._log_tail()}); see {self.log_path}")
            failed, self._failed = self._failed, {}
        return failed

    def stop(self) -> dict[str, str]:
        """Let the process finish what it was given, then end it; the runs that failed."""
        try:
            self.proc.stdin.close()
        except OSError:
            pass
        try:
            self.proc.wait(timeout=_STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self._reader.join(timeout=10.0)
        with self._cond:
            failed, self._failed = self._failed, {}
            for uid in self._pending:  # never written: the journal keeps them unfinished
                failed[uid] = "the catalog process ended before writing it"
            self._pending.clear()
        return failed


class _StoreWriter:
    """Journal first, then the document to the catalog process; never wait for it.

    The acquisition pays for one JSON serialisation per document, written to the
    journal and to the pipe, and a flush of the pipe at each stop document. The
    journal of a run is marked complete only when the catalog has written the whole
    run; if the catalog could not take it, the journal stays unfinished (so
    :meth:`EmbeddedStore.recover` rebuilds it) and :meth:`EmbeddedStore.wait` says so.
    """

    def __init__(self, journal: Journal, catalog: _CatalogProcess) -> None:
        self.journal, self._catalog = journal, catalog

    def __call__(self, name: str, doc: dict) -> None:
        line = json.dumps([name, doc], default=_jsonable)  # serialised once, for both
        uid = self.journal(name, doc, finish=False, line=line)
        self._catalog.send(f"{uid or ''}\t{line}\n",
                           start_of=uid if name == "start" else None, flush=name == "stop")


_OPEN: dict[Path, EmbeddedStore] = {}


def open_catalog(dir_or_uri: str | Path, *, api_key_env: str | None = None) -> Any:
    """The tiled client of a quietwell store.

    Parameters
    ----------
    dir_or_uri : str or Path
        A data directory written by quietwell (an embedded server is started on it and
        stopped at exit; a data directory whose runs went to the lab's catalog server,
        see ``store.json`` in it, opens that server), or the URI of a running tiled
        server (``http://...``).
    api_key_env : str, optional
        Name of the environment variable with the server's API key (default: the one
        the data directory's ``store.json`` names, else ``QUIETWELL_API_KEY``; an
        unset variable means no key).

    Returns
    -------
    tiled.client container
        ``client[uid]["primary"]``, ``["fits"]``, ``["summary"]`` of each run.
    """
    text = str(dir_or_uri)
    path = Path(text).expanduser().resolve()
    if not text.startswith(("http://", "https://")) and (path / "store.json").exists():
        info = json.loads((path / "store.json").read_text(encoding="utf-8"))
        text = info["uri"]
        api_key_env = api_key_env or info.get("api_key_env") or None
    if text.startswith(("http://", "https://")):
        from tiled.client import from_uri

        key = os.environ.get(api_key_env or "QUIETWELL_API_KEY") or None
        try:
            return from_uri(text, api_key=key)
        except Exception as exc:  # noqa: BLE001 - tiled's client errors: one line
            from ._server import explain_http_error

            raise QuietwellError(f"{text}: {explain_http_error(exc)}") from None
    if not (path / "catalog" / "catalog.db").exists():
        raise InputError(f"{path} is not a quietwell data directory (no catalog/catalog.db); "
                         "give the --data-dir of a run, or a tiled server URI")
    store = _OPEN.get(path)
    if store is None:
        store = _OPEN[path] = EmbeddedStore(path).open()
    return store.client


def close_catalog(data_dir: str | Path) -> None:
    """Stop the embedded server that :func:`open_catalog` started on ``data_dir``.

    The data directory is then free for another process (one catalog process per data
    directory: a campaign run or resumed elsewhere waits for it).
    """
    store = _OPEN.pop(Path(data_dir).expanduser().resolve(), None)
    if store is not None:
        store.close()
