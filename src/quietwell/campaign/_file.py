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
The values of a list may be literals or references to the setup; a result of an
earlier step is always a whole parameter.
A result that sets a device (a gain, a pressure) must be bounded: ``clip = [lo, hi]``
(the value is clipped into it); ``otherwise = VALUE`` is used when the step gave no
finite value. :func:`check_campaign` validates every step against the setup and the
state the previous step leaves, with no device opened.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from .._errors import InputError, LimitError, QuietwellError
from ..physics import Estimate, sphere_mass
from ..plans import STEPS, Checked, LabState, Param, state_after
from ..plans._state import pressure_move_seconds, unsafe_problem
from ..setup import Setup
from ..setup._units import parse_quantity

__all__ = ["Campaign", "CampaignStep", "CheckedCampaign", "Ref", "load_campaign",
           "parse_campaign", "check_campaign", "resolve_params", "step_error", "SETUP_VALUES"]

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
    """One step as written: its index, id, plan and parameters (literals in SI, Refs);
    ``raw`` keeps the parameters as the file wrote them, for messages."""

    index: int
    id: str
    plan: str
    params: dict[str, Any]
    note: str = ""
    raw: Mapping[str, Any] = field(default_factory=dict, compare=False)  # as written

    def where(self, source: str, key: str | None = None) -> str:
        at = f"{source}: step {self.index} ({self.id!r})"
        return at if key is None else f"{at} key {key}"


@dataclass(frozen=True)
class SimFault:
    """A fault the simulated laboratory injects: ``kind`` at ``after_s`` of lab time after
    step ``step`` starts, with its parameters in SI (``[[sim.fault]]``)."""

    kind: str
    step: str
    after_s: float
    params: dict[str, Any]


#: Faults of ``[[sim.fault]]``: their parameters as written -> (name in the simulated
#: laboratory's ``schedule_fault``, kind of value).
SIM_FAULTS: dict[str, dict[str, tuple[str, str]]] = {
    "lose_particle": {},
    "pressure_burst": {"factor": ("factor", "dimensionless"), "duration": ("duration_s", "time")},
    "gauge_dropout": {"gauge": ("name", "text"), "duration": ("duration_s", "time")},
    "change_charge": {"delta": ("delta_e", "integer")},
    "saturate_drive": {"duration": ("duration_s", "time")},
}


@dataclass(frozen=True)
class Campaign:
    """A parsed campaign file (setup-independent)."""

    name: str
    description: str
    steps: tuple[CampaignStep, ...]
    source: str
    text: str
    faults: tuple[SimFault, ...] = ()

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
    except UnicodeDecodeError as exc:
        raise InputError(f"{p}: not a text file (byte {exc.start} is not UTF-8); give a "
                         "campaign .toml written as UTF-8 text (see campaigns/)") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read the campaign file ({exc.strerror or exc}); check "
                         "the path and its permissions") from None
    return parse_campaign(text, str(p))


