"""Faults on demand in the simulated laboratory, seen through the devices in a RunEngine.

What a monitor of an unattended run needs: each fault (particle loss, pressure burst,
gauge drop-out, charge change, feedback saturation) on the sim clock, and what the
devices read during and after it. References not taken from the code under test: the
raw text of the profile (converted with the unit table below),
``scipy.constants``, ``scipy.integrate`` and ``scipy.stats``; the cold-damping force
``F = m gamma v`` and the field ``kappa V/d`` between electrodes are common practice,
no source.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import replace
from pathlib import Path

import bluesky.plan_stubs as bps
import bluesky.plans as bp
import numpy as np
import pytest
from bluesky import RunEngine
from quietwell_sim import FAULT_KINDS, SimLab, build_sim_apparatus, connect_apparatus
from scipy import constants, integrate, stats

from quietwell import InputError
from quietwell.setup import load_setup

PROFILES = Path(__file__).resolve().parents[1] / "profiles"
# Independent unit table for the strings of the profile used here (SI factor of each unit).
_UNITS = {"nm": 1e-9, "mm": 1e-3, "W": 1.0, "MHz": 1e6, "mbar": 100.0, "V": 1.0,
          "kg/m^3": 1.0}  # fmt: skip


def si(text: str) -> float:
    number, unit = text.split(" ", 1)
    return float(number) * _UNITS[unit]


RAW = tomllib.loads((PROFILES / "amber" / "setup.toml").read_text())
LOSS_PA = si(RAW["trap"]["loss_pressure"])
V_MAX = si(RAW["limits"]["electrode_voltage_max"])
D = si(RAW["electrodes"]["distance"])
KAPPA = float(RAW["electrodes"]["geometry_factor"])
Q = RAW["particle"]["charge_e"] * constants.e
MASS = 4 / 3 * math.pi * si(RAW["particle"]["radius"]) ** 3 * si(RAW["particle"]["density"])
ACC = {g["name"]: g["accuracy"] for g in RAW["vacuum"]["gauges"]}


@pytest.fixture
def RE():
    return RunEngine({}, call_returns_result=False)


@pytest.fixture
def app(RE, tmp_path):
    a = build_sim_apparatus(load_setup(PROFILES / "amber"), tmp_path / "raw")
    connect_apparatus(a)
    return a


def feedback(app, gain, on=True):
    """Plan: cold damping ``gain`` (1/s) on all three axes (or loops open)."""
    args = []
    for ax in (app.electrodes.x, app.electrodes.y, app.electrodes.z):
        args += [ax.gain, gain, ax.enabled, on]
    yield from bps.mv(*args)


def poll(app, devices, every_s, n, out):
    """Plan: read ``devices`` every ``every_s`` s of lab time, ``n`` times, into ``out``."""
    lab = app.extras["lab"]
    for _ in range(n):
        row = {"t": lab.now}
        for dev in devices:
            row.update({k: v["value"] for k, v in (yield from bps.read(dev)).items()})
        out.append(row)
        yield from bps.mv(app.clock, every_s)


# ------------------------------------------------------------------------ particle loss


@pytest.mark.parametrize("gain", [None, 2e3])
def test_below_the_loss_pressure_undamped_is_lost_and_cold_damping_keeps_it(RE, app, gain):
    lab = app.extras["lab"]
    if gain is not None:
        RE(feedback(app, gain))
    RE(bps.mv(app.pressure, 0.5 * LOSS_PA))
    seen = []

    def watch():
        for _ in range(20):  # 20 min of lab time, ~15 instability times of the setup
            yield from bps.mv(app.clock, 60.0)
            seen.append((yield from bps.rd(app.detector.intensity)))

    RE(watch())
    level = 0.8 * float(app.sim_truth()["laser_power_w"]) / si(RAW["trap"]["power"])
    if gain is None:
        assert lab.truth().lost and lab.truth().lost_time > 0
        assert seen[-1] < 0.05 * level  # the intensity channel shows the empty trap
    else:
        assert not lab.truth().lost
        assert min(seen) > 0.9 * level


def test_lose_particle_now_and_inside_a_record_from_the_right_sample(RE, app, tmp_path):
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 1000.0, app.detector.record_length, 1 << 15))
    fs = si(RAW["detector"]["sample_rate"])
    # a loss due 0.3 of the way into the next record shows from its own sample on
    t0 = lab.now
    lab.schedule_fault("lose_particle", at_s=t0 + 0.3 * (1 << 15) / fs)
    RE(bp.count([app.detector]))
    rec = app.extras["backends"]["motion"].last_record
    assert rec.start_time == t0
    k = math.ceil(0.3 * (1 << 15))
    i = rec.volts["intensity"]
    assert np.all(i[: k - 1] > 0.5) and np.all(i[k + 1 :] < 0.05)
    x = rec.volts["x"]
    assert np.std(x[k + 1 :]) < 0.01 * np.std(x[: k - 1])  # only detector noise after it
    assert lab.truth().lost_time == pytest.approx(t0 + k / fs)
    # on command, another lab: at once, and the intensity poll shows it
    other = build_sim_apparatus(load_setup(PROFILES / "amber"), tmp_path / "other")
    connect_apparatus(other)
    got = []

    def lose_then_look():
        got.append((yield from bps.rd(other.detector.intensity)))
        other.extras["lab"].lose_particle()
        got.append((yield from bps.rd(other.detector.intensity)))

    RE(lose_then_look())
    assert got[0] > 0.5 and got[1] < 0.05
    assert [(e.kind, e.phase) for e in other.extras["lab"].fault_log] == [
        ("lose_particle", "start")
    ]


# ------------------------------------------------------------------------ pressure burst


def test_pressure_burst_rises_by_its_factor_and_recovers_on_the_sim_clock(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 10.0))
    t0 = lab.now
    lab.schedule_fault("pressure_burst", at_s=t0 + 45.0, factor=30.0, duration_s=300.0)
    rows = []
    RE(poll(app, [app.gauges[2]], 30.0, 16, rows))
    assert app.gauges[2].name == "cdg"
    for r in rows:
        during = t0 + 45.0 <= r["t"] < t0 + 345.0
        expect = 10.0 * (30.0 if during else 1.0)
        assert r["cdg-status"] == "ok"
        assert abs(r["cdg-pressure"] / expect - 1) <= ACC["cdg"] + 0.03, r  # + settle band
    assert sum(t0 + 45.0 <= r["t"] < t0 + 345.0 for r in rows) == 10
    log = [(e.time_s, e.kind, e.phase) for e in lab.fault_log]
    assert log == [
        (t0 + 45.0, "pressure_burst", "scheduled"),
        (t0 + 45.0, "pressure_burst", "start"),
        (t0 + 345.0, "pressure_burst", "end"),
    ]


def test_pressure_bursts_overlap_by_multiplying():
    lab = SimLab()
    lab.set_pressure_setpoint(50.0)
    lab.advance(120.0)
    p0 = lab.pressure
    lab.pressure_burst(3.0, 100.0)
    lab.schedule_fault("pressure_burst", at_s=lab.now + 50.0, factor=2.0, duration_s=100.0)
    lab.advance(10.0)
    assert lab.pressure == pytest.approx(3 * p0, rel=0.02)
    lab.advance(50.0)
    assert lab.pressure == pytest.approx(6 * p0, rel=0.02)
    lab.advance(50.0)
    assert lab.pressure == pytest.approx(2 * p0, rel=0.02)
    lab.advance(50.0)
    assert lab.pressure == pytest.approx(p0, rel=0.02) and lab.chamber.burst_factor == 1.0


# ------------------------------------------------------------------------ gauge drop-out


@pytest.mark.parametrize(
    "mode, status", [("fault", "fault"), ("sensor_off", "sensor_off"), ("over_range", "over_range")]
)
def test_gauge_dropout_for_its_duration_then_ok(RE, app, mode, status):
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 10.0))
    t0 = lab.now
    lab.gauge_dropout("tc", 120.0, mode=mode)
    rows = []
    RE(poll(app, app.gauges, 30.0, 8, rows))
    for r in rows:
        if r["t"] < t0 + 120.0:
            assert r["tc-status"] == status and math.isnan(r["tc-pressure"]), r
        else:
            assert r["tc-status"] == "ok" and abs(r["tc-pressure"] / 10.0 - 1) < ACC["tc"] + 0.03
        assert r["cdg-status"] == "ok"  # the other gauge still covers the pressure


# ------------------------------------------------------------------------ charge change


def test_change_charge_needs_more_voltage_and_weakens_the_damping(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 1000.0))
    RE(feedback(app, 1e4))
    before, after = [], []
    RE(poll(app, [app.electrodes], 10.0, 3, before))
    assert lab.change_charge(-6) == 1
    assert app.sim_truth()["charge_e"] == 1
    RE(poll(app, [app.electrodes], 10.0, 3, after))
    # 7 times the voltage per m/s of velocity: the output now clips part of the time
    assert before[-1]["electrodes-feedback_saturation"] < 1e-6
    assert after[-1]["electrodes-feedback_saturation"] > 0.05
    assert after[-1]["electrodes-feedback_voltage"] == pytest.approx(V_MAX)
    assert max(lab.truth().feedback_damping) < 0.95e4


# ------------------------------------------------------------------------ feedback output


def test_feedback_voltage_is_the_cold_damping_force_over_the_charge_and_field():
    # common practice, no source: cold damping force F = m gamma v; field kappa V/d,
    # so V = m gamma v d/(q e kappa), clipped at the setup's voltage limit
    setup = load_setup(PROFILES / "amber")
    from quietwell_sim import lab_params_from_setup

    gain = 1e4
    v_ok, v_clip = 0.1, 0.5  # m/s, both well inside the trap depth (no loss)
    for v0, expect in [(v_ok, MASS * gain * v_ok * D / (Q * KAPPA)), (v_clip, V_MAX)]:
        lab = SimLab(lab_params_from_setup(setup))
        lab.set_electrodes(D, KAPPA, V_MAX)
        lab.set_pressure_setpoint(1000.0)
        lab.set_feedback_damping(gain)
        lab.feedback_report()
        lab.particle.state[:] = [[0.0, v0]] * 3  # through the origin at v0 on each axis
        lab.advance(1e-12)  # the gas's velocity kicks in 1 ps: ~1e-5 m/s
        peak, _, interval = lab.feedback_report()
        assert interval == pytest.approx(1e-12) and not lab.truth().lost
        np.testing.assert_allclose(peak, expect, rtol=1e-3)
    assert MASS * gain * v_ok * D / (Q * KAPPA) < V_MAX < MASS * gain * v_clip * D / (Q * KAPPA)


def test_feedback_voltage_reads_through_the_device_in_a_run(RE, app):
    lab = app.extras["lab"]
    gain = 3e3
    RE(bps.mv(app.pressure, 1000.0))
    RE(feedback(app, gain))
    docs = []
    RE(bps.mv(app.clock, 1.0))

    def look():
        yield from bps.read(app.electrodes)  # closes the interval so far
        lab.particle.state[:] = [[0.0, 0.1], [0.0, 0.08], [0.0, 0.05]]
        yield from bps.mv(app.clock, 1e-12)

    RE(look())
    RE(bp.count([app.electrodes]), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    (ev,) = [d for n, d in docs if n == "event"]
    for a, v in zip("xyz", (0.1, 0.08, 0.05), strict=True):
        assert desc["data_keys"][f"electrodes-{a}-feedback_voltage"]["units"] == "V"
        hand = MASS * gain * v * D / (Q * KAPPA)
        assert ev["data"][f"electrodes-{a}-feedback_voltage"] == pytest.approx(hand, rel=3e-3)
    assert ev["data"]["electrodes-feedback_interval"] == pytest.approx(1e-12)
    assert ev["data"]["electrodes-feedback_saturation"] < 1e-9


def test_saturation_is_the_clipped_force_of_a_gaussian_velocity_and_weakens_the_damping():
    """The damping the sim keeps when the output clips equals the power a clipped force
    removes from a thermal (Gaussian) velocity, by numerical integration."""
    setup = load_setup(PROFILES / "amber")
    from quietwell_sim import lab_params_from_setup

    gain = 1.5e5
    lab = SimLab(lab_params_from_setup(setup))
    lab.set_electrodes(D, KAPPA, V_MAX)
    lab.set_pressure_setpoint(1000.0)
    lab.set_feedback_damping(gain)
    t = lab.truth()
    f_max = Q * KAPPA * V_MAX / D
    for i in range(3):
        energy = constants.hbar * t.omega0[i] * (t.steady_occupation[i] + 0.5)
        sv = math.sqrt(energy / MASS)
        power, _ = integrate.quad(
            lambda v, sv=sv: np.clip(MASS * gain * v, -f_max, f_max) * v * stats.norm.pdf(v, 0, sv),
            -12 * sv,
            12 * sv,
            points=[-f_max / (MASS * gain), f_max / (MASS * gain)],
        )
        assert t.feedback_damping[i] == pytest.approx(power / (MASS * sv**2), rel=1e-6)
        frac = 2 * stats.norm.sf(f_max / (MASS * gain), 0, sv)
        assert t.feedback_saturation[i] == pytest.approx(frac, rel=1e-6)
    assert np.all(t.feedback_damping < 0.7 * gain)
    # the motion shows it: a record's position variance follows the weakened damping
    free = SimLab(lab_params_from_setup(setup))
    free.set_pressure_setpoint(1000.0)
    free.set_feedback_damping(gain)  # no electrodes: no limit
    assert free.truth().feedback_damping.tolist() == [gain] * 3
    var = {}
    for name, lb in (("clipped", lab), ("free", free)):
        lb.advance(0.01)
        x = np.concatenate([lb.particle.sample(1 << 16, 5e-7)[0] for _ in range(4)])
        var[name] = float(np.var(x))
        e = lb.truth().steady_occupation[0] + 0.5
        x2 = constants.hbar * e / (MASS * lb.truth().omega0[0])
        assert var[name] == pytest.approx(x2, rel=0.15), name
    assert var["clipped"] > 1.3 * var["free"]


def test_saturate_drive_holds_the_output_at_the_limit_then_lets_go(RE, app):
    lab = app.extras["lab"]
    gain = 2e3
    RE(bps.mv(app.pressure, 1000.0))
    RE(feedback(app, gain))
    RE(bps.mv(app.clock, 5.0))
    lab.schedule_fault("saturate_drive", at_s=lab.now + 5.0, duration_s=20.0, axes="xz")
    rows = []
    RE(poll(app, [app.electrodes], 10.0, 5, rows))
    # read intervals after rows[0]: [0, 10) half held, [10, 20) held, [20, 30) half, [30, 40)
    sat = {a: [r[f"electrodes-{a}-feedback_saturation"] for r in rows[1:]] for a in "xyz"}
    volt = {a: [r[f"electrodes-{a}-feedback_voltage"] for r in rows[1:]] for a in "xyz"}
    for a in "xz":
        assert sat[a][0] == pytest.approx(0.5) and sat[a][1] == 1.0
        assert sat[a][2] == pytest.approx(0.5) and sat[a][3] < 1e-9
        assert volt[a][:3] == [V_MAX] * 3 and volt[a][3] < V_MAX
    assert max(sat["y"]) < 1e-9 and max(volt["y"]) < V_MAX  # y was never held
    assert rows[2]["electrodes-feedback_saturation"] == 1.0  # the largest over the axes
    assert lab.truth().feedback_damping.tolist() == [gain] * 3  # let go: damping back
    kinds = [(e.kind, e.phase) for e in lab.fault_log]
    assert kinds == [("saturate_drive", p) for p in ("scheduled", "start", "end")]


def test_a_held_drive_below_the_loss_pressure_loses_the_particle(RE, app):
    lab = app.extras["lab"]
    RE(feedback(app, 2e3))
    RE(bps.mv(app.pressure, 0.5 * LOSS_PA))
    lab.saturate_drive(1200.0)
    assert np.all(lab.truth().feedback_damping == 0.0)
    RE(bps.mv(app.clock, 1200.0))
    assert lab.truth().lost  # no damping below the loss pressure: the sim loses it by itself


# ------------------------------------------------------------------------ the API itself


def test_intensity_poll_is_free_and_does_not_touch_the_records(tmp_path):
    def run(polls):
        RE = RunEngine({}, call_returns_result=False)
        a = build_sim_apparatus(load_setup(PROFILES / "amber"), tmp_path / f"raw{polls}")
        connect_apparatus(a)
        lab = a.extras["lab"]
        RE(bps.mv(a.detector.record_length, 1 << 12, a.heterodyne.record_length, 1 << 12))
        seen = []

        def plan():
            for _ in range(polls):
                t = lab.now
                seen.append((yield from bps.rd(a.detector.intensity)))
                seen.append((yield from bps.rd(a.heterodyne.intensity)))
                assert lab.now == t  # a poll takes no sim time
            yield from bp.count([a.detector])

        RE(plan())
        return seen, a.extras["backends"]["motion"].last_record.volts["x"]

    seen, x_polled = run(5)
    _, x_plain = run(0)
    assert np.array_equal(x_polled, x_plain)
    assert all(0.7 < v < 0.9 for v in seen)  # 0.8 V trapped level, 1024-sample mean


def test_faults_are_deterministic_and_logged():
    def night(seed):
        lab = SimLab(replace(SimLab().params, seed=seed))
        lab.set_pressure_setpoint(50.0)
        lab.set_feedback_damping(1e3)
        lab.schedule_fault("pressure_burst", at_s=30.0, factor=5.0, duration_s=60.0)
        lab.schedule_fault("gauge_dropout", at_s=40.0, name="pirani", duration_s=10.0)
        lab.schedule_fault("change_charge", at_s=70.0, delta_e=-2)
        lab.schedule_fault("saturate_drive", at_s=80.0, duration_s=5.0, axes="y")
        lab.schedule_fault("lose_particle", at_s=200.0)
        readings = []
        for _ in range(30):
            lab.advance(10.0)
            readings.append((lab.read_gauge("pirani"), lab.pressure))
        return lab.fault_log, readings, lab.truth()

    a, b = night(1), night(1)
    assert a[0] == b[0] and a[1] == b[1]
    log = [(e.time_s, e.kind, e.phase) for e in a[0] if e.phase != "scheduled"]
    assert log == [
        (30.0, "pressure_burst", "start"),
        (40.0, "gauge_dropout", "start"),
        (50.0, "gauge_dropout", "end"),
        (70.0, "change_charge", "start"),
        (80.0, "saturate_drive", "start"),
        (85.0, "saturate_drive", "end"),
        (90.0, "pressure_burst", "end"),
        (200.0, "lose_particle", "start"),
    ]
    truth = a[2]
    assert truth.lost and truth.lost_time == 200.0 and truth.charge == 5
    assert set(FAULT_KINDS) == {e.kind for e in a[0]}


@pytest.mark.parametrize(
    "kind, at, params, msg",
    [
        ("meteor", None, {}, r"kind='meteor' is not known; use one of \['lose_particle'"),
        ("pressure_burst", None, {"factor": 3.0}, r"needs \['duration_s'\]"),
        ("pressure_burst", None, {"factor": -1.0, "duration_s": 1.0}, "factor=-1.0 must be"),
        ("pressure_burst", None, {"factor": 2, "duration_s": 0}, "duration_s=0 s must be"),
        ("gauge_dropout", None, {"name": "baratron", "duration_s": 1.0}, "'baratron' is not"),
        ("gauge_dropout", None, {"name": "ion", "duration_s": 1.0, "mode": "x"}, "mode='x'"),
        ("change_charge", None, {"delta_e": 0.5}, "delta_e=0.5 must be a whole number"),
        ("saturate_drive", None, {"duration_s": 1.0, "axes": "xw"}, "axes='xw'"),
        ("lose_particle", None, {"when": 3}, r"takes no parameters, not \['when'\]"),
        ("lose_particle", -1.0, {}, r"at_s=-1.0 s is in the past"),
    ],
)
def test_bad_faults_are_refused_with_one_line(kind, at, params, msg):
    lab = SimLab()
    with pytest.raises(InputError, match=msg) as info:
        lab.schedule_fault(kind, at_s=at, **params)
    assert "\n" not in str(info.value) and lab.fault_log == []
    assert re.search(r"\S", str(info.value))
