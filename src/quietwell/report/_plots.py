"""The report's pictures, each a public function returning a matplotlib Figure.

Every function takes a run (the tiled run client, ``client[uid]``) or a table, so a
notebook draws the same pictures as the report. Model curves come from
:mod:`quietwell.physics` and :mod:`quietwell.analysis`; nothing is re-derived here.
Figures are made without pyplot (no window, no global state): in Jupyter the returned
Figure shows inline.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._errors import InputError, QuietwellError
from ..analysis import PSDResult, SpectrumFit, fit_psd, welch_psd
from ..analysis._derived import LinearFit, fit_line
from ..analysis._resolution import segment_length
from ..physics import AXES, cold_damping_occupation, reheating_curve
from . import _streams

__all__ = [
    "AXIS_COLOURS",
    "psd_fits",
    "psd_figure",
    "damping_figure",
    "gain_figure",
    "reheating_figure",
    "heating_table",
    "heating_line",
    "heating_pressure_figure",
    "sideband_fits",
    "sideband_figure",
]

#: One colour per axis, used by every picture and the page: x, y, z.
AXIS_COLOURS = {"x": "#1f5f8b", "y": "#b4531f", "z": "#4f7d3a"}
_INK = "#22303c"
_MODEL = "#0b0f14"
_SOFT = "#8c99a6"

_STYLE = {
    "font.size": 8.5,
    "axes.edgecolor": _SOFT,
    "axes.labelcolor": _INK,
    "axes.titlesize": 9,
    "axes.titleweight": "bold",
    "axes.titlecolor": _INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#e4e0d8",
    "grid.linewidth": 0.6,
    "xtick.color": _INK,
    "ytick.color": _INK,
    "legend.frameon": False,
    "legend.fontsize": 7,
    "legend.loc": "best",
    "figure.facecolor": "white",
    "svg.fonttype": "path",
    "svg.hashsalt": "quietwell",
}


def _figure(rows: int, cols: int, *, width: float = 9.0, height: float = 3.0,
            top: float = 0.32, gap: float = 0.62, **kw: Any):
    """A figure of ``rows`` x ``cols`` axes with fixed margins in inches (``top`` above
    the axes for their titles, ``gap`` between columns for tick labels).

    Fixed margins, not matplotlib's constrained layout: that measures every text
    twice per drawing and took half of the report's drawing time.
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    axs = fig.subplots(rows, cols, squeeze=False, **kw)
    left, right, bottom = 0.78, 0.12, 0.46
    col_w = (width - left - right - gap * (cols - 1)) / cols
    fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=bottom / height,
                        top=1 - top / height, wspace=gap / col_w,
                        hspace=0.12 if rows > 1 else 0.2)
    return fig, axs


def _styled(func):
    """Draw inside the report's style (rcParams are read as each artist is made)."""
    import functools

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any):
        import matplotlib

        with matplotlib.rc_context(_STYLE):
            return func(*args, **kwargs)

    return wrapper


