"""The step contract: pure validation, safe state changes, and the step as the unit of redo.

An interruption inside a run must end that run, never rewind it: a rewind replays the
messages since the last checkpoint while the plan's own records and pending fits do not
go back, so a summary could pair records with the wrong fits (bluesky documents that a
suspender rewinds to the last checkpoint; the plans keep none inside a run).
"""

from __future__ import annotations

import json
import threading

import pytest
from bluesky.utils import RunEngineInterrupted

from quietwell import InputError, LimitError
from quietwell._profile import find_profile
from quietwell.physics import MBAR
from quietwell.plans import STEPS, LabState, reach_state, unsafe_reason
from quietwell.plans._common import RecordMismatchError
from quietwell.plans._state import OFF, ON
from quietwell.session import open_session
from quietwell.setup import load_setup

AMBER = load_setup(find_profile("amber"))


def test_every_step_validates_without_devices_and_states_what_it_needs():
    cases = {
        "charge_calibration": {"charge_steps": [0, -1, -1], "pressure": 3 * MBAR,
                               "drive_frequency": 1.3e5, "drive_amplitude": 8.0},
        "thermal_calibration": {"pressure": 3 * MBAR},
        "pressure_sweep": {"pressures": [10 * MBAR, 1e-3 * MBAR, 1e-8 * MBAR]},
        "gain_sweep": {"gains": [3e3, 1e4, 3e4], "pressure": 1e-8 * MBAR},
        "reheating_cycles": {"cycles": 10, "feedback_gain": 2e4, "off_time": 0.01},
        "sideband_thermometry": {"records": 4, "feedback_gain": 8e3},
    }
    assert set(cases) == set(STEPS)
    for name, params in cases.items():
        c = STEPS[name].validate(AMBER, params)
        assert c.plan_name == name and c.duration_s > 0
        assert set(params) <= set(c.params)
    # a calibration with feedback off stays at or above the loss pressure
    th = STEPS["thermal_calibration"].validate(AMBER, cases["thermal_calibration"])
    assert th.needs == LabState(pressure=3 * MBAR, feedback=OFF)
    # the pump-down leaves cold damping on at its gain, at its last pressure
    ps = STEPS["pressure_sweep"].validate(AMBER, cases["pressure_sweep"])
    assert ps.leaves.feedback == ON and ps.leaves.gain == 2000.0
    assert ps.leaves.pressure == pytest.approx(1e-6)
    # the lab time of records: 3 records of 2**18 samples at 2 MHz (the setup's detector)
    th3 = STEPS["thermal_calibration"].validate(AMBER, {"pressure": 300.0, "records": 3,
                                                        "settle_time": 0.0})
    assert th3.duration_s == pytest.approx(3 * 2**18 / 2e6)


@pytest.mark.parametrize("name, params, error, words", [
    ("thermal_calibration", {"pressure": 50.0}, LimitError, "loss pressure"),
    ("thermal_calibration", {"pressure": 300.0, "records": 0}, InputError, "records"),
    ("pressure_sweep", {"pressures": [1e5, 1e6]}, LimitError, "limits"),
    ("gain_sweep", {"gains": [1e3, 2e3, 1e9]}, LimitError, "gains[2]"),
    ("reheating_cycles", {"cycles": 2, "feedback_gain": 1e4, "off_time": 0.01}, InputError,
     "cycles"),
    ("charge_calibration", {"charge_steps": [0, -1, -1], "pressure": 300.0,
                            "drive_frequency": 152e3, "drive_amplitude": 1.0}, InputError,
     "within 5 %"),
    ("charge_calibration", {"charge_steps": [0, -1, -1], "pressure": 300.0,
                            "drive_frequency": 1.3e5, "drive_amplitude": 50.0}, LimitError,
     "drive_amplitude"),
    ("sideband_thermometry", {"records": 4, "colour": "red"}, InputError, "colour"),
])
def test_validation_refuses_with_one_line(name, params, error, words):
    with pytest.raises(error) as exc:
        STEPS[name].validate(AMBER, params)
    assert words in str(exc.value) and "\n" not in str(exc.value)


def test_unsafe_states_are_named():
    side = STEPS["sideband_thermometry"].validate(AMBER, {"records": 4,
                                                          "pressure": 1e-6})
    why = unsafe_reason(AMBER, None, side)
    assert why and "below the loss pressure" in why
    gains = STEPS["gain_sweep"].validate(AMBER, {"gains": [3e3, 1e4, 3e4], "pressure": 1e-6})
    assert unsafe_reason(AMBER, LabState(charge_change=-7), gains).startswith(
        "it needs a charged particle")
    assert unsafe_reason(AMBER, None, gains) is None


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    with open_session("amber", tmp_path_factory.mktemp("steps")) as s:
        yield s


