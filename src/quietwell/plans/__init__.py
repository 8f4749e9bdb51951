"""Measurement plans of a levitated-particle characterisation.

Each plan takes its detectors first (the motion detector first), then explicit typed
sweep arguments, then keyword-only options with the :class:`Apparatus` and ``md``; it
validates its arguments against the setup's limits before any device moves, records
``plan_name``, ``plan_args``, the setup (name, full description, SHA-256), the
quietwell version and, for a simulated setup, the simulation's truth, and writes the
streams ``primary`` (raw traces as external HDF5 and the gauge ``pressure``),
``fits`` (one event per record) and ``summary`` (one event per run).
"""

from ._calibrations import charge_calibration
from ._calibrations import thermal_calibration_plan as thermal_calibration
from ._common import Apparatus, Recorder, run_metadata, set_feedback, wait_lab
from ._connect import connect_apparatus
from ._derived_device import DerivedValues
from ._gain_sweep import gain_sweep, predicted_cold_damping
from ._pressure_sweep import pressure_sweep
from ._registry import STEPS, Param, Result, Step
from ._reheating import reheating_cycles
from ._sideband import sideband_thermometry
from ._state import Checked, LabState, reach_state, state_after, unsafe_reason

__all__ = [
    "Apparatus", "Checked", "DerivedValues", "LabState", "Param", "Recorder", "Result",
    "STEPS", "Step", "charge_calibration", "connect_apparatus", "gain_sweep",
    "predicted_cold_damping", "pressure_sweep", "reach_state", "reheating_cycles",
    "run_metadata", "set_feedback", "sideband_thermometry", "state_after",
    "thermal_calibration", "unsafe_reason", "wait_lab",
]
