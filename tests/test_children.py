"""quietwell's helper processes end with the process that started them, however it ends.

The fitting process, multiprocessing's resource tracker and the catalog process must not
outlive a main process that is killed (SIGKILL: no atexit, no cleanup). A process that
has exited but is not yet reaped (a zombie, state ``Z`` in ``/proc/<pid>/stat``) counts
as ended: it runs no more, and reaping it is the job of whoever adopted it.
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from quietwell._lifeline import THIS_PROCESS, Parent

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(),
                                reason="reads the process table in /proc (Linux)")

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"), str(ROOT / "sim_devices")])}
#: The bound the children must meet after their parent is killed (seconds).
DEADLINE_S = 10.0


def _stat(pid: int) -> list[str] | None:
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return None
    return text.rpartition(")")[2].split()  # [state, ppid, ..., starttime at index 19]


def _children(pid: int) -> dict[int, tuple[str, str]]:
    """{pid: (start time, command line)} of the processes whose parent is ``pid``."""
    out = {}
    for d in Path("/proc").iterdir():
        st = _stat(int(d.name)) if d.name.isdigit() else None
        if st is not None and int(st[1]) == pid:
            try:
                cmd = (d / "cmdline").read_bytes().replace(b"\0", b" ").decode()
            except OSError:
                continue
            out[int(d.name)] = (st[19], cmd)
    return out


def _running(pid: int, start: str) -> bool:
    st = _stat(pid)
    return st is not None and st[19] == start and st[0] not in ("Z", "X")


def _kill_and_time(proc: subprocess.Popen, kids: dict[int, tuple[str, str]]) -> dict[int, float]:
    """SIGKILL ``proc``; seconds until each of ``kids`` has ended (inf: not within the bound)."""
    t0 = time.monotonic()
    proc.kill()
    proc.wait()
    ended: dict[int, float] = {}
    while len(ended) < len(kids) and time.monotonic() - t0 < DEADLINE_S:
        for pid, (start, _) in kids.items():
            if pid not in ended and not _running(pid, start):
                ended[pid] = time.monotonic() - t0
        time.sleep(0.02)
    leftover = [pid for pid in kids if pid not in ended]
    for pid in leftover:  # do not leave them behind if the test fails
        if _running(pid, kids[pid][0]):
            os.kill(pid, signal.SIGKILL)
    return {pid: ended.get(pid, float("inf")) for pid in kids}


def _start(*args: str) -> tuple[subprocess.Popen, list[str]]:
    """Run ``python *args``; return it once it prints ``ready``, with the lines before that."""
    proc = subprocess.Popen([sys.executable, *args], stdout=subprocess.PIPE, text=True,
                            env=ENV, cwd=ROOT)
    lines = []
    for line in proc.stdout:
        if line.strip() == "ready":
            return proc, lines
        lines.append(line.strip())
    proc.wait()
    pytest.fail(f"the script ended before it was ready (exit {proc.returncode}): {lines}")


def test_a_child_learns_which_thread_of_its_parent_started_it():
    # multiprocessing pickles a child's arguments in the thread that starts it
    assert pickle.loads(pickle.dumps(THIS_PROCESS)) == Parent(os.getpid(), True)
    seen = []
    t = threading.Thread(target=lambda: seen.append(pickle.loads(pickle.dumps(THIS_PROCESS))))
    t.start()
    t.join()
    assert seen == [Parent(os.getpid(), False)]


FOLLOWER = """
import os, signal, sys, time
mode = sys.argv[1]
if mode == "poll":
    del os.pidfd_open  # as on a kernel or sandbox without pidfds
from quietwell._lifeline import Parent, follow_parent
parent = int(sys.argv[2])
if mode == "signal":  # only the kernel's signal can end it: the watcher does nothing
    follow_parent(Parent(parent, True), lambda: None, kill_signal=signal.SIGKILL)
else:
    follow_parent(parent, lambda: os._exit(1))
print("ready", flush=True)
time.sleep(600)
"""

PARENT_OF_FOLLOWER = """
import os, subprocess, sys, time
child = subprocess.Popen([sys.executable, "-c", sys.argv[2], sys.argv[1], str(os.getpid())],
                         stdout=subprocess.PIPE, text=True)
assert child.stdout.readline().strip() == "ready"
print("ready", flush=True)
time.sleep(600)
"""


@pytest.mark.parametrize("mode", ["pidfd", "poll", "signal"])
def test_a_follower_ends_when_its_parent_is_killed(mode):
    proc, _ = _start("-c", PARENT_OF_FOLLOWER, mode, FOLLOWER)
    kids = _children(proc.pid)
    assert len(kids) == 1
    times = _kill_and_time(proc, kids)
    assert max(times.values()) < DEADLINE_S, times


POOL_ONLY = """
import ctypes, os, sys, time

