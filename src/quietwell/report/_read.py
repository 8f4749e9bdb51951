"""How the report reaches a data directory: one small function to swap.

:func:`open_runs` is the only place the report opens the store. It returns the tiled
client of :func:`quietwell.results.open_store`: the data directory read in this process,
read-only (no server, no catalog process, never the writer's ``catalog.lock``), so a
campaign that is still writing to the directory is read as it stands.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from .._errors import InputError

__all__ = ["open_runs", "store_holder", "check_data_dir"]


def check_data_dir(data_dir: str | Path) -> Path:
    """The resolved data directory, or a one-line :class:`InputError` saying what is wrong."""
    path = Path(data_dir).expanduser()
    if not path.exists():
        raise InputError(f"--data-dir {data_dir}: no such directory; give the data directory "
                         "a campaign ran into (quietwell run ... --data-dir DIR)")
    if not path.is_dir():
        raise InputError(f"--data-dir {data_dir} is a file, not a directory; give the data "
                         "directory a campaign ran into")
    path = path.resolve()
    if not (path / "catalog" / "catalog.db").exists() and not (path / "campaigns").is_dir():
        raise InputError(f"--data-dir {data_dir} holds no quietwell store (no catalog/catalog.db "
                         "and no campaigns/); give the data directory a campaign ran into")
    return path


def store_holder(data_dir: Path) -> str | None:
    """The pid (as text) of the process holding the store of ``data_dir``, else None.

    The catalog process keeps an exclusive ``flock`` on ``catalog/catalog.lock`` for
    its life and writes its parent's pid into it (:mod:`quietwell.store._serve`). Only
    tested here (a non-blocking lock, released at once), never kept.
    """
    import fcntl

    path = data_dir / "catalog" / "catalog.lock"
    if not path.exists():
        return None
    with open(path, "a+") as f:
        try:
            fcntl.flock(f.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            f.seek(0)
            return f.read().strip() or "unknown"
        fcntl.flock(f.fileno(), fcntl.LOCK_UN)
    return None


def has_catalog(data_dir: Path) -> bool:
    return (data_dir / "catalog" / "catalog.db").is_file()


def open_runs(data_dir: str | Path) -> Mapping[str, Any]:
    """Uid -> tiled run client of every run in the store at ``data_dir``.

    Read in this process and read-only (:func:`quietwell.results.open_store`), also while
    a campaign's catalog process holds the directory. Raises :class:`InputError` for a
    directory without a store.
    """
    path = check_data_dir(data_dir)
    if not has_catalog(path):
        raise InputError(f"--data-dir {data_dir}: no catalog/catalog.db (no run reached the "
                         "store); give the data directory a campaign ran into")
    import logging
    import warnings

    import tiled.server.app  # noqa: F401 - it sets its logger's level on import

    from ..results import open_store

    # The in-process server is an implementation detail of reading: its start-up line
    # ("Tiled version ...", logged at INFO) and starlette's notice about its test client
    # are not the report's to print (a report prints one line, or one error line).
    server_log = logging.getLogger("tiled.server.app")
    level = server_log.level
    server_log.setLevel(logging.WARNING)
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*starlette.testclient.*")
            client = open_store(path)
            client.context  # noqa: B018 - the app starts here, inside the filters
            len(client)
    finally:
        server_log.setLevel(level)
    return client
