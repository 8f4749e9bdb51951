"""A local journal of every document, so that batched catalog writes lose nothing.

Writing each event to tiled as it arrives costs several HTTP round trips per record
(see bench/RESULTS-store.md), so the embedded store batches its catalog writes. The
journal closes the gap that batching opens: every document is appended to
``DIR/journal/<run uid>.jsonl`` and flushed to disk before the next one, so if the
process dies mid-run, :func:`replay_journal` rebuilds the run in the catalog from it
(the raw traces are already on disk in ``DIR/raw``).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .._plain import plain

__all__ = ["Journal", "replay_journal", "unfinished_runs"]


def _jsonable(obj: Any) -> Any:
    out = plain(obj)
    if out is obj:
        raise TypeError(f"cannot journal a {type(obj).__name__}")
    return out


class Journal:
    """Document callback appending ``[name, doc]`` lines to one file per run."""

    def __init__(self, directory: str | Path, fsync: bool = False) -> None:
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.fsync = fsync
        self._files: dict[str, Any] = {}

    def __call__(
        self, name: str, doc: dict, *, finish: bool = True, line: str | None = None
    ) -> str | None:
        """Append one document; return the uid of the run whose journal holds it.

        With ``finish=False`` a stop document closes the run's file but leaves it named
        unfinished until :meth:`finish` (the store does so once the catalog has the run).
        ``line`` is ``[name, doc]`` already serialised, if the caller has it.
        """
        if name == "start":
            uid = doc["uid"]
            f = open(self.directory / f"{uid}.jsonl", "a", encoding="utf-8")  # noqa: SIM115
            self._files[uid] = f
            self._write(f, name, doc, line)
            return uid
        own = doc.get("run_start") if name in ("descriptor", "stop", "stream_resource") else None
        uid = own if own in self._files else next(reversed(self._files), None)
        if uid is None:
            return None
        self._write(self._files[uid], name, doc, line)
        if name == "stop" and uid == own:
            self._files.pop(uid).close()
            if finish:
                self.finish(uid)
        return uid

    def finish(self, uid: str) -> None:
        """Mark the journal of run ``uid`` complete (``<uid>.done.jsonl``)."""
        path = self.directory / f"{uid}.jsonl"
        if path.exists():
            path.rename(path.with_suffix(".done.jsonl"))

    def _write(self, f, name: str, doc: dict, line: str | None = None) -> None:
        f.write((line if line is not None else json.dumps([name, doc], default=_jsonable)) + "\n")
        f.flush()
        if self.fsync:
            os.fsync(f.fileno())


def unfinished_runs(directory: str | Path) -> list[Path]:
    """Journals of runs the catalog has not confirmed: neither ``.done`` (written by the
    catalog) nor ``.recovered`` (rebuilt from the journal once; rebuilding it again would
    delete what was added to the run since, such as ``superseded_by``)."""
    return sorted(p for p in Path(directory).glob("*.jsonl")
                  if not p.name.endswith((".done.jsonl", ".recovered.jsonl")))


def replay_journal(path: str | Path, client: Any, writer_factory) -> str:
    """Rebuild the run of journal ``path`` in the catalog of ``client``.

    A partial copy of the run in the catalog is deleted first; then every journalled
    document goes to a fresh writer (``writer_factory()``). A run without a stop
    document gets one with ``exit_status="abort"`` and a reason saying it was recovered.
    Returns the run's uid.
    """
    docs = [json.loads(line) for line in Path(path).read_text(encoding="utf-8").splitlines()
            if line.strip()]
    if not docs or docs[0][0] != "start":
        raise ValueError(f"{path}: not a run journal (no start document first)")
    uid = docs[0][1]["uid"]
    if uid in client:
        client.delete_contents(uid, recursive=True, external_only=False)
    writer = writer_factory()
    last_time = docs[0][1]["time"]
    for name, doc in docs:
        writer(name, doc)
        last_time = doc.get("time", last_time)
    if docs[-1][0] != "stop":
        import uuid

        writer("stop", {"uid": str(uuid.uuid4()), "run_start": uid, "time": last_time,
                        "exit_status": "abort",
                        "reason": "recovered from the journal after the process stopped",
                        "num_events": {}})
    return uid
