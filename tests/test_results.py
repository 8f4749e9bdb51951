"""Run listings and tables of derived values, read back from a real store.

The store (tests/results_store.py) is written by the real plans on the simulated setups;
every number here is checked against what the plans returned to the RunEngine
(``plan_result``, outside the catalog) and against the catalog read through tiled's own
HTTP client, and every filter against the runs the test wrote.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest
from results_store import shared_store

from quietwell import InputError
from quietwell.cli import main
from quietwell.results import (
    calibrations,
    derived_table,
    find_runs,
    heating_rates,
    open_store,
    particles,
)

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    return shared_store(tmp_path_factory)


def _runs_cli(capsys, *argv):
    code = main(["runs", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def _close(a, b):
    return (isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b)) \
        or a == pytest.approx(b, rel=1e-12, abs=0)


def test_listing_holds_exactly_the_runs_written_with_their_statuses(store, capsys):
    d, written = store
    code, out, err = _runs_cli(capsys, "--data-dir", str(d), "--json")
    assert code == 0, err
    got = json.loads(out)
    assert [g["uid"] for g in got] == [w.uid for w in written]  # oldest first, newest last
    for g, w in zip(got, written, strict=True):
        assert (g["plan_name"], g["setup"], g["exit_status"]) == (w.plan, w.setup,
                                                                  w.exit_status)
        assert (g["campaign_id"], g["campaign_step"]) == (w.campaign_id, w.campaign_step)
        assert g["superseded_by"] == w.superseded_by
        # the summary the plan returned to the RunEngine is what the listing shows
        for k, v in w.result.items():
            if isinstance(v, float):
                assert _close(g["summary"][k] if g["summary"][k] is not None else math.nan,
                              v), k
    assert got[0]["units"]["calibration_x"] == "V/m"
    assert got[2]["units"]["heating_rate_x"] == "quanta/s"
    # the table form: one line a run plus the header, statuses as written
    code, out, _ = _runs_cli(capsys, "--data-dir", str(d))
    lines = out.strip().splitlines()
    assert len(lines) == len(written) + 1
    for line, w in zip(lines[1:], written, strict=True):
        assert w.uid[:8] in line
        assert ("superseded/abort" if w.superseded_by else w.exit_status) in line.split()
    assert "heating_rate_x=" in lines[3] and "quanta/s" in lines[3]


def _tiled_client_records(client, queries):
    """The runs as tiled's own client reads them (HTTP requests served in this process),
    written out field by field without quietwell's reader: the reference the direct
    reading of the catalog files must equal."""
    node = client
    for q in queries:
        node = node.search(q)
    out = {}
    for uid, run in node.items():
        start, stop = run.metadata["start"], run.metadata.get("stop") or {}
        summary, units = {}, {}
        if "summary" in run:
            stream = run["summary"]
            units = {k: str(v.get("units") or "")
                     for k, v in stream.metadata["data_keys"].items()}
            ds = stream.read()
            for k in units:
                if k in ds and len(ds[k].values):
                    v = ds[k].values[-1]
                    summary[k] = v.item() if hasattr(v, "item") else v
        out[uid] = {
            "uid": start["uid"], "plan_name": start.get("plan_name"),
            "setup": start.get("setup"), "time": start["time"],
            "exit_status": stop.get("exit_status") or "unfinished",
            "reason": stop.get("reason") or "", "campaign_id": start.get("campaign_id"),
            "campaign_step": start.get("campaign_step"),
            "campaign_attempt": start.get("campaign_attempt"),
            "campaign_step_id": start.get("campaign_step_id"),
            "superseded_by": run.metadata.get("superseded_by"),
            "particle": start.get("particle"), "summary": summary, "units": units}
    return out


def _filter_cases(written):
    from tiled.queries import Key, KeyPresent, Like

    return [
        ({}, []),
        ({"setup": "amber"}, [Key("start.setup") == "amber"]),
        ({"setup": "cobalt", "plan": "thermal_calibration"},
         [Key("start.setup") == "cobalt", Key("start.plan_name") == "thermal_calibration"]),
        ({"campaign": "c-one"}, [Key("start.campaign_id") == "c-one"]),
        ({"uid": written[3].uid[:6].upper()}, [Like("start.uid", written[3].uid[:6] + "%")]),
        ({"usable_only": True}, [Key("stop.exit_status") == "success",
                                 KeyPresent("superseded_by", False)]),
        ({"plan": "reheating_cycles", "usable_only": True},
         [Key("start.plan_name") == "reheating_cycles", Key("stop.exit_status") == "success",
          KeyPresent("superseded_by", False)]),
    ]


def test_direct_listing_equals_tiled_clients_reading_field_by_field(store):
    # The listing reads tiled's catalog files itself (quietwell/results/_catalog_sql.py,
    # written for the pinned tiled 0.2.20): every field of every run, for every filter,
    # must equal what tiled's own client reads and finds with tiled's own search, so
    # that a change of tiled's layout fails here rather than misleading a user.
    import dataclasses

    from tiled.queries import Key

    d, written = store
    client = open_store(d)
    cases = _filter_cases(written)
    t3 = find_runs(d, summaries=False)[3].time
    cases.append(({"since": t3}, [Key("start.time") >= t3]))
    for kwargs, queries in cases:
        got = find_runs(d, **kwargs)
        want = _tiled_client_records(client, queries)
        assert sorted(r.uid for r in got) == sorted(want), kwargs
        assert got, kwargs
        for rec in got:
            fields = dataclasses.asdict(rec)
            ref = want[rec.uid]
            assert set(fields) == set(ref)
            for name, value in ref.items():
                if name == "summary":
                    assert set(fields["summary"]) == set(value), (rec.uid, kwargs)
                    for k, v in value.items():
                        g = fields["summary"][k]
                        assert type(g) is type(v) and (g == v or _close(g, v)), (rec.uid, k)
                else:
                    assert fields[name] == value, (rec.uid, name, kwargs)
    # the summaries exist at all (a store of empty summaries would pass the above)
    assert find_runs(d)[0].summary["calibration_x"] > 0


def test_direct_listing_is_pinned_to_tileds_catalog_revision():
    # the revision the direct reading was written for is the one the installed tiled
    # writes; a tiled upgrade changes it and fails here (re-check _catalog_sql's
    # assumptions, then update EXPECTED_REVISION)
    from tiled.catalog.core import REQUIRED_REVISION

    from quietwell.results._catalog_sql import EXPECTED_REVISION

    assert REQUIRED_REVISION == EXPECTED_REVISION


def test_an_unknown_catalog_layout_falls_back_to_tiled_with_one_line(store, monkeypatch, capsys):
    import dataclasses

    from quietwell.results import _catalog_sql, _runs

    d, written = store
    direct = find_runs(d)
    monkeypatch.setattr(_catalog_sql, "EXPECTED_REVISION", "000000000000")
    monkeypatch.setattr(_runs, "_FELL_BACK", set())
    via_tiled = find_runs(d)
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert "000000000000" in err and "tiled's catalog adapter" in err and str(d) in err
    assert [dataclasses.asdict(r) for r in via_tiled] == [dataclasses.asdict(r) for r in direct]
    find_runs(d, setup="amber")  # noticed once a store
    assert capsys.readouterr().err == ""


def test_listing_a_data_directory_does_not_import_tiled(store):
    # what makes `quietwell runs --data-dir` fast: tiled's catalog adapter imports dask
    # and xarray (seconds); the direct reading needs sqlite3 and duckdb only
    d, written = store
    code = ("import sys; from quietwell.results import find_runs; "
            f"rs = find_runs({str(d)!r}); assert len(rs) == {len(written)}; "
            "print(sorted({m.split('.')[0] for m in sys.modules} & "
            "{'tiled', 'dask', 'xarray', 'pandas', 'sqlalchemy'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, env={**os.environ, "PYTHONPATH": os.pathsep.join(
                             [str(ROOT / "src"), str(ROOT / "sim_devices")])})
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


@pytest.mark.parametrize(("argv", "select"), [
    (["--setup", "cobalt"], lambda w: w.setup == "cobalt"),
    (["--setup", "amber", "--plan", "reheating_cycles"],
     lambda w: w.setup == "amber" and w.plan == "reheating_cycles"),
    (["--campaign", "c-two"], lambda w: w.campaign_id == "c-two"),
    (["--campaign", "c-one", "--plan", "pressure_sweep"],
     lambda w: w.campaign_id == "c-one" and w.plan == "pressure_sweep"),
])
def test_filters_return_exactly_the_runs_that_match(store, capsys, argv, select):
    d, written = store
    code, out, err = _runs_cli(capsys, "--data-dir", str(d), "--json", *argv)
    assert code == 0, err
    assert [g["uid"] for g in json.loads(out)] == [w.uid for w in written if select(w)]


def test_since_and_uid_filters(store, capsys):
    import datetime as dt

    d, written = store
    recs = find_runs(d, summaries=False)
    t5 = recs[5].time
    assert [r.uid for r in find_runs(d, since=t5)] == [w.uid for w in written][5:]
    # a datetime keeps microseconds only: just before run 5
    after = [r.uid for r in find_runs(d, since=dt.datetime.fromtimestamp(t5 - 1e-3))]
    assert after == [w.uid for w in written][5:]
    assert [r.uid for r in find_runs(d, since="2000-01-01")] == [w.uid for w in written]
    assert find_runs(d, since="2999-01-01") == []
    code, out, _ = _runs_cli(capsys, "--data-dir", str(d), "--json", "--uid", written[4].uid[:8])
    assert code == 0 and [g["uid"] for g in json.loads(out)] == [written[4].uid]


def test_heating_rates_are_the_summary_values_of_the_usable_reheating_runs(store):
    d, written = store
    df = heating_rates(d, setup="amber")
    usable = [w for w in written if w.plan == "reheating_cycles" and w.exit_status == "success"
              and not w.superseded_by]
    assert list(df["uid"]) == [w.uid for w in usable]  # aborted, failed, superseded left out
    for (_, row), w in zip(df.iterrows(), usable, strict=True):
        for k in ("pressure", "heating_rate_x", "heating_rate_x_stderr", "heating_rate_z",
                  "predicted_heating_rate_y"):
            assert row[k] == pytest.approx(w.result[k], rel=1e-12), k
        assert (row["campaign_id"], row["campaign_step"]) == (w.campaign_id, w.campaign_step)
    assert df.attrs["units"]["heating_rate_x"] == "quanta/s"
    assert df.attrs["units"]["pressure"] == "Pa"
    everything = heating_rates(d, setup="amber", include_all=True)
    assert list(everything["uid"]) == [w.uid for w in written if w.plan == "reheating_cycles"]
    assert set(everything["exit_status"]) == {"success", "abort", "fail"}
    assert everything["superseded_by"].notna().sum() == 1
    assert heating_rates(d, setup="cobalt").empty


def test_calibrations_particles_and_the_generic_table(store):
    d, written = store
    cal = calibrations(d)
    cal_w = [w for w in written if w.plan == "thermal_calibration"]
    assert list(cal["uid"]) == [w.uid for w in cal_w]
    assert list(cal["setup"]) == ["amber", "cobalt"]
    for (_, row), w in zip(cal.iterrows(), cal_w, strict=True):
        assert row["calibration_y"] == pytest.approx(w.result["calibration_y"].value
                                                     if hasattr(w.result["calibration_y"], "value")
                                                     else w.result["calibration_y"], rel=1e-12)
    assert cal.attrs["units"]["calibration_x"] == "V/m"
    par = particles(d, setup="amber")
    (sweep,) = [w for w in written if w.plan == "pressure_sweep"]
    assert list(par["uid"]) == [sweep.uid]
    assert par["radius"].iloc[0] == pytest.approx(sweep.result["radius"], rel=1e-12)
    assert par.attrs["units"]["radius"] == "m"
    gen = derived_table(d, campaign="c-one")
    assert list(gen["uid"]) == [w.uid for w in written if w.campaign_id == "c-one"
                                and w.exit_status == "success" and not w.superseded_by]
    only = derived_table(d, "reheating_cycles", fields=["pressure"])
    assert list(only.columns[-2:]) == ["pressure", "pressure_stderr"]


def test_reading_while_a_writer_holds_the_store(store, capsys):
    # a campaign's catalog process holds catalog.lock and the event tables: the reader
    # neither waits for it nor takes the lock, and reads the same runs
    import fcntl

    from quietwell.store import EmbeddedStore

    d, written = store
    with EmbeddedStore(d):
        code = subprocess.run(
            [sys.executable, "-m", "quietwell.cli", "runs", "--data-dir", str(d), "--json"],
            capture_output=True, text=True, timeout=120,
            env={**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"),
                                                              str(ROOT / "sim_devices")])})
        assert code.returncode == 0, code.stderr
        assert [g["uid"] for g in json.loads(code.stdout)] == [w.uid for w in written]
        with open(d / "catalog" / "catalog.lock") as f:  # still the writer's
            with pytest.raises(BlockingIOError):
                fcntl.flock(f.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)


def test_a_tiled_server_uri_with_its_key_from_the_environment(store, capsys, monkeypatch):
    from urllib.parse import parse_qs, urlsplit

    from quietwell.store import EmbeddedStore

    d, written = store
    with EmbeddedStore(d) as st:
        parts = urlsplit(st.uri)
        key = parse_qs(parts.query)["api_key"][0]
        bare = f"{parts.scheme}://{parts.netloc}{parts.path}"
        monkeypatch.setenv("QW_TEST_KEY", key)
        code, out, err = _runs_cli(capsys, "--uri", bare, "--api-key-env", "QW_TEST_KEY",
                                   "--json", "--plan", "reheating_cycles")
        assert code == 0, err
        got = json.loads(out)
        assert [g["uid"] for g in got] == [w.uid for w in written if w.plan == "reheating_cycles"]
        ok = [w for w in written if w.plan == "reheating_cycles" and w.result]
        for w in ok:
            g = next(g for g in got if g["uid"] == w.uid)
            assert g["summary"]["heating_rate_y"] == pytest.approx(w.result["heating_rate_y"],
                                                                   rel=1e-12)
        df = heating_rates(bare, api_key_env="QW_TEST_KEY")
        assert list(df["uid"]) == [w.uid for w in ok if not w.superseded_by]
        # a refused key: one line, exit 2, the key nowhere
        monkeypatch.setenv("QW_TEST_KEY", "not-the-key-0123")
        code, out, err = _runs_cli(capsys, "--uri", bare, "--api-key-env", "QW_TEST_KEY")
        assert code == 2 and out == ""
        assert "refused" in err and "QW_TEST_KEY" in err and len(err.strip().splitlines()) == 1
        assert "not-the-key-0123" not in err and key not in err


@pytest.mark.parametrize(("argv", "words"), [
    (["--data-dir", "{missing}"], ["does not exist", "data directory"]),
    (["--data-dir", "{empty}"], ["holds no quietwell store", "catalog/catalog.db"]),
    (["--data-dir", "{store}", "--uid", "0000abcd"], ["--uid 0000abcd", "no run"]),
    (["--data-dir", "{store}", "--uid", "not-a-uid!"], ["is not a run uid"]),
    (["--data-dir", "{store}", "--campaign", "c-nine"], ["--campaign c-nine", "no run"]),
    (["--data-dir", "{store}", "--since", "last tuesday"], ["--since 'last tuesday'",
                                                             "YYYY-MM-DD"]),
    (["--data-dir", "{store}", "--since", "2026-13-45"], ["is not a date"]),
    (["--uri", "http://127.0.0.1:9/api/v1?api_key=secret-in-uri"],
     ["does not answer", "http://127.0.0.1:9/api/v1"]),
    (["--data-dir", "{store}", "--uri", "http://127.0.0.1:9"], ["not allowed with"]),
    ([], ["one of the arguments --data-dir --uri is required"]),
])
def test_bad_input_is_one_line_and_exit_2(store, tmp_path, capsys, argv, words):
    d, _ = store
    (tmp_path / "empty").mkdir()
    argv = [a.format(missing=tmp_path / "nowhere", empty=tmp_path / "empty", store=d)
            for a in argv]
    code, out, err = _runs_cli(capsys, *argv)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    for w in words:
        assert w in err
    assert "secret-in-uri" not in err


def test_python_api_refuses_bad_input_with_one_message(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        heating_rates(tmp_path / "nowhere")
    with pytest.raises(InputError, match="is not a date"):
        find_runs(tmp_path, since="yesterday")
    with pytest.raises(InputError, match="not a store"):
        derived_table(42)
