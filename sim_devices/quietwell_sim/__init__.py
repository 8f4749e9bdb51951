"""The simulated laboratory of quietwell: a seeded physics model of a levitated
particle, its detector, feedback, trap laser and vacuum chamber, behind the same
device interfaces as real instruments.

This package is a plain, seedable physics model (numpy/scipy and
:mod:`quietwell.physics` only); it never imports bluesky, ophyd or tiled and never
sleeps on the wall clock. The device layer wraps :class:`SimLab`.
"""

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
from ._lab import LabParams, Record, SimLab
from ._particle import (
    AxisRates,
    GroundTruth,
    Particle,
    ParticleParams,
    TrapParams,
    electrode_field,
)

__all__ = [
    "AxisRates",
    "Chamber",
    "ChamberParams",
    "Detector",
    "DetectorParams",
    "ExactStep",
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
    "SimClock",
    "SimLab",
    "THERMAL_GAS_FACTORS",
    "TrapParams",
    "electrode_field",
    "exact_step",
    "noise_covariance",
    "propagate_linear",
    "sample_linear",
    "sample_parametric",
    "transition_matrix",
]
