"""The lab catalog: setups writing into one tiled server on PostgreSQL (README, "Lab
deployment"). Each test module starts a server of its own (fresh databases, free port)
on the PostgreSQL that .ci/services starts, so that tests can kill it."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from lab_server import ROOT, LabServer, server_profile

TINY = ROOT / "tests" / "data" / "tiny-campaign.toml"


def _env(lab: LabServer, **extra) -> dict:
    env = {k: v for k, v in lab.env.items() if not k.startswith("QUIETWELL_LAB_")}
    env.pop("PGUSER", None)
    env.update({"QWTEST_KEY": lab.key, **extra})
    return env


def _run(args: list[str], env: dict, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "quietwell.cli", *args], env=env,
                          capture_output=True, text=True, cwd=ROOT, **kw)


def _start(args: list[str], env: dict, out: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "quietwell.cli", *args], env=env, cwd=ROOT,
                            stdout=open(out.with_suffix(".out"), "w"),  # noqa: SIM115
                            stderr=open(out.with_suffix(".err"), "w"))  # noqa: SIM115


def _ledger(data_dir: Path) -> tuple[str, dict[str, str]]:
    (folder,) = (data_dir / "campaigns").iterdir()
    entries = [json.loads(x) for x in (folder / "ledger.jsonl").read_text().splitlines()]
    done = {e["uid"]: e for e in entries if e["event"] == "done"}
    return entries[0]["campaign_id"], done


def _journal_counts(data_dir: Path) -> dict[str, dict]:
    """Per run uid: number of events per stream and the stop's num_events, from the
    journal (the acquisition's own record of what it emitted)."""
    out = {}
    for path in (data_dir / "journal").glob("*.jsonl"):
        docs = [json.loads(x) for x in path.read_text().splitlines()]
        uid = docs[0][1]["uid"]
        stop = [d for n, d in docs if n == "stop"]
        out[uid] = {"num_events": stop[0]["num_events"] if stop else None,
                    "done": path.name.endswith(".done.jsonl")}
    return out


def _check_runs(client, setup: str, data_dir: Path) -> None:
    """Every run of the campaign in ``data_dir`` is in the catalog under ``setup``, with
    every record of every stream, and no run of another setup carries its campaign."""
    from tiled.queries import Key

    cid, done = _ledger(data_dir)
    journal = _journal_counts(data_dir)
    assert all(j["done"] for j in journal.values()), journal
    runs = client.search(Key("start.campaign_id") == cid)
    assert sorted(runs) == sorted(journal), "runs of the campaign in the catalog vs journal"
    assert set(done) <= set(runs)
    for uid, run in runs.items():
        start = run.metadata["start"]
        assert start["setup"] == setup and start["campaign_id"] == cid
        assert start["particle"] and start["plan_name"]
        assert start["setup_sha256"] == start["setup_sha256"].lower() and len(
            start["setup_sha256"]) == 64
        for stream, n in journal[uid]["num_events"].items():
            assert run[stream]["seq_num"].read().shape[0] == n, (uid, stream)
        if "trace_x" in run["primary"]:  # every record's external trace is registered
            assert run["primary"]["trace_x"].shape[0] == journal[uid]["num_events"]["primary"]
    mine = client.search(Key("start.setup") == setup)
    assert set(runs) <= set(mine)


def _queries_across_setups(lab: LabServer, env: dict, client, data: dict[str, Path]) -> None:
    """`quietwell runs --uri` and the tables API answer per setup and across setups from
    the catalog's own search: each setup's rows are exactly its completed runs (from its
    ledger), with the values of each run's summary stream."""
    from tiled.queries import Key

    from quietwell.results import derived_table, heating_rates, particles

    for name, data_dir in data.items():
        cid, done = _ledger(data_dir)
        res = _run(["runs", "--uri", lab.uri, "--api-key-env", "QWTEST_KEY", "--setup", name,
                    "--json"], env)
        assert res.returncode == 0, res.stderr
        assert lab.key not in res.stdout + res.stderr
        listed = json.loads(res.stdout)
        assert {r["uid"] for r in listed} == set(client.search(Key("start.setup") == name))
        assert {r["setup"] for r in listed} == {name}
        assert set(done) <= {r["uid"] for r in listed if r["exit_status"] == "success"}
        # heating rates versus pressure of the setup's reheating runs, with provenance
        os.environ["QWTEST_KEY"] = lab.key
        try:
            table = heating_rates(lab.uri, setup=name, api_key_env="QWTEST_KEY")
            every = derived_table(lab.uri, setup=name, api_key_env="QWTEST_KEY")
        finally:
            os.environ.pop("QWTEST_KEY", None)
        reheats = {u for u in done
                   if client[u].metadata["start"]["plan_name"] == "reheating_cycles"}
        assert reheats
        assert set(table["uid"]) == reheats and set(table["setup"]) == {name}
        for _, row in table.iterrows():
            stored = client[row["uid"]]["summary"].read()
            for key in ("pressure", "heating_rate_x", "heating_rate_x_stderr"):
                assert row[key] == float(stored[key].values[-1]), (name, key)
        assert set(every["uid"]) == set(done)
        assert table.attrs["units"]["heating_rate_x"]
    # across setups: one table of the damping slope and radius per particle
    os.environ["QWTEST_KEY"] = lab.key
    try:
        both = particles(lab.uri, api_key_env="QWTEST_KEY")
    finally:
        os.environ.pop("QWTEST_KEY", None)
    assert set(both["setup"]) == set(data)
    assert both["particle"].notna().all() and (both["radius_stderr"] > 0).all()


@pytest.mark.slow  # two campaigns at once: 2-3 minutes on 2 shared cores
def test_two_setups_at_once_every_run_and_record_lands_and_the_key_stays_secret(lab, tmp_path):
    """Two simulated setups run the campaign at the same time into one server: every run
    and record is found under its own setup; the API key (distinctive) appears in no
    file, output or log the setups produced."""
    env = _env(lab)
    procs = {}
    for name in ("amber", "cobalt"):
        prof = server_profile(tmp_path, name, lab)
        data = tmp_path / f"data-{name}"
        procs[name] = (_start(["run", str(TINY), "--setup", str(prof), "--data-dir", str(data)],
                              env, tmp_path / f"run-{name}"), data)
    for name, (proc, _) in procs.items():
        assert proc.wait(timeout=600) == 0, (tmp_path / f"run-{name}.err").read_text()[-3000:]
    client = lab.client()
    for name, (_, data) in procs.items():
        _check_runs(client, name, data)
        assert json.loads((data / "store.json").read_text())["uri"] == lab.uri
    # traces read back from the shared raw folder, byte for byte with the local file
    from tiled.queries import Key

    run = client.search(Key("start.setup") == "cobalt").values().last()
    assert run["primary"]["trace_x"].shape[0] >= 1
    _queries_across_setups(lab, env, client, {n: d for n, (_, d) in procs.items()})
    # the key is in no file the setups produced, nor in their output
    leaks = []
    for root in [tmp_path, lab.raw]:
        for path in Path(root).rglob("*"):
            if path.is_file() and lab.key.encode() in path.read_bytes():
                leaks.append(str(path))
    assert leaks == []
    # the server's log holds neither the key nor the database password
    server_log = lab.log.read_bytes()
    assert lab.key.encode() not in server_log
    assert lab.db_password.encode() not in server_log
    assert b"qwt_" in server_log  # it does print the database URI (without password)


@pytest.mark.slow  # a campaign with a server restart in it: 1-2 minutes
def test_outage_mid_campaign_loses_nothing(lab, tmp_path):
    """The server is killed during a campaign and started again: the campaign goes on,
    and every run reaches the server once it answers."""
    from tiled.queries import Key

    env = _env(lab)
    prof = server_profile(tmp_path, "amber", lab)
    data = tmp_path / "data"
    proc = _start(["run", str(TINY), "--setup", str(prof), "--data-dir", str(data)], env,
                  tmp_path / "run")
    client = lab.client()
    t0 = time.monotonic()
    cid = None
    while time.monotonic() - t0 < 300 and proc.poll() is None:
        if (data / "campaigns").exists() and any((data / "campaigns").iterdir()):
            cid = cid or next((data / "campaigns").iterdir()).name
            if len(client.search(Key("start.campaign_id") == cid)) >= 1:
                break
        time.sleep(0.5)
    assert proc.poll() is None, "the campaign ended before the server could be stopped"
    lab.kill()
    time.sleep(8.0)  # runs go on while the server is away
    lab.start()
    assert proc.wait(timeout=600) == 0, (tmp_path / "run.err").read_text()[-3000:]
    log = (data / "catalog" / "server.log").read_text()
    assert "does not answer" in log and "answers again" in log
    _check_runs(lab.client(), "amber", data)


def test_a_file_the_server_cannot_read_yet_reads_as_one_line_then_works(lab, tmp_path):
    """raw_transfer = "synced": the run is registered at once; reading its traces fails
    with HTTP 500 until the file reaches the server's folder, and quietwell says so in
    one line; once the file is there it reads."""
    import quietwell
    from quietwell.store import explain_http_error

    local = tmp_path / "local-raw"
    prof = server_profile(tmp_path, "amber", lab, data_extra=(
        f'raw_transfer = "synced"\nserver_raw_dir = "{lab.raw / "synced"}"\n'))
    text = (prof / "setup.toml").read_text().replace(f'raw_dir = "{lab.raw / "amber"}"',
                                                      f'raw_dir = "{local}"')
    (prof / "setup.toml").write_text(text)
    camp = tmp_path / "one.toml"
    camp.write_text('[campaign]\nname = "one"\n\n[[step]]\nid = "pump"\nplan = '
                    '"pressure_sweep"\npressures = ["10 mbar", "5 mbar"]\nrecords_per_step = 1\n'
                    'sample_rate = "1 MHz"\nrecord_length = 65536\ninput_range = "2 V"\n')
    data = tmp_path / "data"
    done = _run(["run", str(camp), "--setup", str(prof), "--data-dir", str(data)],
                _env(lab), timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    _, runs = _ledger(data)
    (uid,) = runs
    os.environ["QWTEST_KEY"] = lab.key
    try:
        client = quietwell.open_catalog(data)  # store.json says where the runs went
        run = client[uid]
        with pytest.raises(Exception) as info:
            run["primary"]["trace_x"][0]
        line = explain_http_error(info.value)
        assert "HTTP 500" in line and "readable folder" in line and "\n" not in line
        shutil.copytree(local, lab.raw / "synced")  # the sync arrives
        assert run["primary"]["trace_x"][0].shape == (65536,)
    finally:
        os.environ.pop("QWTEST_KEY", None)


def _load_writer(uri: str, key_env: str, data_dir: str, tag: str, n_runs: int) -> None:
    """One writer process: ``n_runs`` short runs (3 events each) through a ServerStore."""
    from event_model import compose_run

    from quietwell.setup import DataSpec
    from quietwell.store import ServerStore

    spec = DataSpec(store="server", uri=uri, api_key_env=key_env)
    with ServerStore(data_dir, spec) as store:
        for i in range(n_runs):
            bundle = compose_run(metadata={"setup": "load", "load_tag": tag, "load_index": i})
            store.writer("start", bundle.start_doc)
            desc = bundle.compose_descriptor(
                name="primary", data_keys={"x": {"dtype": "number", "shape": [],
                                                 "source": "sim", "units": "V"}})
            store.writer("descriptor", desc.descriptor_doc)
            for k in range(3):
                store.writer("event", desc.compose_event(data={"x": float(k)},
                                                         timestamps={"x": time.time()}))
            store.writer("stop", bundle.compose_stop())


@pytest.mark.slow
def test_five_writers_fifty_runs_each_land_once(lab, tmp_path):
    """5 writer processes x 50 runs: 250 runs in the catalog, none lost or duplicated,
    each with its 3 events."""
    from tiled.queries import Key

    tag = f"load-{time.time_ns()}"
    env = _env(lab)
    code = ("import sys; sys.path.insert(0, 'tests'); from test_lab_catalog import "
            "_load_writer as w; w(*sys.argv[1:5], int(sys.argv[5]))")
    procs = [subprocess.Popen([sys.executable, "-c", code, lab.uri, "QWTEST_KEY",
                               str(tmp_path / f"w{i}"), f"{tag}-{i}", "50"], env=env, cwd=ROOT)
             for i in range(5)]
    assert [p.wait(timeout=900) for p in procs] == [0] * 5
    client = lab.client()
    for i in range(5):
        runs = client.search(Key("start.load_tag") == f"{tag}-{i}")
        indices = sorted(r.metadata["start"]["load_index"] for r in runs.values())
        assert indices == list(range(50))
    for run in client.search(Key("start.load_tag") == f"{tag}-0").values():
        assert run["primary"]["seq_num"].read().shape[0] == 3


def test_embedded_is_still_the_default(tmp_path):
    """A profile without [data] keeps the embedded store (no server needed)."""
    from quietwell.setup import load_setup

    setup = load_setup(ROOT / "profiles" / "amber")
    assert setup.data.store == "embedded"


def test_start_documents_carry_the_keys_the_tables_use(lab, tmp_path):
    """setup, plan_name, campaign_id and particle are searchable with the catalog's own
    queries (checked on the runs the other tests wrote, or a fresh run)."""
    from tiled.queries import Key

    client = lab.client()
    found = client.search(Key("start.setup") == "amber")
    if len(found) == 0:
        pytest.skip("no amber run in this server yet (run with the module's other tests)")
    run = found.values().first()
    start = run.metadata["start"]
    for key in ("setup", "plan_name", "campaign_id", "particle"):
        assert key in start
    assert len(client.search(Key("start.particle") == start["particle"])) >= 1