def parse_campaign(text: str, source: str = "<campaign>") -> Campaign:
    """Parse campaign TOML ``text``; ``source`` names it in errors."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{source}: not valid TOML ({exc}); fix the file at that place "
                         "(strings in double quotes, lists in [ ])") from None
    if "setup" in data and "trap" in data:
        raise InputError(f"{source}: this is a setup file, not a campaign; give it with --setup "
                         "and a campaign file (see campaigns/) as the first argument")
    for key, value in data.items():
        if key not in ("campaign", "step", "sim"):
            what = f"[{key}]" if isinstance(value, dict) else f"{key} = {_toml(value)}"
            raise InputError(f"{source}: {what} is not part of a campaign; allowed at the top "
                             "are the tables [campaign], [[step]] and [sim]; fix the spelling "
                             "or remove it")
    head = data.get("campaign")
    if head is None:
        raise InputError(f"{source}: the [campaign] table is missing; add [campaign] with "
                         "name = \"...\" at the top")
    if not isinstance(head, dict):
        raise InputError(f"{source}: campaign = {_toml(head)}: expected the table [campaign] "
                         "with name = \"...\"; write it as a table at the top")
    for key in head:
        if key not in ("name", "description"):
            raise InputError(f"{source}: [campaign] {key} is not a known key; allowed are "
                             "name, description; fix the spelling or remove it")
    name = head.get("name")
    if name is None:
        raise InputError(f"{source}: [campaign] name is missing; add name = \"...\" (1-64 "
                         "letters, digits, '.', '-' or '_')")
    if not isinstance(name, str) or not _NAME.match(name):
        raise InputError(f"{source}: [campaign] name = {_toml(name)}: expected 1-64 letters, digits, "
                         "'.', '-' or '_' (starting with a letter or digit); fix the file")
    desc = head.get("description", "")
    if not isinstance(desc, str):
        raise InputError(f"{source}: [campaign] description = {_toml(desc)}: expected a string; "
                         "fix the file")
    raw_steps = data.get("step")
    if raw_steps is None or raw_steps == []:
        raise InputError(f"{source}: the campaign has no steps; add at least one [[step]] "
                         "table with id and plan")
    if isinstance(raw_steps, dict):
        raise InputError(f"{source}: [step] is a single table; write [[step]] (double "
                         "brackets) above each step")
    if not isinstance(raw_steps, list):
        raise InputError(f"{source}: step = {_toml(raw_steps)}: expected [[step]] tables; "
                         "write each step as a [[step]] table with id and plan")
    ids = frozenset(r.get("id") for r in raw_steps
                    if isinstance(r, dict) and isinstance(r.get("id"), str))
    steps: list[CampaignStep] = []
    seen: dict[str, tuple[int, str]] = {}
    for i, raw in enumerate(raw_steps):
        steps.append(_parse_step(raw, i, source, _Context(seen, ids)))
        seen[steps[-1].id] = (i, steps[-1].plan)
    faults = _parse_sim(data.get("sim"), source, [st.id for st in steps])
    return Campaign(name, desc, tuple(steps), source, text, faults)


def _parse_sim(sim: Any, source: str, ids: list[str]) -> tuple[SimFault, ...]:
    """``[sim]`` with ``[[sim.fault]]`` tables: faults for a simulated setup."""
    if sim is None:
        return ()
    if not isinstance(sim, dict) or set(sim) - {"fault"}:
        raise InputError(f"{source}: [sim] may hold only [[sim.fault]] tables; fix the file")
    raw = sim.get("fault", [])
    if not isinstance(raw, list):
        raise InputError(f"{source}: [sim] fault must be [[sim.fault]] tables; fix the file")
    out = []
    for i, f in enumerate(raw):
        at = f"{source}: [[sim.fault]] {i}"
        if not isinstance(f, dict):
            raise InputError(f"{at}: expected a table; fix the file")
        kind = f.get("kind")
        if not isinstance(kind, str) or kind not in SIM_FAULTS:
            raise InputError(f"{at} key kind = {_toml(kind)}: not a fault of the simulated "
                             f"laboratory; allowed are {', '.join(SIM_FAULTS)}")
        step = f.get("step")
        if step not in ids:
            raise InputError(f"{at} key step = {_toml(step)}: not the id of a step; the steps "
                             f"are {', '.join(ids)}")
        allowed = SIM_FAULTS[kind]
        for key in f:
            if key not in ("kind", "step", "after", *allowed):
                raise InputError(f"{at} key {key}: not a parameter of {kind}; allowed are "
                                 f"step, after{''.join(', ' + k for k in allowed)}")
        after = _literal(f.get("after", 0.0), Param("time"), f"{at} key after")
        if after < 0:
            raise InputError(f"{at} key after = {_toml(f.get('after'))}: must be >= 0 s")
        params = {}
        for key, (name, kind_) in allowed.items():
            if key not in f:
                raise InputError(f"{at} key {key} is missing: {kind} needs it; add it")
            v = _literal(f[key], Param(kind_), f"{at} key {key}")
            if kind_ in ("time", "dimensionless") and not v > 0:
                raise InputError(f"{at} key {key} = {_toml(f[key])}: must be > 0")
            params[name] = v
        out.append(SimFault(kind, step, float(after), params))
    return tuple(out)


@dataclass(frozen=True)
class _Context:
    """What a step's references may use: the earlier steps (id -> (index, plan)), every
    step id of the file, and the id of the step being parsed."""

    earlier: Mapping[str, tuple[int, str]]
    ids: frozenset
    own: str = ""


def _parse_step(raw: Any, i: int, source: str, ctx: _Context) -> CampaignStep:
    at = f"{source}: step {i}"
    if not isinstance(raw, dict):
        raise InputError(f"{at} = {_toml(raw)}: expected a [[step]] table with id and plan; "
                         "fix the file")
    sid = raw.get("id")
    if sid is None:
        raise InputError(f"{at} key id is missing; add id = \"...\" (a name of 1-64 letters, "
                         "digits, '.', '-' or '_' that later steps can refer to)")
    if not isinstance(sid, str) or not _NAME.match(sid):
        raise InputError(f"{at} key id = {_toml(sid)}: expected a name of 1-64 letters, digits, '.',"
                         " '-' or '_' that later steps can refer to; fix the file")
    if sid in ctx.earlier:
        raise InputError(f"{at} key id = {_toml(sid)}: step {ctx.earlier[sid][0]} has the same id; "
                         "give every step its own id")
    plan = raw.get("plan")
    if plan is None:
        raise InputError(f"{at} ({sid!r}) key plan is missing; add plan = one of "
                         f"{', '.join(STEPS)}")
    if not isinstance(plan, str) or plan not in STEPS:
        raise InputError(f"{at} ({sid!r}) key plan = {_toml(plan)}: not a known step; allowed are "
                         f"{', '.join(STEPS)}; fix the spelling")
    note = raw.get("note", "")
    if not isinstance(note, str):
        raise InputError(f"{at} ({sid!r}) key note = {_toml(note)}: expected a string; fix the file")
    spec = STEPS[plan]
    step = CampaignStep(i, sid, plan, {}, note, raw={k: v for k, v in raw.items()
                                                     if k not in _STEP_KEYS})
    ctx = replace(ctx, own=sid)
    for key, value in raw.items():
        if key in _STEP_KEYS:
            continue
        if key not in spec.params:
            raise InputError(f"{step.where(source, key)}: not a parameter of {plan}; allowed are "
                             f"{', '.join(spec.params)}; fix the spelling or remove it")
        step.params[key] = _parse_param(value, spec.params[key], step.where(source, key), ctx)
    return step


def _parse_param(value: Any, param: Param, where: str, ctx: _Context,
                 in_list: bool = False) -> Any:
    if isinstance(value, dict):
        if "from" in value:
            if in_list:
                raise InputError(f"{where} = {_toml(value)}: a result of an earlier step can be "
                                 "a whole parameter, not an element of a list; give the list's "
                                 "values, or refer to a whole result")
            return _parse_ref(value, param, where, ctx)
        if "setup" in value:
            return _parse_setup_ref(value, param, where)
        if param.estimate and "value" in value:
            extra = set(value) - {"value", "stderr"}
            if extra:
                raise InputError(f"{where} = {_toml(value)}: unknown key(s) {', '.join(sorted(extra))}"
                                 "; a value with error has value and stderr")
            v = _literal(value["value"], param, where)
            e = _literal(value.get("stderr", 0.0), param, f"{where}.stderr")
            if e < 0:
                raise InputError(f"{where}.stderr = {_toml(value['stderr'])}: a standard error "
                                 "must be >= 0; fix the file")
            return Estimate(v, e)
        with_error = " or { value = V, stderr = E }" if param.estimate else ""
        raise InputError(f"{where} = {_toml(value)}: a table must be a reference "
                         f"({{ from = STEP, result = NAME }} or {{ setup = PATH }}){with_error};"
                         f" or give a value like {_example(replace(param, count=None))}; "
                         "fix the file")
    if param.count is not None:
        if not isinstance(value, list):
            want = "a list" if param.count == 0 else f"a list of {param.count} values [x, y, z]"
            raise InputError(f"{where} = {_toml(value)}: expected {want}, e.g. {_example(param)}; "
                             "fix the file")
        if param.count and len(value) != param.count:
            raise InputError(f"{where} = {_toml(value)}: expected {param.count} values [x, y, z], "
                             f"got {len(value)}; fix the file")
        return [_parse_param(v, replace(param, count=None), f"{where}[{j}]", ctx, True)
                for j, v in enumerate(value)]
    return _literal(value, param, where)


#: An example value (as written in a file) of each kind of parameter.
_EXAMPLES = {"pressure": '"3 mbar"', "rate": '"5000 1/s"', "frequency": '"100 kHz"',
             "voltage": '"8 V"', "time": '"10 ms"', "integer": "3", "text": '"x"',
             "axes": '["x", "y", "z"]', "density": '"1850 kg/m^3"', "length": '"75 nm"',
             "mass": "2.7e-18", "calibration": '"1 V/um"', "power": '"0.3 W"',
             "dimensionless": "30"}


#: The SI unit of each kind (for messages).
_SI = {"pressure": "Pa", "rate": "1/s", "frequency": "Hz", "voltage": "V", "time": "s",
       "density": "kg/m^3", "length": "m", "mass": "kg", "calibration": "V/m", "power": "W"}


def _example(param: Param) -> str:
    one = _EXAMPLES.get(param.kind, "1")
    if param.count is None:
        return one
    if param.kind == "integer":
        return "[0, -1, -1]"
    return "[" + ", ".join([one] * (param.count or 2)) + "]"


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml(value: Any) -> str:
    """``value`` as it is written in a TOML file (for messages)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k if _BARE_KEY.match(k) else _toml(k)} = {_toml(v)}"
                                for k, v in value.items()) + " }"
    if hasattr(value, "isoformat"):  # TOML dates and times
        return value.isoformat()
    return str(value)


