"""Opening a store to read: a data directory in this process, or a tiled server.

A data directory (``DIR/catalog/catalog.db``, ``DIR/catalog/storage.duckdb``,
``DIR/raw/*.h5``) is served in this process, without a web server, a catalog process
or ``tiled catalog init``:

* the SQLite catalog is opened read-only (``mode=ro``): nothing here can write to it,
  and SQLite lets it be read while a writer's catalog process fills it;
* the event tables (DuckDB) are never opened where they are: DuckDB lets no other
  process open a file that one process holds, so a reader holding it would stop a
  campaign's catalog process from starting, and a running campaign's catalog process
  (it keeps the file open) would stop the reader. The reader opens, read-only, a copy
  of the file and its write-ahead log (taken again when either changed, and until
  neither changed while it was copied: 3 MB for 100 runs), in a temporary folder
  removed at exit. The writer's ``catalog.lock`` is never taken;
* the listing (:mod:`._catalog_sql`) reads the catalog and a copy of the event tables
  with :mod:`sqlite3` and :mod:`duckdb` alone, without importing tiled (whose catalog
  adapter takes seconds to import); the client and the fallback use tiled's adapter;
* the raw traces are read from ``DIR/raw`` (the only readable file storage), in HDF5's
  single-writer-multiple-reader mode, so a file being written is readable too.

A URI is opened with tiled's client; its API key comes from an environment variable
(never from the command line, never printed).
"""

from __future__ import annotations

import atexit
import contextlib
import dataclasses
import io
import os
import shutil
import tempfile
import threading
from collections.abc import Callable, Coroutine
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit, urlunsplit

from .._errors import InputError

__all__ = ["open_store", "LocalStore", "DEFAULT_API_KEY_ENV", "resolve"]

#: The environment variable the API key of a tiled server is read from by default.
DEFAULT_API_KEY_ENV = "QUIETWELL_API_KEY"


def _public_uri(uri: str) -> str:
    """``uri`` without credentials or query (an ``api_key=...`` may be in either)."""
    try:
        parts = urlsplit(uri)
        host = parts.hostname or ""
        if parts.port:
            host = f"{host}:{parts.port}"
        return urlunsplit((parts.scheme, host, parts.path, "", ""))
    except ValueError:
        return "the URI given"


def _is_uri(text: str) -> bool:
    return text.startswith(("http://", "https://"))


class LocalStore:
    """A quietwell data directory opened read-only in this process.

    :attr:`client` is the standard tiled client (made with ``Context.from_app``, so
    everything tiled's client does works, raw traces included). The listing and the
    tables read the catalog's files directly (:mod:`._catalog_sql`, no tiled import),
    or, for a catalog of another layout, go to tiled's catalog adapter
    (:meth:`run`), which is still several times faster than a request per run.
    Nothing of tiled is imported until :meth:`run` or :attr:`client` is used.
    """

    def __init__(self, data_dir: str | Path) -> None:
        self.data_dir = Path(data_dir).expanduser().resolve()
        self.location = str(self.data_dir)
        self._client: Any = None
        self._portal_cm: Any = None
        self._portal: Any = None
        self._adapter: Any = None
        self._lock = threading.Lock()
        catalog = self.data_dir / "catalog" / "catalog.db"
        if not self.data_dir.exists():
            raise InputError(f"--data-dir {self.data_dir} does not exist; give the data "
                             "directory a campaign or `quietwell demo` wrote to")
        if not self.data_dir.is_dir():
            raise InputError(f"--data-dir {self.data_dir} is a file, not a directory; give "
                             "the data directory a campaign or `quietwell demo` wrote to")
        if not catalog.is_file():
            raise InputError(f"--data-dir {self.data_dir} holds no quietwell store (no "
                             "catalog/catalog.db); give the data directory a campaign or "
                             "`quietwell demo` wrote to, or a tiled server with --uri")
        os.environ.setdefault("TILED_HDF5_SWMR_DEFAULT", "1")
        #: copies of the event tables, shared by tiled's adapter and the direct listing
        self.snapshots = _Snapshots(self.data_dir / "catalog" / "storage.duckdb")
        self._registered = False

    def _make_adapter(self) -> Any:
        from tiled.catalog import from_uri

        if not self._registered:  # tiled is imported only when its adapter is wanted
            _register_event_tables(self.data_dir / "catalog", self.snapshots)
            self._registered = True
        db = self.data_dir / "catalog" / "catalog.db"
        # mode=ro: SQLite refuses every write, so this reader cannot change the catalog.
        # readable: the raw traces, and the arrays the catalog process wrote into its own
        # writable storage (catalog/data: array fields of small streams such as ensemble)
        return from_uri(f"sqlite:///file:{db}?mode=ro&uri=true",
                        readable_storage=[str(self.data_dir / "raw"),
                                          str(self.data_dir / "catalog" / "data")])

    def run(self, func: Callable[..., Coroutine], *args: Any) -> Any:
        """Run ``await func(adapter, *args)`` on this store's event loop."""
        with self._lock:
            if self._portal is None:
                from anyio.from_thread import start_blocking_portal

                self._portal_cm = start_blocking_portal()
                self._portal = self._portal_cm.__enter__()
                self._adapter = self._make_adapter()
                self._portal.call(self._adapter.startup)
                atexit.register(self.close)
        return self._portal.call(func, self._adapter, *args)

    @property
    def client(self) -> Any:
        """The tiled client of the store (built on first use, about 1 s)."""
        if self._client is None:
            from tiled.client import from_context
            from tiled.client.context import Context
            from tiled.server.app import build_app

            app = build_app(self._make_adapter())
            self._client = from_context(Context.from_app(app))
        return self._client

    def close(self) -> None:
        """Release the catalog and the event loop (idempotent)."""
        with self._lock:
            portal, self._portal = self._portal, None
            if portal is not None:
                try:
                    portal.call(self._adapter.shutdown)
                except Exception:  # noqa: BLE001 - closing at exit; nothing to save
                    pass
                self._portal_cm.__exit__(None, None, None)
            if self._client is not None:
                try:
                    self._client.context.close()
                except Exception:  # noqa: BLE001
                    pass
                self._client = None


