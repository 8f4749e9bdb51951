"""Campaigns end to end, as a user runs them: ``quietwell run`` in a subprocess, ended
by signals and by SIGKILL at many points, then ``quietwell run --resume``.

What is checked comes from the job, not from the code: every step in the catalog once
as a complete run, its records and fits in step, the interrupted runs kept and marked,
nothing lost or duplicated against the journal (the documents as emitted), and no
process of the campaign left behind (common practice, no source: an unattended
program must not leave workers running).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import quietwell
from quietwell.campaign import campaign_dirs, read_ledger
from quietwell.store import close_catalog

pytestmark = pytest.mark.slow

TINY = Path(__file__).parent / "data" / "tiny-campaign.toml"
N_STEPS = 5


def _descendants(pid: int) -> set[int]:
    """Every process below ``pid`` (from /proc)."""
    children: dict[int, list[int]] = {}
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        try:
            ppid = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, IndexError, ValueError):
            continue
        children.setdefault(ppid, []).append(int(d.name))
    out, todo = set(), [pid]
    while todo:
        for c in children.get(todo.pop(), []):
            out.add(c)
            todo.append(c)
    return out


def _alive(pid: int) -> bool:
    try:
        state = (Path("/proc") / str(pid) / "stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def _wait_gone(pids: set[int], timeout: float = 15.0) -> set[int]:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        left = {p for p in pids if _alive(p)}
        if not left:
            return set()
        time.sleep(0.2)
    return {p for p in pids if _alive(p)}


class _Cmd:
    """``quietwell ...`` in a subprocess that tracks its descendants while it runs."""

    def __init__(self, args: list[str], fault: str | None = None) -> None:
        env = {**os.environ, "PYTHONUNBUFFERED": "1"}
        env.pop("QUIETWELL_FAULT", None)
        if fault:
            env["QUIETWELL_FAULT"] = fault
        self.proc = subprocess.Popen([sys.executable, "-m", "quietwell.cli", *args],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     text=True, env=env, start_new_session=True)
        self.seen: set[int] = set()

    def poll_children(self) -> None:
        self.seen |= _descendants(self.proc.pid)

    def wait(self, timeout: float = 600.0) -> tuple[int, str, str]:
        t0 = time.monotonic()
        while self.proc.poll() is None and time.monotonic() - t0 < timeout:
            self.poll_children()
            time.sleep(0.2)
        # the children hold the output pipes until they end: wait for them first
        self.left = _wait_gone(self.seen)
        for pid in self.left:  # reported by the test; ended so that the next one is clean
            os.kill(pid, signal.SIGKILL)
        out, err = self.proc.communicate(timeout=60)
        return self.proc.returncode, out, err


def _ledger(data: Path) -> list[dict]:
    (folder,) = campaign_dirs(data)
    return read_ledger(folder / "ledger.jsonl")


def _wait_for(cond, cmd: _Cmd, timeout: float = 300.0) -> None:
    t0 = time.monotonic()
    while not cond():
        cmd.poll_children()
        assert cmd.proc.poll() is None, cmd.proc.communicate()
        assert time.monotonic() - t0 < timeout
        time.sleep(0.1)


def _journal_counts(data: Path, cid: str) -> dict[str, dict[str, int]]:
    """Per run of the campaign: events per stream, as emitted (the journal)."""
    out = {}
    for path in (data / "journal").glob("*.jsonl"):
        docs = [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
        if not docs or docs[0][1].get("campaign_id") != cid:
            continue
        names = {d["uid"]: d["name"] for n, d in docs if n == "descriptor"}
        counts: dict[str, int] = {}
        for n, d in docs:
            if n == "event":
                counts[names[d["descriptor"]]] = counts.get(names[d["descriptor"]], 0) + 1
        out[docs[0][1]["uid"]] = counts
    return out


def _check_store(data: Path) -> dict[int, list]:
    """Each step exactly once complete; partial runs kept and marked; nothing lost."""
    entries = _ledger(data)
    cid = entries[0]["campaign_id"]
    assert entries[-1]["event"] == "end" and entries[-1]["status"] == "completed"
    client = quietwell.open_catalog(data)
    runs: dict[int, list] = {}
    for uid in client:
        run = client[uid]
        start = run.metadata["start"]
        if start.get("campaign_id") != cid:
            continue
        runs.setdefault(start["campaign_step"], []).append(run)
    assert sorted(runs) == list(range(N_STEPS))
    emitted = _journal_counts(data, cid)
    assert len(emitted) == sum(len(v) for v in runs.values())  # every run reached the catalog
    for step, rs in runs.items():
        complete = [r for r in rs if r.metadata["stop"]["exit_status"] == "success"
                    and "superseded_by" not in r.metadata]
        assert len(complete) == 1, (step, [r.metadata["stop"] for r in rs])
        good = complete[0]
        for r in rs:
            if r is not good:  # kept, marked, and ended as not complete
                assert r.metadata["superseded_by"] == good.metadata["start"]["uid"]
                assert r.metadata["stop"]["exit_status"] in ("abort", "fail")
        attempts = sorted(r.metadata["start"]["campaign_attempt"] for r in rs)
        assert attempts == list(range(1, len(rs) + 1)) or len(rs) == 1
        # records and fits in step, as many as emitted, no duplicate
        uid = good.metadata["start"]["uid"]
        n = emitted[uid]["primary"]
        fits = good["fits"].read()
        assert list(np.asarray(fits["record_seq_num"])) == list(range(1, n + 1))
        assert len(good["primary"].read()["time"]) == n
        assert len(good["summary"].read()["time"]) == 1 == emitted[uid]["summary"]
    close_catalog(data)
    return runs


def test_sigkill_at_five_points_then_resume_leaves_each_step_once(tmp_path):
    data = tmp_path / "data"
    # 1: mid-record (30 ms into the third record of the first step)
    cmd = _Cmd(["run", str(TINY), "--setup", "amber", "--data-dir", str(data)],
               fault="trigger:3")
    code, _, err = cmd.wait()
    assert code == -signal.SIGKILL, err
    assert not cmd.left, "processes of the killed campaign stayed alive"
    # 2: during the resume itself (after the journals were recovered)
    # 3: between steps (step 1 written to the ledger, step 2 not started)
    # 4: while the catalog finishes a run (right after the second run's stop document)
    # 5: between records of the last step
    for fault in ("resume:1", "done:1", "stop:2", "event:3"):
        cmd = _Cmd(["run", "--resume", "--data-dir", str(data)], fault=fault)
        code, _, err = cmd.wait()
        assert code == -signal.SIGKILL, (fault, err)
        assert not cmd.left, f"processes stayed alive after the kill at {fault}"
    cmd = _Cmd(["run", "--resume", "--data-dir", str(data)])
    code, out, err = cmd.wait()
    assert code == 0, err
    assert "completed" in out
    runs = _check_store(data)
    assert len(runs[0]) == 2  # the record cut by the kill: its run kept and superseded
    assert len(runs[4]) == 2
    entries = _ledger(data)
    adopted = [e for e in entries if e["event"] == "done" and e.get("adopted")]
    assert len(adopted) == 1 and adopted[0]["step"] == 3  # journalled, not yet in the ledger


@pytest.mark.parametrize("sig, code, words, setup", [
    (signal.SIGINT, 130, "interrupted by the user", "cobalt"),
    (signal.SIGTERM, 143, "terminated", "amber"),
])
def test_a_signal_ends_the_run_cleanly_and_resume_finishes(tmp_path, sig, code, words, setup):
    data = tmp_path / "data"
    cmd = _Cmd(["run", str(TINY), "--setup", setup, "--data-dir", str(data)])
    _wait_for(lambda: any(e["event"] == "run" and e["step"] == 2
                          for folder in campaign_dirs(data)
                          for e in read_ledger(folder / "ledger.jsonl")), cmd)
    time.sleep(0.5)
    # as a terminal or a service manager does: the whole process group is signalled
    os.killpg(cmd.proc.pid, sig)
    got, out, err = cmd.wait()
    assert got == code, err
    lines = [ln for ln in err.strip().splitlines() if not ln.startswith("Caution:")]
    assert len(lines) == 1 and words in lines[0], err
    assert f"quietwell run --resume --data-dir {data}" in lines[0]
    assert "Traceback" not in err + out
    assert not cmd.left, "the fitting or catalog process outlived the campaign"
    entries = _ledger(data)
    assert entries[-1]["event"] == "end" and entries[-1]["reason"] == words
    client = quietwell.open_catalog(data)
    ended = [client[u] for u in client
             if client[u].metadata["start"].get("campaign_step") == 2]
    assert [r.metadata["stop"]["exit_status"] for r in ended] == ["abort"]
    assert ended[0].metadata["stop"]["reason"] == words
    close_catalog(data)  # one catalog process per data directory: free it for the resume
    cmd = _Cmd(["run", "--resume", "--data-dir", str(data)])
    got, out, err = cmd.wait()
    assert got == 0, err
    runs = _check_store(data)
    assert len(runs[2]) == 2
    assert all(r.metadata["start"]["setup"] == setup for rs in runs.values() for r in rs)
