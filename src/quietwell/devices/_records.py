"""What a motion detector's backend returns, and the protocols it implements.

All traces are float32 voltages (V) at the digitiser input, one value per sample;
times are in s on the backend's clock (epoch seconds for hardware, simulated
seconds for a simulation).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Protocol, runtime_checkable

import numpy as np

__all__ = ["RecordData", "HeterodyneRecord", "MotionBackend", "HeterodyneBackend"]


@dataclass(frozen=True)
class RecordData:
    """One record of the split-detection (PSD) motion detector.

    Attributes
    ----------
    x, y, z : numpy.ndarray
        float32 position-sensitive signals of the three axes in V.
    intensity : numpy.ndarray
        float32 total (sum) detector signal in V.
    sample_rate_hz : float
        Sampling rate the digitiser actually used, in Hz.
    start_time_s : float
        Time of the first sample in s (backend clock).
    """

    CHANNELS: ClassVar[tuple[str, ...]] = ("x", "y", "z", "intensity")

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    intensity: np.ndarray
    sample_rate_hz: float
    start_time_s: float


@dataclass(frozen=True)
class HeterodyneRecord:
    """One record of the heterodyne motion detector.

    Attributes
    ----------
    beat : numpy.ndarray
        float32 balanced-detector voltage (V) of the beat between signal and local
        oscillator. Each mode appears as a pair of sidebands at
        ``carrier_frequency +/- f_mode``; ``lo_offset_sign`` says on which side of
        the carrier the Stokes (energy-losing) sideband lies.
    intensity : numpy.ndarray
        float32 low-frequency power monitor of the signal arm in V.
    sample_rate_hz : float
        Sampling rate the digitiser actually used, in Hz.
    start_time_s : float
        Time of the first sample in s (backend clock).
    """

    CHANNELS: ClassVar[tuple[str, ...]] = ("beat", "intensity")

    beat: np.ndarray
    intensity: np.ndarray
    sample_rate_hz: float
    start_time_s: float


@runtime_checkable
class MotionBackend(Protocol):
    """Digitiser of the position-sensitive detector (hardware or simulation)."""

    async def configure(self, sample_rate_hz: float, input_range_v: float) -> None:
        """Set the sampling rate (Hz) and the full-scale input range (+/- V)."""

    async def record(self, n_samples: int) -> RecordData:
        """Acquire one record of ``n_samples`` samples on every channel."""
        ...

    async def read_intensity(self) -> float:
        """The total-intensity signal now in V (a short average of that channel).

        Cheap and at any time, between records too: what a monitor polls to see that
        the particle is still there. Takes no record and writes no file.
        """
        ...


@runtime_checkable
class HeterodyneBackend(Protocol):
    """Digitiser of the heterodyne detector (hardware or simulation)."""

    async def configure(self, sample_rate_hz: float, input_range_v: float) -> None:
        """Set the sampling rate (Hz) and the full-scale input range (+/- V)."""

    async def record(self, n_samples: int) -> HeterodyneRecord:
        """Acquire one record of ``n_samples`` samples on every channel."""
        ...

    async def read_intensity(self) -> float:
        """The total-intensity signal now in V (a short average of that channel).

        Cheap and at any time, between records too: what a monitor polls to see that
        the particle is still there. Takes no record and writes no file.
        """
        ...
