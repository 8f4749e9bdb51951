"""Units at the edge: setup files may say ``"3 mbar"``; code holds SI values.

Only the quantities that setup files need are known, each with the units it
accepts. Anything else is refused with a message that names the allowed units.
"""

from __future__ import annotations

import re

from .._errors import InputError

__all__ = ["UNITS", "parse_quantity"]


#: quantity kind -> {unit spelling: factor to SI}
UNITS: dict[str, dict[str, float]] = {
    "length": {"m": 1.0, "mm": 1e-3, "um": 1e-6, "µm": 1e-6, "nm": 1e-9, "pm": 1e-12},
    "frequency": {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6},
    "rate": {"1/s": 1.0, "s^-1": 1.0, "Hz": 1.0},
    "power": {"W": 1.0, "mW": 1e-3},
    "pressure": {"Pa": 1.0, "hPa": 100.0, "mbar": 100.0, "bar": 1e5, "Torr": 101325.0 / 760.0},
    "temperature": {"K": 1.0},
    "voltage": {"V": 1.0, "mV": 1e-3, "kV": 1e3},
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0},
    "density": {"kg/m^3": 1.0, "g/cm^3": 1e3},
    "calibration": {"V/m": 1.0, "V/nm": 1e9, "V/um": 1e6, "mV/nm": 1e6},
    "amplitude_density": {"m/Hz^0.5": 1.0, "m/sqrt(Hz)": 1.0, "pm/Hz^0.5": 1e-12,
                          "fm/Hz^0.5": 1e-15},
    "field": {"V/m": 1.0, "kV/m": 1e3},
    "inverse_area": {"1/m^2": 1.0, "1/um^2": 1e12, "1/nm^2": 1e18},
    "dimensionless": {"": 1.0},
}

_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


def parse_quantity(value: object, kind: str, where: str) -> float:
    """Return ``value`` in SI units of ``kind``.

    ``value`` is a number (already SI) or a string ``"<number> <unit>"``.
    ``where`` names the file and key for the error message.
    """
    allowed = UNITS[kind]
    if isinstance(value, bool):
        raise InputError(f"{where} = {value!r}: expected a {kind}, not a boolean; fix the file")
    if isinstance(value, int | float):
        return float(value)
    if not isinstance(value, str):
        raise InputError(
            f"{where} = {value!r}: expected a number or a string like '3 {next(iter(allowed))}'"
            "; fix the file"
        )
    m = _NUMBER.match(value)
    if m is None:
        raise InputError(f"{where} = {value!r}: not a number with a unit; write e.g. "
                         f"'3 {next(iter(allowed))}' and fix the file")
    number, unit = float(m.group(1)), m.group(2)
    if unit not in allowed:
        shown = ", ".join(u for u in allowed if u) or "no unit"
        raise InputError(f"{where} = {value!r}: unit {unit!r} is not allowed for a {kind}; "
                         f"use one of {shown} and fix the file")
    return number * allowed[unit]




def display(value: float, kind: str) -> str:  # replaced by the pint version
    return f"{value:.4g} SI"
