"""Hardware-neutral devices of quietwell (ophyd-async).

Each device is a typed bundle of signals with units, and talks to the hardware or
to a simulation only through a small backend protocol defined beside it
(``MotionBackend``, ``ElectrodeBackend``, ...). Plans therefore run unchanged on the
simulated laboratory and on real instruments. Limits come from constructor
arguments (the setup loader passes them) and are checked before a backend is
called: a refused request raises :class:`~quietwell.LimitError` (out of range) or
:class:`~quietwell.InputError` (wrong type) and nothing moves.

Backend methods are coroutines (``async def``) so that a real backend can do I/O
without blocking the RunEngine's event loop; a simulated backend simply returns.

.. caution::
   These devices control a class-4 laser, high voltage on electrodes and vacuum
   hardware. Their limits are no substitute for interlocks, your local safety codes
   or the instructions of the lab's laser-safety officer.
"""

from ._charge import ChargeBackend, ChargeControl
from ._connect import AdoptOnConnect
from ._electrodes import (
    DampingAxis,
    ElectrodeBackend,
    ElectrodeState,
    FeedbackElectrodes,
    FeedbackReport,
)
from ._gauge import GaugeBackend, GaugeStatus, VacuumGauge
from ._lab_clock import ClockBackend, LabClock, WallClockBackend
from ._laser import LaserBackend, LaserState, TrapLaser
from ._motion import BackendDataError, HeterodyneDetector, MotionDetector
from ._pressure import PressureBackend, PressureController, SettleTimeoutError
from ._records import HeterodyneBackend, HeterodyneRecord, MotionBackend, RecordData
from ._trace_file import TRACE_GROUP

__all__ = [
    # motion detection
    "MotionDetector",
    "HeterodyneDetector",
    "MotionBackend",
    "HeterodyneBackend",
    "RecordData",
    "HeterodyneRecord",
    "BackendDataError",
    "TRACE_GROUP",
    # feedback
    "FeedbackElectrodes",
    "DampingAxis",
    "ElectrodeBackend",
    "ElectrodeState",
    "FeedbackReport",
    "ChargeControl",
    "ChargeBackend",
    "TrapLaser",
    "LaserBackend",
    "LaserState",
    # vacuum
    "VacuumGauge",
    "GaugeBackend",
    "GaugeStatus",
    "PressureController",
    "PressureBackend",
    "SettleTimeoutError",
    # time
    "LabClock",
    "ClockBackend",
    "WallClockBackend",
    # shared
    "AdoptOnConnect",
]
