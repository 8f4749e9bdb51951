"""Campaign files: a measurement programme that runs unchanged on every setup.

A campaign is a TOML file::

    [campaign]
    name = "characterise"                 # letters, digits, '-', '_'
    description = "calibrate, pump down, cool, reheat"

    [[step]]
    id = "charge"                         # unique; later steps refer to it
    plan = "charge_calibration"           # a step of quietwell.plans.STEPS
    pressure = "3 mbar"                   # parameters of that step, with units
    charge_steps = [0, -1, -1, -1, -1]
    drive_frequency = { setup = "trap.frequency_x", times = 0.85 }
    drive_amplitude = "8 V"

    [[step]]
    id = "thermal"
    plan = "thermal_calibration"
    pressure = "3 mbar"
    mass = { from = "charge", result = "mass" }   # a result of an earlier step

A parameter is a literal (a number in SI, or a string with a unit: ``"5e-7 Torr"``),
a reference to a value of the setup (``{ setup = PATH, times = k }``), or a reference
to a result of an earlier step (``{ from = STEP_ID, result = NAME }``, with errors).
A result that sets a device (a gain, a pressure) must be bounded: ``clip = [lo, hi]``
(the value is clipped into it); ``otherwise = VALUE`` is used when the step gave no
finite value. :func:`check_campaign` validates every step against the setup and the
state the previous step leaves, with no device opened.
"""

from __future__ import annotations

import hashlib
import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from .._errors import InputError, LimitError, QuietwellError
from ..physics import Estimate, sphere_mass
from ..plans import STEPS, Checked, LabState, Param, state_after, unsafe_reason
from ..plans._state import pressure_move_seconds
from ..setup import Setup
from ..setup._units import parse_quantity

__all__ = ["Campaign", "CampaignStep", "CheckedCampaign", "Ref", "load_campaign",
           "parse_campaign", "check_campaign", "resolve_params", "SETUP_VALUES"]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_STEP_KEYS = ("id", "plan", "note")


def _f(i: int):
    return lambda s: s.trap.frequencies[i]


#: Values of the setup a campaign may refer to: path -> (kind, getter).
SETUP_VALUES: dict[str, tuple[str, Any]] = {
    "trap.frequency_x": ("frequency", _f(0)),
    "trap.frequency_y": ("frequency", _f(1)),
    "trap.frequency_z": ("frequency", _f(2)),
    "trap.loss_pressure": ("pressure", lambda s: s.trap.loss_pressure),
    "trap.power": ("power", lambda s: s.trap.power),
    "vacuum.base_pressure": ("pressure", lambda s: s.vacuum.base_pressure),
    "vacuum.start_pressure": ("pressure", lambda s: s.vacuum.start_pressure),
    "limits.pressure_min": ("pressure", lambda s: s.limits.pressure_min),
    "limits.pressure_max": ("pressure", lambda s: s.limits.pressure_max),
    "limits.feedback_gain_max": ("rate", lambda s: s.limits.feedback_gain_max),
    "limits.electrode_voltage_max": ("voltage", lambda s: s.limits.electrode_voltage_max),
    "detector.sample_rate": ("frequency", lambda s: s.detector.sample_rate),
}


@dataclass(frozen=True)
class Ref:
    """A reference to a result of an earlier step."""

    step: str
    result: str
    clip: tuple[float, float] | None = None
    otherwise: Any = None
    times: float = 1.0


@dataclass(frozen=True)
class CampaignStep:
    """One step as written: its index, id, plan and parameters (literals in SI, Refs)."""

    index: int
    id: str
    plan: str
    params: dict[str, Any]
    note: str = ""

    def where(self, source: str, key: str | None = None) -> str:
        at = f"{source}: step {self.index} ({self.id!r})"
        return at if key is None else f"{at} key {key}"


@dataclass(frozen=True)
class Campaign:
    """A parsed campaign file (setup-independent)."""

    name: str
    description: str
    steps: tuple[CampaignStep, ...]
    source: str
    text: str

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode()).hexdigest()


@dataclass(frozen=True)
class CheckedStep:
    step: CampaignStep
    checked: Checked
    start_s: float          # estimated lab time from the campaign's start to this step
    move_s: float           # of which the pressure move into the step
    deferred: tuple[str, ...] = ()   # parameters resolved only at run time
    after: LabState | None = None    # the state the campaign is in after this step


@dataclass
class CheckedCampaign:
    campaign: Campaign
    setup: Setup
    steps: list[CheckedStep] = field(default_factory=list)

    @property
    def duration_s(self) -> float:
        return sum(s.move_s + s.checked.duration_s for s in self.steps)


# --- parsing -------------------------------------------------------------------------


