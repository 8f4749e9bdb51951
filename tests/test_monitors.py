"""Unattended safety: each monitor against its fault, through a real RunEngine into a
real store, on the simulated laboratory; then what the catalog and the ledger hold.

Facts of the trade behind the checks (common practice, no source): a lost particle
leaves the detector's intensity channel at its dark level; a run must not go on
recording an empty trap; a summary must never include a record taken while the
pressure was off its setpoint or the feedback drive was clipped.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from quietwell_sim import GaugeStatus

from quietwell import InputError
from quietwell.campaign import ParticleLost, read_ledger, resume_campaign, run_campaign
from quietwell.campaign._ledger import campaign_dirs
from quietwell.physics import MBAR
from quietwell.plans import STEPS
from quietwell.session import open_session

pytestmark = pytest.mark.slow

TINY = Path(__file__).parent / "data" / "tiny-campaign.toml"


def _on_record(lab, n, action):
    """Call ``action()`` just before the ``n``-th record the simulated lab takes."""
    original = lab.record
    calls = {"n": 0}

    def record(*a, **k):
        calls["n"] += 1
        if calls["n"] == n:
            action()
        return original(*a, **k)

    lab.record = record
    return original


def test_particle_lost_ends_the_run_stops_the_campaign_and_needs_the_user(tmp_path):
    data = tmp_path / "data"
    with open_session("amber", data) as s:
        lab = s.lab
        # the 14th record of the lab falls in the pump-down (step 2) of the tiny campaign
        _on_record(lab, 14, lab.laser_off)
        with pytest.raises(ParticleLost, match="particle lost"):
            run_campaign(TINY, s.setup, data, session=s)
        client = s.store.client
        runs = {r.metadata["start"]["campaign_step"]: r for r in client.values()}
        lost = runs[max(runs)]
        stop = lost.metadata["stop"]
        assert stop["exit_status"] == "fail" and "particle lost" in stop["reason"]
        mon = lost["monitor"].read()
        assert list(mon["condition"]) == ["particle_lost"]
        assert mon["value"][0] < s.setup.monitors.intensity_min
        assert "summary" not in lost  # nothing derived from an empty trap
        # safe state of the profile: feedback off, the drive off
        truth = lab.truth()
        assert truth.lost and np.all(truth.feedback_damping == 0)
    entries = read_ledger(campaign_dirs(data)[-1] / "ledger.jsonl")
    assert entries[-1]["event"] == "end" and entries[-1]["particle_lost"]
    assert any(e["event"] == "monitor" and e["condition"] == "particle_lost" for e in entries)
    # not resumed onto an empty trap unless the user says a particle is loaded
    with pytest.raises(InputError, match="--particle-reloaded"):
        resume_campaign(data)


def test_gauge_fault_switches_gauge_and_pressure_excursion_waits(tmp_path):
    with open_session("amber", tmp_path / "data") as s:
        app, lab, RE = s.apparatus, s.lab, s.RE
        chk = STEPS["thermal_calibration"].validate(
            app.setup, {"pressure": 3 * MBAR, "records": 4, "record_length": 16384,
                        "sample_rate": 1e6, "settle_time": 0.0})
        read_gauge = lab.read_gauge
        broken = {"cdg": (lambda t: t < math.inf)}
        t_burst = {}

        def faulty(name):
            r = read_gauge(name)
            if name in broken and broken[name](lab.now):
                return dataclasses.replace(r, value=math.nan, status=GaugeStatus.FAULT)
            if "end" in t_burst and lab.now < t_burst["end"]:
                return dataclasses.replace(r, value=r.value * 30)
            return r

        lab.read_gauge = faulty

        def burst():  # a leak: every gauge reads 30x for 60 s of lab time
            t_burst["end"] = lab.now + 60.0

        _on_record(lab, 2, burst)
        res = RE(STEPS["thermal_calibration"].plan(app, chk))
        run = s.store.client[res.run_start_uids[0]]
        mon = run["monitor"].read()
        conditions = list(mon["condition"])
        actions = list(mon["action"])
        assert "gauge_fault:cdg" in conditions
        assert actions[conditions.index("gauge_fault:cdg")] == "switch gauge"
        assert "pressure_excursion" in conditions
        i = conditions.index("pressure_excursion")
        assert actions[i] == "suspend" and actions[conditions.index("pressure_excursion", i + 1)
                                                   ] == "resume"
        # every record that made the summary was taken inside the band, by a good gauge
        prim = run["primary"].read()
        assert set(np.asarray(prim["pressure_gauge"])) <= {"tc"}
        assert run.metadata["stop"]["exit_status"] == "success"


def _runs_by_step(client, cid):
    out = {}
    for uid in client:
        run = client[uid]
        if run.metadata["start"].get("campaign_id") == cid:
            out.setdefault(run.metadata["start"]["campaign_step"], []).append(run)
    return out


def _check_clean_summaries(runs, ledger):
    """Every monitor event is in its run's stream and the ledger; no summary used a
    record a monitor left out."""
    for step, rs in runs.items():
        for run in rs:
            uid = run.metadata["start"]["uid"]
            in_ledger = [e for e in ledger if e["event"] == "monitor" and e.get("uid") == uid]
            stream = run["monitor"].read() if "monitor" in run else {"condition": []}
            assert len(stream["condition"]) == len(in_ledger)
            left = {int(e["record"]) for e in in_ledger if e["action"] == "record left out"}
            if "summary" in run:
                s = run["summary"].read()
                text = str(np.asarray(s["records_used"]).reshape(-1)[0])
                used = {int(x) for x in text.split(",") if x}
                assert not used & left, (step, used & left)
                n = len(run["primary"].read()["time"])
                assert len(used) + int(np.asarray(s["records_left_out"]).reshape(-1)[0]) == n


def test_the_shipped_night_with_faults_shows_every_monitor(tmp_path):
    root = Path(__file__).resolve().parents[1]
    data = tmp_path / "data"
    with open_session("amber", data) as s:
        with pytest.raises(ParticleLost):
            run_campaign(root / "campaigns" / "night-with-faults.toml", s.setup, data,
                         session=s)
        ledger = read_ledger(campaign_dirs(data)[-1] / "ledger.jsonl")
        runs = _runs_by_step(s.store.client, ledger[0]["campaign_id"])
        seen = {(e["step"], e["condition"].split(":")[0], e["action"]) for e in ledger
                if e["event"] == "monitor"}
        assert (0, "pressure_excursion", "suspend") in seen
        assert (0, "pressure_excursion", "resume") in seen
        assert (1, "gauge_fault", "switch gauge") in seen
        assert (2, "feedback_saturation", "record left out") in seen
        assert (4, "particle_lost", "end run, stop campaign") in seen
        assert [r.metadata["stop"]["exit_status"] for st in range(4) for r in runs[st]] == \
            ["success"] * 4
        assert runs[4][0].metadata["stop"]["exit_status"] == "fail"
        _check_clean_summaries(runs, ledger)


@pytest.mark.parametrize("seed", [20261203])
def test_an_eight_hour_night_with_random_faults(tmp_path, seed):
    """A pump-down to 1e-8 mbar (hours of outgassing on the sim clock), a gain sweep and
    reheating at three pressures, with each kind of fault at a random step and time."""
    rng = np.random.default_rng(seed)
    steps = '''
[campaign]
name = "random-night"

[[step]]
id = "pumpdown"
plan = "pressure_sweep"
pressures = ["10 mbar", "3 mbar", "1 mbar", "0.3 mbar", "1e-2 mbar", "1e-4 mbar", "1e-6 mbar", "1e-8 mbar"]
records_per_step = 2
sample_rate = "1 MHz"
record_length = 65536
input_range = "2 V"

[[step]]
id = "gains"
plan = "gain_sweep"
pressure = "1e-8 mbar"
gains = ["3000 1/s", "8000 1/s", "20000 1/s", "50000 1/s"]
records_per_step = 3
sample_rate = "1 MHz"
record_length = 65536
input_range = "20 mV"
'''
    for p in ("1e-6", "1e-7", "1e-8"):
        steps += f'''
[[step]]
id = "reheat-{p}"
plan = "reheating_cycles"
pressure = "{p} mbar"
cycles = 8
feedback_gain = {{ from = "gains", result = "optimal_gain", clip = ["5e3 1/s", "1e5 1/s"], otherwise = 2e4 }}
off_time = "4 ms"
sample_rate = "1 MHz"
input_range = "20 mV"
'''
    ids = ["pumpdown", "gains", "reheat-1e-6", "reheat-1e-7", "reheat-1e-8"]
    faults = [("pressure_burst", 'factor = 20\nduration = "30 s"'),
              ("gauge_dropout", 'gauge = "ion"\nduration = "5 min"'),
              ("saturate_drive", 'duration = "0.2 s"'),
              ("change_charge", "delta = -2"),
              ("lose_particle", "")]
    for kind, extra in faults:
        step = ids[rng.integers(1, len(ids))] if kind != "gauge_dropout" else "pumpdown"
        after = float(rng.uniform(0.0, 0.2))
        steps += f'\n[[sim.fault]]\nkind = "{kind}"\nstep = "{step}"\nafter = "{after:.4f} s"\n'
        steps += extra + "\n"
    path = tmp_path / "random-night.toml"
    path.write_text(steps)
    data = tmp_path / "data"
    with open_session("amber", data) as s:
        try:
            out = run_campaign(path, s.setup, data, session=s)
            stopped = False
        except ParticleLost:
            stopped = True
        ledger = read_ledger(campaign_dirs(data)[-1] / "ledger.jsonl")
        assert s.lab.now > 8 * 3600 or stopped  # a night on the sim clock
        end = ledger[-1]
        if stopped:  # it stops at the particle loss and only there
            assert end["particle_lost"] and s.lab.truth().lost
        else:
            assert end["status"] == "completed" and len(out.uids) == len(ids)
        runs = _runs_by_step(s.store.client, ledger[0]["campaign_id"])
        done = {e["step"] for e in ledger if e["event"] == "done"}
        for step, rs in runs.items():
            if step in done:
                assert any(r.metadata["stop"]["exit_status"] == "success" for r in rs)
        _check_clean_summaries(runs, ledger)


def test_a_pressure_excursion_past_its_timeout_follows_the_policy(tmp_path):
    import dataclasses as dc

    from quietwell._profile import find_profile
    from quietwell.setup import load_setup

    base = load_setup(find_profile("amber"))
    setup = dc.replace(base, monitors=dc.replace(base.monitors, pressure_timeout=30.0,
                                                 pressure_policy="skip", poll_interval=5.0))
    text = '''
[campaign]
name = "leaky"

[[step]]
id = "thermal"
plan = "thermal_calibration"
pressure = "3 mbar"
records = 4
settle_time = "2 s"
sample_rate = "1 MHz"
record_length = 65536
input_range = "2 V"

[[step]]
id = "thermal-again"
plan = "thermal_calibration"
pressure = "5 mbar"
records = 3
sample_rate = "1 MHz"
record_length = 65536
input_range = "2 V"

[[sim.fault]]
kind = "pressure_burst"
step = "thermal"
after = "2.05 s"
factor = 30
duration = "10 min"
'''
    path = tmp_path / "leaky.toml"
    path.write_text(text)
    data = tmp_path / "data"
    with open_session(setup, data) as s:
        out = run_campaign(path, setup, data, session=s)
        ledger = read_ledger(campaign_dirs(data)[-1] / "ledger.jsonl")
        skipped = [e for e in ledger if e["event"] == "skipped"]
        assert [e["step"] for e in skipped] == [0] and "pressure_timeout" in skipped[0]["reason"]
        assert list(out.uids) == ["thermal-again"]  # the campaign went on with the next step
        run = s.store.client[ledger[[e["event"] for e in ledger].index("run")]["uid"]]
        assert run.metadata["stop"]["exit_status"] == "fail"
        assert "policy skip" in run.metadata["stop"]["reason"]
        mon = run["monitor"].read()
        assert list(mon["action"])[-1] == "end run (skip)"
        assert "summary" not in run
