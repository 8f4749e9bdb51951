"""Wrap a plan body into a run with staged detectors and the live fitter subscribed."""

from __future__ import annotations

import math
from collections.abc import Callable, Generator, Sequence
from typing import Any

import bluesky.plan_stubs as bps
import bluesky.preprocessors as bpp

from .._errors import InputError
from ..live import LiveFitter
from ..physics import Estimate, sphere_mass
from ._common import Apparatus, Recorder

__all__ = ["run_with_fitter", "configure_detector", "nominal_mass", "nominal_calibration",
           "as_estimate"]


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


def as_estimate(value: Estimate | float, what: str) -> Estimate:
    """An :class:`Estimate` from an Estimate or a plain number (error unknown: 0)."""
    if isinstance(value, Estimate):
        return value
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(f"{what}={value!r} is not a number; give a value in SI units")
    return Estimate(float(value), 0.0)


def nominal_mass(app: Apparatus) -> Estimate:
    """Mass (kg) from the setup's nominal radius and density, with no error (a nominal)."""
    p = app.setup.particle
    return Estimate(float(sphere_mass(p.radius, p.density)), 0.0)


def nominal_calibration(app: Apparatus) -> list[Estimate]:
    """Calibration (V/m) per axis from the setup description, with no error (a nominal)."""
    return [Estimate(c, 0.0) for c in app.setup.detector.calibration]
