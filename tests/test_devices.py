"""Device layer against mock backends: exact traffic, limits, documents, HDF5, tiled.

"mock" here means an in-memory test double of a backend protocol that logs every
call; it holds no physics (that is the simulated laboratory's job).
"""

from __future__ import annotations

import math
import re
from contextlib import contextmanager
from pathlib import Path

import bluesky.plan_stubs as bps
import bluesky.plans as bp
import h5py
import numpy as np
import pytest
from bluesky import RunEngine
from bluesky.run_engine import call_in_bluesky_event_loop
from bluesky.utils import FailedStatus
from ophyd_async.core import (
    StaticFilenameProvider,
    StaticPathProvider,
    TriggerInfo,
    UUIDFilenameProvider,
)

from quietwell import InputError, LimitError
from quietwell.devices import (
    BackendDataError,
    ChargeControl,
    ElectrodeState,
    FeedbackElectrodes,
    FeedbackReport,
    GaugeStatus,
    HeterodyneDetector,
    HeterodyneRecord,
    LaserState,
    MotionDetector,
    PressureController,
    RecordData,
    SettleTimeoutError,
    TrapLaser,
    VacuumGauge,
)

# ----------------------------------------------------------------------------- mocks


class MockLog:
    """Base of the mock backends: every call lands in ``log`` as a tuple."""

    def __init__(self) -> None:
        self.log: list[tuple] = []


class MockElectrodes(MockLog):
    def __init__(self, state: ElectrodeState | None = None) -> None:
        super().__init__()
        self._state = state or ElectrodeState(
            gain_per_s={"x": 0.0, "y": 0.0, "z": 0.0},
            delay_s={"x": 0.0, "y": 0.0, "z": 0.0},
            enabled={"x": False, "y": False, "z": False},
            drive_frequency_hz=100.0,
            drive_amplitude_v=0.0,
            drive_enabled=False,
        )

    async def state(self):
        self.log.append(("state",))
        return self._state

    async def set_gain(self, axis, gain_per_s):
        self.log.append(("set_gain", axis, gain_per_s))

    async def set_delay(self, axis, delay_s):
        self.log.append(("set_delay", axis, delay_s))

    async def set_enabled(self, axis, enabled):
        self.log.append(("set_enabled", axis, enabled))

    async def set_drive_frequency(self, frequency_hz):
        self.log.append(("set_drive_frequency", frequency_hz))

    async def set_drive_amplitude(self, amplitude_v):
        self.log.append(("set_drive_amplitude", amplitude_v))

    async def set_drive_enabled(self, enabled):
        self.log.append(("set_drive_enabled", enabled))

    report = FeedbackReport(
        peak_voltage_v={"x": 2.5, "y": 10.0, "z": 0.25},
        saturation={"x": 0.0, "y": 0.4, "z": 0.0},
        interval_s=0.5,
    )

    async def feedback_report(self):
        self.log.append(("feedback_report",))
        return self.report


class MockLaser(MockLog):
    def __init__(self, state: LaserState | None = None, measured_w: float = 0.2) -> None:
        super().__init__()
        self._state = state or LaserState(0.2, True, 0.0, 0.0, False)
        self.measured_w = measured_w

    async def state(self):
        self.log.append(("state",))
        return self._state

    async def set_power(self, power_w):
        self.log.append(("set_power", power_w))

    async def set_emission(self, enabled):
        self.log.append(("set_emission", enabled))

    async def set_modulation_depth(self, depth):
        self.log.append(("set_modulation_depth", depth))

    async def set_modulation_phase(self, phase_rad):
        self.log.append(("set_modulation_phase", phase_rad))

    async def set_modulation_enabled(self, enabled):
        self.log.append(("set_modulation_enabled", enabled))

    async def read_power(self):
        self.log.append(("read_power",))
        return self.measured_w


class MockCharge(MockLog):
    async def discharge(self, steps):
        self.log.append(("discharge", steps))


class MockGauge(MockLog):
    def __init__(self, replies):
        super().__init__()
        self.replies = list(replies)

    async def read(self):
        self.log.append(("read",))
        return self.replies.pop(0)


class MockPressure(MockLog):
    """Backend clock advances only in ``wait``; settles ``settle_after_s`` after a set."""

    def __init__(self, settle_after_s: float) -> None:
        super().__init__()
        self.t = 0.0
        self.settle_after_s = settle_after_s
        self.t_set = math.nan
        self.setpoint = math.nan

    async def set_setpoint(self, pressure_pa):
        self.log.append(("set_setpoint", pressure_pa))
        self.setpoint, self.t_set = pressure_pa, self.t

    async def read_pressure(self):
        self.log.append(("read_pressure",))
        return 1e5 if math.isnan(self.setpoint) else self.setpoint

    async def is_settled(self):
        self.log.append(("is_settled",))
        return self.t - self.t_set >= self.settle_after_s

    async def now(self):
        return self.t

    async def wait(self, duration_s):
        self.log.append(("wait", duration_s))
        self.t += duration_s


