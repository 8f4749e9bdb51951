"""A soft ``SignalRW`` whose ``set`` is validated, then forwarded to a backend.

``ophyd_async.core.soft_signal_rw(setter=...)`` records the requested value as
the setpoint before its setter runs, so a refused request would still show up
as the setpoint. This backend validates first: a refused value leaves the
signal, its setpoint and the hardware backend untouched.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from typing import Any, TypeVar

from ophyd_async.core import SignalR, SignalRW, SoftSignalBackend, soft_signal_r_and_setter

from .._errors import InputError, LimitError

__all__ = ["checked_signal_rw", "const_signal"]

T = TypeVar("T", float, int, bool, str)


class _CheckedSoftBackend(SoftSignalBackend[T]):
    def __init__(
        self,
        datatype: type[T],
        initial_value: T,
        units: str | None,
        check: Callable[[Any], T],
        apply: Callable[[T], Awaitable[None]],
    ) -> None:
        self._check = check
        super().__init__(datatype, check(initial_value), units, setter=apply)

    def adopt(self, value: Any) -> None:
        """Take over a value the hardware already holds (checked, not applied)."""
        try:
            checked = self._check(value)
        except (InputError, LimitError) as err:
            raise type(err)(
                f"the hardware already holds a state this setup refuses: {err}"
            ) from None
        self._setpoint = checked
        self.set_value(checked)

    async def put(self, value: Any) -> None:
        if value is None:
            # ``SignalRW.clear``-style puts of the default would bypass the limits
            raise TypeError("this signal has no default to restore; set an explicit value")
        await super().put(self._check(value))


def checked_signal_rw(
    datatype: type[T],
    initial_value: T,
    *,
    units: str | None,
    check: Callable[[Any], T],
    apply: Callable[[T], Awaitable[None]],
) -> tuple[SignalRW[T], Callable[[Any], None]]:
    """Make a ``SignalRW`` that runs ``check`` then ``await apply(value)`` on every set.

    ``check`` raises (``InputError``/``LimitError``) or returns the converted value;
    ``apply`` is the backend call. Returns the signal and an ``adopt(value)``
    function that checks a value read from the hardware and shows it without
    sending it back. ``initial_value`` is checked, never applied.
    """
    backend = _CheckedSoftBackend(datatype, initial_value, units, check, apply)
    return SignalRW(backend=backend), backend.adopt


def const_signal(value: T, units: str) -> SignalR[T]:
    """A read-only soft signal holding a constant (limits shown in configuration)."""
    sig, _ = soft_signal_r_and_setter(type(value), value, units=units)
    return sig
