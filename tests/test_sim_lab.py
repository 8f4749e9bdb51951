"""The shared simulated laboratory: seeding, streams, API and the physics link."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from quietwell_sim import (
    DetectorParams,
    GaugeKind,
    GaugeParams,
    HeterodyneParams,
    LabParams,
    SimClock,
    SimLab,
)

from quietwell import InputError, LimitError
from quietwell import physics as ph

SMALL = LabParams(detector=DetectorParams(sample_rate=2e6, record_length=1 << 14))


def test_clock_moves_only_forward():
    c = SimClock(time_scale=1.0)
    assert c.advance(2.5) == 2.5 and c.now == 2.5 and c.time_scale == 1.0
    with pytest.raises(InputError, match="dt"):
        c.advance(-1.0)


def test_same_seed_is_bit_for_bit_reproducible():
    def run(seed):
        lab = SimLab(replace(SMALL, seed=seed))
        lab.set_pressure_setpoint(50.0)
        lab.advance(30.0)
        lab.set_feedback_damping([1e3, 1e3, 1e3])
        recs = [lab.record() for _ in range(2)]
        return np.concatenate([r.volts[c] for r in recs for c in r.volts]), lab.read_gauge(
            "pirani"
        )

    a, ga = run(3)
    b, gb = run(3)
    c, _ = run(4)
    assert np.array_equal(a, b) and ga == gb
    assert not np.array_equal(a, c)


def test_gauge_reads_and_extra_gauges_do_not_touch_the_particle_stream():
    plain = SimLab(SMALL)
    extra = SimLab(replace(SMALL, gauges=SMALL.gauges + (GaugeParams("ion2", GaugeKind.ION),)))
    for _ in range(5):
        extra.read_gauge("pirani")
        extra.read_gauge("ion2")
    ra, rb = plain.record(), extra.record()
    assert np.array_equal(ra.volts["x"], rb.volts["x"])
    assert ra.truth.energy.tolist() == rb.truth.energy.tolist()


def test_valve_changes_the_damping_the_particle_sees():
    lab = SimLab(SMALL)
    g1 = lab.truth().gas_damping[0]
    lab.set_feedback_damping(2e3)
    lab.set_pressure_setpoint(2.0)
    while not lab.pressure_settled:
        lab.advance(1.0)
    tr = lab.truth()
    ref = ph.gas_damping(75e-9, 1850.0, lab.pressure, 295.0)  # physics core, PHYSICS.md 2
    assert abs(tr.gas_damping[0] / ref - 1) < 1e-12
    assert tr.gas_damping[0] < g1 / 100


def test_record_advances_clock_and_carries_truth():
    lab = SimLab(SMALL)
    t0 = lab.now
    r = lab.record()
    assert r.start_time == t0 and lab.now == pytest.approx(t0 + r.duration)
    assert r.truth.time == t0 and r.sample_rate == 2e6
    assert all(v.dtype == np.float32 for v in r.volts.values())
    assert r.units["x"] == "V"
    assert set(r.clipped) == set(r.volts)


def test_loss_in_lab_drops_intensity():
    lab = SimLab(SMALL)
    lab.set_pressure_setpoint(10.0)  # below the 1 mbar loss pressure, no feedback
    lab.advance(1800.0)
    assert lab.truth().lost
    r = lab.record()
    assert r.volts["intensity"].mean() < 0.05 * lab.params.detector.intensity_level


def test_heterodyne_channel_present():
    lab = SimLab(replace(SMALL, heterodyne=HeterodyneParams(carrier_frequency=5e5)))
    r = lab.record()
    assert "heterodyne" in r.volts and r.volts["heterodyne"].shape == r.volts["x"].shape


def test_setter_errors_name_key_value_and_fix():
    lab = SimLab(SMALL)
    with pytest.raises(LimitError, match=r"laser power=5.0 W .*max_power"):
        lab.set_laser_power(5.0)
    with pytest.raises(InputError, match="does not exist"):
        lab.read_gauge("capacitance")
    with pytest.raises(InputError, match="unique"):
        LabParams(gauges=(GaugeParams("a", "ionization"), GaugeParams("a", "ionization")))
    assert lab.discharge(-2) == 5


def test_laser_power_scales_frequencies():
    # Omega ~ sqrt(P) for a harmonic optical trap (common practice, no source).
    lab = SimLab(SMALL)
    f1 = lab.truth().frequencies
    lab.set_laser_power(0.6)
    np.testing.assert_allclose(lab.truth().frequencies / f1, np.sqrt(2.0), rtol=1e-12)