class MockMotion(MockLog):
    """Returns seeded float32 noise; keeps every record it handed out."""

    def __init__(self, seed: int = 7, amplitude: float = 0.3, dtype=np.float32) -> None:
        super().__init__()
        self.rng = np.random.default_rng(seed)
        self.amplitude = amplitude
        self.dtype = dtype
        self.records: list = []
        self.t = 100.0
        self.rate = None

    async def configure(self, sample_rate_hz, input_range_v):
        self.log.append(("configure", sample_rate_hz, input_range_v))
        self.rate = sample_rate_hz

    def _trace(self, n):
        return (self.amplitude * self.rng.standard_normal(n)).astype(self.dtype)

    async def record(self, n_samples):
        self.log.append(("record", n_samples))
        rec = RecordData(
            *(self._trace(n_samples) for _ in range(4)),
            sample_rate_hz=self.rate,
            start_time_s=self.t,
        )
        self.t += n_samples / self.rate
        self.records.append(rec)
        return rec

    async def read_intensity(self):
        self.log.append(("read_intensity",))
        return 0.75


class MockHeterodyne(MockMotion):
    async def record(self, n_samples):
        self.log.append(("record", n_samples))
        rec = HeterodyneRecord(self._trace(n_samples), self._trace(n_samples), self.rate, self.t)
        self.records.append(rec)
        return rec


# -------------------------------------------------------------------------- fixtures


@pytest.fixture
def RE():
    return RunEngine({}, call_returns_result=False)


def run(coro):
    """Run a coroutine in the RunEngine's loop (where the devices live)."""
    return call_in_bluesky_event_loop(coro)


def set_(signal, value):
    async def _do():
        await signal.set(value)

    return run(_do())


def get(signal):
    return run(signal.get_value())


@contextmanager
def refused_in_run(err: type[Exception], match: str):
    """Errors inside a RunEngine arrive raw or as FailedStatus caused by them."""
    with pytest.raises((err, FailedStatus)) as info:
        yield
    exc = info.value
    while isinstance(exc, FailedStatus):
        exc = exc.__cause__
    assert isinstance(exc, err), repr(exc)
    assert re.search(match, str(exc)), str(exc)


def units_of(keys: dict) -> dict:
    return {k: v.get("units") for k, v in keys.items()}


def make_motion(tmp_path, backend=None, filename=None, **over):
    kw = dict(
        max_sample_rate_hz=2e6,
        max_record_length=1 << 16,
        input_ranges_v=(0.5, 1.0, 5.0),
        sample_rate_hz=1e5,
        record_length=256,
        input_range_v=1.0,
        name="psd",
    )
    kw.update(over)
    fp = StaticFilenameProvider(filename) if filename else UUIDFilenameProvider()
    det = MotionDetector(backend or MockMotion(), StaticPathProvider(fp, tmp_path), **kw)
    run(det.connect())
    return det


# ------------------------------------------------------------------------ electrodes


def make_electrodes(RE, backend=None):
    be = backend or MockElectrodes()
    dev = FeedbackElectrodes(
        be,
        gain_limit_per_s=2e3,
        voltage_limit_v=10.0,
        max_delay_s=1e-4,
        drive_frequency_range_hz=(10.0, 1e5),
        name="el",
    )
    run(dev.connect())
    return dev, be


def test_electrodes_connect_adopts_state_and_sends_nothing(RE):
    st = ElectrodeState(
        gain_per_s={"x": 100.0, "y": 200.0, "z": 0.0},
        delay_s={"x": 1e-6, "y": 0.0, "z": 0.0},
        enabled={"x": True, "y": True, "z": False},
        drive_frequency_hz=5e3,
        drive_amplitude_v=1.5,
        drive_enabled=False,
    )
    dev, be = make_electrodes(RE, MockElectrodes(st))
    assert be.log == [("state",)]
    assert get(dev.x.gain) == 100.0 and get(dev.y.gain) == 200.0
    assert get(dev.x.enabled) is True and get(dev.z.enabled) is False
    assert get(dev.drive_amplitude) == 1.5 and get(dev.drive_frequency) == 5e3


