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


def test_summaries_read_in_one_query_per_table_equal_tiled_client_reads(store):
    # the listing's batched read of the event tables against tiled's own client (HTTP
    # requests served in this process), run by run, value by value
    d, written = store
    client = open_store(d)
    for rec in find_runs(d):
        run = client[rec.uid]
        assert run.metadata["stop"]["exit_status"] == rec.exit_status
        if "summary" not in run:
            assert rec.summary == {}
            continue
        ds = run["summary"].read()
        units = {k: v["units"] for k, v in run["summary"].metadata["data_keys"].items()}
        assert dict(rec.units) == units
        for k in units:
            v = ds[k].values[-1]
            v = v.item() if hasattr(v, "item") else v
            assert rec.summary[k] == v or _close(rec.summary[k], v), (rec.uid, k)


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
