"""Position detector and heterodyne detector of the simulated laboratory.

:class:`Detector` turns the three positions (m) into voltages: per-axis calibration
factor (V/m), a white imprecision floor, a 3x3 crosstalk matrix, and an ADC with a
range (clipping counted) and a resolution; plus a total-intensity channel. The
recorded channels behave as an out-of-loop detector with the same imprecision as
the feedback's: the in-loop correlation of imprecision and feedback force
(squashing) is not modelled.

:class:`HeterodyneDetector` is phenomenological: for each axis the record holds two
independent narrow-band Gaussian processes (complex Ornstein–Uhlenbeck envelopes,
Lorentzian lines of FWHM ``gamma_total`` in rad/s) at ``f_c - f_i`` and
``f_c + f_i`` around a carrier tone at ``f_c``, with areas proportional to
``n + 1`` (Stokes) and ``n`` (anti-Stokes); the sign of the local-oscillator offset
decides which appears above the carrier. The envelopes restart from their
stationary law at every record. References for the sideband weights: Phys. Rev.
Lett. 124, 013603 (2020); Phys. Rev. Lett. 108, 033602 (2012).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal

from quietwell import InputError

__all__ = ["DetectorParams", "Detector", "HeterodyneParams", "HeterodyneDetector", "adc"]


def _default_crosstalk() -> tuple[tuple[float, ...], ...]:
    return ((1.0, 0.02, 0.01), (0.015, 1.0, 0.01), (0.005, 0.01, 1.0))


@dataclass(frozen=True)
class DetectorParams:
    """Position detector and ADC (SI units).

    Attributes
    ----------
    sample_rate : float
        Hz (default 10 MS/s).
    record_length : int
        Default samples per record (default 2**20).
    calibration : tuple of float
        Calibration factors (x, y, z) in V/m (default 4e6, 4e6, 1e6, so that
        room-temperature motion stays within +-1 V).
    imprecision : tuple of float
        White imprecision floor (x, y, z) in m/sqrt(Hz) (default 3e-13).
    crosstalk : tuple of tuple of float
        3x3 matrix mixing the calibrated axis voltages into the channels.
    adc_range : float
        Full scale +-V (default 1 V).
    adc_bits : int
        Resolution in bits (default 16).
    intensity_level : float
        Total-intensity channel in V while trapped (default 0.8 V).
    intensity_noise : float
        White noise of the intensity channel in V/sqrt(Hz) (default 1e-6).
    lost_intensity_level : float
        Intensity channel in V once the particle is lost (default 2 mV).
    """

    sample_rate: float = 10e6
    record_length: int = 1 << 20
    calibration: tuple[float, float, float] = (4e6, 4e6, 1e6)
    imprecision: tuple[float, float, float] = (3e-13, 3e-13, 3e-13)
    crosstalk: tuple[tuple[float, ...], ...] = _default_crosstalk()
    adc_range: float = 1.0
    adc_bits: int = 16
    intensity_level: float = 0.8
    intensity_noise: float = 1e-6
    lost_intensity_level: float = 2e-3

    def __post_init__(self) -> None:
        if not (1e3 <= self.sample_rate <= 1e9):
            raise InputError(f"sample_rate={self.sample_rate!r} Hz must be in [1e3, 1e9] Hz")
        if int(self.record_length) != self.record_length or self.record_length < 2:
            raise InputError(f"record_length={self.record_length!r} must be an integer >= 2")
        for name in ("calibration", "imprecision"):
            v = np.asarray(getattr(self, name), dtype=float)
            if v.shape != (3,) or not np.all(v > 0):
                raise InputError(f"{name}={getattr(self, name)!r} must be 3 positive numbers")
        c = np.asarray(self.crosstalk, dtype=float)
        if c.shape != (3, 3) or not np.all(np.isfinite(c)):
            raise InputError(f"crosstalk={self.crosstalk!r} must be a finite 3x3 matrix")
        if not self.adc_range > 0:
            raise InputError(f"adc_range={self.adc_range!r} V must be > 0")
        if int(self.adc_bits) != self.adc_bits or not 4 <= self.adc_bits <= 24:
            raise InputError(f"adc_bits={self.adc_bits!r} must be an integer in [4, 24]")

    @property
    def s_imp(self) -> np.ndarray:
        """One-sided imprecision PSD (x, y, z) in m**2/Hz."""
        return np.asarray(self.imprecision, dtype=float) ** 2


def adc(volts: np.ndarray, full_scale: float, bits: int) -> tuple[np.ndarray, int]:
    """Clip to ``+-full_scale`` (V) and round to the ADC step ``2 full_scale/2**bits``.

    Returns the float32 voltages in V (a new array, or ``volts`` itself reused if
    it is float32) and the number of clipped samples.
    """
    lsb = 2.0 * full_scale / 2**bits
    out = volts if volts.dtype == np.float32 else volts.astype(np.float32)
    hi, lo = float(out.max()), float(out.min())
    clipped = 0
    if hi > full_scale or lo < -full_scale:
        clipped = int(np.count_nonzero(np.abs(out) > full_scale))
        np.clip(out, -full_scale, full_scale, out=out)
    out *= np.float32(1.0 / lsb)
    np.rint(out, out=out)
    out *= np.float32(lsb)
    return out, clipped


class Detector:
    """Position and intensity detector; see module docs.

    Parameters
    ----------
    params : DetectorParams
    rng : numpy.random.Generator
        The detector's own stream (imprecision and intensity noise).
    """

    CHANNELS = ("x", "y", "z", "intensity")

    def __init__(self, params: DetectorParams, rng: np.random.Generator) -> None:
        self.params = params
        self._rng = rng
        self._cal = np.asarray(params.calibration, dtype=float)
        self._mix = np.asarray(params.crosstalk, dtype=float)

    def convert(
        self,
        positions: np.ndarray,
        lost_from: int | None = None,
        power_ratio: float = 1.0,
    ) -> tuple[dict[str, np.ndarray], dict[str, int]]:
        """Voltages of one record.

        Parameters
        ----------
        positions : ndarray, shape (3, n)
            True positions in m.
        lost_from : int or None
            Sample index from which the particle is gone (intensity drops).
        power_ratio : float
            Laser power over its reference value; scales the intensity level.

        Returns
        -------
        volts : dict of str to ndarray
            float32 channels ``x``, ``y``, ``z``, ``intensity`` in V.
        clipped : dict of str to int
            Clipped samples per channel.
        """
        p = self.params
        n = positions.shape[1]
        fs = p.sample_rate
        sd = np.sqrt(p.s_imp * fs / 2.0)  # white one-sided S_imp over 0..fs/2
        f32 = np.float32
        axis_v = np.empty((3, n), dtype=f32)
        for i in range(3):
            # float32 from here on: volts of a 16-bit-class ADC need no more digits.
            noise = self._rng.standard_normal(n, dtype=f32)
            noise *= f32(sd[i] * self._cal[i])
            axis_v[i] = positions[i] * self._cal[i]
            axis_v[i] += noise
        if np.array_equal(self._mix, np.eye(3)):
            mixed = axis_v
        else:
            mixed = np.empty_like(axis_v)
            for i in range(3):
                np.multiply(axis_v[0], f32(self._mix[i, 0]), out=mixed[i])
                for j in (1, 2):
                    if self._mix[i, j] != 0.0:
                        mixed[i] += f32(self._mix[i, j]) * axis_v[j]
        volts: dict[str, np.ndarray] = {}
        clipped: dict[str, int] = {}
        for i, name in enumerate(("x", "y", "z")):
            volts[name], clipped[name] = adc(mixed[i], p.adc_range, p.adc_bits)
        volts["intensity"], clipped["intensity"] = self.intensity(n, lost_from, power_ratio)
        return volts, clipped

    def intensity(
        self, n: int, lost_from: int | None = None, power_ratio: float = 1.0
    ) -> tuple[np.ndarray, int]:
        """The total-intensity channel alone: float32 V and its clipped-sample count.

        ``lost_from`` and ``power_ratio`` as in :meth:`convert` (which calls this last,
        so a full record draws the same random numbers as before).
        """
        p = self.params
        f32 = np.float32
        level = self._rng.standard_normal(n, dtype=f32)
        level *= f32(p.intensity_noise * math.sqrt(p.sample_rate / 2.0))
        if lost_from is None:
            level += f32(p.intensity_level * power_ratio)
        else:
            level[:lost_from] += f32(p.intensity_level * power_ratio)
            level[lost_from:] += f32(p.lost_intensity_level)
        return adc(level, p.adc_range, p.adc_bits)


@dataclass(frozen=True)
class HeterodyneParams:
    """Heterodyne (sideband) detector, phenomenological (SI units).

    Attributes
    ----------
    carrier_frequency : float
        Carrier (local-oscillator offset) frequency in Hz (default 1.5 MHz).
    lo_sign : int
        Sign of the local-oscillator offset, as the device records it: +1 when the
        local oscillator lies above the signal light, so that the Stokes sideband
        (n + 1, scattered light at omega_L - Omega) beats above the carrier and the
        anti-Stokes sideband (n) below; -1: the reverse.
    sideband_gain : tuple of float
        Sideband area per quantum (x, y, z) in V**2 (default 1e-10).
    carrier_amplitude : float
        Amplitude of the carrier tone in V (default 0.1).
    floor : float
        White noise floor in V**2/Hz (default 1e-16).
    adc_range : float
        Full scale +-V (default 1 V).
    adc_bits : int
        Resolution in bits (default 16).
    """

    carrier_frequency: float = 1.5e6
    lo_sign: int = 1
    sideband_gain: tuple[float, float, float] = (1e-10, 1e-10, 1e-10)
    carrier_amplitude: float = 0.1
    floor: float = 1e-16
    adc_range: float = 1.0
    adc_bits: int = 16

    def __post_init__(self) -> None:
        if self.lo_sign not in (1, -1):
            raise InputError(f"lo_sign={self.lo_sign!r} must be +1 or -1")
        if not self.carrier_frequency > 0:
            raise InputError(f"carrier_frequency={self.carrier_frequency!r} Hz must be > 0")
        g = np.asarray(self.sideband_gain, dtype=float)
        if g.shape != (3,) or not np.all(g >= 0):
            raise InputError(f"sideband_gain={self.sideband_gain!r} must be 3 numbers >= 0 V**2")
        if not self.floor >= 0:
            raise InputError(f"floor={self.floor!r} V**2/Hz must be >= 0")


class HeterodyneDetector:
    """Sideband record around a carrier; see module docs.

    Parameters
    ----------
    params : HeterodyneParams
    rng : numpy.random.Generator
        Its own stream.
    """

    def __init__(self, params: HeterodyneParams, rng: np.random.Generator) -> None:
        self.params = params
        self._rng = rng

    def sideband_frequencies(self, frequencies: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Stokes and anti-Stokes frequencies in Hz for trap ``frequencies`` (Hz)."""
        s = self.params.lo_sign
        fc = self.params.carrier_frequency
        return fc + s * np.asarray(frequencies), fc - s * np.asarray(frequencies)

    def _line(self, n: int, dt: float, area: float, width: float, f: float, t0: float):
        """Real narrow-band Gaussian process of variance ``area`` (V**2) at ``f`` (Hz)."""
        rho = math.exp(-0.5 * width * dt)
        g = self._rng.standard_normal((2, n))
        drive = (g[0] + 1j * g[1]) * math.sqrt(0.5 * area * -math.expm1(-width * dt))
        z0 = complex(*self._rng.standard_normal(2)) * math.sqrt(0.5 * area)
        env, _ = signal.lfilter([1.0], [1.0, -rho], drive, zi=np.array([rho * z0]))
        env = np.concatenate(([z0], env[:-1]))
        ph = 2.0 * math.pi * f * (t0 + dt * np.arange(n))
        return math.sqrt(2.0) * (env.real * np.cos(ph) - env.imag * np.sin(ph))

    def record(
        self,
        n: int,
        sample_rate: float,
        t0: float,
        occupation: np.ndarray,
        frequencies: np.ndarray,
        linewidth: np.ndarray,
        trapped: bool = True,
    ) -> tuple[np.ndarray, int]:
        """One heterodyne record.

        Parameters
        ----------
        n : int
            Samples.
        sample_rate : float
            Hz; the sidebands must lie below the Nyquist frequency.
        t0 : float
            Start time in s (carrier phase).
        occupation : ndarray, shape (3,)
            Mean occupations ``n`` of the axes.
        frequencies : ndarray, shape (3,)
            Trap frequencies in Hz.
        linewidth : ndarray, shape (3,)
            FWHM of each line in rad/s (the total damping).
        trapped : bool
            False: only the carrier and the floor remain.

        Returns
        -------
        volts : ndarray, float32
            Channel in V.
        clipped : int
            Clipped samples.
        """
        p = self.params
        dt = 1.0 / sample_rate
        st, ast = self.sideband_frequencies(frequencies)
        top = max(np.max(st), np.max(ast))
        if top >= 0.5 * sample_rate or min(np.min(st), np.min(ast)) <= 0:
            raise InputError(
                f"sidebands {st.tolist()} / {ast.tolist()} Hz must lie in (0, "
                f"{0.5 * sample_rate}) Hz; lower carrier_frequency or raise sample_rate"
            )
        v = self._rng.standard_normal(n) * math.sqrt(p.floor * sample_rate / 2.0)
        v += p.carrier_amplitude * np.cos(
            2.0 * math.pi * p.carrier_frequency * (t0 + dt * np.arange(n))
        )
        if trapped:
            for i in range(3):
                gain = p.sideband_gain[i]
                if gain == 0:
                    continue
                width = max(float(linewidth[i]), 1e-3)
                nn = max(float(occupation[i]), 0.0)
                v += self._line(n, dt, gain * (nn + 1.0), width, st[i], t0)
                v += self._line(n, dt, gain * nn, width, ast[i], t0)
        return adc(v, p.adc_range, p.adc_bits)
