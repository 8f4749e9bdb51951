"""Setup descriptions (``profiles/<name>/setup.toml``): what the apparatus is and its limits."""

from ._schema import (
    DataSpec,
    DetectorSpec,
    ElectrodeSpec,
    GaugeSpec,
    LimitSpec,
    MonitorSpec,
    ParticleSpec,
    Setup,
    TrapSpec,
    VacuumSpec,
    load_setup,
    setup_from_dict,
)
from ._units import KINDS, display, parse_quantity

__all__ = [
    "DataSpec", "DetectorSpec", "ElectrodeSpec", "GaugeSpec", "KINDS", "LimitSpec",
    "MonitorSpec", "ParticleSpec", "Setup",
    "TrapSpec", "VacuumSpec", "display", "load_setup", "parse_quantity", "setup_from_dict",
]