def open_store(location: str | Path, *, api_key_env: str = DEFAULT_API_KEY_ENV) -> Any:
    """Open a store to read: the tiled client of a data directory or a tiled server.

    Parameters
    ----------
    location : str or Path
        A quietwell data directory (read in this process, read-only, also while a
        campaign writes to it), or the URI of a tiled server (``http://...``).
    api_key_env : str
        For a URI: the environment variable holding the server's API key (default
        ``QUIETWELL_API_KEY``; unset: no key, or the one in the URI). The key is
        never printed or put in an error message.

    Returns
    -------
    tiled.client container
        ``client[uid]`` is a run: ``.metadata["start"]``, ``["primary"]``,
        ``["fits"]``, ``["summary"]``.
    """
    found = resolve(location, api_key_env=api_key_env)
    return found.client if isinstance(found, LocalStore) else found


_LOCAL: dict[Path, LocalStore] = {}


def resolve(location: Any, *, api_key_env: str = DEFAULT_API_KEY_ENV) -> Any:
    """A :class:`LocalStore` for a data directory, a tiled client for anything else.

    ``location`` may be a data directory, a URI, a tiled client (used as it is; the
    client of :func:`open_store` of a data directory gives back its
    :class:`LocalStore`) or a :class:`LocalStore`.
    """
    if isinstance(location, LocalStore):
        return location
    if isinstance(location, (str, os.PathLike)):
        text = os.fspath(location)
        if _is_uri(text):
            return _open_uri(text, api_key_env)
        path = Path(text).expanduser().resolve()
        store = _LOCAL.get(path)
        if store is None:
            store = _LOCAL[path] = LocalStore(path)
        return store
    for store in _LOCAL.values():
        if store._client is location:
            return store
    if hasattr(location, "search") and hasattr(location, "items"):
        return location
    raise InputError(f"{type(location).__name__} is not a store; give a data directory, a "
                     "tiled server URI or a tiled client")


def _open_uri(uri: str, api_key_env: str) -> Any:
    import httpx
    from tiled.client import from_uri

    if not api_key_env or not api_key_env.replace("_", "").isalnum():
        raise InputError(f"--api-key-env {api_key_env!r} is not an environment variable "
                         "name; give a name such as QUIETWELL_API_KEY")
    key = os.environ.get(api_key_env) or None
    shown = _public_uri(uri)
    try:
        # tiled prints "Retrying…" while it retries a connection: one line is the rule
        with contextlib.redirect_stderr(io.StringIO()):
            return from_uri(uri, api_key=key) if key else from_uri(uri)
    except httpx.HTTPStatusError as exc:
        code = exc.response.status_code
        if code in (401, 403):
            where = (f"the API key in ${api_key_env}" if key
                     else f"no API key (${api_key_env} is not set)")
            raise InputError(f"--uri {shown}: the server refused {where} (HTTP {code}); set "
                             f"{api_key_env} to a key the server accepts") from None
        raise InputError(f"--uri {shown}: the server answered HTTP {code}; give the URI "
                         "of a tiled server (http://HOST:PORT/api/v1)") from None
    except (httpx.HTTPError, OSError) as exc:
        raise InputError(f"--uri {shown} does not answer ({type(exc).__name__}); check the "
                         "address and that the tiled server runs") from None
    except RuntimeError as exc:
        if "api key" in str(exc).lower() or "authentica" in str(exc).lower():
            where = (f"the API key in ${api_key_env}" if key
                     else f"no API key (${api_key_env} is not set)")
            raise InputError(f"--uri {shown}: the server refused {where}; set {api_key_env} "
                             "to a key the server accepts") from None
        raise InputError(f"--uri {shown}: not a tiled server ({type(exc).__name__}); give the "
                         "URI of a tiled server (http://HOST:PORT/api/v1)") from None
    except Exception as exc:  # noqa: BLE001 - tiled's own errors; never echo the key
        raise InputError(f"--uri {shown}: not a tiled server ({type(exc).__name__}); give the "
                         "URI of a tiled server (http://HOST:PORT/api/v1)") from None


