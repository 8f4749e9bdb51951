"""Validation of requested settings, shared by every device.

Every check runs before a backend is touched and raises with a one-line
message naming the setting, the value, what is allowed and what to do.
Nothing is ever clipped into range.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from numbers import Integral, Real

from .._errors import InputError, LimitError

__all__ = ["check_choice", "check_flag", "check_int", "check_real", "check_limits_pair"]


def check_real(name: str, value: object, lo: float, hi: float, unit: str) -> float:
    """Return ``value`` as float if it is a finite real number in ``[lo, hi]``.

    Raises
    ------
    InputError
        If ``value`` is not a finite real number (bool, str, NaN and inf are refused).
    LimitError
        If ``value`` lies outside ``[lo, hi]`` (both in ``unit``).
    """
    if isinstance(value, bool) or not isinstance(value, Real):
        raise InputError(
            f"{name}={value!r} is not a number; give a real number in [{lo:g}, {hi:g}] {unit}"
        )
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{name}={v!r} is not finite; give a number in [{lo:g}, {hi:g}] {unit}")
    if not lo <= v <= hi:
        raise LimitError(
            f"{name}={v:g} {unit} is outside the device limits [{lo:g}, {hi:g}] {unit}; "
            "request a value inside them or change the limit in the setup file"
        )
    return v


def check_int(name: str, value: object, lo: int, hi: int, unit: str) -> int:
    """Return ``value`` as int if it is an integer in ``[lo, hi]`` (floats are refused)."""
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise InputError(
            f"{name}={value!r} is not an integer; give an integer in [{lo}, {hi}] {unit}"
        )
    v = int(value)
    if not lo <= v <= hi:
        raise LimitError(
            f"{name}={v} {unit} is outside the device limits [{lo}, {hi}] {unit}; "
            "request a value inside them or change the limit in the setup file"
        )
    return v


def check_flag(name: str, value: object) -> bool:
    """Return ``value`` if it is a bool (0/1 and strings are refused as ambiguous)."""
    if not isinstance(value, bool):
        raise InputError(f"{name}={value!r} is not a bool; give True or False")
    return value


def check_choice(name: str, value: object, choices: Sequence[float], unit: str) -> float:
    """Return ``value`` as float if it equals one of ``choices`` (to 1 part in 1e9)."""
    allowed = ", ".join(f"{c:g}" for c in choices)
    if isinstance(value, bool) or not isinstance(value, Real) or not math.isfinite(value):
        raise InputError(f"{name}={value!r} is not a number; choose one of {allowed} {unit}")
    for c in choices:
        if math.isclose(float(value), c, rel_tol=1e-9, abs_tol=0.0):
            return float(c)
    raise LimitError(
        f"{name}={float(value):g} {unit} is not a setting of this device; "
        f"choose one of {allowed} {unit}"
    )


def check_limits_pair(name: str, lo: float, hi: float, unit: str) -> tuple[float, float]:
    """Validate a constructor limit pair: finite, ``0 <= lo < hi``."""
    for part, v in (("min", lo), ("max", hi)):
        if isinstance(v, bool) or not isinstance(v, Real) or not math.isfinite(v):
            raise InputError(f"{name} {part}={v!r} is not a finite number; fix the setup file")
    if not 0.0 <= lo < hi:
        raise InputError(
            f"{name}=({lo:g}, {hi:g}) {unit} is not a valid range; need 0 <= min < max"
        )
    return float(lo), float(hi)
