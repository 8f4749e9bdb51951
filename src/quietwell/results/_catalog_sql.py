"""Listing a data directory by reading tiled's catalog files directly, read-only.

Importing tiled's catalog adapter takes seconds (it imports dask and xarray through
``tiled.adapters.protocols``), several times what the listing itself costs. For
``quietwell runs --data-dir`` and :func:`quietwell.results.find_runs` on a data
directory, the runs and their summaries are read here with :mod:`sqlite3` and
:mod:`duckdb` alone: the same rows tiled's adapter would read, found with the same
SQL conditions on the catalog's metadata JSON that tiled's own search issues.

What this module assumes of the store (tiled 0.2.20, the version pinned in
``pyproject.toml``; all of it is checked by :func:`check_schema` before a listing,
and ``tests/test_results.py`` checks, field by field, that the listing equals what
tiled's own client reads from the same store):

* ``DIR/catalog/catalog.db`` is tiled's SQLite catalog at alembic revision
  :data:`EXPECTED_REVISION` (``tiled.catalog.core.REQUIRED_REVISION`` of tiled 0.2.20),
  with the tables and columns of :data:`EXPECTED_COLUMNS`;
* the catalog's root is the one node with ``parent IS NULL``; each run is a child of
  it (``nodes.key`` is the run's uid) whose ``metadata`` JSON holds ``start``,
  ``stop`` (absent while the run is unfinished) and, for a redone run,
  ``superseded_by``;
* a run's summary stream is its child node ``summary`` (``metadata.data_keys`` maps
  each value to its data key, with ``units``), and the stream's rows are the child
  ``internal`` of that node, a table with one data source of mimetype
  ``application/x-tiled-sql-table`` whose ``parameters`` hold ``table_name`` and
  ``dataset_id`` and whose one asset (``parameter = 'data_uri'``) is a ``duckdb:``
  URI: the event tables in ``DIR/catalog/storage.duckdb``;
* in that table the run's rows are those with ``_dataset_id = dataset_id``, in the
  order of ``_partition_id`` and then row id, one column a data key in lower case.

Anything else (another revision, a missing column, a summary stored another way) is
:class:`SchemaMismatch`, and the caller reads the store through tiled's adapter
instead, with a one-line notice.

Read-only: the catalog is opened with ``mode=ro`` (SQLite refuses every write; the
writer's ``catalog.lock`` is never taken) and the event tables only through a copy
(see :class:`quietwell.results._reader._Snapshots`): DuckDB lets no two processes
open one file.
"""

from __future__ import annotations

import json
import re
import sqlite3
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["EXPECTED_REVISION", "EXPECTED_COLUMNS", "SchemaMismatch", "check_schema",
           "list_runs"]

#: tiled 0.2.20's catalog revision (``tiled.catalog.core.REQUIRED_REVISION``).
EXPECTED_REVISION = "917dbbcfc4b1"

#: The tables and columns of the catalog this module reads.
EXPECTED_COLUMNS: dict[str, frozenset[str]] = {
    "nodes": frozenset({"id", "parent", "key", "structure_family", "metadata"}),
    "data_sources": frozenset({"id", "node_id", "mimetype", "parameters"}),
    "data_source_asset_association": frozenset({"data_source_id", "asset_id", "parameter"}),
    "assets": frozenset({"id", "data_uri"}),
    "alembic_version": frozenset({"version_num"}),
}

#: tiled's mimetype of a table stored in its SQL event tables.
SQL_TABLE_MIMETYPE = "application/x-tiled-sql-table"


class SchemaMismatch(Exception):
    """The catalog is not laid out as this module expects (see the module's text)."""


def connect(catalog_db: Path) -> sqlite3.Connection:
    """The catalog opened read-only (``mode=ro``: SQLite refuses every write)."""
    return sqlite3.connect(f"file:{catalog_db}?mode=ro", uri=True, timeout=30)


def check_schema(db: sqlite3.Connection) -> None:
    """Raise :class:`SchemaMismatch` unless the catalog is the one described above."""
    try:
        revisions = [r for (r,) in db.execute("SELECT version_num FROM alembic_version")]
        if revisions != [EXPECTED_REVISION]:
            raise SchemaMismatch(f"catalog revision {revisions} (expected "
                                 f"{EXPECTED_REVISION}, tiled 0.2.20)")
        for table, columns in EXPECTED_COLUMNS.items():
            have = {row[1] for row in db.execute(f'PRAGMA table_info("{table}")')}
            if not columns <= have:
                raise SchemaMismatch(f"catalog table {table} lacks "
                                     f"{', '.join(sorted(columns - have))}")
        roots = db.execute("SELECT count(*) FROM nodes WHERE parent IS NULL").fetchone()[0]
        if roots != 1:
            raise SchemaMismatch(f"{roots} root nodes in the catalog (expected 1)")
    except sqlite3.Error as exc:
        raise SchemaMismatch(f"catalog not readable as tiled 0.2.20's ({exc})") from None


def _where(setup, plan, campaign, since, uid_prefix, usable_only) -> tuple[str, list]:
    """The conditions tiled 0.2.20 issues on SQLite for quietwell's queries:
    ``Key(k) == v`` and ``Key(k) >= v`` as ``JSON_EXTRACT(metadata, '$."a"."b"') op v``,
    ``Like(k, p)`` as ``JSON_EXTRACT(...) LIKE p``, ``KeyPresent(k, False)`` as
    ``(metadata -> '$.k') IS NULL``."""
    conds, args = [], []

    def key(path: str) -> str:
        return "JSON_EXTRACT(r.metadata, '$." + ".".join(f'"{p}"' for p in path.split(".")) + "')"

    if setup is not None:
        conds.append(f"{key('start.setup')} = ?")
        args.append(str(setup))
    if plan is not None:
        conds.append(f"{key('start.plan_name')} = ?")
        args.append(str(plan))
    if campaign is not None:
        conds.append(f"{key('start.campaign_id')} = ?")
        args.append(str(campaign))
    if since is not None:
        conds.append(f"{key('start.time')} >= ?")
        args.append(float(since))
    if uid_prefix is not None:
        conds.append(f"{key('start.uid')} LIKE ?")
        args.append(uid_prefix + "%")
    if usable_only:
        conds.append(f"{key('stop.exit_status')} = ?")
        args.append("success")
        conds.append("(r.metadata -> '$.superseded_by') IS NULL")
    return "".join(f" AND {c}" for c in conds), args


