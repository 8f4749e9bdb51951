"""How the report reaches a data directory: one small function to swap.

:func:`open_runs` is the only place the report opens the store. It returns a mapping
of run uid to the tiled run client (``run["primary"|"fits"|"summary"|...]``,
``run.metadata["start"]``); a faster read-only reader that returns the same kind of
mapping can replace it without touching the rest of the report.
"""

from __future__ import annotations

import os
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from .._errors import InputError, QuietwellError

__all__ = ["open_runs", "store_holder", "check_data_dir", "StoreBusy"]

#: Seconds to wait for a store that another process is just closing.
_RELEASE_WAIT_S = 5.0


class StoreBusy(QuietwellError):
    """Another quietwell process (a campaign, or a session that opened the store) holds
    the data directory; ``pid`` is that process's id as it wrote it, or ``""``."""

    def __init__(self, message: str, pid: str) -> None:
        super().__init__(message)
        self.pid = pid


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
    its life and writes its parent's pid into it (:mod:`quietwell.store._serve`).
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


def open_runs(data_dir: str | Path) -> Mapping[str, Any]:
    """Uid -> tiled run client of every run in the store at ``data_dir``.

    Raises :class:`InputError` for a directory without a store and :class:`StoreBusy`
    while another process holds it (a running campaign).
    """
    path = check_data_dir(data_dir)
    if not (path / "catalog" / "catalog.db").exists():
        raise InputError(f"--data-dir {data_dir}: no catalog/catalog.db (no run reached the "
                         "store); give the data directory a campaign ran into")
    holder = store_holder(path)
    deadline = time.monotonic() + _RELEASE_WAIT_S
    while holder is not None and holder != str(os.getpid()) and time.monotonic() < deadline:
        time.sleep(0.2)  # a process that just ended may still be closing its catalog
        holder = store_holder(path)
    if holder is not None and holder != str(os.getpid()):
        raise StoreBusy(f"--data-dir {data_dir} is in use by another quietwell process (pid "
                        f"{holder}); wait until it ends, or stop it", holder)
    from ..store import open_catalog

    return open_catalog(path)
