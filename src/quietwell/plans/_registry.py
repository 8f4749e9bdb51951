"""The step registry: every plan in its step form, shared by ``quietwell check``,
``quietwell run``, the demo and anything that schedules plans.

A :class:`Step` names its parameters with their physical kinds (so that a campaign
file can give them with units), the results it hands to later steps, its validate
function (pure, no device: :mod:`quietwell.plans._state`) and how its plan is built
from an apparatus and cleaned parameters.
"""

from __future__ import annotations

from collections.abc import Callable, Generator, Mapping
from dataclasses import dataclass
from typing import Any

from ..setup import Setup
from ._calibrations import (
    charge_calibration,
    thermal_calibration_plan,
    validate_charge_calibration,
    validate_thermal_calibration,
)
from ._common import Apparatus
from ._gain_sweep import gain_sweep, validate_gain_sweep
from ._pressure_sweep import pressure_sweep, validate_pressure_sweep
from ._reheating import reheating_cycles, validate_reheating_cycles
from ._sideband import sideband_thermometry, validate_sideband_thermometry
from ._state import Checked

__all__ = ["Param", "Result", "Step", "STEPS"]


@dataclass(frozen=True)
class Param:
    """One parameter of a step.

    ``kind`` is a unit kind of :func:`quietwell.setup.parse_quantity` (``"pressure"``,
    ``"rate"``, ...), or ``"integer"``, ``"text"``, ``"axes"``. ``count``: None for a
    scalar, 0 for a list of any length, n for exactly n values (x, y, z).
    ``estimate``: a value with an error (a measured result of an earlier step fits).
    """

    kind: str
    count: int | None = None
    estimate: bool = False
    help: str = ""


@dataclass(frozen=True)
class Result:
    """A result a step hands to later steps: summary keys, kind, and a value with error."""

    kind: str
    keys: tuple[str, ...]
    estimate: bool = True


@dataclass(frozen=True)
class Step:
    """A plan in its step form."""

    name: str
    params: Mapping[str, Param]
    results: Mapping[str, Result]
    validate: Callable[[Setup, Mapping[str, Any]], Checked]
    build: Callable[[Apparatus, Mapping[str, Any], dict], Generator]
    help: str = ""

    def plan(self, app: Apparatus, checked: Checked, md: dict | None = None) -> Generator:
        """The plan of this step with the cleaned parameters of ``checked``."""
        return self.build(app, {k: v for k, v in checked.params.items() if v is not None},
                          md or {})


_DETECTOR = {
    "sample_rate": Param("frequency", help="detector sample rate"),
    "record_length": Param("integer", help="samples per record"),
    "input_range": Param("voltage", help="digitiser input range (+-)"),
}


def _build_charge(app, p, md):
    p = dict(p)
    return charge_calibration([app.detector], p.pop("charge_steps"), apparatus=app, md=md, **p)


def _build_thermal(app, p, md):
    p = dict(p)
    return thermal_calibration_plan([app.detector], p.pop("pressure"), apparatus=app, md=md,
                                    **p)


def _build_pressure_sweep(app, p, md):
    p = dict(p)
    return pressure_sweep([app.detector], p.pop("pressures"), apparatus=app, md=md, **p)


def _build_gain_sweep(app, p, md):
    p = dict(p)
    return gain_sweep([app.detector], p.pop("gains"), apparatus=app, md=md, **p)


def _build_reheating(app, p, md):
    p = dict(p)
    return reheating_cycles([app.detector], p.pop("cycles"), apparatus=app, md=md, **p)


def _build_sideband(app, p, md):
    p = dict(p)
    return sideband_thermometry([app.heterodyne], p.pop("records"), apparatus=app, md=md, **p)


_MASS = Result("mass", ("mass",))

STEPS: dict[str, Step] = {s.name: s for s in (
    Step("charge_calibration",
         {"charge_steps": Param("integer", count=0, help="charge change before each block (e)"),
          "pressure": Param("pressure"), "drive_frequency": Param("frequency"),
          "drive_amplitude": Param("voltage"), "records_per_step": Param("integer"),
          "settle_time": Param("time"), **_DETECTOR},
         {"charge": Result("dimensionless", ("charge",), estimate=False), "mass": _MASS},
         validate_charge_calibration, _build_charge,
         help="charge and mass from a Coulomb drive, feedback off"),
    Step("thermal_calibration",
         {"pressure": Param("pressure"), "records": Param("integer"),
          "mass": Param("mass", estimate=True), "settle_time": Param("time"), **_DETECTOR},
         {"calibration": Result("calibration", ("calibration_x", "calibration_y",
                                                "calibration_z")), "mass": _MASS},
         validate_thermal_calibration, _build_thermal,
         help="detector calibration (V/m) from thermal motion, feedback off"),
    Step("pressure_sweep",
         {"pressures": Param("pressure", count=0), "records_per_step": Param("integer"),
          "settle_time": Param("time"), "feedback_gain": Param("rate"),
          "engage_damping": Param("rate"), "density": Param("density"), **_DETECTOR},
         {"radius": Result("length", ("radius",)), "mass": _MASS,
          "damping_slope": Result("dimensionless", ("damping_slope",))},
         validate_pressure_sweep, _build_pressure_sweep,
         help="pump-down or bleed-up following the modes; radius and mass from damping"),
    Step("gain_sweep",
         {"gains": Param("rate", count=0), "pressure": Param("pressure"),
          "records_per_step": Param("integer"), "settle_periods": Param("dimensionless"),
          "calibration": Param("calibration", count=3, estimate=True),
          "mass": Param("mass", estimate=True), "stop_after_rises": Param("integer"),
          "stop_axes": Param("axes"), **_DETECTOR},
         {"optimal_gain": Result("rate", ("optimal_gain",))},
         validate_gain_sweep, _build_gain_sweep,
         help="cold-damping gain sweep; optimal gain and minimum occupation"),
    Step("reheating_cycles",
         {"cycles": Param("integer"), "pressure": Param("pressure"),
          "feedback_gain": Param("rate"), "off_time": Param("time"), "on_time": Param("time"),
          "envelope_bandwidth": Param("frequency"),
          "calibration": Param("calibration", count=3, estimate=True),
          "mass": Param("mass", estimate=True), "n_boot": Param("integer"),
          "sample_rate": Param("frequency"), "input_range": Param("voltage")},
         {f"heating_rate_{a}": Result("rate", (f"heating_rate_{a}",)) for a in "xyz"},
         validate_reheating_cycles, _build_reheating,
         help="feedback off and on again, many times; heating rates in quanta/s"),
    Step("sideband_thermometry",
         {"records": Param("integer"), "axis": Param("text"), "pressure": Param("pressure"),
          "feedback_gain": Param("rate"), "settle_periods": Param("dimensionless"),
          "input_range": Param("voltage")},
         {"occupation": Result("dimensionless", ("occupation",))},
         validate_sideband_thermometry, _build_sideband,
         help="occupation from the heterodyne sideband ratio"),
)}
