"""The simulated apparatus: setup -> lab parameters, sim backends, devices in a RunEngine.

References used here and not taken from the code under test: the raw text of the
profile files (converted with the unit table below), the sphere mass ``4/3 pi r**3
rho``, ``k_B`` (CODATA, exact since 2019) and each gauge's stated accuracy.
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
import time
import tomllib
from contextlib import contextmanager
from pathlib import Path

import bluesky.plan_stubs as bps
import bluesky.plans as bp
import numpy as np
import pytest
from bluesky import RunEngine
from bluesky.run_engine import call_in_bluesky_event_loop
from bluesky.utils import FailedStatus
from quietwell_sim import (
    GaugeKind,
    SimLab,
    build_sim_apparatus,
    connect_apparatus,
    lab_params_from_setup,
)
from quietwell_sim.trace import main as trace_main
from scipy import optimize, signal

from quietwell import InputError, LimitError
from quietwell.physics import gas_damping
from quietwell.setup import load_setup, setup_from_dict

ROOT = Path(__file__).resolve().parents[1]
PROFILES = ROOT / "profiles"
K_B = 1.380649e-23  # J/K, exact (SI 2019)

# Independent unit table for the strings in the profiles (SI factor of each unit).
_UNITS = {
    "nm": 1e-9, "um": 1e-6, "mm": 1e-3, "W": 1.0, "kHz": 1e3, "MHz": 1e6, "Hz": 1.0,
    "mbar": 100.0, "K": 1.0, "V/um": 1e6, "m/Hz^0.5": 1.0, "V": 1.0, "us": 1e-6,
    "kg/m^3": 1.0, "1/s": 1.0,
}  # fmt: skip


def si(text: str) -> float:
    number, unit = text.split(" ", 1)
    return float(number) * _UNITS[unit]


def raw_profile(name: str) -> dict:
    return tomllib.loads((PROFILES / name / "setup.toml").read_text())


@contextmanager
def refused_in_run(err: type[Exception], match: str):
    """Errors inside a RunEngine arrive raw or as a FailedStatus caused by them."""
    with pytest.raises((err, FailedStatus)) as info:
        yield
    exc = info.value
    while isinstance(exc, FailedStatus):
        exc = exc.__cause__
    assert isinstance(exc, err), repr(exc)
    assert re.search(match, str(exc)), str(exc)


@pytest.fixture
def RE():
    return RunEngine({}, call_returns_result=False)


@pytest.fixture
def app(RE, tmp_path):
    a = build_sim_apparatus(load_setup(PROFILES / "amber"), tmp_path / "raw")
    connect_apparatus(a)
    return a


# ------------------------------------------------------------------- lab parameters


@pytest.mark.parametrize("profile", ["amber", "cobalt"])
def test_lab_params_follow_the_setup_file(profile):
    raw = raw_profile(profile)
    lp = lab_params_from_setup(load_setup(PROFILES / profile))
    pa, tr, de, va, li = (
        raw["particle"],
        raw["trap"],
        raw["detector"],
        raw["vacuum"],
        raw["limits"],
    )
    rel = dict(rel=1e-12)
    assert lp.particle.radius == pytest.approx(si(pa["radius"]), **rel)
    assert lp.particle.density == pytest.approx(si(pa["density"]), **rel)
    assert lp.particle.charge == pa["charge_e"]
    assert lp.particle.temperature == pytest.approx(si(raw["setup"]["temperature"]), **rel)
    assert lp.trap.wavelength == pytest.approx(si(tr["wavelength"]), **rel)
    assert lp.trap.waist == pytest.approx(si(tr["waist"]), **rel)
    assert lp.trap.power == pytest.approx(si(tr["power"]), **rel)
    assert lp.trap.frequencies == pytest.approx([si(f) for f in tr["frequencies"]], **rel)
    assert lp.trap.loss_pressure == pytest.approx(si(tr["loss_pressure"]), **rel)
    assert lp.trap.trap_depth == pytest.approx(si(tr["trap_depth"]), **rel)
    assert lp.trap.max_power == pytest.approx(si(li["laser_power_max"]), **rel)
    assert lp.detector.sample_rate == pytest.approx(si(de["sample_rate"]), **rel)
    assert lp.detector.record_length == de["record_length"]
    assert lp.detector.calibration == pytest.approx([si(c) for c in de["calibration"]], **rel)
    assert lp.detector.imprecision == pytest.approx([si(de["imprecision"])] * 3, **rel)
    assert np.array_equal(np.array(lp.detector.crosstalk), np.array(de["crosstalk"]))
    assert lp.detector.adc_range == pytest.approx(si(de["adc_range"]), **rel)
    assert lp.detector.adc_bits == de["adc_bits"]
    assert lp.heterodyne is not None
    assert lp.heterodyne.carrier_frequency == pytest.approx(si(de["heterodyne_carrier"]), **rel)
    assert lp.heterodyne.lo_sign == de["lo_sign"]
    assert lp.chamber.gas == va["gas"]
    assert lp.chamber.base_pressure == pytest.approx(si(va["base_pressure"]), **rel)
    assert lp.chamber.initial_pressure == pytest.approx(si(va["start_pressure"]), **rel)
    assert lp.chamber.max_pressure == pytest.approx(si(li["pressure_max"]), **rel)
    kinds = {"thermal_conductivity": "thermal-conductivity", "ionization": "ionization",
             "capacitance_diaphragm": "capacitance-diaphragm"}  # fmt: skip
    assert [g.name for g in lp.gauges] == [g["name"] for g in va["gauges"]]
    for gp, g in zip(lp.gauges, va["gauges"], strict=True):
        assert gp.kind == kinds[g["kind"]]
        assert gp.range == pytest.approx((si(g["range_min"]), si(g["range_max"])), **rel)
        assert gp.stated_accuracy == g["accuracy"]
        # displayed rounding (<= 5*10**-digits of reading) well inside the accuracy
        assert 5 * 10.0**-gp.digits <= 0.1 * g["accuracy"]
    assert lp.seed == raw["setup"]["seed"]
    assert lab_params_from_setup(load_setup(PROFILES / profile), seed=3).seed == 3


def test_both_profiles_have_the_capacitance_gauge():
    for profile in ("amber", "cobalt"):
        (cdg,) = [g for g in raw_profile(profile)["vacuum"]["gauges"] if g["name"] == "cdg"]
        assert cdg["kind"] == "capacitance_diaphragm" and cdg["accuracy"] == 0.0025
        assert (si(cdg["range_min"]), si(cdg["range_max"])) == pytest.approx((1e-2, 1300.0))


def test_no_heterodyne_without_a_carrier(tmp_path):
    raw = raw_profile("amber")
    raw["detector"]["heterodyne_carrier"] = "0 Hz"
    setup = setup_from_dict(raw, "amber-no-het")
    assert lab_params_from_setup(setup).heterodyne is None
    app = build_sim_apparatus(setup, tmp_path)
    assert app.heterodyne is None
    with pytest.raises(InputError, match="no heterodyne detector"):
        app.extras["lab"].record(16, channels=("heterodyne",))


def test_sim_record_computes_only_the_channels_asked_for():
    lab = SimLab(lab_params_from_setup(load_setup(PROFILES / "amber")))
    motion = lab.record(4096, channels=("x", "y", "z", "intensity"))
    assert sorted(motion.volts) == ["intensity", "x", "y", "z"]
    het = lab.record(4096, channels=("heterodyne", "intensity"))
    assert sorted(het.volts) == ["heterodyne", "intensity"]
    assert het.start_time == pytest.approx(4096 / 2e6)
    assert all(v.dtype == np.float32 and v.shape == (4096,) for v in het.volts.values())
    with pytest.raises(InputError, match="subset of"):
        lab.record(16, channels=("w",))


# ------------------------------------------------------------------ devices in a run


def test_count_records_traces_and_gauges(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 1000.0))  # hold 10 mbar (else the chamber pumps down)
    RE(bps.mv(app.detector.record_length, 1 << 15))
    docs, p_true = [], []

    def keep(name, doc):
        docs.append((name, doc))
        if name == "event":
            p_true.append(lab.pressure)  # emitted synchronously, right after the reads

    RE(bp.count([app.detector, *app.gauges], num=2), keep)
    (desc,) = [d for n, d in docs if n == "descriptor"]
    for ch in ("x", "y", "z", "intensity"):
        dk = desc["data_keys"][f"trace_{ch}"]
        assert dk["external"] == "STREAM:" and dk["units"] == "V" and dk["shape"] == [1 << 15]
    resources = [d for n, d in docs if n == "stream_resource"]
    assert {r["data_key"] for r in resources} == {
        f"trace_{c}" for c in ("x", "y", "z", "intensity")
    }
    assert all(Path(r["uri"].removeprefix("file://localhost")).is_file() for r in resources)
    assert len([d for n, d in docs if n == "stream_datum"]) == 2 * 4
    events = [d for n, d in docs if n == "event"]
    assert len(events) == 2
    acc = {g["name"]: g["accuracy"] for g in raw_profile("amber")["vacuum"]["gauges"]}
    for ev, p in zip(events, p_true, strict=True):
        data = ev["data"]
        assert data["sample_rate"] == 2e6
        assert data["ion-status"] == "sensor_off" and math.isnan(data["ion-pressure"])
        for name in ("tc", "cdg"):
            assert data[f"{name}-status"] == "ok"
            assert abs(data[f"{name}-pressure"] / p - 1) <= acc[name], name
    t0 = [e["data"]["record_start_time"] for e in events]
    assert t0[1] - t0[0] >= (1 << 15) / 2e6  # sim-clock start times, one record apart


def test_heterodyne_device_records_beat_and_intensity(RE, app):
    assert app.heterodyne.name == "het"
    RE(bps.mv(app.heterodyne.record_length, 1 << 14))
    docs = []
    RE(bp.count([app.heterodyne]), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    assert {"het_trace_beat", "het_trace_intensity"} <= set(desc["data_keys"])
    rec = app.heterodyne._backend.last_record
    assert sorted(rec.volts) == ["heterodyne", "intensity"]
    # sidebands of z at carrier -+ f_z: a real record shows both
    f, s = signal.welch(rec.volts["heterodyne"].astype(float), fs=rec.sample_rate, nperseg=2048)
    fz = rec.truth.frequencies[2]
    band = lambda c: s[(f > c - 5e3) & (f < c + 5e3)].max()  # noqa: E731
    floor = np.median(s)
    assert band(400e3 - fz) > 100 * floor and band(400e3 + fz) > 100 * floor


def test_electrode_gains_set_the_feedback_damping_of_the_sim(RE, app):
    lab = app.extras["lab"]
    el = app.electrodes
    RE(bps.mv(el.x.gain, 2000.0, el.z.gain, 500.0))
    assert lab.truth().feedback_damping.tolist() == [0.0, 0.0, 0.0]  # loops still open
    RE(bps.mv(el.x.enabled, True, el.z.enabled, True))
    assert lab.truth().feedback_damping.tolist() == [2000.0, 0.0, 500.0]
    RE(bps.mv(el.x.enabled, False))
    assert lab.truth().feedback_damping.tolist() == [0.0, 0.0, 500.0]
    # on connect the device adopted the loop delay the (simulated) electronics hold
    assert call_in_bluesky_event_loop(el.x.delay.get_value()) == pytest.approx(0.5e-6)


def test_drive_tone_moves_the_particle_by_the_coulomb_response(RE, app):
    # x0 = (q E0/m)/sqrt((W0^2 - Wd^2)^2 + gamma^2 Wd^2), E0 = kappa V/d (PHYSICS.md 6)
    raw = raw_profile("amber")
    q = raw["particle"]["charge_e"] * 1.602176634e-19
    e0 = raw["electrodes"]["geometry_factor"] * 10.0 / si(raw["electrodes"]["distance"])
    el = app.electrodes
    fd = 30e3
    RE(bps.mv(el.drive_frequency, fd, el.drive_amplitude, 10.0, el.drive_enabled, True))
    RE(bps.mv(app.detector.record_length, 1 << 15))
    RE(bp.count([app.detector]))
    rec = app.extras["backends"]["motion"].last_record
    t = rec.start_time + np.arange(rec.n_samples) / rec.sample_rate
    amp = 2 * abs(np.mean(rec.volts["x"] * np.exp(-2j * np.pi * fd * t)))  # lock-in, V
    tr = rec.truth
    w0, wd = tr.omega0[0], 2 * np.pi * fd
    x0 = q * e0 / tr.mass / math.hypot(w0**2 - wd**2, tr.total_damping[0] * wd)
    c_x = si(raw["detector"]["calibration"][0])
    assert amp == pytest.approx(c_x * x0, rel=0.2)
    RE(bps.mv(el.drive_enabled, False))
    RE(bp.count([app.detector]))
    rec = app.extras["backends"]["motion"].last_record
    t = rec.start_time + np.arange(rec.n_samples) / rec.sample_rate
    off = 2 * abs(np.mean(rec.volts["x"] * np.exp(-2j * np.pi * fd * t)))
    assert off < 0.3 * c_x * x0


def test_limit_violations_are_refused_and_the_lab_is_unchanged(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.electrodes.y.gain, 100.0, app.electrodes.y.enabled, True))
    before = (lab.particle.laser_power, lab.truth().feedback_damping.tolist(), lab.now)
    with refused_in_run(LimitError, r"power=0.6 W is outside .*\[0, 0.5\] W"):
        RE(bps.mv(app.laser.power, 0.6))
    with refused_in_run(LimitError, r"y gain=200000 1/s is outside"):
        RE(bps.mv(app.electrodes.y.gain, 2e5))
    with refused_in_run(LimitError, r"modulation_depth=0.5 .*outside"):
        RE(bps.mv(app.laser.modulation_depth, 0.5))
    with refused_in_run(LimitError, r"pressure setpoint=200000 Pa is outside"):
        RE(bps.mv(app.pressure, 2e5))
    with refused_in_run(LimitError, r"sample_rate=2e\+07 Hz is outside"):
        RE(bps.mv(app.detector.sample_rate, 2e7))
    after = (lab.particle.laser_power, lab.truth().feedback_damping.tolist(), lab.now)
    assert after == before
    assert lab.chamber.setpoint is None
    assert np.all(lab.truth().parametric_gain == 0)


def test_modulation_depth_maps_to_eta_through_the_thermal_amplitude(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.laser.modulation_depth, 0.1, app.laser.modulation_phase, 0.0))
    assert np.all(lab.truth().parametric_gain == 0)  # not enabled yet
    RE(bps.mv(app.laser.modulation_enabled, True))
    raw = raw_profile("amber")
    r, rho = si(raw["particle"]["radius"]), si(raw["particle"]["density"])
    m = 4.0 / 3.0 * math.pi * r**3 * rho
    w = 2 * math.pi * np.array([si(f) for f in raw["trap"]["frequencies"]])
    x_ref2 = K_B * 295.0 / (m * w**2)
    np.testing.assert_allclose(lab.truth().parametric_gain, 0.1 / x_ref2, rtol=1e-9)
    # at 4x the power the frequencies double, so eta follows by 4x
    RE(bps.mv(app.laser.power, 0.075))
    np.testing.assert_allclose(lab.truth().parametric_gain, 0.1 / x_ref2 / 4, rtol=1e-9)


def test_emission_off_loses_the_particle(RE, app):
    lab = app.extras["lab"]
    RE(bps.mv(app.laser.emission, False))
    assert lab.truth().lost and app.sim_truth()["laser_power_w"] == 0.0
    RE(bps.mv(app.laser.emission, True))
    assert lab.truth().lost  # light back, particle gone


def test_discharge_steps_change_the_sim_charge(RE, app):
    RE(bps.mv(app.charge.steps, -3))
    assert app.sim_truth()["charge_e"] == 7 - 3


def _count_advances(lab) -> list[int]:
    """Count the calls of ``lab.advance`` from now on (element 0 of the returned list)."""
    count = [0]
    advance = lab.advance

    def counted(*a, **k):
        count[0] += 1
        return advance(*a, **k)

    lab.advance = counted
    return count


def test_pressure_settles_in_sim_time_with_tiny_wall_time(RE, app):
    lab = app.extras["lab"]
    t_sim = lab.now
    polls = _count_advances(lab)
    RE(bps.mv(app.pressure, 10.0))
    assert lab.pressure_settled and abs(lab.pressure / 10.0 - 1) <= 0.03
    assert lab.now - t_sim >= lab.params.chamber.settle_hold
    # no wall clock: the sim clock advances in a bounded number of polls, whatever
    # the machine's load (speed is measured in bench/, never asserted in a test)
    assert 0 < polls[0] < 200
    assert app.sim_pressure() == lab.pressure


def test_pump_down_to_1e_8_mbar_takes_hours_of_sim_time_and_little_wall_time(RE, app):
    lab = app.extras["lab"]
    RE(
        bps.mv(
            *[
                a
                for ax in "xyz"
                for a in (
                    getattr(app.electrodes, ax).gain,
                    1e3,
                    getattr(app.electrodes, ax).enabled,
                    True,
                )
            ]
        )
    )
    polls = _count_advances(lab)
    RE(bps.mv(app.pressure, 1e-6))
    assert lab.pressure_settled and abs(lab.pressure / 1e-6 - 1) <= 0.03
    assert lab.now > 3600.0  # hours of outgassing-limited pumping
    # the poll interval grows with the time waited: a fixed 1 s poll would need more
    # than 3600 polls for these hours
    assert 0 < polls[0] < 0.1 * lab.now
    assert not lab.truth().lost  # feedback kept it


def test_clock_move_advances_sim_time_by_an_hour(RE, app):
    lab = app.extras["lab"]
    t0 = lab.now
    t_wall = time.perf_counter()
    RE(bps.mv(app.clock, 3600))
    assert lab.now - t0 == pytest.approx(3600.0, abs=1e-9)
    assert time.perf_counter() - t_wall < 60.0  # it never sleeps an hour of wall clock


def test_sim_truth_is_plain_json_with_the_agreed_keys(app):
    truth = app.sim_truth()
    assert sorted(truth) == sorted([
        "radius_m", "mass_kg", "density_kg_m3", "charge_e", "frequencies_hz",
        "calibration_v_per_m", "gas", "temperature_k", "laser_power_w", "wavelength_m",
        "waist_m"])  # fmt: skip
    import json

    assert json.loads(json.dumps(truth)) == truth
    assert truth["mass_kg"] == pytest.approx(4 / 3 * math.pi * 75e-9**3 * 1850, rel=1e-12)
    assert truth["calibration_v_per_m"] == pytest.approx([1.2e6, 1.0e6, 0.6e6])


def test_connect_without_a_runengine_says_what_to_do(tmp_path):
    # a fresh interpreter: once a RunEngine exists its loop runs for the whole process
    code = (
        "from quietwell.setup import load_setup\n"
        "from quietwell_sim import build_sim_apparatus, connect_apparatus\n"
        f"app = build_sim_apparatus(load_setup({str(PROFILES / 'amber')!r}), {str(tmp_path)!r})\n"
        "try:\n    connect_apparatus(app)\nexcept ValueError as e:\n    print(type(e).__name__, e)\n"
    )
    res = subprocess.run([sys.executable, "-W", "error", "-c", code], capture_output=True,
                         text=True)  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith("InputError no RunEngine event loop is running")
    assert "create bluesky.RunEngine()" in res.stdout


# --------------------------------------------------------------------------- gauges


@pytest.mark.parametrize("gas", ["N2", "He", "Ar"])
def test_cdg_reads_within_its_accuracy_whatever_the_gas(gas):
    raw = raw_profile("amber")
    raw["vacuum"]["gas"] = gas
    lab = SimLab(lab_params_from_setup(setup_from_dict(raw, f"amber-{gas}")))
    assert lab.gauges["cdg"].params.kind is GaugeKind.CAPACITANCE
    ratios, tc = [], []
    for p in np.geomspace(0.02, 1200.0, 40):
        lab.chamber.pressure = float(p)
        r = lab.read_gauge("cdg")
        assert r.status == "ok"
        ratios.append(r.value / p)
        tc.append(lab.read_gauge("tc").value / p)
    assert np.all(np.abs(np.array(ratios) - 1) <= 3 * 0.0025)
    # same seed, same instrument: the cdg's error does not depend on the gas ...
    assert np.std(ratios) < 0.1 * 0.0025 * 2
    # ... while the thermal gauge's does (He reads 1/0.8 high, Ar 1/1.6 low)
    expect = {"N2": 1.0, "He": 1 / 0.8, "Ar": 1 / 1.6}[gas]
    assert np.mean(tc) == pytest.approx(expect, rel=0.15)
    ref = SimLab(lab_params_from_setup(load_setup(PROFILES / "amber")))  # N2
    assert lab.gauges["cdg"].calibration_error == ref.gauges["cdg"].calibration_error


# ---------------------------------------------------------------------- trace script


def _damped_psd(f, a, f0, width, floor):
    # one-sided displacement PSD of a damped oscillator (Hz units), plus a white floor
    return a / ((f0**2 - f**2) ** 2 + (width * f) ** 2) + floor


def test_trace_script_psd_peaks_at_the_setup_mode_frequencies(tmp_path):
    out = tmp_path / "trace.npy"
    res = subprocess.run(
        [sys.executable, "-m", "quietwell_sim.trace", str(out), "--seconds", "0.1"],
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    assert res.returncode == 0, res.stderr
    assert res.stdout.count("\n") == 1 and str(out) in res.stdout and "amber" in res.stdout
    data = np.load(out)
    assert data.dtype == np.float32 and data.shape == (3, 200_000)
    raw = raw_profile("amber")
    fs = si(raw["detector"]["sample_rate"])
    f, s = signal.welch(data.astype(float), fs=fs, nperseg=1 << 13, axis=-1)
    # at the start pressure (10 mbar) the lines are broad: gamma/2pi ~ 8.6 kHz from the
    # physics core's gas damping, so the PSD maximum sits below f0; fit the line shape
    gamma = float(
        gas_damping(
            si(raw["particle"]["radius"]),
            si(raw["particle"]["density"]),
            si(raw["vacuum"]["start_pressure"]),
            295.0,
        )
    )
    for ch, f_mode in enumerate(si(x) for x in raw["trap"]["frequencies"]):
        above = f > 5e3
        guess = f[above][np.argmax(s[ch][above])]  # from the data, not from the setup
        win = (f > 0.6 * guess) & (f < 1.4 * guess)
        p0 = (s[ch][win].max() * (guess * gamma / 2 / np.pi) ** 2, guess, gamma / 2 / np.pi,
              s[ch][win].min() / 10)  # fmt: skip
        popt, _ = optimize.curve_fit(_damped_psd, f[win], s[ch][win], p0=p0, maxfev=20000)
        assert abs(popt[1] / f_mode - 1) < 0.01, (ch, popt[1], f_mode)
        assert abs(popt[2] / (gamma / 2 / np.pi) - 1) < 0.25, (ch, popt[2])


def test_trace_script_bad_input_is_one_line_on_stderr_and_exit_2(tmp_path):
    res = subprocess.run(
        [sys.executable, "-m", "quietwell_sim.trace", str(tmp_path / "t.npy"), "--seconds", "-1"],
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    assert res.returncode == 2 and res.stdout == ""
    assert res.stderr.count("\n") == 1 and "--seconds=-1.0 must be" in res.stderr
    assert "Traceback" not in res.stderr and not (tmp_path / "t.npy").exists()


@pytest.mark.parametrize("args, msg", [
    (["--setup", "/no/such/profile"], "no such setup file"),
    (["--seconds", "1e3"], "record_length_max"),
    (["--seconds", "soon"], "invalid float value"),
])  # fmt: skip
def test_trace_main_refuses_bad_input(tmp_path, capsys, args, msg):
    assert trace_main([str(tmp_path / "t.npy"), *args]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and msg in err
    assert not (tmp_path / "t.npy").exists()


def test_ionization_gauge_in_helium_is_corrected_by_the_published_factor(tmp_path):
    # CRC Handbook: ionization-gauge sensitivity of He relative to N2 is 0.18 (published)
    import tomllib

    import bluesky.plan_stubs as bps
    from bluesky import RunEngine

    from quietwell._profile import build_apparatus, connect_apparatus, find_profile
    from quietwell.setup import setup_from_dict

    text = (find_profile("amber") / "setup.toml").read_text().replace('gas = "N2"', 'gas = "He"')
    setup = setup_from_dict(tomllib.loads(text), "amber-in-helium")
    RE = RunEngine({})
    app = build_apparatus(setup, tmp_path)
    connect_apparatus(app)
    lab = app.extras["lab"]
    RE(bps.mv(app.pressure, 1e-4))  # 1e-6 mbar, inside the ionization gauge's range
    (ion,) = [g for g in app.gauges if g.name == "ion"]
    readings = {}

    def read():
        readings.update((yield from bps.read(ion)))

    RE(read())
    true_p = lab.pressure
    acc = [g.accuracy for g in setup.vacuum.gauges if g.name == "ion"][0]
    assert abs(readings["ion-pressure"]["value"] / true_p - 1) <= acc
    # uncorrected, the gauge would be off by the factor itself
    shown = readings["ion-indicated_pressure"]["value"] / true_p
    assert abs(shown / 0.18 - 1) <= acc and shown < 0.5