def _literal(value: Any, param: Param, where: str) -> Any:
    kind = param.kind
    if kind == "integer":
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(f"{where} = {_toml(value)}: expected an integer (a whole number "
                             "without quotes, e.g. 3); fix the file")
        return value
    if kind == "text":
        if not isinstance(value, str):
            raise InputError(f"{where} = {_toml(value)}: expected a string in double quotes; "
                             "fix the file")
        return value
    if kind == "axes":
        if (not isinstance(value, list) or not value
                or any(a not in ("x", "y", "z") for a in value)):
            raise InputError(f"{where} = {_toml(value)}: expected a list of axes among \"x\", "
                             "\"y\", \"z\"; fix the file")
        return value
    if isinstance(value, list | dict):
        raise InputError(f"{where} = {_toml(value)}: expected one {kind} value, e.g. "
                         f"{_example(replace(param, count=None))}; fix the file")
    if isinstance(value, bool):
        raise InputError(f"{where} = {_toml(value)}: expected a {kind}, not true or false: a "
                         f"number in SI units or a string with a unit, e.g. {_example(param)}; "
                         "fix the file")
    if not isinstance(value, str | int | float):  # a TOML date or time
        raise InputError(f"{where} = {_toml(value)}: expected a {kind}: a number in SI units "
                         f"or a string with a unit, e.g. {_example(param)}; fix the file")
    if isinstance(value, int | float):  # a number: already in SI units
        x = float(value)
    else:
        try:
            x = parse_quantity(value, kind, where)
        except KeyError:  # a kind the unit parser does not know: SI numbers only
            raise InputError(f"{where} = {_toml(value)}: give the {kind} as a number in SI "
                             f"units ({_SI.get(kind, 'SI')}), e.g. {_example(param)}") from None
    if not math.isfinite(x):
        raise InputError(f"{where} = {_toml(value)}: not a finite {kind}; give a finite value, "
                         f"e.g. {_example(param)}")
    return x


