"""Finding runs in a store with the catalog's own search, and their summaries."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
import re
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .._errors import InputError
from ._reader import DEFAULT_API_KEY_ENV, LocalStore, resolve

__all__ = ["RunRecord", "find_runs", "format_runs", "runs_json", "parse_since", "KEY_FIELDS"]

#: The derived values `quietwell runs` shows for each plan (each with its ``_stderr``
#: when the summary has one). Other plans show their first three values with errors.
KEY_FIELDS: dict[str, tuple[str, ...]] = {
    "charge_calibration": ("charge", "mass"),
    "thermal_calibration": ("calibration_x", "calibration_y", "calibration_z"),
    "pressure_sweep": ("damping_slope", "radius"),
    "gain_sweep": ("optimal_gain", "min_occupation_x", "min_occupation_y",
                   "min_occupation_z"),
    "reheating_cycles": ("pressure", "heating_rate_x", "heating_rate_y", "heating_rate_z"),
    "sideband_thermometry": ("occupation",),
}


@dataclass(frozen=True)
class RunRecord:
    """One run of a store: where it came from, how it ended, what it derived.

    ``time`` is the start document's time (s since the epoch, UTC). ``exit_status``
    is the stop document's (``success``, ``abort``, ``fail``), or ``unfinished`` for
    a run with no stop document (still running, or its process died and it was not
    recovered). ``summary`` holds the values of the run's ``summary`` stream in SI
    (``name`` and ``name_stderr``), ``units`` their units from the data keys.
    """

    uid: str
    plan_name: str | None
    setup: str | None
    time: float
    exit_status: str
    reason: str = ""
    campaign_id: str | None = None
    campaign_step: int | None = None
    campaign_attempt: int | None = None
    campaign_step_id: str | None = None
    superseded_by: str | None = None
    particle: str | None = None
    summary: Mapping[str, Any] = field(default_factory=dict)
    units: Mapping[str, str] = field(default_factory=dict)

    @property
    def usable(self) -> bool:
        """True for a run that completed and was not replaced (tables use only those)."""
        return self.exit_status == "success" and not self.superseded_by

    @property
    def status(self) -> str:
        """``exit_status``, with ``superseded`` in front for a run that was redone."""
        return f"superseded/{self.exit_status}" if self.superseded_by else self.exit_status


# --------------------------------------------------------------------------
# dates


_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}([T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?)?([+-]\d{2}:?\d{2}|Z)?$")


def parse_since(value: Any) -> float:
    """``value`` (a date or date-time in ISO 8601, local time unless it has an offset;
    a ``datetime``/``date``; or seconds since the epoch) as seconds since the epoch."""
    if isinstance(value, bool):
        value = str(value)
    if isinstance(value, (int, float)):
        if math.isfinite(value):
            return float(value)
        value = str(value)
    if isinstance(value, _dt.datetime):
        return value.timestamp()
    if isinstance(value, _dt.date):
        return _dt.datetime(value.year, value.month, value.day).timestamp()
    text = str(value).strip()
    try:
        if not _DATE.match(text):
            raise ValueError(text)
        return _dt.datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
    except ValueError:
        raise InputError(f"--since {text!r} is not a date; give YYYY-MM-DD or "
                         "YYYY-MM-DDTHH:MM (local time), e.g. --since 2026-03-14") from None


# --------------------------------------------------------------------------
# search


def _uid_prefix(uid: Any) -> str | None:
    """``uid`` checked (a uid or its first 4 or more characters), in lower case."""
    if uid is None:
        return None
    text = str(uid).strip()
    if not re.fullmatch(r"[0-9a-fA-F-]{4,36}", text):
        raise InputError(f"--uid {text!r} is not a run uid; give a uid or its first "
                         "4 or more characters, as `quietwell runs` shows them")
    return text.lower()


def _queries(setup, plan, campaign, since, uid, usable_only) -> list:
    """tiled's queries for the filters (see ``_catalog_sql._where`` for the same as SQL)."""
    from tiled.queries import Key, KeyPresent, Like

    q = []
    if setup is not None:
        q.append(Key("start.setup") == str(setup))
    if plan is not None:
        q.append(Key("start.plan_name") == str(plan))
    if campaign is not None:
        q.append(Key("start.campaign_id") == str(campaign))
    if since is not None:
        q.append(Key("start.time") >= parse_since(since))
    if uid is not None:
        q.append(Like("start.uid", _uid_prefix(uid) + "%"))
    if usable_only:
        q.append(Key("stop.exit_status") == "success")
        q.append(KeyPresent("superseded_by", False))
    return q


