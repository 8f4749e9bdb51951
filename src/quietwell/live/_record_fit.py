"""Fit one record: per axis f0, gamma, area, background, occupation, energy envelope;
heterodyne sidebands and their ratio.

The same code path serves the live fitter, the summaries and re-analysis of a stored
run. A fit that fails is reported in the fields (``nan`` values and a status message),
never raised into the RunEngine.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from .._errors import InputError, QuietwellError
from ..analysis import fit_psd, welch_psd
from ..analysis._derived import energy_envelope, occupation_from_area
from ..physics import AXES, sideband_occupation

__all__ = [
    "RecordAnalyzer",
    "ModeAnalyzer",
    "SidebandAnalyzer",
    "CombinedAnalyzer",
    "DriveAnalyzer",
    "FIT_QUANTITIES",
]

#: per-axis quantity -> units of its data key (the ``_stderr`` twin has the same units)
FIT_QUANTITIES: dict[str, str] = {
    "f0": "Hz",
    "gamma": "1/s",
    "area": "V**2",
    "background": "V**2/Hz",
    "occupation": "quanta",
}

_FAILURES = (QuietwellError, ValueError, np.linalg.LinAlgError, FloatingPointError)


class RecordAnalyzer(Protocol):
    """What the live fitter needs: data keys with units, and fields of one record."""

    def describe(self) -> dict[str, dict]: ...

    def analyze(self, traces: Mapping[str, np.ndarray], data: Mapping) -> dict: ...


def _key(name: str, dtype: str, units: str, shape: list[int] | None = None) -> dict:
    return {"dtype": dtype, "shape": shape or [], "units": units, "source": "quietwell.live"}


def _number_keys(names: Sequence[str], units: str) -> dict[str, dict]:
    out = {}
    for n in names:
        out[n] = _key(n, "number", units)
        out[f"{n}_stderr"] = _key(n, "number", units)
    return out


def _own_peak(psd, lines: Sequence[float], own: float, band: tuple[float, float],
              *, strong_neighbours: bool = False):
    """Fit every line in ``band`` and return the one nearest ``own`` (Hz).

    A neighbouring line that cannot be fitted must not cost the channel its own line:
    the fit is then repeated with ``own`` alone. A weak neighbour (crosstalk of another
    mode, far below the channel's own line) may stay in the band; a strong one
    (``strong_neighbours``: the sidebands of other modes) must not be absorbed.
    """
    try:
        fit = fit_psd(psd, peaks=list(lines), band=band)
    except QuietwellError:
        if len(lines) == 1:
            raise
        if strong_neighbours:
            # alone, in a band that stops halfway to the nearest other line, so that the
            # line left out cannot be absorbed into this one
            half = 0.5 * min(abs(f - own) for f in lines if f != own)
            band = (max(band[0], own - half), min(band[1], own + half))
        fit = fit_psd(psd, peaks=[own], band=band)
    return min(fit.peaks, key=lambda p: abs(p.f0 - own))


def _status(exc: Exception) -> str:
    return f"{type(exc).__name__}: {exc}"[:400]


@dataclass
class ModeAnalyzer:
    """Fits the x, y, z channels of a record around the modes of the setup.

    Parameters
    ----------
    mode_frequencies : sequence of 3 floats
        Expected x, y, z frequencies in Hz; each channel is fitted in a band of
        ``band_fraction`` around its own mode, with every mode inside the band
        (crosstalk peaks) fitted too.
    nperseg : int
        Welch segment length (50 % overlap, Hann window).
    calibration, calibration_stderr : sequence of 3 floats or None
        V/m per axis; with ``mass`` (kg) they give each mode's occupation.
    envelope_window : int or None
        If set, also the energy envelope ``envelope_x`` (quanta, one value per window
        of this many samples) of a record of ``record_length`` samples.
    prefix : str
        Data-key prefix of the traces (``"trace_"`` gives ``trace_x``...).
    """

    mode_frequencies: Sequence[float]
    nperseg: int
    calibration: Sequence[float] | None = None
    calibration_stderr: Sequence[float] | None = None
    mass: float | None = None
    band_fraction: float = 0.4
    envelope_window: int | None = None
    record_length: int | None = None
    prefix: str = "trace_"

    def __post_init__(self) -> None:
        if self.envelope_window is not None:
            if self.record_length is None or self.calibration is None or self.mass is None:
                raise InputError("an energy envelope needs record_length, calibration and mass")
            if self.envelope_window > self.record_length:
                raise InputError(
                    f"envelope_window={self.envelope_window} must be <= "
                    f"record_length={self.record_length}"
                )

    @property
    def n_windows(self) -> int:
        return 0 if self.envelope_window is None else self.record_length // self.envelope_window

    def describe(self) -> dict[str, dict]:
        out: dict[str, dict] = {}
        for axis in AXES:
            for q, units in FIT_QUANTITIES.items():
                out.update(_number_keys([f"{q}_{axis}"], units))
            out[f"fit_status_{axis}"] = _key("", "string", "")
            if self.envelope_window is not None:
                out[f"envelope_{axis}"] = _key("", "array", "quanta", [self.n_windows])
        if self.envelope_window is not None:
            out["envelope_time"] = _key("", "array", "s", [self.n_windows])
        return out

    def analyze(self, traces: Mapping[str, np.ndarray], data: Mapping) -> dict:
        fs = float(data.get("sample_rate", math.nan))
        out: dict = {}
        for i, axis in enumerate(AXES):
            fields: dict = {
                f"{q}_{axis}{s}": math.nan for q in FIT_QUANTITIES for s in ("", "_stderr")
            }
            trace = traces.get(f"{self.prefix}{axis}")
            try:
                if trace is None:
                    raise InputError(f"the record has no {self.prefix}{axis} trace")
                fields.update(self._fit_axis(i, axis, np.asarray(trace), fs))
                fields[f"fit_status_{axis}"] = "ok"
            except _FAILURES as exc:
                fields[f"fit_status_{axis}"] = _status(exc)
            if self.envelope_window is not None:
                fields[f"envelope_{axis}"] = self._envelope(i, axis, trace, fs, fields)
            out.update(fields)
        if self.envelope_window is not None:
            out["envelope_time"] = (
                (np.arange(self.n_windows) + 0.5) * self.envelope_window / fs
            ).tolist()
        return out

    def _fit_axis(self, i: int, axis: str, trace: np.ndarray, fs: float) -> dict[str, float]:
        f_own = float(self.mode_frequencies[i])
        lo, hi = f_own * (1 - self.band_fraction), f_own * (1 + self.band_fraction)
        guesses = sorted(f for f in self.mode_frequencies if lo < f < hi)
        psd = welch_psd(trace, fs, nperseg=self.nperseg, noverlap=self.nperseg // 2)
        peak = _own_peak(psd, guesses, f_own, (lo, hi))
        res = {
            f"f0_{axis}": peak.f0,
            f"f0_{axis}_stderr": peak.f0_stderr,
            f"gamma_{axis}": peak.gamma,
            f"gamma_{axis}_stderr": peak.gamma_stderr,
            f"area_{axis}": peak.area,
            f"area_{axis}_stderr": peak.area_stderr,
            f"background_{axis}": peak.background,
            f"background_{axis}_stderr": peak.background_stderr,
        }
        if self.calibration is not None and self.mass is not None:
            c_err = 0.0 if self.calibration_stderr is None else self.calibration_stderr[i]
            n = occupation_from_area(
                peak.area, peak.area_stderr, self.calibration[i], c_err, self.mass, peak.f0
            )
            res[f"occupation_{axis}"] = n.value
            res[f"occupation_{axis}_stderr"] = n.stderr
        return res

    def _envelope(self, i: int, axis: str, trace, fs: float, fields: dict) -> list[float]:
        if trace is None or not math.isfinite(fs):
            return [math.nan] * self.n_windows
        trace = np.asarray(trace)
        floor = fields.get(f"background_{axis}", math.nan)
        if not math.isfinite(floor):
            # no fit (a reheating record is not stationary): floor from the band edges
            psd = welch_psd(trace, fs, nperseg=self.nperseg, noverlap=self.nperseg // 2)
            f = psd.frequency
            f0 = float(self.mode_frequencies[i])
            edge = (np.abs(f - f0) > 0.08 * f0) & (np.abs(f - f0) < 0.12 * f0)
            others = np.all([np.abs(f - fm) > 0.04 * fm for fm in self.mode_frequencies], axis=0)
            sel = edge & others
            floor = (
                float(np.median(psd.psd[sel]) / (1 - 1 / (9 * psd.effective_averages)) ** 3)
                if np.any(sel)
                else 0.0
            )
        env = energy_envelope(
            trace,
            fs,
            float(self.mode_frequencies[i]),
            float(self.calibration[i]),
            float(self.mass),
            window_samples=int(self.envelope_window),
            floor_v2_per_hz=floor,
        )
        return env.occupation.tolist()


@dataclass
class SidebandAnalyzer:
    """Occupation of one mode from the heterodyne sidebands of a beat record.

    With the local oscillator above the signal light (``lo_sign = +1``) the Stokes
    sideband (weight n + 1) beats at ``carrier + f_mode`` and the anti-Stokes one
    (weight n) at ``carrier - f_mode``; ``lo_sign = -1`` swaps them. Each sideband is
    fitted in a band of ``band_fraction * f_mode`` with every sideband of the other
    modes inside it fitted too; ``R = A_antiStokes/A_Stokes`` gives ``n = R/(1 - R)``.
    """

    carrier: float
    lo_sign: int
    mode_frequencies: Sequence[float]
    nperseg: int
    axis: str = "z"
    band_fraction: float = 0.3
    trace_key: str = "het_trace_beat"
    rate_key: str = "het_sample_rate"

    def stokes_side(self) -> int:
        """+1 if the Stokes sideband is above the carrier, -1 if below."""
        return 1 if self.lo_sign > 0 else -1

    def describe(self) -> dict[str, dict]:
        a = self.axis
        out = _number_keys([f"stokes_area_{a}", f"antistokes_area_{a}"], "V**2")
        out.update(_number_keys([f"sideband_ratio_{a}"], "1"))
        out.update(_number_keys([f"sideband_occupation_{a}"], "quanta"))
        out[f"sideband_status_{a}"] = _key("", "string", "")
        return out

    def _area(self, psd, fc: float, f_mode: float) -> tuple[float, float]:
        lo, hi = fc - self.band_fraction * f_mode, fc + self.band_fraction * f_mode
        lines = sorted({self.carrier + s * f for f in self.mode_frequencies for s in (1, -1)
                        if lo < self.carrier + s * f < hi})
        pk = _own_peak(psd, lines, fc, (lo, hi), strong_neighbours=True)
        return pk.area, pk.area_stderr

    def analyze(self, traces: Mapping[str, np.ndarray], data: Mapping) -> dict:
        a = self.axis
        out: dict = {k: math.nan for k in self.describe() if "status" not in k}
        try:
            trace = traces.get(self.trace_key)
            if trace is None:
                raise InputError(f"the record has no {self.trace_key} trace")
            fs = float(data.get(self.rate_key, data.get("sample_rate", math.nan)))
            psd = welch_psd(np.asarray(trace), fs, nperseg=self.nperseg, noverlap=self.nperseg // 2)
            f_mode = float(self.mode_frequencies[AXES.index(a)])
            s = self.stokes_side()
            a_s, e_s = self._area(psd, self.carrier + s * f_mode, f_mode)
            a_as, e_as = self._area(psd, self.carrier - s * f_mode, f_mode)
            ratio = a_as / a_s
            r_err = ratio * math.hypot(e_as / a_as, e_s / a_s)
            out.update({f"stokes_area_{a}": a_s, f"stokes_area_{a}_stderr": e_s,
                        f"antistokes_area_{a}": a_as, f"antistokes_area_{a}_stderr": e_as,
                        f"sideband_ratio_{a}": ratio, f"sideband_ratio_{a}_stderr": r_err,
                        f"sideband_status_{a}": "ok"})
            # A hot mode's ratio is near 1 and one record's can exceed it: the areas are
            # kept (a summary combines them over records, dropping none), only this
            # record's own occupation is then undefined.
            if 0.0 <= ratio < 1.0:
                n = sideband_occupation(ratio, r_err)
                out[f"sideband_occupation_{a}"] = n.value
                out[f"sideband_occupation_{a}_stderr"] = n.stderr
        except _FAILURES as exc:
            out[f"sideband_status_{a}"] = _status(exc)
        return out


@dataclass
class CombinedAnalyzer:
    """Several analyzers on the same record; their fields are merged."""

    parts: Sequence[RecordAnalyzer]

    def describe(self) -> dict[str, dict]:
        out: dict[str, dict] = {}
        for p in self.parts:
            out.update(p.describe())
        return out

    def analyze(self, traces: Mapping[str, np.ndarray], data: Mapping) -> dict:
        out: dict = {}
        for p in self.parts:
            out.update(p.analyze(traces, data))
        return out


@dataclass
class DriveAnalyzer:
    """Complex amplitude (V) of a Coulomb drive tone in one channel.

    Fields ``drive_re_<axis>`` and ``drive_im_<axis>``: the phasor relative to a cosine
    starting at the record's first sample (see
    :func:`quietwell.analysis._derived.drive_phasor`). The plan projects the phasors of
    all records on a common phase to get signed amplitudes.
    """

    drive_frequency: float
    axis: str = "x"
    prefix: str = "trace_"

    def describe(self) -> dict[str, dict]:
        a = self.axis
        return {f"drive_re_{a}": _key("", "number", "V"), f"drive_im_{a}": _key("", "number", "V")}

    def analyze(self, traces: Mapping[str, np.ndarray], data: Mapping) -> dict:
        from ..analysis._derived import drive_phasor

        a = self.axis
        trace = traces.get(f"{self.prefix}{a}")
        fs = float(data.get("sample_rate", math.nan))
        if trace is None or not math.isfinite(fs):
            return {f"drive_re_{a}": math.nan, f"drive_im_{a}": math.nan}
        z = drive_phasor(trace, fs, self.drive_frequency)
        return {f"drive_re_{a}": z.real, f"drive_im_{a}": z.imag}
