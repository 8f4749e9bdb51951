"""Units at the edge: files may say ``"3 mbar"``; code holds SI values.

The conversion is pint's. Each quantity *kind* (``"pressure"``, ``"rate"``, ...) names its
SI unit; a value in any unit of the same dimension is accepted and converted, anything
else is refused with one line that names the file and key, the value, the units one may
use and what to do.

pint and its registry are loaded on the first string that needs them, not on import
(pint costs a few hundred milliseconds): plain numbers never touch it. quietwell uses the
process's one pint application registry (``pint.get_application_registry()``), so it
shares units with any other pint user in the same process, and adds to it only the
spelling ``Torr`` (pint knows ``torr``).
"""

from __future__ import annotations

import math
import re
import threading
from dataclasses import dataclass
from typing import Any

from .._errors import InputError

__all__ = ["KINDS", "display", "parse_quantity"]


@dataclass(frozen=True)
class _Kind:
    example: str                        # a typical value, shown in messages
    si: str                             # the SI unit, as pint reads it
    examples: tuple[str, ...]           # units shown in messages (any unit of the dimension works)
    ladder: tuple[tuple[float, str], ...]  # display: (smallest |SI value|, unit), rising


_TABLE: dict[str, _Kind] = {
    "length": _Kind("1064 nm", "m", ("m", "mm", "um", "nm", "pm"),
                    ((0.0, "pm"), (1e-9, "nm"), (1e-6, "um"), (1e-3, "mm"), (1.0, "m"))),
    "frequency": _Kind("150 kHz", "Hz", ("Hz", "kHz", "MHz", "GHz"),
                       ((0.0, "Hz"), (1e3, "kHz"), (1e6, "MHz"))),
    "rate": _Kind("2e4 1/s", "1/s", ("1/s", "s^-1", "Hz"), ((0.0, "1/s"),)),
    "power": _Kind("20 mW", "W", ("W", "mW", "uW"), ((0.0, "mW"), (1.0, "W"))),
    "pressure": _Kind("1e-8 mbar", "Pa", ("Pa", "hPa", "mbar", "bar", "Torr", "mTorr"),
                      ((0.0, "mbar"),)),
    "temperature": _Kind("300 K", "K", ("K", "mK", "uK"), ((0.0, "K"),)),
    "voltage": _Kind("10 V", "V", ("V", "mV", "kV"), ((0.0, "V"),)),
    "time": _Kind("10 ms", "s", ("s", "ms", "us", "ns", "min", "h"),
                  ((0.0, "us"), (1e-3, "ms"), (1.0, "s"), (120.0, "min"), (7200.0, "h"))),
    "mass": _Kind("3 fg", "kg", ("kg", "g", "mg", "ng", "pg", "fg"),
                  ((0.0, "fg"), (1e-15, "pg"), (1e-12, "ng"), (1e-9, "ug"), (1e-6, "mg"),
                   (1e-3, "g"), (1.0, "kg"))),
    "density": _Kind("2200 kg/m^3", "kg/m^3", ("kg/m^3", "g/cm^3"), ((0.0, "kg/m^3"),)),
    "calibration": _Kind("1.2 V/um", "V/m", ("V/m", "V/um", "V/nm", "mV/nm"), ((0.0, "V/um"),)),
    "amplitude_density": _Kind("10 fm/Hz^0.5", "m/Hz^0.5",
                               ("m/Hz^0.5", "m/sqrt(Hz)", "pm/Hz^0.5", "fm/Hz^0.5"),
                               ((0.0, "fm/Hz^0.5"), (1e-12, "pm/Hz^0.5"), (1e-9, "nm/Hz^0.5"))),
    "field": _Kind("1 kV/m", "V/m", ("V/m", "kV/m", "V/um"), ((0.0, "V/m"), (1e3, "kV/m"))),
    "inverse_area": _Kind("1 1/um^2", "1/m^2", ("1/m^2", "1/um^2", "1/nm^2"), ((0.0, "1/m^2"),)),
    "dimensionless": _Kind("0.5", "", ("", "%"), ((0.0, ""),)),
}

#: The quantity kinds that :func:`parse_quantity` and :func:`display` know.
KINDS: tuple[str, ...] = tuple(_TABLE)

_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")
_SQRT = re.compile(r"sqrt\(\s*([^()]*?)\s*\)")

_lock = threading.Lock()
_prepared: Any = None  # the application registry once the Torr spelling is added to it


def _registry() -> Any:
    """The process's pint application registry, ready for quietwell's spellings.

    Imported and built on first use; if an application replaces the registry later
    (``pint.set_application_registry``), the new one is prepared on the next call.
    """
    global _prepared
    import pint

    reg = pint.get_application_registry().get()
    if reg is not _prepared:
        with _lock:
            try:
                reg.parse_units("Torr")  # also builds pint's lazy default registry
            except pint.UndefinedUnitError:
                # the unit's usual symbol (1 Torr = 101325/760 Pa); pint spells it "torr"
                reg.define("Torr = torr")
            _prepared = reg
    return reg


def _spec(kind: str) -> _Kind:
    try:
        return _TABLE[kind]
    except KeyError:
        raise ValueError(f"unknown quantity kind {kind!r}; known kinds: {', '.join(KINDS)}") from None


def _label(kind: str) -> str:
    name = "dimensionless number" if kind == "dimensionless" else kind.replace("_", " ")
    return f"{'an' if name[0] in 'aeiou' else 'a'} {name}"


def _shown(spec: _Kind) -> str:
    return ", ".join(u if u else "no unit" for u in spec.examples)


def _dimension(units: Any) -> str:
    text = str(units.dimensionality)
    if text == "dimensionless":
        return "no dimension"
    return "dimension " + text.replace(" ** ", "^").replace(" ", "")


