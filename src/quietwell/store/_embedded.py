"""The embedded store: a tiled server that quietwell starts in a local data directory.

Layout of a data directory::

    DIR/catalog/   tiled's SQLite catalog (catalog.db), event tables and logs
    DIR/raw/       HDF5 files of the raw traces, registered as external assets
    DIR/backup/    JSON-lines copies of runs the writer could not deliver
    DIR/journal/   every document of every run, flushed as it is emitted

Documents go through ``bluesky_tiled_plugins.TiledWriter``. Each catalog write costs
HTTP round trips (about 0.2 s per 4-channel record with ``batch_size=1``, see
bench/RESULTS-store.md), so the writer batches ``batch_size`` rows; the journal keeps
every document on local disk as it is emitted, so a run whose process dies is rebuilt
with :meth:`EmbeddedStore.recover` and nothing completed is lost. The server lists
``DIR/raw`` in its readable storage (without it, registration succeeds but every read
fails).
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

from .._errors import InputError
from ._journal import Journal

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

    def __init__(self, data_dir: str | Path, *, batch_size: int = 10) -> None:
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
        from tiled.server import SimpleTiledServer

        self._server = SimpleTiledServer(directory=self.catalog_dir,
                                         readable_storage=[self.raw_dir])
        # close before the interpreter joins non-daemon threads, or it would hang
        threading._register_atexit(self.close)  # type: ignore[attr-defined]
        self.client = from_uri(self._server.uri)
        self._writer_factory = lambda: TiledWriter(self.client, batch_size=self.batch_size,
                                                   backup_directory=str(self.backup_dir))
        self.writer = _JournaledWriter(Journal(self.journal_dir), self._writer_factory())
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
        return self._server.uri

    def close(self) -> None:
        """Stop the server (idempotent)."""
        server, self._server = self._server, None
        if server is not None:
            server.close()

    def __enter__(self) -> EmbeddedStore:
        return self.open()

    def __exit__(self, *exc: object) -> None:
        self.close()


class _JournaledWriter:
    """Journal first (local, flushed), then the catalog writer."""

    def __init__(self, journal: Journal, writer: Any) -> None:
        self.journal, self.tiled = journal, writer

    def __call__(self, name: str, doc: dict) -> None:
        self.journal(name, doc)
        self.tiled(name, doc)


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
