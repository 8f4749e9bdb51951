"""A simulated apparatus from a setup profile: lab parameters, backends and devices.

:func:`lab_params_from_setup` maps every field of a :class:`quietwell.setup.Setup`
onto :class:`LabParams`; :func:`build_sim_apparatus` builds the :class:`SimLab` and
the ophyd-async devices on it with the setup's limits. quietwell finds it through the
entry point ``sim`` of the group ``quietwell.apparatus``;
:func:`quietwell.plans.connect_apparatus` connects the devices in the RunEngine's
event loop.

A RunEngine must exist before ``connect_apparatus`` (ophyd-async devices live in the
loop that bluesky's RunEngine runs in a background thread)::

    RE = RunEngine()
    app = build_sim_apparatus(load_setup("profiles/amber"), raw_dir)
    connect_apparatus(app)
    RE(bp.count([app.detector, *app.gauges]))
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

from quietwell import InputError
from quietwell.physics import GASES
from quietwell.setup import Setup

from ._chamber import ChamberParams, GaugeKind, GaugeParams
from ._detector import DetectorParams, HeterodyneParams
from ._lab import LabParams, SimLab
from ._particle import ParticleParams, TrapParams

if TYPE_CHECKING:  # the device layer (bluesky, ophyd-async) loads only when building
    from quietwell.plans._common import Apparatus

__all__ = [
    "lab_params_from_setup",
    "build_sim_apparatus",
    "GAUGE_KIND_OF_SETUP",
    "PRESSURE_TIMEOUT_S",
    "PRESSURE_POLL_S",
    "DISCHARGE_STEPS_MAX",
]

#: Setup gauge kinds (``[[vacuum.gauges]] kind``) to the sim's :class:`GaugeKind`.
GAUGE_KIND_OF_SETUP: dict[str, GaugeKind] = {
    "thermal_conductivity": GaugeKind.THERMAL,
    "ionization": GaugeKind.ION,
    "capacitance_diaphragm": GaugeKind.CAPACITANCE,
}

#: Sim time (s) after which an unsettled pressure set fails: 12 h, several times the
#: ~3.5 h a pump-down from 10 mbar to 1e-8 mbar takes.
PRESSURE_TIMEOUT_S = 12 * 3600.0
#: Sim time (s) between settle polls. Each poll costs one lab step (~1 ms of wall
#: time), so that 3.5 h pump-down costs ~0.3 s; settling is known within a minute.
PRESSURE_POLL_S = 60.0
#: Largest number of discharge steps in one request (the setup has no such limit).
DISCHARGE_STEPS_MAX = 100
#: Digitiser full-scale ranges (+-V) offered besides the setup's ``adc_range``.
INPUT_RANGES_V = (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0)


def _display_digits(accuracy: float) -> int:
    # Rounding to d significant digits errs by up to 5*10**-d of reading; keep it
    # within a tenth of the stated accuracy (3 digits for 15 %, 5 for 0.25 %).
    return max(3, min(6, math.ceil(math.log10(50.0 / accuracy))))


def lab_params_from_setup(setup: Setup, *, seed: int | None = None) -> LabParams:
    """Simulation parameters (SI units) of ``setup``.

    Parameters
    ----------
    setup : quietwell.setup.Setup
        A parsed setup (``load_setup``).
    seed : int or None
        Overrides the setup's seed; with neither, 0.

    Returns
    -------
    LabParams
        Particle (radius m, density kg/m**3, charge e, temperature K), trap
        (wavelength m, waist m, power W, frequencies Hz, loss pressure Pa, trap depth
        K, maximum power = ``limits.laser_power_max`` W), detector (sample rate Hz,
        record length, calibration V/m, imprecision m/sqrt(Hz) on every axis,
        crosstalk, ADC range V and bits), heterodyne (when ``heterodyne_carrier > 0``
        Hz: carrier, ``lo_sign``, the detector's ADC), chamber (gas, base and start
        pressure Pa, largest setpoint = ``limits.pressure_max``), the setup's gauges
        (range Pa, accuracy; displayed digits chosen so rounding stays within a tenth
        of the accuracy) and the seed.
    """
    if not isinstance(setup, Setup):
        raise InputError(f"setup={setup!r} is not a Setup; load one with load_setup(path)")
    p, t, d, v, lim = setup.particle, setup.trap, setup.detector, setup.vacuum, setup.limits
    gauges = []
    for g in v.gauges:
        if g.kind not in GAUGE_KIND_OF_SETUP:
            raise InputError(
                f"gauge {g.name!r} kind={g.kind!r} has no simulation; use one of "
                f"{', '.join(GAUGE_KIND_OF_SETUP)}"
            )
        gauges.append(
            GaugeParams(
                g.name,
                GAUGE_KIND_OF_SETUP[g.kind],
                low=g.range_min,
                high=g.range_max,
                accuracy=g.accuracy,
                digits=_display_digits(g.accuracy),
            )
        )
    het = None
    if d.heterodyne_carrier > 0:
        het = HeterodyneParams(
            carrier_frequency=d.heterodyne_carrier,
            lo_sign=d.lo_sign,
            adc_range=d.adc_range,
            adc_bits=d.adc_bits,
        )
    if seed is None:
        seed = setup.seed if setup.seed is not None else 0
    return LabParams(
        particle=ParticleParams(
            radius=p.radius, density=p.density, charge=p.charge_e, temperature=setup.temperature
        ),
        trap=TrapParams(
            wavelength=t.wavelength,
            power=t.power,
            waist=t.waist,
            frequencies=tuple(t.frequencies),
            max_power=lim.laser_power_max,
            trap_depth=t.trap_depth,
            loss_pressure=t.loss_pressure,
        ),
        detector=DetectorParams(
            sample_rate=d.sample_rate,
            record_length=d.record_length,
            calibration=tuple(d.calibration),
            imprecision=(d.imprecision,) * 3,
            crosstalk=tuple(tuple(r) for r in d.crosstalk),
            adc_range=d.adc_range,
            adc_bits=d.adc_bits,
        ),
        chamber=ChamberParams(
            base_pressure=v.base_pressure,
            initial_pressure=v.start_pressure,
            gas=v.gas,
            max_pressure=lim.pressure_max,
        ),
        gauges=tuple(gauges),
        heterodyne=het,
        seed=int(seed),
    )


def build_sim_apparatus(
    setup: Setup, raw_dir: str | Path, *, seed: int | None = None
) -> Apparatus:
    """The devices of ``setup`` on a fresh simulated laboratory.

    Parameters
    ----------
    setup : quietwell.setup.Setup
        The setup (its ``[limits]`` become the devices' limits).
    raw_dir : str or Path
        Folder for the detectors' HDF5 files (created if missing; a tiled server
        must list it in ``readable_storage``).
    seed : int or None
        Overrides the setup's seed.

    Returns
    -------
    quietwell.plans._common.Apparatus
        Devices ``motion`` (detector), ``het`` (heterodyne, keys ``het_...``, only
        with a heterodyne carrier), ``electrodes``, ``charge``, ``laser``, the gauges
        by their setup names, ``pressure_control`` and ``clock``; not yet connected
        (see :func:`quietwell.plans.connect_apparatus`). ``sim_truth()`` gives the plain-JSON truth
        (radius_m, mass_kg, density_kg_m3, charge_e, frequencies_hz,
        calibration_v_per_m, gas, temperature_k, laser_power_w, wavelength_m,
        waist_m) and ``sim_pressure()`` the true pressure in Pa;
        ``extras["lab"]`` is the :class:`SimLab` (its fault methods inject faults on
        demand, see :meth:`SimLab.schedule_fault`); the feedback output clips at
        ``limits.electrode_voltage_max``.
    """
    from ophyd_async.core import StaticPathProvider, UUIDFilenameProvider

    from quietwell.devices import (
        ChargeControl,
        FeedbackElectrodes,
        HeterodyneDetector,
        LabClock,
        MotionDetector,
        PressureController,
        TrapLaser,
        VacuumGauge,
    )
    from quietwell.plans._common import Apparatus

    from ._backends import (
        SimCharge,
        SimClockBackend,
        SimElectrodes,
        SimGauge,
        SimHeterodyne,
        SimLaser,
        SimMotion,
        SimPressure,
    )

    lab = SimLab(lab_params_from_setup(setup, seed=seed))
    raw = Path(raw_dir)
    try:
        raw.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(
            f"raw_dir={str(raw)!r} cannot be created ({exc.strerror}); give a writable folder"
        ) from None
    path_provider = StaticPathProvider(UUIDFilenameProvider(), raw)
    d, lim, el = setup.detector, setup.limits, setup.electrodes
    ranges = tuple(sorted({*INPUT_RANGES_V, float(d.adc_range)}))
    det_kw = dict(
        max_sample_rate_hz=lim.sample_rate_max,
        max_record_length=lim.record_length_max,
        input_ranges_v=ranges,
        sample_rate_hz=d.sample_rate,
        record_length=d.record_length,
        input_range_v=d.adc_range,
    )
    motion = SimMotion(lab)
    detector = MotionDetector(motion, path_provider, name="motion", **det_kw)
    het_dev = None
    if lab.heterodyne is not None:
        het_dev = HeterodyneDetector(
            SimHeterodyne(lab),
            path_provider,
            carrier_frequency_hz=d.heterodyne_carrier,
            lo_offset_sign=d.lo_sign,
            key_prefix="het_",
            name="het",
            **det_kw,
        )
    electrodes_be = SimElectrodes(
        lab,
        el.distance,
        el.geometry_factor,
        loop_delay_s=el.loop_delay,
        voltage_limit_v=lim.electrode_voltage_max,
    )
    electrodes = FeedbackElectrodes(
        electrodes_be,
        gain_limit_per_s=lim.feedback_gain_max,
        voltage_limit_v=lim.electrode_voltage_max,
        max_delay_s=max(1e-3, el.loop_delay),
        name="electrodes",
    )
    charge = ChargeControl(SimCharge(lab), max_steps=DISCHARGE_STEPS_MAX, name="charge")
    laser_be = SimLaser(lab)
    laser = TrapLaser(
        laser_be,
        max_power_w=lim.laser_power_max,
        max_modulation_depth=lim.modulation_depth_max,
        name="laser",
    )
    gauges = [
        VacuumGauge(
            SimGauge(lab, g.name),
            range_pa=(g.range_min, g.range_max),
            accuracy=g.accuracy,
            gas=setup.vacuum.gas,
            # ionization gauges read S_gas times the true pressure (published factors)
            sensitivity=GASES[setup.vacuum.gas].ion_sensitivity if g.kind == "ionization" else 1.0,
            name=g.name,
        )
        for g in setup.vacuum.gauges
    ]
    pressure = PressureController(
        SimPressure(lab),
        setpoint_range_pa=(lim.pressure_min, lim.pressure_max),
        timeout_s=PRESSURE_TIMEOUT_S,
        poll_interval_s=PRESSURE_POLL_S,
        name="pressure_control",
    )
    clock = LabClock(SimClockBackend(lab), name="clock")

    def sim_truth() -> dict:
        t = lab.truth()
        return {
            "radius_m": float(t.radius),
            "mass_kg": float(t.mass),
            "density_kg_m3": float(t.density),
            "charge_e": int(t.charge),
            "frequencies_hz": [float(f) for f in t.frequencies],
            "calibration_v_per_m": [float(c) for c in lab.params.detector.calibration],
            "gas": str(t.gas),
            "temperature_k": float(lab.params.particle.temperature),
            "laser_power_w": float(laser_be.emitted_power_w),
            "wavelength_m": float(lab.params.trap.wavelength),
            "waist_m": float(lab.params.trap.waist),
        }

    def sim_pressure() -> float:
        return float(lab.pressure)

    return Apparatus(
        setup=setup,
        detector=detector,
        electrodes=electrodes,
        charge=charge,
        laser=laser,
        gauges=gauges,
        pressure=pressure,
        clock=clock,
        heterodyne=het_dev,
        sim_truth=sim_truth,
        sim_pressure=sim_pressure,
        extras={
            "lab": lab,
            "backends": {
                "motion": motion,
                "electrodes": electrodes_be,
                "laser": laser_be,
            },
        },
    )