def test_electrodes_refuse_a_held_state_outside_the_limits(RE):
    st = ElectrodeState(
        gain_per_s={"x": 5e3, "y": 0.0, "z": 0.0},
        delay_s={"x": 0.0, "y": 0.0, "z": 0.0},
        enabled={"x": True, "y": False, "z": False},
        drive_frequency_hz=100.0,
        drive_amplitude_v=0.0,
        drive_enabled=False,
    )
    be = MockElectrodes(st)
    with pytest.raises(LimitError, match=r"x gain=5000 1/s .*\[0, 2000\]"):
        make_electrodes(RE, be)
    assert be.log == [("state",)]  # read, never written


def test_electrodes_exact_traffic_for_sets(RE):
    dev, be = make_electrodes(RE)
    be.log.clear()
    set_(dev.y.gain, 1500.0)
    set_(dev.y.delay, 2e-5)
    set_(dev.y.enabled, True)
    set_(dev.drive_frequency, 3e4)
    set_(dev.drive_amplitude, 2.5)
    set_(dev.drive_enabled, True)
    assert be.log == [
        ("set_gain", "y", 1500.0),
        ("set_delay", "y", 2e-5),
        ("set_enabled", "y", True),
        ("set_drive_frequency", 3e4),
        ("set_drive_amplitude", 2.5),
        ("set_drive_enabled", True),
    ]
    assert get(dev.y.gain) == 1500.0


@pytest.mark.parametrize(
    "attr, value, err, msg",
    [
        (("z", "gain"), 2000.5, LimitError, r"z gain=2000.5 1/s is outside .*\[0, 2000\] 1/s"),
        (("z", "gain"), -1.0, LimitError, "z gain=-1"),
        (("z", "gain"), math.nan, InputError, "not finite"),
        (("z", "gain"), "fast", InputError, "not a number"),
        (("z", "delay"), 2e-4, LimitError, "z delay=0.0002 s"),
        (("z", "enabled"), 1, InputError, "not a bool"),
        (("drive_amplitude",), 10.01, LimitError, r"drive_amplitude=10.01 V .*\[0, 10\] V"),
        (("drive_frequency",), 5.0, LimitError, "drive_frequency=5 Hz"),
    ],
)
def test_electrodes_refuse_before_any_backend_call(RE, attr, value, err, msg):
    dev, be = make_electrodes(RE)
    sig = dev
    for a in attr:
        sig = getattr(sig, a)
    before = get(sig)
    be.log.clear()
    with pytest.raises(err, match=msg):
        set_(sig, value)
    assert be.log == []
    assert get(sig) == before
    assert run(sig.locate())["setpoint"] == before