def death_signal():  # prctl(PR_GET_PDEATHSIG) in the fitting process
    sig = ctypes.c_int(-1)
    ctypes.CDLL(None).prctl(2, ctypes.byref(sig), 0, 0, 0)
    return sig.value

if __name__ == "__main__":
    from quietwell.live._fitter import _process_pool
    print(_process_pool().submit(death_signal).result(timeout=120), flush=True)
    print("ready", flush=True)
    time.sleep(600)
"""


def test_a_fitting_process_started_by_the_main_thread_ends_by_the_kernels_signal(tmp_path):
    script = tmp_path / "pool_only.py"  # a file: "spawn" children import the main module
    script.write_text(POOL_ONLY)
    proc, lines = _start(str(script))
    assert lines == [str(int(signal.SIGKILL))]
    kids = _children(proc.pid)
    assert sorted(_role(cmd) for _, cmd in kids.values()) == ["fitting", "resource tracker"]
    times = _kill_and_time(proc, kids)
    assert max(times.values()) < DEADLINE_S, times


STORE_AND_POOL = """
import ctypes, os, sys, threading, time

def death_signal():
    sig = ctypes.c_int(-1)
    ctypes.CDLL(None).prctl(2, ctypes.byref(sig), 0, 0, 0)
    return sig.value, os.getpid()

if __name__ == "__main__":
    import bluesky.plans as bp
    from bluesky import RunEngine
    from event_model import compose_run
    from ophyd.sim import det
    from quietwell.live._fitter import _process_pool
    from quietwell.store import EmbeddedStore

    # The fitting process is started by a thread that then ends (as the RunEngine's
    # thread may): it must go on fitting after that thread has gone ...
    first = []
    t = threading.Thread(target=lambda: first.append(
        _process_pool().submit(death_signal).result(timeout=120)))
    t.start()
    store = EmbeddedStore(sys.argv[1], batch_size=2).open()
    t.join()
    time.sleep(0.5)
    assert _process_pool().submit(death_signal).result(timeout=30) == first[0]
    print(first[0][0], flush=True)
    RE = RunEngine({}, context_managers=[])
    RE.subscribe(store.writer)
    (done,) = RE(bp.count([det], num=3))
    store.wait()
    # ... and the process is killed in the middle of a second run
    run = compose_run()
    store.writer("start", run.start_doc)
    desc = run.compose_descriptor(name="primary", data_keys={
        "x": {"dtype": "number", "shape": [], "source": "test", "units": "m"}})
    store.writer("descriptor", desc.descriptor_doc)
    for i in range(5):
        store.writer("event", desc.compose_event(data={"x": float(i)},
                                                 timestamps={"x": time.time()}))
    print(done, flush=True)
    print(run.start_doc["uid"], flush=True)
    print("ready", flush=True)
    time.sleep(600)
"""


def _role(cmd: str) -> str:
    for key, role in (("quietwell.store._serve", "catalog"), ("resource_tracker", "resource tracker"),
                      ("multiprocessing.spawn", "fitting")):
        if key in cmd:
            return role
    return cmd


def test_children_end_with_a_killed_main_process_and_the_store_recovers(tmp_path, capsys):
    script = tmp_path / "store_and_pool.py"
    script.write_text(STORE_AND_POOL)
    data = tmp_path / "data"
    proc, lines = _start(str(script), str(data))
    death_signal, done_uid, partial_uid = lines
    assert death_signal == "0"  # started by a thread that ends: no PR_SET_PDEATHSIG
    kids = _children(proc.pid)
    assert sorted(_role(cmd) for _, cmd in kids.values()) == [
        "catalog", "fitting", "resource tracker"]
    times = _kill_and_time(proc, kids)
    with capsys.disabled():
        print("\n  seconds to end after SIGKILL of the main process: " + ", ".join(
            f"{_role(kids[pid][1])} {s:.2f}" for pid, s in sorted(times.items())))
    assert max(times.values()) < DEADLINE_S, {_role(kids[p][1]): s for p, s in times.items()}

    # The journal and the catalog are in order: the finished run's journal is marked
    # complete, and `quietwell recover` (a fresh store on the directory, opened and
    # closed) rebuilds the run in progress from its journal into the catalog.
    journal = data / "journal"
    assert (journal / f"{done_uid}.done.jsonl").exists()
    assert (journal / f"{partial_uid}.jsonl").exists()
    from quietwell.cli import main

    assert main(["recover", "--data-dir", str(data)]) == 0
    assert capsys.readouterr().out.strip() == f"recovered 1 run(s): {partial_uid}"
    assert (journal / f"{partial_uid}.recovered.jsonl").exists()
    assert sorted(p.name for p in journal.iterdir()) == sorted(
        [f"{done_uid}.done.jsonl", f"{partial_uid}.recovered.jsonl"])