# --------------------------------------------------------------------------
# the event tables, read-only


_REGISTERED: set[str] = set()


def _register_event_tables(catalog_dir: Path, snapshots: _Snapshots) -> None:
    """Make tiled read the event tables (DuckDB) read-only, from a consistent copy."""
    import sqlite3

    from tiled.storage import EmbeddedSQLStorage, acquire_storage

    db = sqlite3.connect(f"file:{catalog_dir / 'catalog.db'}?mode=ro", uri=True, timeout=30)
    try:  # the URI the writer recorded (its own path for the file)
        uris = [u for (u,) in db.execute(
            "SELECT DISTINCT data_uri FROM assets WHERE data_uri LIKE 'duckdb:%'")]
    except sqlite3.Error:
        uris = []
    finally:
        db.close()

    @dataclasses.dataclass(frozen=True)
    class ReadOnlyDuckDB(EmbeddedSQLStorage):
        def create_adbc_connection(self) -> Any:
            return snapshots.connect()

        def connect(self) -> Any:  # no pool: a connection per query, closed after it
            return snapshots.connect()

    for uri in uris:
        if uri not in _REGISTERED:
            acquire_storage(ReadOnlyDuckDB(uri))
            _REGISTERED.add(uri)


class _Snapshots:
    """Read-only connections to a copy of a DuckDB file, copied again when it changed.

    The file itself is never opened: DuckDB lets no other process open a file that one
    process holds, so a reader holding it would stop a campaign's catalog process from
    starting, and a writer holding it would stop the reader. A copy of the file and its
    write-ahead log is taken when none exists or either changed since the last (and
    taken again until neither changed while it was copied), under a new name each time,
    since a connection to the previous copy may still be reading it.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self.wal = path.with_name(path.name + ".wal")
        self._lock = threading.Lock()
        self._state: tuple | None = None
        self._copy: Path | None = None
        self._folder: Path | None = None
        self._n = 0

    def _stat(self) -> tuple:
        return tuple((p.stat().st_size, p.stat().st_mtime_ns) if p.exists() else None
                     for p in (self.path, self.wal))

    def current(self) -> Path | None:
        """The path of a copy as the file is now (None: the store has no event table)."""
        with self._lock:
            if not self.path.exists():
                return None
            if self._copy is None or self._stat() != self._state:
                self._take()
            return self._copy

    def connect(self) -> Any:
        """An ADBC connection (tiled's kind) to the current copy, read-only."""
        import adbc_driver_duckdb
        import adbc_driver_manager
        import adbc_driver_manager.dbapi as dbapi

        copy = self.current()
        if copy is None:  # a store with no event table yet
            db = adbc_driver_manager.AdbcDatabase(
                driver=adbc_driver_duckdb.driver_path(), entrypoint="duckdb_adbc_init")
            return dbapi.Connection(db, adbc_driver_manager.AdbcConnection(db))
        db = adbc_driver_manager.AdbcDatabase(
            driver=adbc_driver_duckdb.driver_path(), entrypoint="duckdb_adbc_init",
            path=str(copy), access_mode="READ_ONLY")
        return dbapi.Connection(db, adbc_driver_manager.AdbcConnection(db))

    def _take(self, attempts: int = 20) -> None:
        if self._folder is None:
            self._folder = Path(tempfile.mkdtemp(prefix="quietwell-read-"))
            atexit.register(shutil.rmtree, self._folder, True)
        for _ in range(attempts):
            self._n += 1
            copy = self._folder / f"events-{self._n}.duckdb"
            before = self._stat()
            shutil.copyfile(self.path, copy)
            if self.wal.exists():
                try:
                    shutil.copyfile(self.wal, copy.with_name(copy.name + ".wal"))
                except FileNotFoundError:  # checkpointed meanwhile: copy again
                    continue
            if self._stat() == before:
                self._copy, self._state = copy, before
                return
        raise InputError(f"{self.path}: the writer changed the event tables during "
                         f"{attempts} copies; try again in a moment")
