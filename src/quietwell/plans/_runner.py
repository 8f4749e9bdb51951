"""Wrap a plan body into a run with staged detectors and the live fitter subscribed."""

from __future__ import annotations

from collections.abc import Callable, Generator, Mapping, Sequence
from typing import Any

import bluesky.plan_stubs as bps
import bluesky.preprocessors as bpp

from .._errors import InputError, LimitError
from ..live import LiveFitter
from ..physics import Estimate, sphere_mass
from ._common import Apparatus, Recorder

__all__ = ["run_with_fitter", "configure_detector", "nominal_mass", "nominal_calibration",
           "take", "clean_detector", "DETECTOR_DEFAULTS"]

#: Detector settings every recording plan accepts (None: keep the detector's setting).
DETECTOR_DEFAULTS: dict[str, Any] = {"sample_rate": None, "record_length": None,
                                     "input_range": None}


def take(params: Mapping[str, Any], plan: str, *, required: Sequence[str] = (),
         optional: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The parameters of ``plan``: every required one present, no unknown one.

    Returns a new dict with the defaults of ``optional`` filled in.
    """
    optional = optional or {}
    allowed = [*required, *optional]
    for key in params:
        if key not in allowed:
            raise InputError(f"{plan}: {key!r} is not a parameter of this step; allowed are "
                             f"{', '.join(allowed)}; fix the spelling or remove it", key=key)
    for key in required:
        if key not in params or params[key] is None:
            raise InputError(f"{plan}: parameter {key!r} is missing; add it", key=key)
    out = dict(optional)
    out.update({k: v for k, v in params.items()})
    return out


def clean_detector(setup: Any, a: dict[str, Any]) -> None:
    """Check ``sample_rate`` (Hz), ``record_length`` (samples) and ``input_range`` (V) of
    ``a`` in place against the setup's limits (None keeps the detector's setting)."""
    lim = setup.limits
    if a.get("sample_rate") is not None:
        fs = a["sample_rate"]
        if isinstance(fs, bool) or not isinstance(fs, int | float) or not 0 < fs <= \
                lim.sample_rate_max:
            raise LimitError(f"sample_rate={fs!r} Hz is outside (0, {lim.sample_rate_max:g}] Hz,"
                             f" the setup {setup.name!r} limit; choose a rate inside it",
                             key="sample_rate")
        a["sample_rate"] = float(fs)
    if a.get("record_length") is not None:
        n = a["record_length"]
        if isinstance(n, bool) or not isinstance(n, int) or not 1024 <= n <= \
                lim.record_length_max:
            raise LimitError(f"record_length={n!r} samples is outside [1024, "
                             f"{lim.record_length_max}], the setup {setup.name!r} limit; "
                             "choose an integer inside it", key="record_length")
    if a.get("input_range") is not None:
        r = a["input_range"]
        if isinstance(r, bool) or not isinstance(r, int | float) or not 0 < r <= 1e3:
            raise InputError(f"input_range={r!r} V must be a positive voltage (the "
                             "digitiser's +- range, at most 1000 V); give one in V",
                             key="input_range")
        a["input_range"] = float(r)


def run_with_fitter(app: Apparatus, detectors: Sequence[Any], fitter: LiveFitter, md: dict,
                    body: Callable[[Recorder], Generator]) -> Generator:
    """Open a run around ``body(recorder)`` with ``detectors`` staged and ``fitter.feed``
    subscribed.

    However the body ends (an exception, an abort), the fits of every completed record
    are read into the run before it closes, and the fitter's thread is stopped after.
    Returns what ``body`` returns (the plans' summary values; ``run_wrapper`` itself
    would return the run's uid), so ``RunEngine(call_returns_result=True)`` hands it
    back as ``plan_result``.
    """
    rec = Recorder(app, detectors, fitter)
    returned: list = []

    def kept(gen: Generator) -> Generator:
        returned.append((yield from gen))

    plan = bpp.finalize_wrapper(kept(body(rec)), rec.flush)
    plan = bpp.run_wrapper(plan, md=md)
    plan = bpp.stage_wrapper(plan, list(detectors))
    plan = bpp.subs_wrapper(plan, {"all": [fitter.feed]})
    plan = bpp.finalize_wrapper(plan, _close(fitter))
    yield from plan
    return returned[0] if returned else None


def _close(fitter: LiveFitter) -> Generator:
    # a generator, so that the fitter closes when the wrapper's ``finally`` runs it
    fitter.close()
    yield from ()


def configure_detector(app: Apparatus, detector: Any, sample_rate: float | None,
                       record_length: int | None, input_range: float | None = None
                       ) -> Generator:
    """Plan stub: set the sample rate (Hz), record length (samples) and input range (+-V)
    before staging.

    Choose the input range for the signal: a motion of a few quanta is microvolts, far
    below one step of a digitiser set for room-temperature motion, and a quantiser
    without enough noise ahead of it suppresses such signals.
    """
    args: list = []
    if input_range is not None:
        args += [detector.input_range, float(input_range)]
    if sample_rate is not None:
        args += [detector.sample_rate, float(sample_rate)]
    if record_length is not None:
        args += [detector.record_length, int(record_length)]
    if args:
        yield from bps.mv(*args)
    rate = yield from bps.rd(detector.sample_rate)
    length = yield from bps.rd(detector.record_length)
    return float(rate), int(length)


def nominal_mass(app: Apparatus) -> Estimate:
    """Mass (kg) from the setup's nominal radius and density, with no error (a nominal)."""
    p = app.setup.particle
    return Estimate(float(sphere_mass(p.radius, p.density)), 0.0)


def nominal_calibration(app: Apparatus) -> list[Estimate]:
    """Calibration (V/m) per axis from the setup description, with no error (a nominal)."""
    return [Estimate(c, 0.0) for c in app.setup.detector.calibration]