def load_campaign(path: str | Path) -> Campaign:
    """Read and parse the campaign file ``path`` (one-line errors naming it)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{p}: no such campaign file; give the path of a campaign .toml "
                         "(see campaigns/)") from None
    except IsADirectoryError:
        raise InputError(f"{p}: is a folder, not a campaign file; give the path of a "
                         "campaign .toml (see campaigns/)") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read the campaign file ({exc}); check the path") from None
    return parse_campaign(text, str(p))


def parse_campaign(text: str, source: str = "<campaign>") -> Campaign:
    """Parse campaign TOML ``text``; ``source`` names it in errors."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{source}: not valid TOML ({exc}); fix the file") from None
    if "setup" in data and "trap" in data:
        raise InputError(f"{source}: this is a setup file, not a campaign; give it with --setup "
                         "and a campaign file (see campaigns/) as the first argument")
    for key in data:
        if key not in ("campaign", "step"):
            raise InputError(f"{source}: [{key}] is not a campaign section; allowed are "
                             "[campaign] and [[step]]; fix the spelling or remove it")
    head = data.get("campaign")
    if not isinstance(head, dict):
        raise InputError(f"{source}: the [campaign] table is missing; add [campaign] with "
                         "name = \"...\" at the top")
    for key in head:
        if key not in ("name", "description"):
            raise InputError(f"{source}: [campaign] {key} is not a known key; allowed are "
                             "name, description; fix the spelling or remove it")
    name = head.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise InputError(f"{source}: [campaign] name = {name!r}: expected 1-64 letters, digits, "
                         "'.', '-' or '_'; fix the file")
    desc = head.get("description", "")
    if not isinstance(desc, str):
        raise InputError(f"{source}: [campaign] description = {desc!r}: expected a string; "
                         "fix the file")
    raw_steps = data.get("step")
    if not isinstance(raw_steps, list) or not raw_steps:
        raise InputError(f"{source}: the campaign has no steps; add at least one [[step]] "
                         "table with id and plan")
    steps: list[CampaignStep] = []
    seen: dict[str, int] = {}
    for i, raw in enumerate(raw_steps):
        steps.append(_parse_step(raw, i, source, seen))
        seen[steps[-1].id] = i
    return Campaign(name, desc, tuple(steps), source, text)


def _parse_step(raw: Any, i: int, source: str, earlier: Mapping[str, int]) -> CampaignStep:
    at = f"{source}: step {i}"
    if not isinstance(raw, dict):
        raise InputError(f"{at}: expected a [[step]] table; fix the file")
    sid = raw.get("id")
    if not isinstance(sid, str) or not _NAME.match(sid):
        raise InputError(f"{at} key id = {sid!r}: expected a name of 1-64 letters, digits, '.',"
                         " '-' or '_' that later steps can refer to; fix the file")
    if sid in earlier:
        raise InputError(f"{at} key id = {sid!r}: step {earlier[sid]} has the same id; give "
                         "every step its own id")
    plan = raw.get("plan")
    if plan not in STEPS:
        raise InputError(f"{at} ({sid!r}) key plan = {plan!r}: not a known step; allowed are "
                         f"{', '.join(STEPS)}; fix the spelling")
    note = raw.get("note", "")
    if not isinstance(note, str):
        raise InputError(f"{at} ({sid!r}) key note = {note!r}: expected a string; fix the file")
    spec = STEPS[plan]
    step = CampaignStep(i, sid, plan, {}, note)
    for key, value in raw.items():
        if key in _STEP_KEYS:
            continue
        if key not in spec.params:
            raise InputError(f"{step.where(source, key)}: not a parameter of {plan}; allowed are "
                             f"{', '.join(spec.params)}; fix the spelling or remove it")
        step.params[key] = _parse_param(value, spec.params[key], step.where(source, key),
                                        earlier)
    return step


def _parse_param(value: Any, param: Param, where: str, earlier: Mapping[str, int]) -> Any:
    if isinstance(value, dict):
        if "from" in value:
            return _parse_ref(value, param, where, earlier)
        if "setup" in value:
            return _parse_setup_ref(value, param, where)
        if param.estimate and "value" in value:
            extra = set(value) - {"value", "stderr"}
            if extra:
                raise InputError(f"{where} = {value!r}: unknown key(s) {', '.join(sorted(extra))}"
                                 "; a value with error has value and stderr")
            v = _literal(value["value"], param, where)
            e = _literal(value.get("stderr", 0.0), param, f"{where}.stderr")
            return Estimate(v, e)
        raise InputError(f"{where} = {value!r}: a table must be a reference "
                         "({ from = STEP, result = NAME } or { setup = PATH }); fix the file")
    if param.count is not None:
        if not isinstance(value, list):
            want = "a list" if param.count == 0 else f"a list of {param.count} values [x, y, z]"
            raise InputError(f"{where} = {value!r}: expected {want}; fix the file")
        if param.count and len(value) != param.count:
            raise InputError(f"{where} = {value!r}: expected {param.count} values [x, y, z], "
                             f"got {len(value)}; fix the file")
        return [_parse_param(v, replace(param, count=None), f"{where}[{j}]", earlier)
                for j, v in enumerate(value)]
    return _literal(value, param, where)


