"""Acceptance of the measurement plans: a real RunEngine, sim devices, a real tiled store.

Each derived number is compared with the simulation's ground truth, which the
simulated laboratory computes from the physics core (itself checked against the
published values in test_physics.py).
"""

from __future__ import annotations

import bluesky.plan_stubs as bps
import numpy as np
import pytest

from quietwell import LimitError
from quietwell import physics as qp
from quietwell._profile import build_apparatus, find_profile
from quietwell.physics import AXES, MBAR, Estimate
from quietwell.plans import (
    charge_calibration,
    connect_apparatus,
    gain_sweep,
    pressure_sweep,
    reheating_cycles,
    set_feedback,
    sideband_thermometry,
    thermal_calibration,
)
from quietwell.session import open_session
from quietwell.setup import load_setup

pytestmark = pytest.mark.slow

RATE = 1e6


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    with open_session("amber", tmp_path_factory.mktemp("store")) as s:
        yield _UidsOnly(s.RE), s.store, s.apparatus, s.lab


class _UidsOnly:
    """The session's RunEngine, called the way these tests were written: ``RE(plan)``
    gives the run uids (the session's RunEngine returns a RunEngineResult)."""

    def __init__(self, RE) -> None:
        self._RE = RE

    def __call__(self, plan):
        return self._RE(plan).run_start_uids

    def __getattr__(self, name):
        return getattr(self._RE, name)


def _summary(store, uid):
    tbl = store.client[uid]["summary"].read()
    return {k: np.asarray(tbl[k]).reshape(-1)[0] for k in tbl if k != "time"}


def _go(RE, app, pressure_pa, gain=None):
    def plan():
        yield from set_feedback(app, gain)
        yield from bps.mv(app.pressure, pressure_pa)

    RE(plan())


def test_limits_are_refused_before_anything_moves(bench):
    RE, store, app, lab = bench
    before = lab.truth().pressure
    with pytest.raises(LimitError, match="outside the setup 'amber' limits"):
        RE(pressure_sweep([app.detector], [1e6], apparatus=app))
    with pytest.raises(LimitError, match="feedback_gain"):
        RE(pressure_sweep([app.detector], [100.0], apparatus=app, feedback_gain=1e9))
    assert lab.truth().pressure == before


def test_pressure_sweep_gives_the_radius_and_keeps_the_particle(bench):
    RE, store, app, lab = bench
    _go(RE, app, 10 * MBAR)
    pressures = [p * MBAR for p in (10, 6, 4, 2.5, 1.6, 0.6, 0.2, 1e-3)]
    (uid,) = RE(pressure_sweep([app.detector], pressures, apparatus=app, records_per_step=2,
                               feedback_gain=2000.0, sample_rate=RATE, record_length=2**19,
                               input_range=2.0))
    truth = lab.truth()
    assert not truth.lost
    assert np.all(truth.feedback_damping > 0)  # engaged on the way down
    s = _summary(store, uid)
    # Phys. Rev. 23, 710 (1924): R = 8 delta/(pi rho v s); truth is the sim's radius
    assert abs(s["radius"] - truth.radius) < 0.03 * truth.radius
    assert s["radius_stderr"] < 0.03 * truth.radius
    assert abs(s["mass"] - truth.mass) < 3 * s["mass_stderr"] + 0.09 * truth.mass
    run = store.client[uid]
    start = run.metadata["start"]
    assert start["plan_name"] == "pressure_sweep"
    assert start["setup"] == "amber" and len(start["setup_sha256"]) == 64
    assert start["sim_truth"]["charge_e"] == 7
    assert set(start["sim_truth"]) >= {"radius_m", "mass_kg", "density_kg_m3", "charge_e",
                                       "frequencies_hz", "calibration_v_per_m", "gas",
                                       "temperature_k", "laser_power_w", "wavelength_m",
                                       "waist_m"}
    prim = run["primary"]
    assert prim["trace_x"].shape == (16, 2**19)
    p = np.asarray(prim["pressure"].read())
    true_p = np.asarray(prim["sim_pressure"].read())
    assert np.all(np.abs(p / true_p - 1) < 0.05)  # best gauge in range
    fits = run["fits"].read()
    assert len(fits["f0_x"]) == 16
    units = run["summary"].metadata["data_keys"]["radius"]["units"]
    assert units == "m"


