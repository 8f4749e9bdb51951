"""Gather what a report shows: the campaign's ledger, its runs and their streams.

The ledger (``DIR/campaigns/<id>/ledger.jsonl``) says what the runner did: which step
ran in which attempt, how each ended, which runs a redo superseded, and every monitor
event. The store holds the runs themselves. :func:`collect` joins the two into a
:class:`ReportData` that the HTML writer and the tests read.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import InputError, QuietwellError
from ..campaign._ledger import campaign_dirs, read_ledger
from . import _streams
from ._read import check_data_dir, has_catalog, open_runs, store_holder

__all__ = ["ReportData", "RunEntry", "StepEntry", "collect", "summary_values",
           "USABLE", "LEFT_OUT"]

#: Run statuses whose results enter tables, plots and fits across runs.
USABLE = ("completed",)
#: Run statuses shown only in the marked section of runs left out.
LEFT_OUT = ("failed", "aborted", "superseded", "interrupted", "skipped", "refused")


@dataclass
class RunEntry:
    """One run (one attempt of a step): its uid, status and what the store holds."""

    uid: str
    step: int | None
    step_id: str
    plan: str
    attempt: int
    status: str
    reason: str = ""
    superseded_by: str = ""
    summary: dict[str, Any] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)
    client: Any = None
    start: dict[str, Any] = field(default_factory=dict)
    stop: dict[str, Any] = field(default_factory=dict)


@dataclass
class StepEntry:
    """One step of the campaign file and how it went (its last attempt decides)."""

    index: int
    id: str
    plan: str
    status: str
    attempts: list[RunEntry] = field(default_factory=list)


@dataclass
class ReportData:
    """Everything a report shows (see :func:`collect`)."""

    data_dir: Path
    campaign_id: str = ""
    campaign_name: str = ""
    description: str = ""
    campaign_file: str = ""
    campaign_sha256: str = ""
    setup: str = ""
    setup_profile: str = ""
    setup_sha256: str = ""
    started: float | None = None
    ended: float | None = None
    end_status: str = ""
    end_reason: str = ""
    running_pid: str = ""
    quietwell_version: str = ""
    versions: dict[str, str] = field(default_factory=dict)
    steps: list[StepEntry] = field(default_factory=list)
    runs: list[RunEntry] = field(default_factory=list)
    monitors: list[dict[str, Any]] = field(default_factory=list)
    ledger_events: list[dict[str, Any]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def running(self) -> bool:
        return bool(self.running_pid)

    def usable(self, plan: str | None = None) -> list[RunEntry]:
        """Runs whose results count (completed and not superseded), in step order."""
        return [r for r in self.runs if r.status in USABLE and r.client is not None
                and (plan is None or r.plan == plan)]

    def left_out(self) -> list[RunEntry]:
        return [r for r in self.runs if r.status in LEFT_OUT]


def _first(v: Any) -> Any:
    a = np.asarray(v)
    if a.ndim == 0:
        out = a.item()
    elif a.size == 1:
        out = a.reshape(-1)[0].item()
    else:
        return a.tolist()
    return out.decode() if isinstance(out, bytes) else out


def summary_values(run: Any) -> tuple[dict[str, Any], dict[str, str]]:
    """The ``summary`` stream of ``run`` as ``{key: value}`` and ``{key: units}``.

    ``{}`` for a run without one (a run that ended before its summary).
    """
    if not _streams.has(run, "summary"):
        return {}, {}
    stream = _streams.stream(run, "summary")
    ds = _streams.read(run, "summary")
    values = {k: _first(ds[k].values) for k in ds.data_vars}
    keys = dict(stream.metadata.get("data_keys", {}))
    units = {k: str(keys.get(k, {}).get("units", "")) for k in values}
    return values, units


def _campaign_folder(data_dir: Path, campaign: str | None) -> Path:
    dirs = campaign_dirs(data_dir)
    if campaign is None:
        if not dirs:
            raise InputError(f"--data-dir {data_dir}: no campaign was run here (no campaigns/*/"
                             "ledger.jsonl); give run uids, or the data directory of a "
                             "campaign")
        return dirs[-1]
    hits = [d for d in dirs if d.name == campaign] or [d for d in dirs
                                                       if d.name.startswith(campaign)]
    if len(hits) != 1:
        known = ", ".join(d.name for d in dirs) or "none"
        what = "no" if not hits else "more than one"
        raise InputError(f"--campaign {campaign}: {what} campaign of that id in {data_dir} "
                         f"(there are: {known}); give one of those ids")
    return hits[0]


def collect(data_dir: str | Path, *, campaign: str | None = None,
            uids: Sequence[str] = ()) -> ReportData:
    """Read the ledger and the runs for a report.

    Parameters
    ----------
    data_dir : str or Path
        A quietwell data directory.
    campaign : str, optional
        A campaign id (or a unique start of one); default the latest campaign.
    uids : sequence of str
        Report these runs (full uids or unique starts of 8 or more characters)
        instead of a campaign's.

    A campaign whose process still holds the store is reported from its ledger alone
    (``running_pid`` set); a run that is not in the store is an :class:`InputError`.
    """
    path = check_data_dir(data_dir)
    data = ReportData(data_dir=path)
    if uids:
        return _collect_uids(data, list(uids))
    folder = _campaign_folder(path, campaign)
    entries = read_ledger(folder / "ledger.jsonl")
    _read_head(data, entries)
    data.runs, data.steps = _runs_from_ledger(entries)
    data.monitors = [dict(e, source="ledger") for e in entries if e["event"] == "monitor"]
    data.ledger_events = [e for e in entries if e["event"] in
                          ("fault_scheduled", "particle_reloaded", "skipped", "end")]
    holder = store_holder(path) if data.end_status == "" else None
    if holder is not None:
        data.running_pid = holder
        data.notes.append(
            f"The campaign is still running (process {holder} holds the data directory). "
            "This report shows it as it stands: the runs the store holds so far, the step "
            "in progress as running, and pictures and checks of the completed steps only. "
            "Write the report again when the campaign has ended.")
    if not has_catalog(path):
        if holder is None:
            raise InputError(f"--data-dir {path}: no catalog/catalog.db (no run reached the "
                             "store); give the data directory a campaign ran into")
        _ledger_only(data)
        return data
    try:
        store = open_runs(path)
    except QuietwellError as exc:
        if holder is None:
            raise
        data.notes.append(f"The store could not be read as the campaign writes it ({exc}); "
                          "this report shows the ledger only.")
        _ledger_only(data)
        return data
    _attach(data, store, running=holder is not None)
    if data.end_status == "" and holder is None:
        data.notes.append(
            "The campaign did not end: its process stopped during a step, and the run of "
            "that step is marked interrupted. Resume it with: quietwell run --resume "
            f"--data-dir {path}")
    return data


def _ledger_only(data: ReportData) -> None:
    """A running campaign whose store cannot be read yet: statuses from the ledger."""
    for r in data.runs:
        if r.status == "in progress":
            r.status = "running"
    for s in data.steps:
        if s.attempts:
            s.status = s.attempts[-1].status
    data.monitors = _merge_monitors(data)


def _read_head(data: ReportData, entries: list[dict]) -> None:
    head = entries[0]
    data.campaign_id = head.get("campaign_id", "")
    data.campaign_name = head.get("campaign_name", "")
    data.campaign_file = head.get("campaign_file", "")
    data.campaign_sha256 = head.get("campaign_sha256", "")
    data.setup = head.get("setup", "")
    data.setup_profile = head.get("setup_profile", "")
    data.setup_sha256 = head.get("setup_sha256", "")
    data.quietwell_version = head.get("quietwell_version", "")
    data.started = head.get("time")
    text = head.get("campaign_text", "")
    try:
        import tomllib

        data.description = str(tomllib.loads(text).get("campaign", {}).get("description", ""))
    except Exception:  # noqa: BLE001 - the description is decoration
        data.description = ""
    ends = [e for e in entries if e["event"] == "end"]
    if ends:
        data.end_status = ends[-1].get("status", "")
        data.end_reason = ends[-1].get("reason", "")
        data.ended = ends[-1].get("time")


def _runs_from_ledger(entries: list[dict]) -> tuple[list[RunEntry], list[StepEntry]]:
    head = entries[0]
    steps = [StepEntry(int(s["index"]), s["id"], s["plan"], "never reached")
             for s in head.get("steps", [])]
    by_key: dict[tuple[int, int], RunEntry] = {}
    by_uid: dict[str, RunEntry] = {}
    order: list[RunEntry] = []

    def entry(step: int, attempt: int) -> RunEntry:
        key = (step, attempt)
        if key not in by_key:
            s = steps[step] if step < len(steps) else StepEntry(step, f"step {step}", "", "")
            by_key[key] = RunEntry("", step, s.id, s.plan, attempt, "in progress")
            order.append(by_key[key])
        return by_key[key]

    for e in entries:
        ev = e["event"]
        if ev == "attempt":
            entry(e["step"], e["attempt"])
        elif ev == "run":
            r = entry(e["step"], e["attempt"])
            r.uid = e.get("uid") or r.uid
            by_uid[r.uid] = r
        elif ev == "done":
            r = entry(e["step"], e["attempt"])
            r.uid, r.status = e.get("uid") or r.uid, "completed"
            r.summary = dict(e.get("summary") or {})
            by_uid[r.uid] = r
        elif ev == "failed":
            r = entry(e["step"], e["attempt"])
            r.uid = e.get("uid") or r.uid
            status = e.get("exit_status", "fail")
            r.status = {"abort": "aborted", "refused": "refused"}.get(status, "failed")
            r.reason = e.get("reason", "")
            if r.uid:
                by_uid[r.uid] = r
        elif ev == "skipped":
            r = entry(e["step"], e["attempt"])
            r.status, r.reason = "skipped", e.get("reason", r.reason)
        elif ev == "superseded":
            r = by_uid.get(e.get("uid", ""))
            if r is not None:
                r.status, r.superseded_by = "superseded", e.get("by", "")
    for r in order:
        if r.step is not None and r.step < len(steps):
            steps[r.step].attempts.append(r)
    for s in steps:
        if s.attempts:
            s.status = s.attempts[-1].status
    return order, steps


def _attach(data: ReportData, store: Mapping[str, Any], *, running: bool = False) -> None:
    """Fill each run's client, start and stop documents and summary from the store.

    ``running``: the campaign's process still holds the directory, so a run the ledger
    has in progress is running (not interrupted), and one not in the store yet is no
    loss.
    """
    gone = "running" if running else "interrupted"
    for r in data.runs:
        if not r.uid:
            continue
        try:
            run = store[r.uid]
        except KeyError:
            if r.status in ("completed",) and not running:
                data.notes.append(f"Run {r.uid} (step {r.step_id}) is in the ledger but not "
                                  f"in the store; rebuild it with: quietwell recover "
                                  f"--data-dir {data.data_dir}")
            if r.status == "in progress":
                r.status = gone
            continue
        _fill(r, run, running=running)
    for r in data.runs:
        if r.status == "in progress":
            r.status = gone
            if not running:
                r.reason = r.reason or "the process ended during the run"
    for s in data.steps:
        if s.attempts:
            s.status = s.attempts[-1].status
    _versions(data)
    data.monitors = _merge_monitors(data)


def _fill(r: RunEntry, run: Any, *, running: bool = False) -> None:
    """Documents and summary of ``r`` from the store. The status too, where the ledger
    missed it (a superseded mark, a stop document), unless the campaign still runs: its
    ledger is then current, and the store only adds documents and values."""
    r.client = run
    md = run.metadata
    r.start = dict(md.get("start") or {})
    r.stop = dict(md.get("stop") or {})
    if not running and md.get("superseded_by") and r.status != "superseded":
        r.status, r.superseded_by = "superseded", str(md["superseded_by"])
    if r.status == "in progress" and not running:  # the ledger missed its end
        status = r.stop.get("exit_status")
        if status == "success":
            r.status = "completed"
        elif status:
            r.status = "aborted" if status == "abort" else "failed"
            r.reason = r.stop.get("reason", "")
    values, units = summary_values(run)
    if values:
        r.summary, r.units = values, units
    if not r.plan:
        r.plan = r.start.get("plan_name", "")


def _versions(data: ReportData) -> None:
    for r in data.runs:
        if r.start:
            data.quietwell_version = data.quietwell_version or r.start.get("quietwell_version",
                                                                           "")
            data.versions = dict(r.start.get("versions") or {})
            if data.versions:
                return


def _merge_monitors(data: ReportData) -> list[dict[str, Any]]:
    """Monitor events of the runs' ``monitor`` streams, and any the ledger has beside."""
    out: list[dict[str, Any]] = []
    seen = set()
    for r in data.runs:
        if r.client is None or not _streams.has(r.client, "monitor"):
            continue
        stream = _streams.stream(r.client, "monitor")
        ds = _streams.read(r.client, "monitor")
        keys = dict(stream.metadata.get("data_keys", {}))
        units = str(keys.get("value", {}).get("units", ""))
        n = ds.sizes.get("time", 0)
        for i in range(n):
            ev = {k: _first(ds[k].values[i]) for k in ds.data_vars}
            ev.update(uid=r.uid, step=r.step, step_id=r.step_id, attempt=r.attempt,
                      units=units, source="run", time=float(ds["time"].values[i]))
            out.append(ev)
            seen.add((r.uid, ev.get("condition"), ev.get("action"), ev.get("record")))
    for e in data.monitors:
        key = (e.get("uid"), e.get("condition"), e.get("action"), e.get("record"))
        if key not in seen:
            sid = next((s.id for s in data.steps if s.index == e.get("step")), "")
            out.append(dict(e, step_id=sid, units="", source="ledger"))
    return sorted(out, key=lambda e: e.get("time") or 0.0)