def _journal(session, uid) -> list:
    path = next(session.store.journal_dir.glob(f"{uid}*.jsonl"))
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def _streams(docs) -> dict[str, list[dict]]:
    names = {d["uid"]: d["name"] for n, d in docs if n == "descriptor"}
    out: dict[str, list[dict]] = {}
    for n, d in docs:
        if n == "event":
            out.setdefault(names[d["descriptor"]], []).append(d)
    return out


def test_reach_state_raises_the_pressure_before_switching_feedback_off(session):
    app, lab = session.apparatus, session.lab
    session.RE(reach_state(app, LabState(pressure=1e-4, feedback=ON, gain=3000.0)))
    assert not lab.truth().lost and lab.truth().feedback_damping[0] > 0
    seen = []
    session.RE.msg_hook = lambda msg: seen.append(
        (msg.command, getattr(msg.obj, "name", "")))
    try:
        session.RE(reach_state(app, LabState(pressure=300.0, feedback=OFF)))
    finally:
        session.RE.msg_hook = None
    sets = [name for cmd, name in seen if cmd == "set"]
    first_feedback_off = min(i for i, n in enumerate(sets) if "enabled" in n)
    assert sets.index(next(n for n in sets if "pressure" in n)) < first_feedback_off
    assert not lab.truth().lost and lab.truth().feedback_damping[0] == 0


def test_a_pause_inside_a_run_ends_it_and_no_summary_is_made(session):
    app, RE = session.apparatus, session.RE
    plan = STEPS["thermal_calibration"].plan(app, STEPS["thermal_calibration"].validate(
        app.setup, {"pressure": 300.0, "records": 8, "record_length": 16384,
                    "sample_rate": 1e6, "settle_time": 0.0}))
    seen = {"n": 0, "primary": None}

    def pause_after_third_record(name, doc):
        if name == "descriptor" and doc["name"] == "primary":
            seen["primary"] = doc["uid"]
        if name == "event" and doc["descriptor"] == seen["primary"]:
            seen["n"] += 1
            if seen["n"] == 3:  # as a suspender or Ctrl-C would, from another thread
                threading.Thread(target=RE.request_pause, kwargs={"defer": False}).start()

    token = RE.subscribe(pause_after_third_record)
    try:
        with pytest.raises(RunEngineInterrupted):
            RE(plan)
    finally:
        RE.unsubscribe(token)
    if RE.state != "idle":
        RE.abort("test")
    docs = _journal(session, _last_uid(session))
    streams = _streams(docs)
    stop = docs[-1][1]
    assert docs[-1][0] == "stop" and stop["exit_status"] == "abort"
    seq = [e["seq_num"] for e in streams["primary"]]
    assert seq == list(range(1, len(seq) + 1)) and 3 <= len(seq) < 8  # no rewind, no repeat
    fits = [e["data"]["record_seq_num"] for e in streams.get("fits", [])]
    assert fits == list(range(1, len(fits) + 1))  # every fit read is its record's
    assert "summary" not in streams


def _last_uid(session) -> str:
    paths = sorted(session.store.journal_dir.glob("*.jsonl"), key=lambda p: p.stat().st_mtime)
    return paths[-1].name.split(".")[0]


def test_a_fit_out_of_step_with_its_record_ends_the_run_without_a_summary(session, monkeypatch):
    from quietwell.live import LiveFitter

    submit = LiveFitter.submit
    dropped = {"n": 0}

    def lose_second_record(self, seq_num, traces, data):
        if seq_num == 2 and not dropped["n"]:  # a record whose fit never started
            dropped["n"] += 1
            return None
        return submit(self, seq_num, traces, data)

    monkeypatch.setattr(LiveFitter, "submit", lose_second_record)
    app = session.apparatus
    checked = STEPS["thermal_calibration"].validate(
        app.setup, {"pressure": 300.0, "records": 4, "record_length": 16384,
                    "sample_rate": 1e6, "settle_time": 0.0})
    with pytest.raises(RecordMismatchError, match="out of step"):
        session.RE(STEPS["thermal_calibration"].plan(app, checked))
    docs = _journal(session, _last_uid(session))
    streams = _streams(docs)
    assert docs[-1][1]["exit_status"] == "fail"
    assert "summary" not in streams
    assert dropped["n"] == 1
    # the fit of record 1 is stored; the out-of-step one never is
    assert [e["data"]["record_seq_num"] for e in streams["fits"]] == [1]