def test_electrodes_in_a_run_have_units_everywhere(RE):
    dev, _ = make_electrodes(RE)
    docs = []
    RE(bp.count([dev]), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    assert units_of(desc["data_keys"]) == {
        **{f"el-{a}-gain": "1/s" for a in "xyz"},
        **{f"el-{a}-delay": "s" for a in "xyz"},
        **{f"el-{a}-enabled": "" for a in "xyz"},
        **{f"el-{a}-feedback_voltage": "V" for a in "xyz"},
        **{f"el-{a}-feedback_saturation": "1" for a in "xyz"},
        "el-drive_frequency": "Hz",
        "el-drive_amplitude": "V",
        "el-drive_enabled": "",
        "el-feedback_voltage": "V",
        "el-feedback_saturation": "1",
        "el-feedback_interval": "s",
    }
    conf = desc["configuration"]["el"]
    assert conf["data"] == {"el-gain_limit": 2e3, "el-voltage_limit": 10.0, "el-max_delay": 1e-4}
    assert units_of(conf["data_keys"]) == {
        "el-gain_limit": "1/s",
        "el-voltage_limit": "V",
        "el-max_delay": "s",
    }


def test_electrodes_axis_lookup_names_the_choices(RE):
    dev, _ = make_electrodes(RE)
    assert dev.axis("z") is dev.z
    with pytest.raises(InputError, match="axis='w' .* x, y, z"):
        dev.axis("w")


def test_bps_mv_sets_the_gain_through_the_runengine(RE):
    dev, be = make_electrodes(RE)
    be.log.clear()
    RE(bps.mv(dev.x.gain, 750.0))
    assert be.log == [("set_gain", "x", 750.0)]
    with refused_in_run(LimitError, "x gain=10000 1/s is outside"):
        RE(bps.mv(dev.x.gain, 1e4))
    assert be.log == [("set_gain", "x", 750.0)]


def test_electrodes_read_asks_for_one_feedback_report_and_shows_it(RE):
    dev, be = make_electrodes(RE)
    be.log.clear()
    reading = run(dev.read())
    assert be.log == [("feedback_report",)]  # one call per read, nothing sent
    assert reading["el-x-feedback_voltage"]["value"] == 2.5
    assert reading["el-y-feedback_saturation"]["value"] == 0.4
    # totals: the largest over the axes
    assert reading["el-feedback_voltage"]["value"] == 10.0
    assert reading["el-feedback_saturation"]["value"] == 0.4
    assert reading["el-feedback_interval"]["value"] == 0.5


@pytest.mark.parametrize(
    "report, msg",
    [
        (dict(saturation={"x": 1.5, "y": 0.0, "z": 0.0}), "saturation=1.5"),
        (dict(peak_voltage_v={"x": -1.0, "y": 0.0, "z": 0.0}), "peak_voltage_v=-1.0"),
        (dict(interval_s=-1.0), "interval_s=-1.0"),
    ],
)
def test_electrodes_refuse_a_feedback_report_that_breaks_the_protocol(RE, report, msg):
    dev, be = make_electrodes(RE)
    good = dict(
        peak_voltage_v={"x": 0.0, "y": 0.0, "z": 0.0},
        saturation={"x": 0.0, "y": 0.0, "z": 0.0},
        interval_s=1.0,
    )
    be.report = FeedbackReport(**{**good, **report})
    with pytest.raises(BackendDataError, match=msg):
        run(dev.refresh_feedback())


# ----------------------------------------------------------------------------- laser


def make_laser(RE, backend=None):
    be = backend or MockLaser()
    dev = TrapLaser(be, max_power_w=0.5, max_modulation_depth=0.3, name="laser")
    run(dev.connect())
    return dev, be


def test_laser_connect_keeps_the_trap_running(RE):
    dev, be = make_laser(RE)
    assert be.log == [("state",)]
    assert get(dev.emission) is True and get(dev.power) == 0.2


def test_laser_exact_traffic_and_readback(RE):
    dev, be = make_laser(RE, MockLaser(measured_w=0.187))
    be.log.clear()
    set_(dev.power, 0.35)
    set_(dev.modulation_depth, 0.1)
    set_(dev.modulation_phase, -math.pi / 2)
    set_(dev.modulation_enabled, True)
    assert be.log == [
        ("set_power", 0.35),
        ("set_modulation_depth", 0.1),
        ("set_modulation_phase", -math.pi / 2),
        ("set_modulation_enabled", True),
    ]
    be.log.clear()
    reading = run(dev.read())
    assert reading["laser-measured_power"]["value"] == 0.187
    assert be.log == [("read_power",)]
    keys = run(dev.describe())
    assert keys["laser-power"]["units"] == "W"
    assert keys["laser-modulation_phase"]["units"] == "rad"
    assert keys["laser-measured_power"]["units"] == "W"


@pytest.mark.parametrize(
    "name, value, msg",
    [
        ("power", 0.51, r"power=0.51 W is outside the device limits \[0, 0.5\] W"),
        ("modulation_depth", 0.31, "modulation_depth=0.31"),
        ("modulation_phase", 3.2, "modulation_phase=3.2 rad"),
    ],
)
def test_laser_limits(RE, name, value, msg):
    dev, be = make_laser(RE)
    be.log.clear()
    with pytest.raises(LimitError, match=msg):
        set_(getattr(dev, name), value)
    assert be.log == []


def test_laser_refuses_a_depth_limit_of_one_or_more():
    with pytest.raises(InputError, match="max_modulation_depth=1 must be < 1"):
        TrapLaser(MockLaser(), max_power_w=1.0, max_modulation_depth=1.0)


# ---------------------------------------------------------------------------- charge


def test_charge_steps_traffic_total_and_limits(RE):
    be = MockCharge()
    dev = ChargeControl(be, max_steps=5, name="charge")
    run(dev.connect())
    set_(dev.steps, 3)
    set_(dev.steps, -2)
    set_(dev.steps, 0)
    assert be.log == [("discharge", 3), ("discharge", -2)]
    assert get(dev.total_steps) == 1
    with pytest.raises(LimitError, match=r"steps=6 steps is outside .*\[-5, 5\]"):
        set_(dev.steps, 6)
    with pytest.raises(InputError, match="steps=1.5 is not an integer"):
        set_(dev.steps, 1.5)
    assert be.log == [("discharge", 3), ("discharge", -2)]
    assert units_of(run(dev.describe())) == {
        "charge-steps": "count",
        "charge-total_steps": "count",
    }


# ----------------------------------------------------------------------------- gauge


def make_gauge(RE, replies):
    be = MockGauge(replies)
    dev = VacuumGauge(be, range_pa=(1e-7, 1e3), accuracy=0.15, gas="N2", name="gauge")
    run(dev.connect())
    return dev, be


@pytest.mark.parametrize(
    "reply, pressure, status",
    [
        ((2.5e-3, GaugeStatus.OK), 2.5e-3, GaugeStatus.OK),
        ((1e3, GaugeStatus.OK), 1e3, GaugeStatus.OK),  # the range edge is inside
        ((1e3, GaugeStatus.OVER_RANGE), math.nan, GaugeStatus.OVER_RANGE),
        ((5e3, GaugeStatus.OK), math.nan, GaugeStatus.OVER_RANGE),
        ((1e-9, GaugeStatus.OK), math.nan, GaugeStatus.UNDER_RANGE),
        ((0.0, GaugeStatus.SENSOR_OFF), math.nan, GaugeStatus.SENSOR_OFF),
        ((7.0, GaugeStatus.FAULT), math.nan, GaugeStatus.FAULT),
        ((math.nan, GaugeStatus.OK), math.nan, GaugeStatus.FAULT),
        ((1.0, "under_range"), math.nan, GaugeStatus.UNDER_RANGE),
    ],
)
def test_gauge_status_paths_never_report_a_fake_number(RE, reply, pressure, status):
    dev, be = make_gauge(RE, [reply])
    r = run(dev.read())
    assert be.log == [("read",)]
    got = r["gauge-pressure"]["value"]
    assert (math.isnan(got) and math.isnan(pressure)) or got == pressure
    assert r["gauge-status"]["value"] == status


def test_gauge_in_count_with_units_and_configuration(RE):
    dev, be = make_gauge(RE, [(1e-3, GaugeStatus.OK), (2e-3, GaugeStatus.OK)])
    docs = []
    RE(bp.count([dev], num=2), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    assert units_of(desc["data_keys"]) == {"gauge-pressure": "Pa",
                                           "gauge-indicated_pressure": "Pa", "gauge-status": ""}
    assert set(desc["data_keys"]["gauge-status"]["choices"]) == {s.value for s in GaugeStatus}
    conf = desc["configuration"]["gauge"]
    assert conf["data"] == {
        "gauge-gas": "N2",
        "gauge-sensitivity": 1.0,
        "gauge-range_min": 1e-7,
        "gauge-range_max": 1e3,
        "gauge-accuracy": 0.15,
    }
    assert conf["data_keys"]["gauge-range_max"]["units"] == "Pa"
    events = [d for n, d in docs if n == "event"]
    assert [e["data"]["gauge-pressure"] for e in events] == [1e-3, 2e-3]
    assert be.log == [("read",), ("read",)]


def test_ionization_gauge_reading_is_corrected_for_the_gas(RE):
    # CRC Handbook relative sensitivity of He to N2: 0.18 (published); p = p_ind / S
    dev = VacuumGauge(MockGauge([(1.8e-6, GaugeStatus.OK)]), range_pa=(1e-7, 1.0),
                      accuracy=0.15, gas="He", sensitivity=0.18, name="ion")
    run(dev.connect())
    r = run(dev.read())
    assert r["ion-indicated_pressure"]["value"] == pytest.approx(1.8e-6)
    assert r["ion-pressure"]["value"] == pytest.approx(1e-5)


def test_gauge_refuses_bad_configuration():
    with pytest.raises(InputError, match="accuracy=15 must be a fraction"):
        VacuumGauge(MockGauge([]), range_pa=(1e-7, 1e3), accuracy=15)
    with pytest.raises(InputError, match="range_pa=.*need 0 <= min < max"):
        VacuumGauge(MockGauge([]), range_pa=(1e3, 1e-7), accuracy=0.1)


# -------------------------------------------------------------------------- pressure


def make_controller(settle_after_s, timeout_s=60.0, poll=2.0):
    be = MockPressure(settle_after_s)
    dev = PressureController(
        be, setpoint_range_pa=(1e-6, 1e3), timeout_s=timeout_s, poll_interval_s=poll, name="pc"
    )
    run(dev.connect())
    return dev, be


def test_pressure_controller_completes_when_settled(RE):
    dev, be = make_controller(settle_after_s=5.0, poll=2.0)
    RE(bps.mv(dev, 1e-2))
    assert be.log == [
        ("set_setpoint", 1e-2),
        ("is_settled",),
        ("wait", 2.0),
        ("is_settled",),
        ("wait", 2.0),
        ("is_settled",),
        ("wait", 2.0),
        ("is_settled",),
    ]
    assert be.t == 6.0
    assert get(dev.setpoint) == 1e-2
    r = run(dev.read())
    assert r["pc-pressure"]["value"] == 1e-2 and r["pc-setpoint"]["value"] == 1e-2


def test_pressure_controller_times_out_in_backend_time(RE):
    import time

    dev, be = make_controller(settle_after_s=1e9, timeout_s=3600.0, poll=10.0)
    t0 = time.monotonic()
    with pytest.raises(SettleTimeoutError, match=r"1e-05 Pa not settled after 3600 s"):
        set_(dev, 1e-5)
    assert time.monotonic() - t0 < 5.0  # an hour of backend time, not of wall time
    assert be.t == 3600.0
    assert sum(1 for c in be.log if c[0] == "wait") == 360


@pytest.mark.parametrize("value", [1e4, 1e-7, -1.0])
def test_pressure_setpoint_limits_refused_before_anything_moves(RE, value):
    dev, be = make_controller(settle_after_s=0.0)
    with pytest.raises(LimitError, match=r"pressure setpoint=.* Pa is outside"):
        set_(dev, value)
    assert be.log == []
    assert math.isnan(get(dev.setpoint))


# ---------------------------------------------------------------------------- motion


def test_count_emits_external_traces_and_scalar_events(RE, tmp_path):
    be = MockMotion()
    det = make_motion(tmp_path, be)
    docs = []
    RE(bp.count([det], num=3), lambda n, d: docs.append((n, d)))
    names = [n for n, _ in docs]
    assert names[0] == "start" and names[1] == "descriptor" and names[-1] == "stop"
    assert names.count("stream_resource") == 4
    assert names.count("stream_datum") == 12
    assert names.count("event") == 3

    (desc,) = [d for n, d in docs if n == "descriptor"]
    keys = desc["data_keys"]
    traces = ["trace_x", "trace_y", "trace_z", "trace_intensity"]
    for k in traces:
        assert keys[k]["external"] == "STREAM:"
        assert keys[k]["dtype"] == "array"
        assert keys[k]["shape"] == [256]
        assert keys[k]["units"] == "V"
    assert units_of({k: v for k, v in keys.items() if k not in traces}) == {
        "sample_rate": "Hz",
        "record_start_time": "s",
        "clipped_samples": "count",
        "intensity_mean": "V",
    }
    conf = desc["configuration"]["psd"]["data"]
    assert conf["psd-sample_rate"] == 1e5 and conf["psd-record_length"] == 256

    resources = [d for n, d in docs if n == "stream_resource"]
    assert {r["data_key"] for r in resources} == set(traces)
    (uri,) = {r["uri"] for r in resources}
    for r in resources:
        assert r["mimetype"] == "application/x-hdf5"
        assert r["parameters"]["dataset"] == "/traces/" + r["data_key"][len("trace_") :]
        assert list(r["parameters"]["chunk_shape"]) == [1, 256]
    by_resource: dict[str, list] = {}
    for n, d in docs:
        if n == "stream_datum":
            by_resource.setdefault(d["stream_resource"], []).append(d["indices"])
    assert all(v == [{"start": i, "stop": i + 1} for i in range(3)] for v in by_resource.values())

    events = [d for n, d in docs if n == "event"]
    for ev, rec in zip(events, be.records, strict=True):
        assert set(ev["data"]) == {
            "sample_rate",
            "record_start_time",
            "clipped_samples",
            "intensity_mean",
        }
        assert all(np.isscalar(v) for v in ev["data"].values())
        assert ev["data"]["record_start_time"] == rec.start_time_s
        assert ev["data"]["intensity_mean"] == pytest.approx(
            float(np.mean(rec.intensity, dtype=np.float64))
        )

    assert be.log == [("configure", 1e5, 1.0)] + [("record", 256)] * 3
    path = Path(uri.removeprefix("file://localhost"))
    assert path.parent == tmp_path
    with h5py.File(path, "r", swmr=True) as f:
        for ch in ("x", "y", "z", "intensity"):
            ds = f[f"/traces/{ch}"]
            assert ds.shape == (3, 256) and ds.dtype == np.float32
            assert ds.attrs["units"] == "V"
            np.testing.assert_array_equal(ds[()], np.stack([getattr(r, ch) for r in be.records]))
        np.testing.assert_array_equal(
            f["/records/start_time"][()], [r.start_time_s for r in be.records]
        )


def test_fly_prepare_kickoff_complete_collect(RE, tmp_path):
    be = MockMotion()
    det = make_motion(tmp_path, be)

    def plan():
        yield from bps.stage(det)
        yield from bps.open_run()
        yield from bps.prepare(det, TriggerInfo(number_of_events=4), wait=True)
        yield from bps.declare_stream(det, name="primary", collect=True)
        yield from bps.kickoff(det, wait=True)
        yield from bps.complete(det, wait=True)
        yield from bps.collect(det, name="primary")
        yield from bps.close_run()
        yield from bps.unstage(det)

    docs = []
    RE(plan(), lambda n, d: docs.append((n, d)))
    data = [d for n, d in docs if n == "stream_datum"]
    assert len(data) == 4 and all(d["indices"] == {"start": 0, "stop": 4} for d in data)
    assert be.log == [("configure", 1e5, 1.0)] + [("record", 256)] * 4
    (uri,) = {d["uri"] for n, d in docs if n == "stream_resource"}
    with h5py.File(uri.removeprefix("file://localhost"), "r", swmr=True) as f:
        np.testing.assert_array_equal(f["/traces/z"][()], np.stack([r.z for r in be.records]))


def test_clipped_samples_count_values_at_or_beyond_the_range(RE, tmp_path):
    class Clipping(MockMotion):
        async def record(self, n_samples):
            rec = await super().record(n_samples)
            rec.x[:3] = 1.0  # at +range
            rec.y[10] = -1.0  # at -range
            rec.z[20] = 0.999
            return rec

    det = make_motion(tmp_path, Clipping(amplitude=0.01))
    docs = []
    RE(bp.count([det], num=1), lambda n, d: docs.append((n, d)))
    (ev,) = [d for n, d in docs if n == "event"]
    assert ev["data"]["clipped_samples"] == 4


@pytest.mark.parametrize(
    "name, value, err, msg",
    [
        ("sample_rate", 3e6, LimitError, r"sample_rate=3e\+06 Hz is outside"),
        ("sample_rate", 0.0, LimitError, "sample_rate=0 Hz"),
        ("input_range", 2.0, LimitError, "input_range=2 V is not a setting.*0.5, 1, 5 V"),
        ("record_length", 1 << 17, LimitError, "record_length=131072 samples"),
        ("record_length", 100.0, InputError, "record_length=100.0 is not an integer"),
    ],
)
def test_motion_settings_refused_before_the_backend(RE, tmp_path, name, value, err, msg):
    be = MockMotion()
    det = make_motion(tmp_path, be)
    with pytest.raises(err, match=msg):
        set_(getattr(det, name), value)
    assert be.log == []


def test_motion_settings_traffic_and_stage_push(RE, tmp_path):
    be = MockMotion()
    det = make_motion(tmp_path, be)
    set_(det.sample_rate, 5e5)
    set_(det.input_range, 5.0)
    set_(det.record_length, 64)
    assert be.log == [("configure", 5e5, 1.0), ("configure", 5e5, 5.0)]
    be.log.clear()
    RE(bp.count([det], num=1))
    assert be.log == [("configure", 5e5, 5.0), ("record", 64)]


def test_motion_intensity_asks_the_backend_on_every_read_and_stays_out_of_records(RE, tmp_path):
    be = MockMotion()
    det = make_motion(tmp_path, be)
    be.log.clear()
    seen = []

    def poll():
        seen.append((yield from bps.rd(det.intensity)))

    RE(poll())
    assert seen == [0.75] and get(det.intensity) == 0.75
    assert be.log.count(("read_intensity",)) >= 1 and ("record", 256) not in be.log
    (dk,) = run(det.intensity.describe()).values()
    assert dk["units"] == "V"
    be.log.clear()
    RE(bp.count([det], num=1))
    assert ("read_intensity",) not in be.log  # a record does not poll it


def test_record_length_is_fixed_while_staged(RE, tmp_path):
    be = MockMotion()
    det = make_motion(tmp_path, be)

    def plan():
        yield from bps.stage(det)
        yield from bps.open_run()
        yield from bps.trigger_and_read([det])
        yield from bps.mv(det.record_length, 128)

    with refused_in_run(InputError, "record_length=128 cannot change while .* staged"):
        RE(plan())
    assert get(det.record_length) == 256
    set_(det.record_length, 128)  # allowed again after the failed run unstaged it
    assert get(det.record_length) == 128


def test_one_file_per_run_and_no_overwrite(RE, tmp_path):
    det = make_motion(tmp_path)
    RE(bp.count([det], num=1))
    RE(bp.count([det], num=2))
    files = sorted(tmp_path.glob("*.h5"))
    assert len(files) == 2
    shapes = sorted(h5py.File(f, "r")["/traces/x"].shape[0] for f in files)
    assert shapes == [1, 2]

    fixed_dir = tmp_path / "fixed"
    fixed_dir.mkdir()
    (fixed_dir / "run.h5").write_bytes(b"keep me")
    det2 = make_motion(fixed_dir, filename="run")
    with refused_in_run(InputError, "already exists and is never overwritten"):
        RE(bp.count([det2], num=1))
    assert (fixed_dir / "run.h5").read_bytes() == b"keep me"


def test_missing_directory_is_a_clear_error(RE, tmp_path):
    det = make_motion(tmp_path / "absent")
    with refused_in_run(InputError, "HDF5 directory .*absent' does not exist"):
        RE(bp.count([det], num=1))


def test_backend_breaking_the_protocol_is_reported(RE, tmp_path):
    det = make_motion(tmp_path, MockMotion(dtype=np.float64))
    with refused_in_run(BackendDataError, r"channel 'x' is float64\[256\], expected float32"):
        RE(bp.count([det], num=1))


def test_key_prefix_lets_two_detectors_share_a_run(RE, tmp_path):
    a = make_motion(tmp_path, name="psd_a")
    b = make_motion(tmp_path, name="psd_b", key_prefix="aux_")
    docs = []
    RE(bp.count([a, b], num=2), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    assert {"trace_x", "aux_trace_x", "intensity_mean", "aux_intensity_mean"} <= set(
        desc["data_keys"]
    )
    assert len({d["uri"] for n, d in docs if n == "stream_resource"}) == 2


# ------------------------------------------------------------------------ heterodyne


def make_het(tmp_path, backend=None, **over):
    kw = dict(
        carrier_frequency_hz=2e5,
        lo_offset_sign=-1,
        max_sample_rate_hz=5e6,
        max_record_length=4096,
        input_ranges_v=(1.0,),
        sample_rate_hz=1e6,
        record_length=512,
        input_range_v=1.0,
        name="het",
    )
    kw.update(over)
    det = HeterodyneDetector(
        backend or MockHeterodyne(), StaticPathProvider(UUIDFilenameProvider(), tmp_path), **kw
    )
    run(det.connect())
    return det


def test_heterodyne_records_carrier_and_sign_as_configuration(RE, tmp_path):
    be = MockHeterodyne()
    det = make_het(tmp_path, be)
    docs = []
    RE(bp.count([det], num=2), lambda n, d: docs.append((n, d)))
    (desc,) = [d for n, d in docs if n == "descriptor"]
    conf = desc["configuration"]["het"]
    assert conf["data"]["het-carrier_frequency"] == 2e5
    assert conf["data"]["het-lo_offset_sign"] == -1
    assert conf["data_keys"]["het-carrier_frequency"]["units"] == "Hz"
    ext = {k for k, v in desc["data_keys"].items() if v.get("external") == "STREAM:"}
    assert ext == {"trace_beat", "trace_intensity"}
    (uri,) = {d["uri"] for n, d in docs if n == "stream_resource"}
    with h5py.File(uri.removeprefix("file://localhost"), "r", swmr=True) as f:
        np.testing.assert_array_equal(
            f["/traces/beat"][()], np.stack([r.beat for r in be.records])
        )


def test_heterodyne_validation(RE, tmp_path):
    be = MockHeterodyne()
    det = make_het(tmp_path, be)
    with pytest.raises(LimitError, match="carrier 200000 Hz at or above the Nyquist"):
        set_(det.sample_rate, 4e5)
    assert be.log == []
    with pytest.raises(LimitError, match="Nyquist"):
        make_het(tmp_path, sample_rate_hz=3e5)
    with pytest.raises(InputError, match="lo_offset_sign=0 must be"):
        make_het(tmp_path, lo_offset_sign=0)


# ----------------------------------------------------------------------------- tiled


def test_count_into_a_real_tiled_store(RE, tmp_path):
    from bluesky_tiled_plugins import TiledWriter
    from tiled.client import from_uri
    from tiled.server import SimpleTiledServer

    h5dir = tmp_path / "raw"
    h5dir.mkdir()
    be = MockMotion()
    det = make_motion(h5dir, be, record_length=128)
    with SimpleTiledServer(directory=tmp_path / "tiled", readable_storage=[h5dir]) as server:
        client = from_uri(server.uri)
        RE.subscribe(TiledWriter(client, batch_size=1))
        (uid,) = RE(bp.count([det], num=3))
        primary = client[uid]["primary"]
        for ch in ("x", "y", "z", "intensity"):
            arr = np.asarray(primary[f"trace_{ch}"].read())
            assert arr.shape == (3, 128)
            np.testing.assert_array_equal(arr, np.stack([getattr(r, ch) for r in be.records]))
        times = np.asarray(primary["record_start_time"].read())
        np.testing.assert_array_equal(times, [r.start_time_s for r in be.records])
