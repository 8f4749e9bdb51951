"""What every quietwell plan shares: the apparatus, run metadata, the record stub
(primary event + pipelined fit), the gauge choice, feedback stubs and the summary.

Plans open runs; the stubs here never do.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import bluesky.plan_stubs as bps
import numpy as np
from bluesky.utils import short_uid

from .. import __version__
from .._errors import QuietwellError
from .._plain import plain
from ..live import LiveFitter
from ..physics import AXES
from ..setup import Setup
from ._derived_device import DerivedValues

__all__ = ["Apparatus", "Recorder", "RecordMismatchError", "run_metadata", "set_feedback", "wait_lab",
           "emit_summary"]


@dataclass
class Apparatus:
    """The devices of one setup, as built from its profile.

    Attributes
    ----------
    setup : Setup
        The parsed setup description (limits, nominal values).
    detector : quietwell.devices.MotionDetector
    electrodes : quietwell.devices.FeedbackElectrodes
    charge : quietwell.devices.ChargeControl
    laser : quietwell.devices.TrapLaser
    gauges : sequence of quietwell.devices.VacuumGauge
        Named as in the setup's ``[[vacuum.gauges]]``.
    pressure : quietwell.devices.PressureController
    clock : quietwell.devices.LabClock
    heterodyne : quietwell.devices.HeterodyneDetector or None
    sim_truth : callable or None
        For a simulated setup: returns the simulation's static truth (radius_m, ...).
    sim_pressure : callable or None
        For a simulated setup: the true chamber pressure in Pa now.
    """

    setup: Setup
    detector: Any
    electrodes: Any
    charge: Any
    laser: Any
    gauges: Sequence[Any]
    pressure: Any
    clock: Any
    heterodyne: Any = None
    sim_truth: Callable[[], dict] | None = None
    sim_pressure: Callable[[], float] | None = None
    extras: dict[str, Any] = field(default_factory=dict)

    def devices(self) -> list[Any]:
        """Every device, for connecting them."""
        out = [self.detector, self.electrodes, self.charge, self.laser, self.pressure,
               self.clock, *self.gauges]
        return out + ([self.heterodyne] if self.heterodyne is not None else [])


def run_metadata(app: Apparatus, plan_name: str, plan_args: dict, md: dict | None,
                 dimensions: list | None = None) -> dict:
    """Start-document metadata shared by every plan (setup, hash, version, sim truth)."""
    out = {
        "plan_name": plan_name,
        "plan_args": plan_args,
        "setup": app.setup.name,
        "setup_description": app.setup.as_dict(),
        "setup_sha256": app.setup.sha256,
        "quietwell_version": __version__,
        "hints": {"dimensions": dimensions or [(["time"], "primary")]},
    }
    if app.sim_truth is not None:
        out["sim_truth"] = app.sim_truth()
    out.update(md or {})
    return out


def set_feedback(app: Apparatus, gain: float | None, axes: Sequence[str] = AXES):
    """Plan stub: cold damping on with ``gain`` (1/s) on ``axes``, or off if ``gain`` is None."""
    args: list = []
    for a in axes:
        ax = app.electrodes.axis(a)
        if gain is None:
            args += [ax.enabled, False]
        else:
            args += [ax.gain, float(gain), ax.enabled, True]
    yield from bps.mv(*args)


def wait_lab(app: Apparatus, seconds: float):
    """Plan stub: let ``seconds`` of setup time pass (simulated or real)."""
    if seconds > 0:
        yield from bps.mv(app.clock, float(seconds))


class _PressurePick(DerivedValues):
    """The gauge reading used for an event: ``pressure`` (Pa), ``pressure_gauge``, and for
    a sim ``sim_pressure`` (Pa, the true chamber pressure)."""

    def __init__(self, sim: bool) -> None:
        super().__init__(name="pressure_pick")
        self.sim = sim
        self.set(math.nan, "none", math.nan)

    def set(self, p: float, gauge: str, true_p: float) -> None:
        self.clear()
        self.put("pressure", p, "Pa")
        self.put("pressure_gauge", gauge, "")
        if self.sim:
            self.put("sim_pressure", true_p, "Pa")


class RecordMismatchError(QuietwellError, RuntimeError):
    """Records and their fits are out of step (a record rewound, duplicated or lost)."""


class Recorder:
    """Acquire records into ``primary`` and their fits into ``fits``, one behind.

    ``record()`` asks the run's :class:`~quietwell.plans._monitors.Monitors` whether to
    go on (it may wait out a pressure excursion on the lab clock, or end the run),
    triggers the detectors, reads them and the gauges into one ``primary`` event (with
    the chosen ``pressure``), asks the monitors whether the record is clean, then reads
    the fit of the previous record, so that each fit runs while the next record is
    acquired. ``flush()`` reads every outstanding fit. ``fits`` and ``primaries`` hold
    the plain fits and primary readings of the clean records, in order (what summaries
    are computed from); ``left_out`` the ``seq_num`` of the records taken while a
    condition held (kept in ``primary`` and ``fits``, never in a summary).
    """

    def __init__(self, app: Apparatus, detectors: Sequence[Any], fitter: LiveFitter) -> None:
        from ._monitors import Monitors

        self.app, self.detectors, self.fitter = app, list(detectors), fitter
        self.pick = _PressurePick(sim=app.sim_pressure is not None)
        self.monitors = Monitors(app)
        self.fits: list[dict] = []
        self.primaries: list[dict] = []
        self.left_out: list[int] = []
        self._saved = 0
        self._unread: list[tuple[int, bool]] = []  # (seq_num, clean) whose fit is unread
        self._accuracy = {g.name: g.accuracy for g in app.setup.vacuum.gauges}

    @property
    def _outstanding(self) -> int:
        return len(self._unread)

    def _choose(self, readings: dict) -> tuple[float, str]:
        best = (math.nan, "none", math.inf)
        for g in self.app.gauges:
            p = readings.get(f"{g.name}-pressure")
            st = readings.get(f"{g.name}-status")
            if p is None or st is None or str(st) != "ok" or not math.isfinite(p):
                continue
            acc = self._accuracy.get(g.name, 1.0)
            if acc < best[2]:
                best = (float(p), g.name, acc)
        return best[0], best[1]

    def record(self):
        """Plan stub: one record and its event; returns True if the record is clean."""
        # No checkpoint: a rewind would replay the messages since it (a second primary
        # event, a second fit submitted) while this object's records and pending fits
        # stay where they are. Without one, a pause, a suspender or a signal ends the
        # run (exit_status "abort"), and the step is redone as a whole.
        self.monitors.record = self._saved + 1
        yield from self.monitors.before_record(self.detectors[0])
        group = short_uid("record")
        for det in self.detectors:
            if hasattr(det, "trigger"):
                yield from bps.trigger(det, group=group)
        yield from bps.wait(group=group)
        yield from bps.create("primary")
        readings: dict = {}
        for det in self.detectors:
            r = yield from bps.read(det)
            readings.update({k: plain(v["value"]) for k, v in (r or {}).items()})
        for g in self.app.gauges:
            if g not in self.detectors:
                r = yield from bps.read(g)
                readings.update({k: plain(v["value"]) for k, v in (r or {}).items()})
        p, name = self._choose(readings)
        true_p = self.app.sim_pressure() if self.app.sim_pressure is not None else math.nan
        self.pick.set(p, name, true_p)
        yield from bps.read(self.pick)
        readings.update(self.pick.values)
        yield from bps.save()
        self._saved += 1
        clean = yield from self.monitors.after_record(readings, self.detectors[0])
        if clean:
            self.primaries.append(readings)
        else:
            self.left_out.append(self._saved)
        self._unread.append((self._saved, clean))
        while self._outstanding > 1:
            yield from self._read_fit()
        return clean

    def _read_fit(self):
        expected, clean = self._unread[0]  # the primary event's seq_num of the next fit
        self.fitter.want = expected
        yield from bps.trigger(self.fitter, wait=True)
        got = self.fitter.latest.get("record_seq_num")
        if got != expected:
            # a rewound, duplicated or lost record: no summary may pair records with the
            # wrong fits, so the run ends here (before the fit is stored) and the step is
            # redone as a whole
            raise RecordMismatchError(
                f"fit of record {got} read where the fit of record {expected} belongs "
                "(records and fits out of step); the run is ended without a summary, redo "
                "the step")
        yield from bps.create("fits")
        r = yield from bps.read(self.fitter)
        yield from bps.save()
        self.fitter.forget(expected)
        self._unread.pop(0)
        fit = {k: plain(v["value"]) for k, v in r.items()}
        yield from self.monitors.after_fit(fit)
        if clean:
            self.fits.append(fit)

    def flush(self):
        while self._outstanding > 0:
            yield from self._read_fit()

    def pairs(self) -> list[tuple[dict, dict]]:
        """(primary, fit) of every clean record whose fit has been read."""
        return list(zip(self.primaries, self.fits, strict=False))


def emit_summary(values: DerivedValues, rec: Recorder | None = None):
    """Plan stub: one event in the ``summary`` stream with the derived results.

    With the run's recorder, the summary also says which records it used
    (``records_used``: their ``seq_num`` in ``primary``, as text "1,2,5", since a table
    cell holds one value) and how many were left out because a monitor's condition held
    (``records_left_out``).
    """
    if rec is not None:
        left = set(rec.left_out)
        values.put("records_used", ",".join(str(i) for i in range(1, rec._saved + 1)
                                            if i not in left), "")
        values.put("records_left_out", len(left), "")
    yield from bps.trigger_and_read([values], name="summary")


def weighted_mean(values: Sequence[float], errors: Sequence[float]) -> tuple[float, float]:
    """Weighted mean and its error, the error inflated by sqrt(reduced chi2) when > 1."""
    m, err, _ = weighted_mean_chi2(values, errors)
    return m, err


def weighted_mean_chi2(values: Sequence[float], errors: Sequence[float]
                       ) -> tuple[float, float, float]:
    """:func:`weighted_mean` and the reduced chi2 of the values about it (nan for one value).

    Non-finite values and errors <= 0 are left out.
    """
    v = np.asarray(values, dtype=float)
    e = np.asarray(errors, dtype=float)
    ok = np.isfinite(v) & np.isfinite(e) & (e > 0)
    v, e = v[ok], e[ok]
    if v.size == 0:
        return math.nan, math.nan, math.nan
    w = 1 / e**2
    m = float(np.sum(w * v) / np.sum(w))
    err = float(1 / math.sqrt(np.sum(w)))
    chi2 = math.nan
    if v.size > 1:
        chi2 = float(np.sum(w * (v - m) ** 2) / (v.size - 1))
        err *= math.sqrt(max(1.0, chi2))
    return m, err, chi2