def _parse_ref(value: dict, param: Param, where: str, ctx: _Context) -> Ref:
    extra = set(value) - {"from", "result", "clip", "otherwise", "times"}
    if extra:
        raise InputError(f"{where} = {_toml(value)}: unknown key(s) {', '.join(sorted(extra))};"
                         " a reference has from, result and optionally clip, otherwise, times")
    src, result = value.get("from"), value.get("result")
    if not isinstance(src, str) or src not in ctx.earlier:
        earlier = ", ".join(ctx.earlier) or "none"
        if src == ctx.own:
            why = "is this step itself: a step can only use results of earlier steps"
        elif isinstance(src, str) and src in ctx.ids:
            why = ("comes after this step: a step can only use results of earlier steps; move "
                   "that step before this one")
        else:
            why = "is not the id of an earlier step"
        raise InputError(f"{where}: from = {_toml(src)} {why}; ids of earlier steps: {earlier}")
    plan = ctx.earlier[src][1]
    if not isinstance(result, str):
        raise InputError(f"{where}: result = {_toml(result) if result is not None else 'missing'}"
                         f": name the result to take from step {src!r} ({plan}), one of "
                         f"{', '.join(STEPS[plan].results)}; fix the file")
    times = value.get("times", 1.0)
    if (isinstance(times, bool) or not isinstance(times, int | float) or not times > 0
            or not math.isfinite(times)):
        raise InputError(f"{where}: times = {_toml(times)}: expected a number > 0 (a factor, "
                         "no unit); fix the file")
    clip = value.get("clip")
    if clip is not None:
        if not isinstance(clip, list) or len(clip) != 2:
            raise InputError(f"{where}: clip = {_toml(clip)}: expected [lowest, highest] with "
                             f"units, e.g. [{_example(replace(param, count=None))}, ...]; fix "
                             "the file")
        lo, hi = (_literal(c, replace(param, count=None), f"{where}.clip") for c in clip)
        if not lo < hi:
            raise InputError(f"{where}: clip = {_toml(clip)}: the lowest value must be below "
                             "the highest; fix the file")
        clip = (lo, hi)
    otherwise = value.get("otherwise")
    if otherwise is not None:
        otherwise = _literal(otherwise, replace(param, count=None), f"{where}.otherwise")
    return Ref(src, result, clip, otherwise, float(times))


