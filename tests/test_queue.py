"""The queue server end to end: a profile's startup directory in bluesky's own RE manager
(``start-re-manager`` through ``quietwell queue-serve``) on a real Redis, a campaign
queued through ``REManagerAPI``, the manager killed mid-campaign and restarted.

What is checked comes from the job and from the queue server's documented behaviour,
not from quietwell's code: every step in the catalog once as a complete run, the
interrupted run kept and marked, the item that was running when the manager died in the
history as not completed (bluesky-queueserver: an item running when the manager stopped
moves to the history with ``exit_status`` ``unknown``), bad input refused with one line
(common practice, no source: an unattended program explains a refusal in one line).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from quietwell.campaign import campaign_dirs, read_ledger
from quietwell.store import close_catalog, open_catalog

sys.path.insert(0, str(Path(__file__).parent))
from lab_server import server_profile  # noqa: E402

HERE = Path(__file__).parent
SHORT = HERE / "data" / "queue-campaign.toml"
N_STEPS = 3
SRC = [str(HERE.parent / "src"), str(HERE.parent / "sim_devices")]


def _env() -> dict:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    env["PYTHONPATH"] = os.pathsep.join(SRC + [p for p in env.get("PYTHONPATH", "").split(
        os.pathsep) if p and not p.startswith(("src", "sim_devices"))])
    env.pop("QUIETWELL_FAULT", None)
    return env


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "quietwell.cli", *args], env=_env(),
                          capture_output=True, text=True, timeout=300)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _Manager:
    """``quietwell queue-serve`` in its own process group, on free ports, with its own
    Redis key prefix (removed at the end)."""

    def __init__(self, startup: Path, redis_uri: str, log: Path, prefix: str) -> None:
        self.redis_addr = redis_uri.split("://", 1)[-1]
        self.prefix = prefix
        self.control = f"tcp://127.0.0.1:{_free_port()}"
        self.info = f"tcp://127.0.0.1:{_free_port()}"
        self.startup, self.log = startup, log
        self.proc: subprocess.Popen | None = None

    def start(self):
        from bluesky_queueserver_api.zmq import REManagerAPI

        out = open(self.log, "a")  # noqa: SIM115 - closed with the process
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "quietwell.cli", "queue-serve", str(self.startup),
             "--redis-addr", self.redis_addr, "--redis-prefix", self.prefix,
             "--control-addr", self.control, "--info-addr", self.info],
            env=_env(), stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
        out.close()
        api = REManagerAPI(zmq_control_addr=self.control, timeout_recv=2.0)
        t0 = time.monotonic()
        while True:
            try:
                api.status()
                return api
            except Exception:  # noqa: BLE001 - not up yet
                assert self.proc.poll() is None, self.log.read_text()
                assert time.monotonic() - t0 < 60, self.log.read_text()
                time.sleep(0.3)

    def kill(self) -> None:
        """SIGKILL of the whole process group: manager, worker, catalog process."""
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=30)

    def stop(self, api) -> None:
        try:
            if api.status()["worker_environment_exists"]:
                api.environment_close()
                api.wait_for_idle(timeout=120)
                _wait_env_closed(api)
        finally:
            api.close()
            if self.proc is not None and self.proc.poll() is None:
                os.killpg(self.proc.pid, signal.SIGTERM)
                try:
                    self.proc.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    os.killpg(self.proc.pid, signal.SIGKILL)

    def drop_keys(self) -> None:
        import redis

        host, _, port = self.redis_addr.partition(":")
        r = redis.Redis(host=host, port=int(port or 6379))
        for key in r.scan_iter(f"{self.prefix}*"):
            r.delete(key)


def _wait_env_closed(api, timeout: float = 120) -> None:
    t0 = time.monotonic()
    while api.status()["worker_environment_exists"]:
        assert time.monotonic() - t0 < timeout
        time.sleep(0.3)


def _open_env(api) -> None:
    api.environment_open()
    api.wait_for_idle(timeout=180)
    assert api.status()["worker_environment_exists"]


@pytest.fixture
def startup(tmp_path) -> tuple[Path, Path]:
    data = tmp_path / "data"
    res = _cli("queue-startup", "amber", "--data-dir", str(data), "-o",
               str(tmp_path / "startup"))
    assert res.returncode == 0, res.stderr
    return tmp_path / "startup", data


@pytest.fixture
def manager(lab_startup, redis_uri, tmp_path):
    m = _Manager(lab_startup[0], redis_uri, tmp_path / "manager.log",
                 f"qwtest_{uuid.uuid4().hex[:8]}")
    yield m
    m.kill()
    m.drop_keys()


@pytest.fixture
def lab_startup(lab, tmp_path, monkeypatch) -> tuple[Path, Path]:
    """A startup directory of amber whose profile writes to the shared catalog."""
    monkeypatch.setenv("QWTEST_KEY", lab.key)  # the manager's worker inherits it
    profile = server_profile(tmp_path, "amber", lab)
    data = tmp_path / "data"
    res = _cli("queue-startup", str(profile), "--data-dir", str(data), "-o",
               str(tmp_path / "startup"))
    assert res.returncode == 0, res.stderr
    return tmp_path / "startup", data


def _run_item(api, timeout: float = 600) -> dict:
    """Start the queue, wait until it is idle, return the last history item."""
    api.queue_start()
    api.wait_for_idle(timeout=timeout)
    return api.history_get()["items"][-1]


def _ledger(data: Path) -> list[dict]:
    (folder,) = campaign_dirs(data)
    return read_ledger(folder / "ledger.jsonl")


def _catalog_runs(client, cid: str) -> dict[int, list]:
    from tiled.queries import Key

    runs: dict[int, list] = {}
    for _, run in client.search(Key("start.campaign_id") == cid).items():
        runs.setdefault(run.metadata["start"]["campaign_step"], []).append(run)
    return runs


def _complete(rs: list) -> list:
    return [r for r in rs if r.metadata["stop"]["exit_status"] == "success"
            and "superseded_by" not in r.metadata]


def test_startup_dir_lists_the_campaign_plan_and_the_devices(startup):
    import yaml

    st, data = startup
    names = sorted(p.name for p in st.iterdir())
    assert names == ["00-session.py", "10-devices.py", "20-plans.py",
                     "existing_plans_and_devices.yaml", "quietwell-queue.json",
                     "user_group_permissions.yaml"]
    listing = yaml.safe_load((st / "existing_plans_and_devices.yaml").read_text())
    assert sorted(listing["existing_plans"]) == ["campaign"]  # nothing else is allowed
    params = {p["name"]: p for p in listing["existing_plans"]["campaign"]["parameters"]}
    assert params["path"]["annotation"]["type"] == "str"
    devices = set(listing["existing_devices"])
    assert {"motion", "electrodes", "laser", "pressure_control", "clock", "tc", "ion",
            "cdg"} <= devices
    assert all(name.isidentifier() for name in devices)
    assert not data.exists()  # listing the plans used a throw-away store


def test_bad_input_is_one_line():
    res = _cli("queue-startup", "no-such-setup", "--data-dir", "d", "-o", "s")
    assert res.returncode == 2
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr
    assert "'no-such-setup' not found" in res.stderr
    # nobody on this port: one line naming the address and the fix
    port = _free_port()
    res = _cli("queue-serve", str(HERE), "--redis-addr", f"127.0.0.1:{port}")
    assert res.returncode == 2 and res.stderr.count("\n") == 1
    assert "quietwell-queue.json" in res.stderr  # not a startup directory
    res = _cli("queue-add", str(SHORT), "--setup", "amber", "--control-addr",
               f"tcp://127.0.0.1:{port}")
    assert res.returncode == 2 and res.stderr.count("\n") == 1, res.stderr
    assert f"tcp://127.0.0.1:{port} does not answer" in res.stderr


def test_redis_not_answering_is_one_line(startup):
    port = _free_port()  # nothing listens there
    res = _cli("queue-serve", str(startup[0]), "--redis-addr", f"127.0.0.1:{port}")
    assert res.returncode == 2, res.stderr
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr
    assert f"Redis at 127.0.0.1:{port} does not answer" in res.stderr


@pytest.mark.slow
def test_queued_campaign_runs_and_resumes_after_the_manager_is_killed(lab_startup, manager,
                                                                         lab, tmp_path):
    """Into the lab's shared catalog, read back from there."""
    from bluesky_queueserver_api import BPlan

    st, data = lab_startup
    bad = tmp_path / "bad.toml"
    bad.write_text(SHORT.read_text().replace('records = 2', 'records = "two"'))
    api = manager.start()
    _open_env(api)

    # a campaign file with an error: the item fails with one line, the worker logs no
    # traceback, nothing ran
    api.item_add(BPlan("campaign", str(bad)))
    item = _run_item(api)
    assert item["result"]["exit_status"] == "failed"
    msg = item["result"]["msg"]
    assert "\n" not in msg.strip() and "bad.toml" in msg and "records" in msg, msg
    assert "Traceback" not in manager.log.read_text()
    assert not campaign_dirs(data)
    # the queue server puts a failed item back at the front of the queue and stops
    assert api.status()["items_in_queue"] == 1
    api.queue_clear()

    # the campaign, queued, killed mid-step with the whole manager
    api.item_add(BPlan("campaign", str(SHORT)))
    api.queue_start()
    t0 = time.monotonic()
    while True:  # the second step's run has started
        entries = _ledger(data) if campaign_dirs(data) else []
        if any(e["event"] == "run" and e["step"] == 1 for e in entries):
            break
        assert time.monotonic() - t0 < 120, manager.log.read_text()
        time.sleep(0.1)
    time.sleep(1.0)  # a record or two into the step
    api.close()
    manager.kill()

    api = manager.start()
    status = api.status()
    assert status["items_in_queue"] == 0 and not status["worker_environment_exists"]
    killed = api.history_get()["items"][-1]
    assert killed["name"] == "campaign" and killed["args"] == [str(SHORT)]
    assert killed["result"]["exit_status"] == "unknown"  # not completed: it must be re-run
    # re-queue the interrupted item as it was, run it: the completed step is skipped
    api.item_add(BPlan(killed["name"], *killed["args"], **killed.get("kwargs", {})))
    _open_env(api)
    item = _run_item(api)
    assert item["result"]["exit_status"] == "completed", item["result"]
    # queued again once more: the campaign completed, a new one starts only on purpose
    manager.stop(api)

    entries = _ledger(data)
    cid = entries[0]["campaign_id"]
    assert entries[-1]["event"] == "end" and entries[-1]["status"] == "completed"
    done = [e for e in entries if e["event"] == "done"]
    assert sorted(e["step"] for e in done) == list(range(N_STEPS))  # each once
    attempts = [e for e in entries if e["event"] == "attempt"]
    assert [e["step"] for e in attempts] == [0, 1, 1, 2]  # step 0 not redone, step 1 redone
    runs = _catalog_runs(lab.client(), cid)
    try:
        assert sorted(runs) == list(range(N_STEPS))
        for step, rs in runs.items():
            good = _complete(rs)
            assert len(good) == 1, (step, [r.metadata["stop"] for r in rs])
            assert good[0].metadata["start"]["uid"] == next(e["uid"] for e in done
                                                            if e["step"] == step)
        assert len(runs[0]) == 1
        (cut,) = [r for r in runs[1] if r not in _complete(runs[1])]  # kept and marked
        assert cut.metadata["stop"]["exit_status"] in ("abort", "fail")
        assert cut.metadata["superseded_by"] == _complete(runs[1])[0].metadata["start"]["uid"]
        assert len(_complete(runs[1])[0]["summary"].read()["time"]) == 1
    finally:
        close_catalog(data)
    info = json.loads((st / "quietwell-queue.json").read_text())
    assert info["setup"] == "amber" and Path(info["data_dir"]) == data.resolve()