def _literal(value: Any, param: Param, where: str) -> Any:
    kind = param.kind
    if kind == "integer":
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(f"{where} = {value!r}: expected an integer; fix the file")
        return value
    if kind == "text":
        if not isinstance(value, str):
            raise InputError(f"{where} = {value!r}: expected a string; fix the file")
        return value
    if kind == "axes":
        if (not isinstance(value, list) or not value
                or any(a not in ("x", "y", "z") for a in value)):
            raise InputError(f"{where} = {value!r}: expected a list of axes among \"x\", \"y\", "
                             "\"z\"; fix the file")
        return value
    if isinstance(value, list | dict):
        raise InputError(f"{where} = {value!r}: expected one {kind} value; fix the file")
    x = parse_quantity(value, kind, where)
    if not math.isfinite(x):
        raise InputError(f"{where} = {value!r}: not a finite {kind}; fix the file")
    return x


def _parse_ref(value: dict, param: Param, where: str, earlier: Mapping[str, int]) -> Ref:
    extra = set(value) - {"from", "result", "clip", "otherwise", "times"}
    if extra:
        raise InputError(f"{where} = {value!r}: unknown key(s) {', '.join(sorted(extra))}; a "
                         "reference has from, result and optionally clip, otherwise, times")
    src, result = value.get("from"), value.get("result")
    if src not in earlier:
        later = "" if not isinstance(src, str) else " (a step can only use earlier steps)"
        raise InputError(f"{where}: from = {src!r} is not the id of an earlier step{later}; "
                         f"earlier steps are {', '.join(earlier) or 'none'}")
    if not isinstance(result, str):
        raise InputError(f"{where}: result = {result!r}: name the result to take from step "
                         f"{src!r}; fix the file")
    times = value.get("times", 1.0)
    if isinstance(times, bool) or not isinstance(times, int | float) or not times > 0:
        raise InputError(f"{where}: times = {times!r}: expected a number > 0; fix the file")
    clip = value.get("clip")
    if clip is not None:
        if not isinstance(clip, list) or len(clip) != 2:
            raise InputError(f"{where}: clip = {clip!r}: expected [lowest, highest] with units;"
                             " fix the file")
        lo, hi = (_literal(c, replace(param, count=None), f"{where}.clip") for c in clip)
        if not lo < hi:
            raise InputError(f"{where}: clip = {clip!r}: the lowest value must be below the "
                             "highest; fix the file")
        clip = (lo, hi)
    otherwise = value.get("otherwise")
    if otherwise is not None:
        otherwise = _literal(otherwise, replace(param, count=None), f"{where}.otherwise")
    return Ref(src, result, clip, otherwise, float(times))


def _parse_setup_ref(value: dict, param: Param, where: str) -> tuple[str, float]:
    extra = set(value) - {"setup", "times"}
    if extra:
        raise InputError(f"{where} = {value!r}: unknown key(s) {', '.join(sorted(extra))}; a "
                         "setup reference has setup and optionally times")
    path = value["setup"]
    if path not in SETUP_VALUES:
        raise InputError(f"{where}: setup = {path!r} is not a value campaigns may use; allowed "
                         f"are {', '.join(SETUP_VALUES)}")
    kind = SETUP_VALUES[path][0]
    if kind != param.kind:
        raise InputError(f"{where}: setup = {path!r} is a {kind}, and this parameter is a "
                         f"{param.kind}; refer to a {param.kind}")
    times = value.get("times", 1.0)
    if isinstance(times, bool) or not isinstance(times, int | float) or not times > 0:
        raise InputError(f"{where}: times = {times!r}: expected a number > 0; fix the file")
    return ("setup", path, float(times))  # type: ignore[return-value]


# --- resolving and checking ----------------------------------------------------------


def _ref_kind_problem(ref: Ref, param: Param, campaign: Campaign) -> str | None:
    src = next(s for s in campaign.steps if s.id == ref.step)
    results = STEPS[src.plan].results
    if ref.result not in results:
        return (f"step {ref.step!r} ({src.plan}) gives no result {ref.result!r}; it gives "
                f"{', '.join(results)}")
    res = results[ref.result]
    if res.kind != param.kind:
        return f"result {ref.result!r} is a {res.kind}, and this parameter is a {param.kind}"
    n = len(res.keys)
    if (param.count or 1) != n and not (param.count is None and n == 1):
        return f"result {ref.result!r} has {n} value(s), and this parameter takes {param.count}"
    if param.kind not in ("mass", "calibration") and ref.clip is None:
        return (f"result {ref.result!r} sets a device, so the reference needs bounds: add "
                "clip = [lowest, highest] (with units)")
    return None