def test_thermal_and_charge_calibration(bench):
    RE, store, app, lab = bench
    _go(RE, app, 3 * MBAR, gain=2000.0)
    (uid_c,) = RE(charge_calibration(
        [app.detector], [0, -1, -1, -1], apparatus=app, pressure=3 * MBAR,
        drive_frequency=129e3, drive_amplitude=8.0, records_per_step=3, sample_rate=RATE,
        record_length=2**17, input_range=2.0))
    c = _summary(store, uid_c)
    truth = lab.truth()
    assert int(c["charge"]) == truth.charge + 3  # charge at the first step
    # rounding to the nearest integer is right at > 95 % confidence when sigma < 1/4
    assert c["charge_stderr"] < 0.25
    assert abs(c["mass"] - truth.mass) < 0.05 * truth.mass
    assert abs(c["mass"] - truth.mass) < 3 * c["mass_stderr"]  # and its error is honest
    (uid_t,) = RE(thermal_calibration([app.detector], 3 * MBAR, apparatus=app, records=4,
                                      mass=Estimate(c["mass"], c["mass_stderr"]),
                                      sample_rate=RATE, record_length=2**19))
    t = _summary(store, uid_t)
    for i, a in enumerate(AXES):
        true_c = app.setup.detector.calibration[i]
        # within 3.5 of its own standard errors (a two-sided 99.95 % interval: the
        # records' noise, not the test, decides the scatter) and a few percent
        err = t[f"calibration_{a}_stderr"]
        assert abs(t[f"calibration_{a}"] - true_c) < 3.5 * err < 0.06 * true_c
    assert t["mass_source"] == "measured"


def test_gain_sweep_minimum_follows_the_cold_damping_model(bench):
    RE, store, app, lab = bench
    _go(RE, app, 1e-8 * MBAR, gain=2000.0)
    truth = lab.truth()
    gains = list(np.geomspace(2e3, 1.2e5, 9))
    (uid,) = RE(gain_sweep([app.detector], gains, apparatus=app, records_per_step=2,
                           calibration=list(app.setup.detector.calibration), mass=truth.mass,
                           sample_rate=RATE, record_length=2**17, input_range=0.02))
    s = _summary(store, uid)
    # Nature 524, 325 (2015) model with the sim's true rates: heating without feedback,
    # and the imprecision heating per gain^2 that the feedback injects.
    t = lab.truth()
    for i, a in enumerate(AXES):
        dec = float(t.gas_heating[i] + t.recoil_heating[i])
        per_g2 = float(t.feedback_heating[i] / t.feedback_damping[i] ** 2)
        gm = 1 / (16 * per_g2)
        g_opt, n_min = qp.cold_damping_optimum(float(t.gas_damping[i]), 0.0, gm, dec)
        if g_opt > max(gains):
            # the optimum is out of reach (z here): the plan must say so, not invent one
            assert "beyond the largest swept gain" in str(s[f"fit_status_{a}"])
            assert s[f"lowest_occupation_{a}"] > n_min
            continue
        assert s[f"fit_status_{a}"] == "ok"
        err = s[f"min_occupation_{a}_stderr"]
        assert abs(s[f"min_occupation_{a}"] - n_min) < 3 * err, (a, s[f"min_occupation_{a}"],
                                                                  n_min, err)


def test_gain_sweep_stops_once_past_the_optimum(bench):
    # setup "cobalt" has a noisier detector: its x optimum (~1e4 1/s) lies well inside
    # the gains, so the occupation rises for three steps and the sweep stops there
    RE, store, _, _ = bench
    app = build_apparatus(load_setup(find_profile("cobalt")), store.raw_dir)
    connect_apparatus(app)
    _go(RE, app, 1e-8 * MBAR, gain=2000.0)
    gains = list(np.geomspace(2e3, 1.2e5, 12))
    (uid,) = RE(gain_sweep([app.detector], gains, apparatus=app, records_per_step=2,
                           stop_axes=("x",), sample_rate=RATE, record_length=2**17,
                           input_range=0.02))
    s = _summary(store, uid)
    assert 5 <= int(s["steps_done"]) < len(gains)
    assert s["fit_status_x"] == "ok"