def _collect_uids(data: ReportData, uids: list[str]) -> ReportData:
    store = open_runs(data.data_dir)
    keys = None
    chosen: list[tuple[str, Any]] = []
    for u in uids:
        try:
            chosen.append((u, store[u]))
            continue
        except KeyError:
            pass
        if keys is None:
            keys = list(store)
        hits = [k for k in keys if k.startswith(u)] if len(u) >= 8 else []
        if len(hits) != 1:
            what = "not in the store" if not hits else "the start of more than one uid"
            raise InputError(f"uid {u}: {what} at {data.data_dir}; give the full uid of a "
                             "run there (the campaign's ledger lists them)")
        chosen.append((hits[0], store[hits[0]]))
    ledgers: dict[str, list[dict]] = {}
    for _uid, run in chosen:
        start = dict(run.metadata.get("start") or {})
        cid = start.get("campaign_id")
        if cid and cid not in ledgers:
            path = data.data_dir / "campaigns" / cid / "ledger.jsonl"
            ledgers[cid] = read_ledger(path) if path.exists() else []
    if len(ledgers) == 1 and next(iter(ledgers.values())):
        entries = next(iter(ledgers.values()))
        _read_head(data, entries)
        led_runs, _ = _runs_from_ledger(entries)
    else:
        led_runs = []
        data.campaign_name = "selected runs"
    by_uid = {r.uid: r for r in led_runs if r.uid}
    for uid, run in chosen:
        start = dict(run.metadata.get("start") or {})
        r = by_uid.get(uid) or RunEntry(
            uid, start.get("campaign_step"), start.get("campaign_step_id", "") or
            start.get("plan_name", ""), start.get("plan_name", ""),
            int(start.get("campaign_attempt", 1) or 1), "in progress")
        _fill(r, run)
        if r.status == "in progress":
            r.status, r.reason = "interrupted", "the run has no stop document"
        data.runs.append(r)
        data.setup = data.setup or start.get("setup", "")
        data.setup_sha256 = data.setup_sha256 or start.get("setup_sha256", "")
        if data.started is None or start.get("time", math.inf) < data.started:
            data.started = start.get("time")
    data.runs.sort(key=lambda r: r.start.get("time", 0.0))
    data.steps = [StepEntry(r.step if r.step is not None else i, r.step_id, r.plan, r.status,
                            [r]) for i, r in enumerate(data.runs)]
    if data.ended is None:
        stops = [r.stop.get("time") for r in data.runs if r.stop.get("time")]
        data.ended = max(stops) if stops else None
    _versions(data)
    data.monitors = _merge_monitors(data)
    return data