def _parse_setup_ref(value: dict, param: Param, where: str) -> tuple[str, float]:
    extra = set(value) - {"setup", "times"}
    if extra:
        raise InputError(f"{where} = {_toml(value)}: unknown key(s) {', '.join(sorted(extra))};"
                         " a setup reference has setup and optionally times")
    path = value["setup"]
    if not isinstance(path, str) or path not in SETUP_VALUES:
        raise InputError(f"{where}: setup = {_toml(path)} is not a value campaigns may use; "
                         f"allowed are {', '.join(SETUP_VALUES)}")
    kind = SETUP_VALUES[path][0]
    if kind != param.kind:
        same = [k for k, v in SETUP_VALUES.items() if v[0] == param.kind]
        raise InputError(f"{where}: setup = {path!r} is a {kind}, and this parameter is a "
                         f"{param.kind}; refer to a {param.kind}"
                         + (f" ({', '.join(same)})" if same else ", or give a value"))
    times = value.get("times", 1.0)
    if (isinstance(times, bool) or not isinstance(times, int | float) or not times > 0
            or not math.isfinite(times)):
        raise InputError(f"{where}: times = {_toml(times)}: expected a number > 0 (a factor, "
                         "no unit); fix the file")
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
        fits = [f"{name} of {plan}" for plan, spec in STEPS.items()
                for name, r in spec.results.items() if r.kind == param.kind]
        return (f"result {ref.result!r} is a {res.kind}, and this parameter is a {param.kind}; "
                + (f"refer to a {param.kind} ({', '.join(fits)})" if fits else
                   "no step gives one: write a value"))
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
        if _is_setup_ref(value):
            out[key] = _setup_value(value, setup)
        elif isinstance(value, list) and any(_is_setup_ref(v) for v in value):
            out[key] = [_setup_value(v, setup) if _is_setup_ref(v) else v for v in value]
        elif isinstance(value, Ref):
            deferred.append(key)
            if results is None:
                out[key] = _stand_in(value, param, setup, end)
            else:
                out[key] = _take_result(value, param, step, results, source)
        else:
            out[key] = value
    return out, deferred