async def _local_search(adapter: Any, queries: list) -> list[tuple[str, dict]]:
    node = adapter
    for query in queries:
        node = node.search(query)
    items = await node.items_range(0, None)
    return [(key, dict(child.metadata())) for key, child in items]


def _client_search(client: Any, queries: list) -> list[tuple[str, dict]]:
    node = client
    for query in queries:
        node = node.search(query)
    return [(key, dict(child.metadata)) for key, child in node.items()]


def _record(uid: str, md: Mapping[str, Any]) -> RunRecord:
    start = md.get("start") or {}
    stop = md.get("stop") or {}

    def opt_int(v):
        return int(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None

    return RunRecord(
        uid=str(start.get("uid", uid)), plan_name=start.get("plan_name"),
        setup=start.get("setup"), time=float(start.get("time", float("nan"))),
        exit_status=str(stop.get("exit_status") or "unfinished"),
        reason=str(stop.get("reason") or ""), campaign_id=start.get("campaign_id"),
        campaign_step=opt_int(start.get("campaign_step")),
        campaign_attempt=opt_int(start.get("campaign_attempt")),
        campaign_step_id=start.get("campaign_step_id"),
        superseded_by=md.get("superseded_by"),
        particle=None if start.get("particle") is None else str(start.get("particle")))


# --------------------------------------------------------------------------
# summaries


def _plain(v: Any) -> Any:
    item = getattr(v, "item", None)
    if item is not None and getattr(v, "ndim", 0) == 0:
        v = item()
    if isinstance(v, bytes):
        v = v.decode()
    return v


def _units(stream_md: Mapping[str, Any]) -> dict[str, str]:
    keys = stream_md.get("data_keys") or {}
    return {k: str(v.get("units") or "") for k, v in keys.items() if isinstance(v, Mapping)}


async def _local_summaries(adapter: Any, uids: Sequence[str]) -> dict[str, tuple]:
    """Each run's summary row and units, read in one query per event table.

    The catalog is asked per run for the summary stream (its data keys) and the data
    source of its table; the rows of all runs whose summaries share a table (one per
    plan and schema) are then read from the event tables at once, which is several
    times faster than reading each run's table through its adapter. A data source of
    another kind is read through its adapter.
    """
    from collections import defaultdict

    from tiled.mimetypes import TILED_SQL_TABLE_MIMETYPE

    out: dict[str, tuple | None] = {}
    units_of: dict[str, dict[str, str]] = {}
    batches: dict[tuple[str, str], list[tuple[str, int]]] = defaultdict(list)
    for uid in uids:
        try:
            stream = await adapter.lookup_adapter([uid, "summary"])
            table = None if stream is None else await stream.lookup_adapter(["internal"])
        except Exception:  # noqa: BLE001 - a run without a summary stream
            table = None
        if table is None:
            out[uid] = None
            continue
        units_of[uid] = _units(stream.metadata())
        (source,) = await table.data_sources(include_assets=True)
        params = source.parameters or {}
        if (source.mimetype == TILED_SQL_TABLE_MIMETYPE and len(source.assets) == 1
                and "table_name" in params and "dataset_id" in params):
            batches[(source.assets[0].data_uri, params["table_name"])].append(
                (uid, int(params["dataset_id"])))
        else:
            df = await table.read()
            last = df.iloc[-1] if len(df) else None
            out[uid] = ({} if last is None else
                        {k: _plain(last[k]) for k in units_of[uid] if k in df.columns},
                        units_of[uid])
    for (data_uri, table_name), members in batches.items():
        rows = _last_rows(data_uri, table_name, [d for _, d in members])
        for uid, dataset_id in members:
            row = rows.get(dataset_id, {})
            out[uid] = ({k: row[k.lower()] for k in units_of[uid] if k.lower() in row},
                        units_of[uid])
    return out


def _last_rows(data_uri: str, table_name: str, dataset_ids: list[int]) -> dict[int, dict]:
    """The last row of each dataset of one tiled SQL table (columns in lower case)."""
    from contextlib import closing

    from tiled.storage import get_storage

    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", table_name):
        raise ValueError(f"unexpected table name {table_name!r}")
    ids = ", ".join(str(int(d)) for d in sorted(set(dataset_ids)))
    query = (f'SELECT * FROM "{table_name}" WHERE _dataset_id IN ({ids}) '
             "ORDER BY _dataset_id, _partition_id, rowid")
    with closing(get_storage(data_uri).connect()) as conn:
        with conn.cursor() as cursor:
            cursor.execute(query)
            rows = cursor.fetch_arrow_table().to_pylist()
    return {int(r["_dataset_id"]): r for r in rows}  # later rows replace earlier ones


def _client_summaries(client: Any, uids: Sequence[str]) -> dict[str, tuple]:
    def one(uid: str):
        run = client[uid]
        if "summary" not in run:
            return uid, None
        stream = run["summary"]
        units = _units(stream.metadata)
        ds = stream.read()
        row = {}
        for k in units:
            if k in ds:
                values = ds[k].values
                if len(values):
                    row[k] = _plain(values[-1])
        return uid, (row, units)

    # One at a time: a tiled server on DuckDB storage shares one connection between
    # its request threads, and concurrent table reads fail there (seen in this process).
    return dict(one(u) for u in uids)


_FELL_BACK: set[Any] = set()


def _tiled_path(store: LocalStore) -> bool:
    """True to read ``store`` through tiled's adapter (``QUIETWELL_READ_VIA_TILED=1``,
    or after the direct reading found a catalog it does not know)."""
    return os.environ.get("QUIETWELL_READ_VIA_TILED") == "1" or store.data_dir in _FELL_BACK


def _notice_fallback(store: LocalStore, exc: Exception) -> None:
    _FELL_BACK.add(store.data_dir)
    print(f"quietwell: note: {store.data_dir}: {exc}; reading it through tiled's catalog "
          "adapter instead (slower)", file=sys.stderr)


def find_runs(location: Any, *, setup: str | None = None, plan: str | None = None,
              campaign: str | None = None, since: Any = None, uid: str | None = None,
              usable_only: bool = False, summaries: bool = True,
              api_key_env: str = DEFAULT_API_KEY_ENV) -> list[RunRecord]:
    """The runs of a store that match, oldest first, found by the catalog's search.

    Parameters
    ----------
    location : str, Path or tiled client
        A data directory, a tiled server URI, or a tiled client.
    setup, plan, campaign : str, optional
        Exact ``setup``, ``plan_name``, ``campaign_id`` of the start document.
    since : str, datetime or float, optional
        Runs started at or after this time (ISO date or date-time, local time).
    uid : str, optional
        A run's uid or its first 4 or more characters.
    usable_only : bool
        Only runs that ended with ``success`` and were not superseded.
    summaries : bool
        Read each run's ``summary`` stream (values in SI, ``units``).
    api_key_env : str
        For a URI: the environment variable holding the API key.
    """
    # refused before the store is opened
    since_s = None if since is None else parse_since(since)
    prefix = _uid_prefix(uid)
    store = resolve(location, api_key_env=api_key_env)
    if isinstance(store, LocalStore) and not _tiled_path(store):
        from . import _catalog_sql

        try:
            found = _catalog_sql.list_runs(
                store.data_dir / "catalog", store.snapshots.current, setup=setup, plan=plan,
                campaign=campaign, since=since_s, uid_prefix=prefix, usable_only=usable_only,
                summaries=summaries)
        except _catalog_sql.SchemaMismatch as exc:
            _notice_fallback(store, exc)
        else:
            records = []
            for key, md, got in found:
                rec = _record(key, md)
                if got is not None:
                    rec = dataclasses.replace(rec, summary=got[0], units=got[1])
                records.append(rec)
            return sorted(records, key=lambda r: (r.time, r.uid))
    queries = _queries(setup, plan, campaign, since_s, prefix, usable_only)
    if isinstance(store, LocalStore):
        found = store.run(_local_search, queries)
    else:
        found = _client_search(store, queries)
    records = sorted((_record(k, md) for k, md in found), key=lambda r: (r.time, r.uid))
    if summaries and records:
        uids = [r.uid for r in records]
        if isinstance(store, LocalStore):
            got = store.run(_local_summaries, uids)
        else:
            got = _client_summaries(store, uids)
        records = [r if got.get(r.uid) is None else
                   dataclasses.replace(r, summary=got[r.uid][0], units=got[r.uid][1])
                   for r in records]
    return records


# --------------------------------------------------------------------------
# output


def key_values(rec: RunRecord) -> list[str]:
    """The names of the run's key derived values (see :data:`KEY_FIELDS`)."""
    names = KEY_FIELDS.get(rec.plan_name or "")
    if names is None:
        names = tuple(k for k in rec.summary if f"{k}_stderr" in rec.summary)[:3]
    return [k for k in names if k in rec.summary]


def _number(v: Any) -> str:
    if isinstance(v, float):
        return "nan" if math.isnan(v) else f"{v:.4g}"
    return str(v)


def _value(rec: RunRecord, k: str) -> str:
    v, err = rec.summary[k], rec.summary.get(f"{k}_stderr")
    unit = rec.units.get(k, "")
    unit = "" if unit in ("", "1") else f" {unit}"
    if isinstance(err, float) and math.isfinite(err) and err > 0:
        return f"{k}={_number(v)}±{err:.2g}{unit}"
    return f"{k}={_number(v)}{unit}"


def _when(t: float) -> str:
    if not math.isfinite(t):
        return "?"
    return _dt.datetime.fromtimestamp(t).strftime("%Y-%m-%d %H:%M:%S")


def format_runs(records: Sequence[RunRecord]) -> str:
    """One line a run: time (local), setup, plan, campaign, step#attempt, status, uid
    (first 8 characters), key derived values with errors and units."""
    head = ("time", "setup", "plan", "campaign", "step", "status", "uid")
    rows = []
    for r in records:
        step = "-" if r.campaign_step is None else (
            f"{r.campaign_step}#{r.campaign_attempt or 1}")
        rows.append((_when(r.time), r.setup or "-", r.plan_name or "-", r.campaign_id or "-",
                     step, r.status, r.uid[:8], "  ".join(_value(r, k) for k in key_values(r))))
    widths = [max([len(h)] + [len(row[i]) for row in rows]) for i, h in enumerate(head)]
    lines = ["  ".join(h.ljust(w) for h, w in zip(head, widths, strict=True)) + "  values"]
    lines += ["  ".join(c.ljust(w) for c, w in zip(row[:-1], widths, strict=True))
              + "  " + row[-1] for row in rows]
    return "\n".join(line.rstrip() for line in lines)


def _json_value(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def runs_json(records: Sequence[RunRecord]) -> list[dict]:
    """The records as JSON-ready objects (``time`` ISO 8601 in UTC, ``time_s`` since
    the epoch; a value that is not finite is ``null``)."""
    out = []
    for r in records:
        t = (_dt.datetime.fromtimestamp(r.time, _dt.UTC).isoformat()
             if math.isfinite(r.time) else None)
        out.append({"uid": r.uid, "plan_name": r.plan_name, "setup": r.setup, "time": t,
                    "time_s": _json_value(r.time), "exit_status": r.exit_status,
                    "reason": r.reason, "superseded_by": r.superseded_by,
                    "campaign_id": r.campaign_id, "campaign_step": r.campaign_step,
                    "campaign_attempt": r.campaign_attempt, "particle": r.particle,
                    "summary": {k: _json_value(v) for k, v in r.summary.items()},
                    "units": dict(r.units)})
    return out