def _stand_in(ref: Ref, param: Param, setup: Setup, end: int) -> Any:
    """A value of the right kind for ``check``, before the result exists."""
    if param.kind == "mass":
        p = setup.particle
        return Estimate(float(sphere_mass(p.radius, p.density)), 0.0)
    if param.kind == "calibration":
        return [Estimate(c, 0.0) for c in setup.detector.calibration]
    assert ref.clip is not None
    return ref.clip[end]


def resolve_params(step: CampaignStep, setup: Setup, results: Mapping[str, Mapping[str, Any]]
                   | None, *, source: str = "", end: int = 0) -> tuple[dict[str, Any], list[str]]:
    """Parameters of ``step`` in SI with references replaced.

    ``results`` maps earlier step ids to their results (``{name: value}``, an Estimate
    dict ``{"value", "stderr"}`` or a list of them). With ``results=None`` (check) a
    result is replaced by a stand-in: the setup's nominal mass or calibration, or an end
    of the reference's ``clip`` (``end`` 0 or 1). Returns the parameters and the names of
    those that came from results.
    """
    spec = STEPS[step.plan]
    out: dict[str, Any] = {}
    deferred: list[str] = []
    for key, value in step.params.items():
        param = spec.params[key]
        if isinstance(value, tuple) and value and value[0] == "setup":
            _, path, times = value
            out[key] = SETUP_VALUES[path][1](setup) * times
        elif isinstance(value, Ref):
            deferred.append(key)
            if results is None:
                out[key] = _stand_in(value, param, setup, end)
            else:
                out[key] = _take_result(value, param, step, results, source)
        else:
            out[key] = value
    return out, deferred


def _take_result(ref: Ref, param: Param, step: CampaignStep,
                 results: Mapping[str, Mapping[str, Any]], source: str) -> Any:
    got = results.get(ref.step, {}).get(ref.result)

    def est(v):
        if isinstance(v, dict):
            return Estimate(float(v["value"]) * ref.times, float(v["stderr"]) * ref.times)
        return None if v is None else float(v) * ref.times

    if isinstance(got, list):
        val = [est(v) for v in got]
        ok = all(v is not None and math.isfinite(v.value) for v in val)
    else:
        val = est(got)
        x = val.value if isinstance(val, Estimate) else val
        ok = x is not None and math.isfinite(x)
    if not ok:
        if ref.otherwise is not None:
            return ref.otherwise
        raise QuietwellError(f"{step.where(source)}: step {ref.step!r} gave no finite "
                             f"{ref.result!r}; add otherwise = VALUE to the reference, or "
                             "look at that step's summary")
    if param.kind in ("mass", "calibration"):
        return val
    x = val.value if isinstance(val, Estimate) else val
    if ref.clip is not None:
        x = min(max(x, ref.clip[0]), ref.clip[1])
    return x


def check_campaign(campaign: Campaign, setup: Setup, *,
                   results: Mapping[str, Mapping[str, Any]] | None = None,
                   before: LabState | None = None) -> CheckedCampaign:
    """Validate every step of ``campaign`` on ``setup``, in order, with no device opened.

    Each step's parameters are cleaned by its validate function; the order of steps is
    refused where it would leave the particle undamped below the loss pressure or cool
    an uncharged particle. Raises :class:`~quietwell.InputError` (one line).
    """
    src = campaign.source
    out = CheckedCampaign(campaign, setup)
    state = before
    t = 0.0
    for step in campaign.steps:
        spec = STEPS[step.plan]
        for key, value in step.params.items():
            if isinstance(value, Ref):
                problem = _ref_kind_problem(value, spec.params[key], campaign)
                if problem:
                    raise InputError(f"{step.where(src, key)}: {problem}; fix the file")
        checked = None
        ends = (0, 1) if any(isinstance(v, Ref) and v.clip for v in step.params.values()) \
            else (0,)
        for end in ends:  # a clipped result is checked at both ends of its range
            params, deferred = resolve_params(step, setup, results, source=src, end=end)
            try:
                checked = spec.validate(setup, params)
            except (InputError, LimitError) as exc:
                raise type(exc)(f"{step.where(src)}: {exc}; fix the file") from None
        assert checked is not None
        why = unsafe_reason(setup, state, checked)
        if why:
            raise InputError(f"{step.where(src)}: unsafe order of steps: {why}; put a step "
                             "that engages cold damping before it, or raise its pressure")
        prev_p = state.pressure if state else None
        move = pressure_move_seconds(prev_p, checked.needs.pressure)
        t_step = t
        t += move + checked.duration_s
        state = state_after(state, checked)
        out.steps.append(CheckedStep(step, checked, t_step, move, tuple(deferred), state))
    return out