def _is_setup_ref(value: Any) -> bool:
    return isinstance(value, tuple) and len(value) == 3 and value[0] == "setup"


def _setup_value(value: tuple, setup: Setup) -> float:
    _, path, times = value
    return SETUP_VALUES[path][1](setup) * times


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


def step_error(step: CampaignStep, exc: QuietwellError, source: str) -> str:
    """The one-line message of ``exc`` raised by the validate function of ``step``: the
    file, step and key, the value as written in the file, and the message."""
    msg, key = str(exc), getattr(exc, "key", None)
    root = key.split("[", 1)[0] if key else None
    spec = STEPS[step.plan]
    if root is None or root not in spec.params:
        return f"{step.where(source)}: {msg}"
    where = step.where(source, key)
    if root not in step.raw:
        if "missing" not in msg:
            return f"{where}: {msg}"
        param = spec.params[root]
        what = f" ({param.help})" if param.help else ""
        return (f"{where} is missing: {step.plan} needs {root}{what}; add it, e.g. "
                f"{root} = {_example(param)}")
    raw = step.raw[root]
    for index in re.findall(r"\[(\d+)\]", key[len(root):]):
        if isinstance(raw, list) and int(index) < len(raw):
            raw = raw[int(index)]
    msg = msg.removeprefix(f"{key}=")
    return f"{where} = {_toml(raw)}: {msg}"


def check_campaign(campaign: Campaign, setup: Setup, *,
                   results: Mapping[str, Mapping[str, Any]] | None = None,
                   before: LabState | None = None) -> CheckedCampaign:
    """Validate every step of ``campaign`` on ``setup``, in order, with no device opened.

    Each step's parameters are cleaned by its validate function; the order of steps is
    refused where it would leave the particle undamped below the loss pressure or cool
    an uncharged particle. Raises :class:`~quietwell.InputError` (one line).
    """
    src = campaign.source
    if campaign.faults and setup.kind != "sim":
        raise InputError(f"{src}: [[sim.fault]] injects faults into the simulated laboratory, "
                         f"and setup {setup.name!r} is of kind {setup.kind!r}; remove the [sim] "
                         "section or use a simulated setup")
    for f in campaign.faults:
        if f.kind == "gauge_dropout" and f.params["name"] not in {
                g.name for g in setup.vacuum.gauges}:
            raise InputError(f"{src}: [[sim.fault]] gauge = {f.params['name']!r}: setup "
                             f"{setup.name!r} has the gauges "
                             f"{', '.join(g.name for g in setup.vacuum.gauges)}")
    out = CheckedCampaign(campaign, setup)
    state = before
    t = 0.0
    for step in campaign.steps:
        spec = STEPS[step.plan]
        for key, value in step.params.items():
            if isinstance(value, Ref):
                problem = _ref_kind_problem(value, spec.params[key], campaign)
                if problem:
                    raise InputError(f"{step.where(src, key)} = {_toml(step.raw[key])}: "
                                     f"{problem}; fix the file", key=key)
        checked = None
        ends = (0, 1) if any(isinstance(v, Ref) and v.clip for v in step.params.values()) \
            else (0,)
        for end in ends:  # a clipped result is checked at both ends of its range
            params, deferred = resolve_params(step, setup, results, source=src, end=end)
            try:
                checked = spec.validate(setup, params)
            except (InputError, LimitError) as exc:
                raise type(exc)(step_error(step, exc, src) + "; fix the file",
                                key=exc.key) from None
        assert checked is not None
        found = unsafe_problem(setup, state, checked)
        if found:
            key, why = found
            at = (f"{step.where(src, key)} = {_toml(step.raw[key])}" if key in step.raw
                  else step.where(src))
            raise InputError(f"{at}: unsafe order of steps: {why}")
        prev_p = state.pressure if state else None
        move = pressure_move_seconds(prev_p, checked.needs.pressure)
        t_step = t
        t += move + checked.duration_s
        state = state_after(state, checked)
        out.steps.append(CheckedStep(step, checked, t_step, move, tuple(deferred), state))
    return out