def _search(db: sqlite3.Connection, where: str, args: list, summaries: bool) -> list[tuple]:
    """(uid, run metadata, summary metadata, mimetype, parameters, data_uri) a run."""
    if not summaries:
        sql = ("SELECT r.key, r.metadata, NULL, NULL, NULL, NULL FROM nodes r "
               "WHERE r.parent = (SELECT id FROM nodes WHERE parent IS NULL)" + where
               + " ORDER BY r.id")
        return db.execute(sql, args).fetchall()
    sql = (
        "SELECT r.key, r.metadata, s.metadata, d.mimetype, d.parameters, a.data_uri "
        "FROM nodes r "
        "LEFT JOIN nodes s ON s.parent = r.id AND s.key = 'summary' "
        "LEFT JOIN nodes i ON i.parent = s.id AND i.key = 'internal' "
        "LEFT JOIN data_sources d ON d.node_id = i.id "
        "LEFT JOIN data_source_asset_association x ON x.data_source_id = d.id "
        "  AND x.parameter = 'data_uri' "
        "LEFT JOIN assets a ON a.id = x.asset_id "
        "WHERE r.parent = (SELECT id FROM nodes WHERE parent IS NULL)" + where
        + " ORDER BY r.id")
    return db.execute(sql, args).fetchall()


def _units(stream_md: Mapping[str, Any]) -> dict[str, str]:
    keys = stream_md.get("data_keys") or {}
    return {k: str(v.get("units") or "") for k, v in keys.items() if isinstance(v, Mapping)}


def list_runs(catalog_dir: Path, snapshot: Any, *, setup=None, plan=None, campaign=None,
              since: float | None = None, uid_prefix: str | None = None,
              usable_only: bool = False, summaries: bool = True
              ) -> list[tuple[str, dict, tuple | None]]:
    """The matching runs: (uid, run metadata, (summary row, units) or None) each, in the
    catalog's order. ``snapshot()`` gives the path of a current copy of the event
    tables (or None if the store has none). Raises :class:`SchemaMismatch`."""
    db = connect(catalog_dir / "catalog.db")
    try:
        check_schema(db)
        where, args = _where(setup, plan, campaign, since, uid_prefix, usable_only)
        try:
            rows = _search(db, where, args, summaries)
        except sqlite3.Error as exc:
            raise SchemaMismatch(f"catalog search failed ({exc})") from None
    finally:
        db.close()
    seen: set[str] = set()
    found: list[tuple[str, dict, Any]] = []
    batches: dict[str, list[tuple[int, int]]] = {}  # table -> [(index in found, dataset)]
    for uid, run_md, stream_md, mimetype, params, data_uri in rows:
        if uid in seen:  # more than one data source or asset for one summary table
            raise SchemaMismatch(f"run {uid}: its summary table has more than one data "
                                 "source")
        seen.add(uid)
        md = json.loads(run_md)
        if stream_md is None or mimetype is None:  # no summary stream, or no rows yet
            found.append((uid, md, None))
            continue
        units = _units(json.loads(stream_md))
        p = json.loads(params) if params else {}
        table, dataset = p.get("table_name"), p.get("dataset_id")
        if (mimetype != SQL_TABLE_MIMETYPE or not isinstance(table, str)
                or not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", table)
                or not isinstance(dataset, int) or not str(data_uri or "").startswith("duckdb:")):
            raise SchemaMismatch(f"run {uid}: summary stored as {mimetype} "
                                 f"({data_uri or 'no asset'})")
        found.append((uid, md, units))
        batches.setdefault(table, []).append((len(found) - 1, dataset))
    if batches:
        last = _last_rows(snapshot(), {t: [d for _, d in m] for t, m in batches.items()})
        for table, members in batches.items():
            for index, dataset in members:
                uid, md, units = found[index]
                row = last.get((table, dataset), {})
                found[index] = (uid, md, ({k: row[k.lower()] for k in units
                                           if k.lower() in row}, units))
    return found


def _last_rows(path: Path | None, tables: Mapping[str, Sequence[int]]
               ) -> dict[tuple[str, int], dict[str, Any]]:
    """The last row of each dataset of each table (columns in lower case)."""
    if path is None:
        raise SchemaMismatch("runs refer to event tables but catalog/storage.duckdb is missing")
    import duckdb

    out: dict[tuple[str, int], dict[str, Any]] = {}
    conn = duckdb.connect(str(path), read_only=True)
    try:
        for table, datasets in tables.items():
            ids = ", ".join(str(int(d)) for d in sorted(set(datasets)))
            try:
                cur = conn.execute(f'SELECT * FROM "{table}" WHERE _dataset_id IN ({ids}) '
                                   "ORDER BY _dataset_id, _partition_id, rowid")
            except duckdb.Error as exc:
                raise SchemaMismatch(f"event table {table}: {exc}") from None
            names = [d[0] for d in cur.description]
            for values in cur.fetchall():
                row = dict(zip(names, values, strict=True))
                out[(table, int(row["_dataset_id"]))] = row  # later rows replace earlier
    finally:
        conn.close()
    return out
