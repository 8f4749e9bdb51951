"""The campaign ledger: one append-only, fsynced JSON-lines file per campaign.

``DIR/campaigns/<campaign_id>/ledger.jsonl`` holds, one object a line:

* ``{"event": "campaign", ...}`` first: the campaign id, the campaign file's text and
  sha256, the setup profile, its description and sha256, and the checked steps;
* ``{"event": "attempt", "step", "attempt"}`` when a step's attempt begins;
* ``{"event": "run", "step", "attempt", "uid"}`` when its run has started;
* ``{"event": "done", "step", "attempt", "uid", "summary", "results"}`` when its run
  ended in success: the results that later steps use, so that a resume does not depend
  on the catalog;
* ``{"event": "failed", "step", "attempt", "uid", "exit_status", "reason"}``;
* ``{"event": "superseded", "uid", "by"}`` once a redo has replaced a run;
* ``{"event": "end", "status", "reason"}`` when the campaign ends (``completed``,
  ``stopped``).

Each line is written with one ``write`` and ``fsync``: a crash leaves at most a last
line cut short, which :func:`read_ledger` ignores.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path
from typing import Any

from .._errors import InputError
from .._plain import plain

__all__ = ["Ledger", "read_ledger", "campaign_dirs"]


class Ledger:
    """Append entries to a campaign's ledger file."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)

    def append(self, event: str, **fields: Any) -> dict:
        entry = {"event": event, "time": time.time(), **{k: plain(v) for k, v in fields.items()}}
        line = json.dumps(entry, default=_default, allow_nan=True) + "\n"
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, line.encode())
            os.fsync(fd)
        finally:
            os.close(fd)
        return entry

    def entries(self) -> list[dict]:
        return read_ledger(self.path)


def _default(obj: Any) -> Any:
    from ..physics import Estimate

    if isinstance(obj, Estimate):
        return {"value": float(obj.value), "stderr": float(obj.stderr)}
    out = plain(obj)
    if out is obj:
        raise TypeError(f"cannot write a {type(obj).__name__} to the ledger")
    return out


def read_ledger(path: str | Path) -> list[dict]:
    """Every complete entry of the ledger ``path`` (a cut-short last line is ignored)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{p}: no campaign ledger here; give the --data-dir of a campaign "
                         "run") from None
    out = []
    lines = text.split("\n")
    for i, line in enumerate(lines):
        if not line.strip():
            continue
        try:
            out.append(json.loads(line))
        except json.JSONDecodeError:
            if i < len(lines) - 2:  # only the last line may be cut short by a crash
                raise InputError(f"{p}: line {i + 1} is not a ledger entry; the ledger is "
                                 "damaged: keep a copy and report it") from None
    if not out or out[0].get("event") != "campaign":
        raise InputError(f"{p}: not a campaign ledger (no campaign entry first)")
    return out


def campaign_dirs(data_dir: str | Path) -> list[Path]:
    """Campaign folders in ``data_dir``, oldest first."""
    root = Path(data_dir) / "campaigns"
    if not root.is_dir():
        return []
    dirs = [d for d in root.iterdir() if (d / "ledger.jsonl").exists()]
    return sorted(dirs, key=lambda d: (d / "ledger.jsonl").stat().st_mtime)
