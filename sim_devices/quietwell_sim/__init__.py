"""The simulated laboratory of quietwell: a seeded physics model of a levitated
particle, its detector, feedback, trap laser and vacuum chamber, behind the same
device interfaces as real instruments.

The physics model (:class:`SimLab` and its parts) is plain and seedable (numpy/scipy
and :mod:`quietwell.physics` only); it never imports bluesky, ophyd or tiled and never
sleeps on the wall clock. :func:`lab_params_from_setup` maps a setup profile onto it.
The device layer wraps :class:`SimLab` through the backends of ``_backends``
(``SimMotion``, ``SimHeterodyne``, ``SimElectrodes``, ``SimCharge``, ``SimLaser``,
``SimGauge``, ``SimPressure``, ``SimClockBackend``) and :func:`build_sim_apparatus`
(registered as the builder of setup kind ``sim``) with :func:`connect_apparatus`
(re-exported from :mod:`quietwell.plans`); these load bluesky and ophyd-async on
first use only.
"""

from typing import Any

from ._chamber import (
    THERMAL_GAS_FACTORS,
    Chamber,
    ChamberParams,
    Gauge,
    GaugeKind,
    GaugeParams,
    GaugeReading,
    GaugeStatus,
)
from ._clock import SimClock
from ._detector import Detector, DetectorParams, HeterodyneDetector, HeterodyneParams
from ._exact import (
    ExactStep,
    exact_step,
    noise_covariance,
    propagate_linear,
    sample_linear,
    sample_parametric,
    transition_matrix,
)
from ._from_setup import lab_params_from_setup
from ._lab import FAULT_KINDS, FaultEvent, LabParams, Record, SimLab
from ._particle import (
    AxisRates,
    GroundTruth,
    Particle,
    ParticleParams,
    TrapParams,
    electrode_field,
)

_LAZY = {
    "build_sim_apparatus": "._from_setup",
    "connect_apparatus": "quietwell.plans",  # re-exported: one implementation
    "SimMotion": "._backends",
    "SimHeterodyne": "._backends",
    "SimElectrodes": "._backends",
    "SimCharge": "._backends",
    "SimLaser": "._backends",
    "SimGauge": "._backends",
    "SimPressure": "._backends",
    "SimClockBackend": "._backends",
}


def __getattr__(name: str) -> Any:
    # The device-facing parts import bluesky/ophyd-async; load them only when asked.
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name], __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = [
    "AxisRates",
    "Chamber",
    "ChamberParams",
    "Detector",
    "DetectorParams",
    "ExactStep",
    "FAULT_KINDS",
    "FaultEvent",
    "Gauge",
    "GaugeKind",
    "GaugeParams",
    "GaugeReading",
    "GaugeStatus",
    "GroundTruth",
    "HeterodyneDetector",
    "HeterodyneParams",
    "LabParams",
    "Particle",
    "ParticleParams",
    "Record",
    "SimCharge",
    "SimClock",
    "SimClockBackend",
    "SimElectrodes",
    "SimGauge",
    "SimHeterodyne",
    "SimLab",
    "SimLaser",
    "SimMotion",
    "SimPressure",
    "THERMAL_GAS_FACTORS",
    "TrapParams",
    "build_sim_apparatus",
    "connect_apparatus",
    "electrode_field",
    "exact_step",
    "lab_params_from_setup",
    "noise_covariance",
    "propagate_linear",
    "sample_linear",
    "sample_parametric",
    "transition_matrix",
]
