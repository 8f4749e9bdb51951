"""A readable that carries values computed by a plan, for the ``summary`` stream."""

from __future__ import annotations

import time
from collections.abc import Mapping

from ..physics import Estimate

__all__ = ["DerivedValues"]


class DerivedValues:
    """Holds named results with units; ``bps.trigger_and_read([dv], name="summary")``.

    Values are plain floats, ints or strings; an :class:`Estimate` adds ``NAME`` and
    ``NAME_stderr`` with the same units.
    """

    def __init__(self, name: str = "derived") -> None:
        self.name = name
        self.parent = None
        self._values: dict[str, object] = {}
        self._units: dict[str, str] = {}

    def put(self, key: str, value: Estimate | float | int | str, units: str) -> None:
        """Add ``key`` (and ``key_stderr`` for an Estimate) with its ``units``."""
        if isinstance(value, Estimate):
            self._values[key] = float(value.value)
            self._values[f"{key}_stderr"] = float(value.stderr)
            self._units[key] = self._units[f"{key}_stderr"] = units
        elif isinstance(value, list | tuple):
            self._values[key] = [float(v) for v in value]  # a short array, inline
            self._units[key] = units
        else:
            self._values[key] = value if isinstance(value, str | int) else float(value)
            self._units[key] = units

    def update(self, values: Mapping[str, tuple[Estimate | float | int | str, str]]) -> None:
        for key, (value, units) in values.items():
            self.put(key, value, units)

    def clear(self) -> None:
        self._values.clear()
        self._units.clear()

    @property
    def values(self) -> dict[str, object]:
        return dict(self._values)

    def read(self) -> dict:
        now = time.time()
        return {k: {"value": v, "timestamp": now} for k, v in self._values.items()}

    def describe(self) -> dict:
        out = {}
        for k, v in self._values.items():
            shape: list[int] = []
            if isinstance(v, list):
                dtype, shape = "array", [len(v)]
            elif isinstance(v, str):
                dtype = "string"
            elif isinstance(v, bool) or (isinstance(v, int) and not isinstance(v, bool)):
                dtype = "integer"
            else:
                dtype = "number"
            out[k] = {"dtype": dtype, "shape": shape, "units": self._units[k],
                      "source": "quietwell.plans"}
        return out

    def read_configuration(self) -> dict:
        return {}

    def describe_configuration(self) -> dict:
        return {}

    def trigger(self):
        from ophyd.status import Status

        st = Status(obj=self)
        st.set_finished()
        return st