@pytest.mark.slow
def test_campaign_plan_aborted_in_its_runengine_resumes_when_run_again(tmp_path):
    """The queue's re_pause + re_abort, as the worker does them (RE.request_pause from
    another thread, then RE.abort): the step's run is ended and marked, the ledger says
    the queue stopped it, and running the same plan again redoes only that step."""
    import threading

    from bluesky.utils import RunEngineInterrupted

    from quietwell.campaign import campaign_plan
    from quietwell.session import open_session

    data = tmp_path / "data"
    s = open_session("amber", data)
    try:
        def pause_in_step_1() -> None:
            t0 = time.monotonic()
            while time.monotonic() - t0 < 120:
                d = campaign_dirs(data)
                if d and any(e["event"] == "run" and e["step"] == 1
                             for e in read_ledger(d[0] / "ledger.jsonl")):
                    time.sleep(0.5)
                    s.RE.request_pause(defer=False)
                    return
                time.sleep(0.05)

        threading.Thread(target=pause_in_step_1, daemon=True).start()
        with pytest.raises(RunEngineInterrupted):
            s.RE(campaign_plan(s, str(SHORT)))
        assert s.RE.state == "paused"
        s.RE.abort("from the test")  # ends the run: RequestAbort thrown into the plan
        entries = _ledger(data)
        failed = [e for e in entries if e["event"] == "failed"]
        assert [(e["step"], e["exit_status"]) for e in failed] == [(1, "abort")]
        assert entries[-1]["event"] == "end" and entries[-1]["status"] == "stopped"
        res = s.RE(campaign_plan(s, str(SHORT)))
        assert res.exit_status == "success"
        assert sorted(res.plan_result.uids) == ["gains", "pumpdown", "thermal"]
    finally:
        s.close()
    entries = _ledger(data)
    assert [e["step"] for e in entries if e["event"] == "attempt"] == [0, 1, 1, 2]
    assert entries[-1]["status"] == "completed"
    runs = _catalog_runs(open_catalog(data), entries[0]["campaign_id"])
    try:
        assert all(len(_complete(rs)) == 1 for rs in runs.values()) and len(runs[1]) == 2
        (cut,) = [r for r in runs[1] if r not in _complete(runs[1])]
        assert cut.metadata["stop"]["exit_status"] == "abort"
    finally:
        close_catalog(data)
