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