def test_reheating_rates_match_gas_plus_recoil(bench):
    RE, store, app, lab = bench
    _go(RE, app, 1e-7 * MBAR, gain=2e4)
    (uid,) = RE(reheating_cycles([app.detector], 120, apparatus=app, feedback_gain=2e4,
                                 off_time=0.01, calibration=list(app.setup.detector.calibration),
                                 mass=lab.truth().mass, sample_rate=RATE, n_boot=200,
                                 input_range=0.02))
    s = _summary(store, uid)
    t = lab.truth()
    for i, a in enumerate(AXES):
        expected = float(t.gas_heating[i] + t.recoil_heating[i])
        rate, err = s[f"heating_rate_{a}"], s[f"heating_rate_{a}_stderr"]
        assert err < 0.1 * rate
        assert abs(rate - expected) < 3 * err, (a, rate, expected, err)
        # the prediction uses the gauge reading (stated accuracy) for the gas part
        acc = max(g.accuracy for g in app.setup.vacuum.gauges if g.kind == "ionization")
        allowed = 3 * acc * float(t.gas_heating[i]) + 0.02 * expected
        assert abs(s[f"predicted_heating_rate_{a}"] - expected) < allowed
    env = store.client[uid]["fits"].read()
    assert np.asarray(env["envelope_x"]).shape[0] == 120
    ens = store.client[uid]["ensemble"].read()
    assert int(np.asarray(ens["cycles_in_mean"])[-1]) == 120  # running mean, last = all
    assert np.asarray(ens["ensemble_mean_x"]).shape[1] == np.asarray(env["envelope_x"]).shape[1]


@pytest.mark.parametrize("gain", [2.7e4, 8e3, 3e3])
def test_sideband_occupation_without_calibration(bench, gain):
    # Phys. Rev. Lett. 124, 013603 (2020): n = R/(1 - R); the gains put the x mode
    # between n ~ 0.5 and n ~ 10 at 1e-8 mbar.
    RE, store, app, lab = bench
    _go(RE, app, 1e-8 * MBAR, gain=gain)
    (uid,) = RE(sideband_thermometry([app.heterodyne], 8, apparatus=app, axis="x",
                                     feedback_gain=gain, input_range=0.2))
    s = _summary(store, uid)
    n_true = float(lab.truth().occupation[0])
    assert 0.4 < n_true < 12
    assert abs(s["occupation"] - n_true) < 3 * s["occupation_stderr"], (s, n_true)


def _fail_on_record(lab, n, action):
    """Make the n-th record of the simulated laboratory call ``action`` first."""
    original = lab.record
    calls = {"n": 0}

    def record(*a, **k):
        calls["n"] += 1
        if calls["n"] == n:
            action()
        return original(*a, **k)

    lab.record = record
    return original


def test_exception_mid_run_keeps_completed_records_and_says_how_it_ended(bench):
    RE, store, app, lab = bench
    _go(RE, app, 3 * MBAR, gain=None)

    def boom():
        raise RuntimeError("digitiser lost its clock")

    original = _fail_on_record(lab, 3, boom)
    try:
        with pytest.raises(Exception, match="digitiser lost its clock"):
            RE(thermal_calibration([app.detector], 3 * MBAR, apparatus=app, records=4,
                                   sample_rate=RATE, record_length=2**16))
    finally:
        lab.record = original
    run = store.client.values().last()
    stop = run.metadata["stop"]
    assert stop["exit_status"] == "fail"
    assert "digitiser lost its clock" in stop["reason"]
    assert run["primary"]["trace_x"].read().shape[0] == 2
    assert len(run["fits"].read()["f0_x"]) == 2  # both completed records have their fits
    assert "summary" not in run


def test_ctrl_c_then_abort_keeps_completed_records(bench):
    import threading

    from bluesky.utils import RunEngineInterrupted

    RE, store, app, lab = bench
    _go(RE, app, 3 * MBAR, gain=None)

    def ctrl_c():  # what bluesky's Ctrl-C handler does: a pause request from a thread
        threading.Thread(target=RE.request_pause, kwargs={"defer": False}).start()

    original = _fail_on_record(lab, 3, ctrl_c)
    try:
        with pytest.raises(RunEngineInterrupted):
            RE(thermal_calibration([app.detector], 3 * MBAR, apparatus=app, records=5,
                                   sample_rate=RATE, record_length=2**16))
        if RE.state != "idle":  # no checkpoint in the run: the pause has ended it already
            RE.abort("operator pressed Ctrl-C")
    finally:
        lab.record = original
    run = store.client.values().last()
    assert run.metadata["stop"]["exit_status"] == "abort"
    n = run["primary"]["trace_x"].read().shape[0]
    assert n >= 2
    assert len(run["fits"].read()["f0_x"]) >= n - 1