def parse_quantity(value: object, kind: str, where: str) -> float:
    """Return ``value`` in SI units of ``kind`` (one of :data:`KINDS`).

    Parameters
    ----------
    value
        A number, taken to be in SI units already (pascals, hertz, ...), or a string
        ``"<number> <unit>"`` in any unit of the kind's dimension (``"5e-7 Torr"``,
        ``"1.2 GHz"``, ``"10 fm/sqrt(Hz)"``). A rate may be given in ``Hz`` (= 1/s).
    kind
        The quantity kind; its SI unit is the unit of the result.
    where
        The file and key, for the error message.

    Returns
    -------
    float
        The value in SI units. Range checks are the caller's.

    Raises
    ------
    InputError
        One line naming ``where``, the value, what is allowed and what to do, for a
        boolean, a value that is neither number nor string, a comma, text that is not a
        number and a unit, an unknown unit (unit names are case-sensitive), a unit of
        the wrong dimension, an angle unit (``rad/s`` is not ``Hz``) and an offset
        temperature scale (``degC``).
    ValueError
        ``kind`` is not one of :data:`KINDS` (a programming error).

    Examples
    --------
    >>> parse_quantity("3 mbar", "pressure", "setup.toml: [vacuum] base_pressure")
    300.0
    >>> parse_quantity(2e4, "rate", "k")
    20000.0
    """
    spec = _spec(kind)
    example = f"'{spec.example}'"
    shown_value = repr(value) if len(repr(value)) <= 80 else repr(value)[:77] + "..."

    def refuse(reason: str, fix: str) -> InputError:
        return InputError(f"{where} = {shown_value}: {reason}; {fix} and fix the file")

    if isinstance(value, bool):
        raise refuse(f"expected {_label(kind)}, not a boolean", f"write e.g. {example}")
    if isinstance(value, int | float):
        try:
            return float(value)
        except OverflowError:
            raise refuse("the number is too large", f"write e.g. {example}") from None
    if not isinstance(value, str):
        raise refuse(f"expected a number or a string like {example}", "write one")
    if "," in value:
        # pint would read "1,5 mbar" as 15 mbar
        raise refuse("a comma is not allowed (write 1.5, not 1,5; one value per entry)",
                     f"write e.g. {example}")
    m = _NUMBER.match(value)
    if m is None:
        raise refuse("not a number with a unit", f"write e.g. {example}")
    number, unit = float(m.group(1)), m.group(2)
    if not unit and spec.si:
        raise refuse(f"no unit; {_label(kind)} in a string needs one of {_shown(spec)}"
                     f" (a plain number is read in {spec.si})", f"write e.g. {example}")

    import pint
    from pint.util import to_units_container

    reg = _registry()
    try:
        units = reg.parse_units(_SQRT.sub(r"(\1)^0.5", unit))
    except pint.UndefinedUnitError:
        raise refuse(f"unit {unit!r} is not known (unit names are case-sensitive)",
                     f"use one of {_shown(spec)}") from None
    except Exception:  # pint's parser raises several types for malformed text ("3 2 mbar", "m^")
        raise refuse("not a number with a unit", f"write e.g. {example}") from None
    target = reg.parse_units(spec.si)

    if units.dimensionality != target.dimensionality:
        others = [k for k in KINDS if k != kind and
                  reg.parse_units(_TABLE[k].si).dimensionality == units.dimensionality]
        what = f" ({' or '.join(_label(k) for k in others)})" if others else ""
        raise refuse(f"unit {unit!r} has {_dimension(units)}{what}, but {_label(kind)} has "
                     f"{_dimension(target)}", f"use one of {_shown(spec)}")
    if "radian" in to_units_container(reg.get_root_units(units)[1]):
        why = (": an angular frequency in rad/s is 2π times the frequency in Hz"
               if kind in ("frequency", "rate") else "")
        raise refuse(f"unit {unit!r} contains an angle (rad, deg, turn, rpm), which is not accepted{why}",
                     f"use one of {_shown(spec)}")
    if reg.Quantity(0.0, units).to(target).magnitude != 0.0:
        # an offset scale (degC, degF): its zero is not zero kelvin
        raise refuse(f"unit {unit!r} is an offset scale, which is not accepted",
                     f"give the value in {_shown(spec)} (e.g. 20 degC is '293.15 K')")
    return float(reg.Quantity(number, units).to(target).magnitude)


def display(value_si: float, kind: str) -> str:
    """A short human string for an SI value of ``kind``, in the unit one reads it in.

    Pressure in mbar, frequency in Hz, kHz or MHz, rate in 1/s, power in mW below 1 W,
    temperature in K, voltage in V, time in us, ms, s, min (from 2 min) or h (from 2 h),
    mass from fg to kg, length from pm to m, calibration in V/um, amplitude spectral
    density in fm/Hz^0.5 to nm/Hz^0.5; four significant digits. The string of a finite
    value reads back with :func:`parse_quantity` to the same value within those digits.
    Zero and non-finite values take the unit that 1 (SI) would take.

    Examples
    --------
    >>> display(300.0, "pressure")
    '3 mbar'
    >>> display(152e3, "frequency")
    '152 kHz'
    >>> display(2e4, "rate")
    '2e+04 1/s'
    """
    spec = _spec(kind)
    x = float(value_si)
    size = abs(x) if math.isfinite(x) and x != 0.0 else 1.0
    unit = spec.ladder[0][1]
    for lowest, u in spec.ladder:
        if size >= lowest:
            unit = u
    if not unit:
        return f"{x:.4g}"
    reg = _registry()
    shown = reg.Quantity(x, reg.parse_units(spec.si)).to(reg.parse_units(unit)).magnitude
    return f"{float(shown):.4g} {unit}"