def _thin(f: np.ndarray, p: np.ndarray, most: int = 500) -> tuple[np.ndarray, np.ndarray, int]:
    """Average neighbouring PSD bins in groups so that at most ``most`` points are drawn
    (the page stays small; the fits use every bin). Returns the group size too."""
    k = max(1, int(math.ceil(f.size / most)))
    n = (f.size // k) * k
    if k == 1 or n == 0:
        return f, p, 1
    return f[:n].reshape(-1, k).mean(axis=1), p[:n].reshape(-1, k).mean(axis=1), k


def _start(run: Any) -> dict:
    return dict(run.metadata.get("start") or {})


def _plan(run: Any, *names: str) -> None:
    plan = _start(run).get("plan_name", "")
    if plan not in names:
        raise InputError(f"run {_start(run).get('uid', '?')} is a {plan or 'unknown'} run; this "
                         f"picture needs a {' or '.join(names)} run")


def _column(ds: Any, key: str) -> np.ndarray:
    if key not in ds:
        return np.array([])
    return np.asarray(ds[key].values)


def as_array(value: Any, name: str = "array field") -> np.ndarray:
    """A stored array field (one event's value) as a 1-d float array.

    A list or array passes through. Text (numpy's printed form, as a table read with
    dask's ``dataframe.convert-string`` on returns it) is refused with an
    :class:`InputError`: it is rounded, and summarised with ``...`` when long, so
    reading it back would lose data. Read the stream with
    :func:`quietwell.report._streams.read`.
    """
    if isinstance(value, (bytes, np.bytes_, str)):
        text = value.decode(errors="replace") if isinstance(value, (bytes, np.bytes_)) else value
        shown = " ".join(str(text).split())
        shown = shown if len(shown) <= 40 else shown[:37] + "..."
        raise InputError(f"{name}: the stored array came back as text ({shown!r}), which "
                         "loses digits; read the stream with dask's "
                         "dataframe.convert-string off (quietwell.report._streams.read)")
    try:
        return np.asarray(value, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"{name}: {type(value).__name__} is not an array of numbers; "
                         "give a run whose stream holds this field as an array") from None


def _summary(run: Any) -> dict[str, Any]:
    from ._collect import summary_values

    return summary_values(run)[0]


def _est(summary: Mapping[str, Any], key: str) -> tuple[float, float]:
    def num(v: Any) -> float:
        try:
            return float(v)
        except (TypeError, ValueError):
            return math.nan

    return num(summary.get(key, math.nan)), num(summary.get(f"{key}_stderr", math.nan))


def _modes(run: Any) -> list[float]:
    desc = _start(run).get("setup_description") or {}
    return [float(f) for f in desc.get("trap", {}).get("frequencies", [])]


def _trace(run: Any, key: str, record: int) -> np.ndarray:
    prim = _streams.stream(run, "primary")
    if key not in prim:
        raise InputError(f"run {_start(run).get('uid', '?')} has no {key} trace in its primary "
                         "stream; choose a run that recorded it")
    n = prim[key].shape[0]
    if not -n <= record < n:
        raise InputError(f"record={record} is outside the run's {n} records; give 0 to {n - 1}")
    return np.asarray(prim[key][record], dtype=float).reshape(-1)


# --------------------------------------------------------------------------
# PSD of one record with its fit


@dataclass(frozen=True)
class AxisSpectrum:
    """One channel of one record: its Welch PSD and the fit of its lines (or why not)."""

    axis: str
    psd: PSDResult
    band: tuple[float, float]
    fit: SpectrumFit | None
    error: str = ""


def psd_fits(run: Any, record: int = 0, *, band_fraction: float = 0.4
             ) -> dict[str, AxisSpectrum]:
    """Welch PSD and peak fit of each axis of one record, as the live fits make them.

    Segment length from :func:`quietwell.analysis._resolution.segment_length` of the record
    length, half overlap, Hann window; each channel fitted in ``f_mode (1 ± band_fraction)``
    with every mode of the setup inside that band (crosstalk lines) fitted too.
    PSD in V**2/Hz, frequencies in Hz.
    """
    modes = _modes(run)
    fs = float(_streams.primary_column(run, "sample_rate")[record])
    out = {}
    for i, axis in enumerate(AXES):
        trace = _trace(run, f"trace_{axis}", record)
        nperseg = segment_length(trace.size)
        psd = welch_psd(trace, fs, nperseg=nperseg, noverlap=nperseg // 2)
        f_own = modes[i]
        band = (f_own * (1 - band_fraction), f_own * (1 + band_fraction))
        lines = sorted(f for f in modes if band[0] < f < band[1])
        fit, error = None, ""
        try:
            try:
                fit = fit_psd(psd, peaks=lines, band=band)
            except QuietwellError:
                if len(lines) == 1:
                    raise
                fit = fit_psd(psd, peaks=[f_own], band=band)
        except (QuietwellError, ValueError) as exc:
            error = f"{type(exc).__name__}: {exc}"
        out[axis] = AxisSpectrum(axis, psd, band, fit, error)
    return out


@_styled
def psd_figure(run: Any, record: int = 0, *, spectra: Mapping[str, AxisSpectrum] | None = None):
    """PSD of each axis of one record with the fitted model, and the residuals below.

    Top row: the Welch PSD (V**2/Hz) in each axis's fit band and the fitted
    :meth:`~quietwell.analysis.SpectrumFit.model`; bottom row: data/model. The title gives
    the fitted frequency, linewidth and the reduced deviance of the fit (about 1 for a good
    fit).
    """
    spectra = spectra if spectra is not None else psd_fits(run, record)
    fig, axs = _figure(2, 3, height=4.2, top=0.48, sharex="col",
                       gridspec_kw={"height_ratios": [3, 1.2]})
    for j, axis in enumerate(AXES):
        sp = spectra[axis]
        f, p = sp.psd.frequency, np.asarray(sp.psd.psd)
        sel = (f >= sp.band[0]) & (f <= sp.band[1])
        top, bottom = axs[0][j], axs[1][j]
        colour = AXIS_COLOURS[axis]
        fs_, ps_, k = _thin(f[sel], p[sel])
        label = f"record {record}, Welch PSD" + (f" ({k} bins a point)" if k > 1 else "")
        top.semilogy(fs_ / 1e3, ps_, ".", ms=2.2, color=colour, alpha=0.55, label=label)
        if sp.fit is not None:
            model = sp.fit.model(fs_)
            top.semilogy(fs_ / 1e3, model, "-", lw=1.1, color=_MODEL, label="fitted model")
            bottom.plot(fs_ / 1e3, ps_ / model, ".", ms=2.0, color=colour, alpha=0.6)
            bottom.axhline(1.0, color=_MODEL, lw=0.8)
            own = min(sp.fit.peaks, key=lambda pk: abs(pk.f0 - _modes(run)[j]))
            top.set_title(f"{axis}: f₀ {own.f0 / 1e3:.3f} kHz, γ/2π {own.gamma / (2 * math.pi):.3g}"
                          f" Hz\nreduced deviance {sp.fit.goodness.reduced:.2f}", loc="left")
        else:
            top.set_title(f"{axis}: no fit ({sp.error[:60]})", loc="left")
        bottom.set_xlabel("frequency (kHz)")
        if j == 0:
            top.set_ylabel("PSD (V²/Hz)")
            bottom.set_ylabel("data / model")
        top.legend(loc="upper right")
    return fig


# --------------------------------------------------------------------------
# damping versus pressure


@_styled
def damping_figure(run: Any):
    """Fitted energy damping ``gamma`` (1/s) of each record versus the gauge pressure (Pa)
    of a pressure sweep, with the fitted gas line ``gamma = s P`` of the run's summary
    (``damping_slope_x|y|z``) and the cold-damping gain of the records below the loss
    pressure."""
    _plan(run, "pressure_sweep")
    fits = _streams.read(run, "fits")
    seq = _streams.primary_column(run, "seq_num")
    pressure = dict(zip(seq.tolist(), _streams.primary_column(run, "pressure").astype(float),
                        strict=False))
    recs = _column(fits, "record_seq_num")
    p = np.array([pressure.get(int(s), math.nan) for s in recs])
    summary = _summary(run)
    args = _start(run).get("plan_args", {})
    loss = float((_start(run).get("setup_description") or {}).get("trap", {})
                 .get("loss_pressure", math.nan))
    fig, axs = _figure(1, 3, height=3.0, sharey=True)
    grid = np.geomspace(np.nanmin(p), np.nanmax(p), 100) if p.size else np.array([])
    gammas = np.concatenate([_column(fits, f"gamma_{a}") for a in AXES])
    gammas = gammas[np.isfinite(gammas) & (gammas > 0)]
    for j, axis in enumerate(AXES):
        ax = axs[0][j]
        g, e = _column(fits, f"gamma_{axis}"), _column(fits, f"gamma_{axis}_stderr")
        ok = _column(fits, f"fit_status_{axis}") == "ok"
        ax.errorbar(p[ok], g[ok], yerr=e[ok], fmt="o", ms=3, color=AXIS_COLOURS[axis],
                    elinewidth=0.8, label="fitted γ per record")
        s, s_err = _est(summary, f"damping_slope_{axis}")
        if math.isfinite(s):
            ax.plot(grid, s * grid, "-", color=_MODEL, lw=1.0,
                    label=f"gas line, slope {s:.3g} ± {s_err:.2g} /(s·Pa)")
        gain = args.get("feedback_gain")
        if gain:
            ax.axhline(float(gain), color=_SOFT, ls="--", lw=0.8, label="cold-damping gain")
        if math.isfinite(loss):
            ax.axvline(loss, color=_SOFT, ls=":", lw=0.8, label="loss pressure")
        ax.set_xscale("log")
        ax.set_yscale("log")
        if gammas.size:
            ax.set_ylim(gammas.min() / 4, gammas.max() * 4)
        ax.set_xlabel("pressure (Pa)")
        ax.set_title(f"{axis}", loc="left")
        if j == 0:
            ax.set_ylabel("damping γ (1/s)")
        ax.legend()
    return fig


# --------------------------------------------------------------------------
# occupation versus gain


def gain_points(run: Any, axis: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per gain of a gain sweep: the gain (1/s), the weighted mean occupation of its records
    and its error, as the summary combined them."""
    from ..plans._common import weighted_mean

    fits = _streams.read(run, "fits")
    gains_of = _record_gains(run)
    recs = _column(fits, "record_seq_num")
    n, e = _column(fits, f"occupation_{axis}"), _column(fits, f"occupation_{axis}_stderr")
    ok = _column(fits, f"fit_status_{axis}") == "ok"
    out_g, out_n, out_e = [], [], []
    for gain in sorted({gains_of.get(int(r), math.nan) for r in recs} - {math.nan}):
        sel = ok & np.array([gains_of.get(int(r)) == gain for r in recs])
        if not sel.any():
            continue
        mean, err = weighted_mean(n[sel].tolist(), e[sel].tolist())
        if math.isfinite(mean):
            out_g.append(gain)
            out_n.append(mean)
            out_e.append(err)
    return np.array(out_g), np.array(out_n), np.array(out_e)


def _record_gains(run: Any) -> dict[int, float]:
    """Gain (1/s) of each primary record of a gain sweep, from the plan's gains and
    ``records_per_step`` (records go in order, ``records_per_step`` per gain)."""
    args = _start(run).get("plan_args", {})
    gains = [float(g) for g in args.get("gains", [])]
    per = int(args.get("records_per_step", 1))
    seq = _streams.primary_column(run, "seq_num").astype(int)
    return {int(s): gains[(int(s) - 1) // per] for s in seq if (int(s) - 1) // per < len(gains)}


@_styled
def gain_figure(run: Any):
    """Occupation (quanta) of each axis versus the cold-damping gain (1/s) of a gain sweep,
    with the fitted cold-damping model of the summary
    (:func:`quietwell.physics.cold_damping_occupation` with its ``measurement_rate`` and
    ``decoherence_rate``) and the predicted optimum from the setup's nominal values."""
    _plan(run, "gain_sweep")
    summary = _summary(run)
    fig, axs = _figure(1, 3, height=3.0)
    for j, axis in enumerate(AXES):
        ax = axs[0][j]
        g, n, e = gain_points(run, axis)
        colour = AXIS_COLOURS[axis]
        ax.errorbar(g, n, yerr=e, fmt="o", ms=3.5, color=colour, elinewidth=0.8,
                    label="measured (mean per gain)")
        meas, _ = _est(summary, f"measurement_rate_{axis}")
        dec, _ = _est(summary, f"decoherence_rate_{axis}")
        if g.size and math.isfinite(meas) and math.isfinite(dec):
            grid = np.geomspace(g.min() / 1.5, g.max() * 1.5, 200)
            ax.plot(grid, cold_damping_occupation(grid, 0.0, 0.0, meas, dec), "-",
                    color=_MODEL, lw=1.0, label="fitted cold-damping model")
            g_opt, g_err = _est(summary, f"optimal_gain_{axis}")
            n_min, n_err = _est(summary, f"min_occupation_{axis}")
            ax.errorbar([g_opt], [n_min], xerr=[g_err], yerr=[n_err], fmt="D", ms=5,
                        mfc="white", mec=_MODEL, ecolor=_MODEL,
                        label=f"optimum: n = {n_min:.3g} ± {n_err:.2g}")
        else:
            status = summary.get(f"fit_status_{axis}", "")
            ax.text(0.03, 0.97, f"no model: {str(status)[:60]}", transform=ax.transAxes,
                    fontsize=6.5, color=_INK, va="top", wrap=True)
        pg, _ = _est(summary, f"predicted_optimal_gain_{axis}")
        pn, _ = _est(summary, f"predicted_min_occupation_{axis}")
        if math.isfinite(pg) and math.isfinite(pn):
            ax.plot([pg], [pn], "x", ms=7, color=_SOFT, mew=1.5, label="predicted optimum")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("gain (1/s)")
        ax.set_title(axis, loc="left")
        if j == 0:
            ax.set_ylabel("occupation n")
        ax.legend()
    return fig


# --------------------------------------------------------------------------
# reheating ensemble


def reheating_ensemble(run: Any, axis: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Time after feedback off (s), ensemble mean and spread of the occupation (quanta) over
    the cycles of a reheating run, and the number of cycles: the run's last ``ensemble``
    event (the mean over every fitted cycle)."""
    fits = _streams.read(run, "fits")
    times = _column(fits, "envelope_time")
    if not times.size or not _streams.has(run, "ensemble"):
        raise InputError(f"run {_start(run).get('uid', '?')} has no energy envelopes; choose a "
                         "reheating_cycles run")
    t = as_array(times[0], "fits envelope_time")
    ens = _streams.read(run, "ensemble")
    mean = as_array(_column(ens, f"ensemble_mean_{axis}")[-1], f"ensemble_mean_{axis}")
    spread = as_array(_column(ens, f"ensemble_spread_{axis}")[-1], f"ensemble_spread_{axis}")
    cycles = int(np.asarray(_column(ens, "cycles_in_mean"))[-1])
    return t, mean, spread, cycles


@_styled
def reheating_figure(run: Any):
    """Ensemble mean occupation (energy in quanta) versus time after the feedback is
    switched off, with the spread of the cycles and the fitted linear heating model
    ``n0 + Gamma t`` of the summary (:func:`quietwell.physics.reheating_curve`)."""
    _plan(run, "reheating_cycles")
    summary = _summary(run)
    fig, axs = _figure(1, 3, height=3.0)
    p, _ = _est(summary, "pressure")
    for j, axis in enumerate(AXES):
        ax = axs[0][j]
        t, mean, spread, cycles = reheating_ensemble(run, axis)
        colour = AXIS_COLOURS[axis]
        ms = t * 1e3
        if mean.size == t.size:
            ax.fill_between(ms, mean - spread, mean + spread, color=colour, alpha=0.15, lw=0,
                            label="spread of the cycles")
            ax.plot(ms, mean, "o", ms=3, color=colour, label=f"mean of {cycles} cycles")
        rate, rate_err = _est(summary, f"heating_rate_{axis}")
        n0, _ = _est(summary, f"initial_occupation_{axis}")
        if math.isfinite(rate) and math.isfinite(n0):
            grid = np.linspace(0.0, float(t.max()) if t.size else 0.0, 100)
            ax.plot(grid * 1e3, reheating_curve(grid, n0, rate, 0.0), "-", color=_MODEL, lw=1.0,
                    label=f"Γ = {rate:.3g} ± {rate_err:.2g} /s")
        ax.set_xlabel("time after feedback off (ms)")
        ax.set_title(f"{axis} at {p:.3g} Pa", loc="left")
        if j == 0:
            ax.set_ylabel("occupation n (quanta)")
        ax.legend()
    return fig


# --------------------------------------------------------------------------
# heating rate versus pressure


def heating_table(runs: Iterable[Any]):
    """One row per reheating run: ``uid``, ``pressure`` (Pa) and, per axis, the measured
    and predicted heating rates (quanta/s) with their errors, from each run's summary.

    Returns a :class:`pandas.DataFrame` sorted by pressure. Give only runs whose results
    count: the report passes completed runs that no redo superseded.
    """
    import pandas as pd

    rows = []
    for run in runs:
        if _start(run).get("plan_name") != "reheating_cycles":
            continue
        s = _summary(run)
        row: dict[str, Any] = {"uid": _start(run).get("uid", "")}
        row["pressure"], row["pressure_stderr"] = _est(s, "pressure")
        for axis in AXES:
            for key in ("heating_rate", "predicted_heating_rate"):
                row[f"{key}_{axis}"], row[f"{key}_{axis}_stderr"] = _est(s, f"{key}_{axis}")
        rows.append(row)
    table = pd.DataFrame(rows)
    return table.sort_values("pressure", ignore_index=True) if rows else table


def heating_line(table: Any, axis: str) -> LinearFit:
    """``Gamma(P) = a P + b`` through the measured heating rates of ``table``: the gas slope
    ``a`` (quanta/(s Pa)) and the photon-recoil intercept ``b`` (quanta/s), by
    :func:`quietwell.analysis._derived.fit_line` (needs 3 pressures)."""
    sel = np.isfinite(table[f"heating_rate_{axis}"]) & np.isfinite(
        table[f"heating_rate_{axis}_stderr"])
    t = table[sel]
    return fit_line(t["pressure"], t[f"heating_rate_{axis}"], t[f"heating_rate_{axis}_stderr"])


@_styled
def heating_pressure_figure(table: Any):
    """Measured heating rate (quanta/s) versus pressure (Pa) per axis, with the fitted line
    ``a P + b`` (:func:`heating_line`): its gas part ``a P`` and recoil intercept ``b``,
    and the predicted rates from the setup's nominal values. ``table`` is
    :func:`heating_table`'s."""
    fig, axs = _figure(1, 3, height=3.0, sharey=True)
    if len(table) == 0:
        for ax in axs[0]:
            ax.text(0.5, 0.5, "no reheating runs", ha="center", transform=ax.transAxes)
        return fig
    p = np.asarray(table["pressure"], dtype=float)
    grid = np.geomspace(p.min() / 2, p.max() * 2, 200)
    for j, axis in enumerate(AXES):
        ax = axs[0][j]
        colour = AXIS_COLOURS[axis]
        ax.errorbar(p, table[f"heating_rate_{axis}"], yerr=table[f"heating_rate_{axis}_stderr"],
                    fmt="o", ms=4, color=colour, elinewidth=0.8, label="measured")
        ax.errorbar(p * 1.04, table[f"predicted_heating_rate_{axis}"],
                    yerr=table[f"predicted_heating_rate_{axis}_stderr"], fmt="s", ms=3.5,
                    mfc="white", mec=_SOFT, ecolor=_SOFT, elinewidth=0.8, label="predicted")
        try:
            line = heating_line(table, axis)
        except (InputError, ValueError, np.linalg.LinAlgError):
            line = None
        if line is not None:
            a, b = line.slope.value, line.intercept.value
            ax.plot(grid, a * grid + b, "-", color=_MODEL, lw=1.0, label="fit a·P + b")
            if a > 0:
                ax.plot(grid, a * grid, "--", color=_MODEL, lw=0.8,
                        label=f"gas a = {a:.3g} ± {line.slope.stderr:.2g} /(s·Pa)")
            if b > 0:
                ax.axhline(b, color=_MODEL, ls=":", lw=0.9,
                           label=f"recoil b = {b:.3g} ± {line.intercept.stderr:.2g} /s")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("pressure (Pa)")
        ax.set_title(axis, loc="left")
        if j == 0:
            ax.set_ylabel("heating rate Γ (quanta/s)")
        ax.legend()
    return fig


# --------------------------------------------------------------------------
# heterodyne sidebands


@dataclass(frozen=True)
class SidebandSpectrum:
    """The beat note PSD of one heterodyne record and the fit of each sideband."""

    axis: str
    psd: PSDResult
    stokes: tuple[tuple[float, float], SpectrumFit | None]
    antistokes: tuple[tuple[float, float], SpectrumFit | None]


def sideband_fits(run: Any, record: int = 0, *, band_fraction: float = 0.3) -> SidebandSpectrum:
    """Welch PSD of one heterodyne record and the fits of the Stokes and anti-Stokes
    sidebands of the run's axis, in bands of ``band_fraction`` times the mode frequency,
    as the live fits make them (every sideband of another mode inside a band is fitted
    too). PSD in V**2/Hz, frequencies in Hz."""
    _plan(run, "sideband_thermometry")
    start = _start(run)
    det = (start.get("setup_description") or {}).get("detector", {})
    carrier, lo_sign = float(det["heterodyne_carrier"]), int(det.get("lo_sign", 1))
    modes = _modes(run)
    axis = str(start.get("plan_args", {}).get("axis", "z"))
    f_mode = modes[AXES.index(axis)]
    fs = float(_streams.primary_column(run, "het_sample_rate")[record])
    trace = _trace(run, "het_trace_beat", record)
    nperseg = segment_length(trace.size)
    psd = welch_psd(trace, fs, nperseg=nperseg, noverlap=nperseg // 2)
    side = 1 if lo_sign > 0 else -1

    def one(fc: float) -> tuple[tuple[float, float], SpectrumFit | None]:
        lo, hi = fc - band_fraction * f_mode, fc + band_fraction * f_mode
        lines = sorted({carrier + s * f for f in modes for s in (1, -1)
                        if lo < carrier + s * f < hi})
        try:
            return (lo, hi), fit_psd(psd, peaks=lines, band=(lo, hi))
        except QuietwellError:
            try:
                half = 0.5 * min((abs(f - fc) for f in lines if f != fc), default=hi - lo)
                band = (max(lo, fc - half), min(hi, fc + half))
                return band, fit_psd(psd, peaks=[fc], band=band)
            except QuietwellError:
                return (lo, hi), None

    return SidebandSpectrum(axis, psd, one(carrier + side * f_mode), one(carrier - side * f_mode))


@_styled
def sideband_figure(run: Any, record: int = 0, *, spectrum: SidebandSpectrum | None = None):
    """The heterodyne beat PSD (V**2/Hz) around the Stokes and anti-Stokes sidebands of the
    run's axis, with the fitted lines, and the sideband ratio and occupation of the run's
    summary (``n = R/(1 - R)``)."""
    sp = spectrum if spectrum is not None else sideband_fits(run, record)
    summary = _summary(run)
    fig, axs = _figure(1, 2, height=3.0, top=0.5, sharey=True)
    colour = AXIS_COLOURS.get(sp.axis, _INK)
    f, p = sp.psd.frequency, np.asarray(sp.psd.psd)
    for ax, (name, (band, fit)) in zip(axs[0], (("Stokes", sp.stokes),
                                                ("anti-Stokes", sp.antistokes)), strict=True):
        sel = (f >= band[0]) & (f <= band[1])
        fs_, ps_, k = _thin(f[sel], p[sel])
        ax.semilogy(fs_ / 1e3, ps_, ".", ms=2.2, color=colour, alpha=0.55,
                    label=f"record {record}, beat PSD" + (f" ({k} bins a point)" if k > 1 else ""))
        if fit is not None:
            ax.semilogy(fs_ / 1e3, fit.model(fs_), "-", color=_MODEL, lw=1.1,
                        label=f"fit, red. dev. {fit.goodness.reduced:.2f}")
        ax.set_title(f"{name} sideband of {sp.axis}", loc="left")
        centre = 0.5 * (band[0] + band[1]) if fit is None else min(
            (pk.f0 for pk in fit.peaks), key=lambda x: abs(x - 0.5 * (band[0] + band[1])))
        ax.axvline(centre / 1e3, color=_SOFT, ls=":", lw=0.8)
        ax.set_xlabel("beat frequency (kHz)")
        ax.legend()
    axs[0][0].set_ylabel("PSD (V²/Hz)")
    r, r_err = _est(summary, "sideband_ratio")
    n, n_err = _est(summary, "occupation")
    fig.suptitle(f"ratio R = {r:.3g} ± {r_err:.2g}, occupation n = {n:.3g} ± {n_err:.2g}",
                 fontsize=8.5, x=0.02, ha="left", color=_INK)
    return fig


def figure_svg(fig) -> str:
    """The figure as an inline ``<svg>`` element (fonts as paths: no external resource)."""
    import io

    import matplotlib

    buf = io.StringIO()
    with matplotlib.rc_context(_STYLE):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    return text[text.index("<svg"):]
