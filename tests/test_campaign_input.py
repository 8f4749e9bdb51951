"""Bad campaign files: one line naming the file, the step and key, the value and the fix.

Every malformed file of the table below is given to ``quietwell check`` in-process; the
command must exit 2 with exactly one line on stderr and no traceback (the project's
rule for bad input). The line must name the file, the step and key where there is one,
the offending value where there is one, and what is allowed or what to do. Expected
fragments are a string, or a tuple of strings of which one must appear (so that the
wording of the unit parser may change without these tests depending on it).

The setups are the shipped profiles: amber (loss pressure 1 mbar, modes 152, 171 and
48 kHz, particle charge +7 e, limits 1e-9..1100 mbar, 150000 1/s, 10 V, 10 MHz,
16777216 samples) and cobalt.
"""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from quietwell import InputError, LimitError
from quietwell.campaign import SETUP_VALUES, check_campaign, parse_campaign
from quietwell.campaign._file import resolve_params, step_error
from quietwell.cli import main
from quietwell.plans import STEPS
from quietwell.setup import load_setup

ROOT = Path(__file__).resolve().parents[1]
SHIPPED = [ROOT / "campaigns" / "characterise.toml",
           ROOT / "campaigns" / "characterise-quick.toml",
           ROOT / "tests" / "data" / "tiny-campaign.toml"]

HEAD = '[campaign]\nname = "bad-input"\n\n'

#: A minimal valid step of every plan on amber (TOML values as written in a file).
GOOD = {
    "charge_calibration": {"pressure": '"3 mbar"', "charge_steps": "[0, -1, -1]",
                           "drive_frequency": '"100 kHz"', "drive_amplitude": '"8 V"'},
    "thermal_calibration": {"pressure": '"3 mbar"'},
    "pressure_sweep": {"pressures": '["10 mbar", "5 mbar"]'},
    "gain_sweep": {"gains": '["3000 1/s", "12000 1/s", "48000 1/s"]'},
    "reheating_cycles": {"cycles": "3", "feedback_gain": '"20000 1/s"', "off_time": '"10 ms"'},
    "sideband_thermometry": {"records": "2"},
}


def step(plan: str | None, sid: str | None = "s", drop: tuple[str, ...] = (), **kv: str) -> str:
    """A [[step]] table: the minimal valid step of ``plan`` with ``kv`` (TOML text) set
    and the keys in ``drop`` removed."""
    lines = ["[[step]]"]
    if sid is not None:
        lines.append(f'id = "{sid}"')
    if plan is not None:
        lines.append(f'plan = "{plan}"')
    params = {**GOOD.get(plan, {}), **kv}
    lines += [f"{k} = {v}" for k, v in params.items() if k not in drop]
    return "\n".join(lines) + "\n\n"


def q(text: str) -> tuple[str, str]:
    """A string value as a message may quote it: 'text' or "text"."""
    return (f"'{text}'", f'"{text}"')


def camp(*steps: str) -> str:
    return HEAD + "".join(steps)


CHARGE = step("charge_calibration", "charge")
THERMAL = step("thermal_calibration", "thermal")
GAINS = step("gain_sweep", "gains")
PUMP = step("pressure_sweep", "pumpdown",
            pressures='["10 mbar", "1e-3 mbar", "1e-8 mbar"]')
GAIN_REF = '{ from = "gains", result = "optimal_gain", clip = ["5000 1/s", "100000 1/s"] }'


def reheat(**kv: str) -> str:
    return step("reheating_cycles", "reheat", **kv)


# (case id, file text or bytes, fragments the one line must hold)
CASES: list[tuple[str, str | bytes, list]] = [
    # --- the file as a whole
    ("not-toml", "this is = not [toml\n", ["TOML", "line 1"]),
    ("not-toml-unclosed-string", HEAD + '[[step]]\nid = "a\n', ["TOML", "line 5"]),
    ("empty-file", "", ["[campaign]", "add"]),
    ("only-comments", "# nothing here\n", ["[campaign]", "add"]),
    ("binary-garbage", bytes(range(256)) * 4, [("UTF-8", "utf-8", "text"), "campaign"]),
    ("missing-campaign-table", step("thermal_calibration"), ["[campaign]", "add"]),
    ("campaign-not-a-table", 'campaign = "x"\n' + step("thermal_calibration"),
     ["[campaign]", q("x")]),
    ("campaign-name-missing", '[campaign]\ndescription = "d"\n\n' + THERMAL,
     ["name", "letters, digits"]),
    ("campaign-name-bad", '[campaign]\nname = "my campaign!"\n\n' + THERMAL,
     ["name", q("my campaign!"), "letters, digits"]),
    ("campaign-name-number", "[campaign]\nname = 3\n\n" + THERMAL, ["name", "3", "letters"]),
    ("campaign-unknown-key", '[campaign]\nname = "n"\nowner = "x"\n\n' + THERMAL,
     ["owner", "name, description"]),
    ("campaign-description-not-text", '[campaign]\nname = "n"\ndescription = 5\n\n' + THERMAL,
     ["description", "5", "string"]),
    ("unknown-top-level-table", HEAD + "[trapp]\nx = 1\n\n" + THERMAL,
     ["[trapp]", "[campaign], [[step]] and [sim]"]),
    ("unknown-top-level-key", HEAD.replace("[campaign]", 'author = "x"\n[campaign]') + THERMAL,
     ["author", "[campaign], [[step]] and [sim]"]),
    ("no-steps", HEAD, ["no steps", "[[step]]"]),
    ("step-not-a-table", "step = [1, 2]\n" + HEAD, ["step 0", "1", "[[step]]"]),
    ("step-a-string", 'step = "thermal"\n' + HEAD, ["step", q("thermal"), "[[step]]"]),
    ("step-in-campaign-table", HEAD + 'step = "thermal"\n', ["[campaign] step", "name"]),
    ("step-a-single-table", HEAD + '[step]\nid = "a"\nplan = "thermal_calibration"\n'
     'pressure = "3 mbar"\n', ["[step]", "[[step]]"]),
    # --- id and plan
    ("missing-id", camp(step("thermal_calibration", None)), ["step 0", "id", "add"]),
    ("duplicate-id", camp(step("thermal_calibration", "a"), step("thermal_calibration", "a")),
     ["step 1", "id", q("a"), "step 0", "own id"]),
    ("bad-id-characters", camp(step("thermal_calibration", "my step")),
     ["step 0", "id", q("my step"), "letters, digits"]),
    ("id-a-number", HEAD + '[[step]]\nid = 7\nplan = "thermal_calibration"\npressure = "3 mbar"\n',
     ["step 0", "id", "7", "letters, digits"]),
    ("unknown-plan", camp(step("thermal_calib")),
     ["step 0", "plan", q("thermal_calib"), "thermal_calibration"]),
    ("missing-plan", camp(step(None)), ["step 0", "plan", "thermal_calibration", "add"]),
    ("note-not-text", camp(step("thermal_calibration", note="3")), ["note", "3", "string"]),
    ("unknown-key-in-step", camp(step("thermal_calibration", presure='"3 mbar"')),
     ["step 0 ('s') key presure", "pressure", "allowed"]),
    # --- a required parameter missing, per step kind
    *[(f"missing-{key}-{plan}", camp(step(plan, drop=(key,))),
       ["step 0 ('s') key " + key, "missing", "add"])
      for plan, keys in (("pressure_sweep", ("pressures",)), ("gain_sweep", ("gains",)),
                         ("reheating_cycles", ("cycles", "off_time", "feedback_gain")),
                         ("charge_calibration", ("charge_steps", "drive_frequency",
                                                 "drive_amplitude", "pressure")),
                         ("thermal_calibration", ("pressure",)),
                         ("sideband_thermometry", ("records",)))
      for key in keys],
    # --- wrong types
    ("string-for-integer", camp(step("thermal_calibration", records='"4"')),
     ["key records", q("4"), "integer"]),
    ("list-for-scalar", camp(step("thermal_calibration", pressure='["3 mbar"]')),
     ["key pressure", "3 mbar", "one"]),
    ("scalar-for-list", camp(step("pressure_sweep", pressures='"3 mbar"')),
     ["key pressures", q("3 mbar"), "list"]),
    ("bool-for-pressure", camp(step("thermal_calibration", pressure="true")),
     ["key pressure", "true", ("pressure", "mbar", "Pa")]),
    ("bool-for-integer", camp(step("thermal_calibration", records="true")),
     ["key records", "true", "integer"]),
    ("float-for-integer-records", camp(step("sideband_thermometry", records="2.5")),
     ["key records", "2.5", "integer"]),
    ("int-list-for-charge-steps", camp(step("charge_calibration", charge_steps='[0, "-1", 1]')),
     ["key charge_steps[1]", q("-1"), "integer"]),
    ("text-for-axis-list", camp(step("gain_sweep", stop_axes='"x"')),
     ["key stop_axes", q("x"), '"x", "y", "z"']),
    ("number-for-axis", camp(step("sideband_thermometry", axis="3")),
     ["key axis", "3", "string"]),
    ("table-for-scalar", camp(step("thermal_calibration", pressure='{ value = "3 mbar" }')),
     ["key pressure", "3 mbar", "reference"]),
    ("date-for-pressure", camp(step("thermal_calibration", pressure="1979-05-27")),
     ["key pressure", "1979-05-27", ("pressure", "mbar")]),
    # --- wrong unit, unparseable quantity
    ("frequency-unit-for-pressure", camp(step("thermal_calibration", pressure='"3 mHz"')),
     ["key pressure", "3 mHz", ("mbar", "Pa")]),
    ("voltage-unit-for-gain", camp(reheat(feedback_gain='"3 V"')),
     ["key feedback_gain", "3 V", "1/s"]),
    ("voltage-unit-in-gain-list", camp(step("gain_sweep", gains='["3000 1/s", "3 V", "9 kHz"]')),
     ["key gains[1]", "3 V", "1/s"]),
    ("mass-unit-for-time", camp(reheat(off_time='"2 kg"')), ["key off_time", "2 kg", "ms"]),
    ("misspelt-unit", camp(step("thermal_calibration", pressure='"3 mbaar"')),
     ["key pressure", "3 mbaar", "mbar"]),
    ("unit-without-number", camp(step("thermal_calibration", pressure='"mbar"')),
     ["key pressure", q("mbar"), ("mbar", "Pa")]),
    ("decimal-comma", camp(step("thermal_calibration", pressure='"3,5 mbar"')),
     ["key pressure", "3,5 mbar", "mbar"]),
    ("empty-string-quantity", camp(step("thermal_calibration", pressure='""')),
     ["key pressure", q(""), ("mbar", "Pa")]),
    ("infinite-pressure", camp(step("thermal_calibration", pressure="inf")),
     ["key pressure", "inf", ("finite", "mbar")]),
    ("nan-frequency", camp(step("charge_calibration", drive_frequency="nan")),
     ["key drive_frequency", "nan", ("finite", "Hz")]),
    # --- outside a limit of the setup
    ("pressure-above-max", camp(step("thermal_calibration", pressure='"2000 mbar"')),
     ["key pressure", "2000 mbar", ("1100 mbar", "110000] Pa"), "limit"]),
    ("pressure-below-min", camp(reheat(pressure='"1e-10 mbar"')),
     ["key pressure", "1e-10 mbar", ("1e-09 mbar", "1e-07"), "limit"]),
    ("pressure-list-above-max", camp(step("pressure_sweep",
                                          pressures='["5000 mbar", "10 mbar"]')),
     ["key pressures[0]", "5000 mbar", ("1100 mbar", "110000] Pa")]),
    ("gain-above-max", camp(reheat(feedback_gain='"200000 1/s"')),
     ["key feedback_gain", "200000 1/s", "150000", "limit"]),
    ("gain-zero", camp(step("sideband_thermometry", feedback_gain='"0 1/s"')),
     ["key feedback_gain", "0 1/s", "150000"]),
    ("gain-list-above-max", camp(step("gain_sweep",
                                      gains='["3000 1/s", "12000 1/s", "480000 1/s"]')),
     ["key gains[2]", "480000 1/s", "150000"]),
    ("drive-amplitude-above-max", camp(step("charge_calibration", drive_amplitude='"12 V"')),
     ["key drive_amplitude", "12 V", ("10 V", "10] V"), "limit"]),
    ("sample-rate-above-max", camp(step("thermal_calibration", sample_rate='"20 MHz"')),
     ["key sample_rate", "20 MHz", ("10 MHz", "1e+07] Hz"), "limit"]),
    ("record-length-above-max", camp(step("thermal_calibration", record_length="33554432")),
     ["key record_length", "33554432", "16777216", "limit"]),
    ("record-length-too-short", camp(step("thermal_calibration", record_length="100")),
     ["key record_length", "100", "1024"]),
    ("input-range-negative", camp(step("thermal_calibration", input_range='"-2 V"')),
     ["key input_range", "-2 V", "positive"]),
    ("settle-time-negative", camp(step("thermal_calibration", settle_time='"-1 s"')),
     ["key settle_time", "-1 s", ">= 0"]),
    ("off-time-record-too-long", camp(reheat(off_time='"100 s"')),
     ["key off_time", "100 s", "16777216"]),
    # --- outside the plan's own rules
    ("pressures-not-monotonic", camp(step("pressure_sweep",
                                          pressures='["10 mbar", "5 mbar", "7 mbar"]')),
     ["key pressures", "7 mbar", "monotonic"]),
    ("pressures-empty", camp(step("pressure_sweep", pressures="[]")),
     ["key pressures", "[]", "at least one"]),
    ("fewer-than-3-gains", camp(step("gain_sweep", gains='["3000 1/s", "9000 1/s"]')),
     ["key gains", "9000 1/s", ">= 3"]),
    ("cycles-below-3", camp(reheat(cycles="2")), ["key cycles", "2", ">= 3"]),
    ("thermal-below-loss-pressure", camp(step("thermal_calibration", pressure='"0.5 mbar"')),
     ["key pressure", "0.5 mbar", "loss pressure", ("1 mbar", "100 Pa")]),
    ("charge-below-loss-pressure", camp(step("charge_calibration", pressure='"0.1 mbar"')),
     ["key pressure", "0.1 mbar", "loss pressure"]),
    ("drive-frequency-on-a-mode", camp(step("charge_calibration", drive_frequency='"150 kHz"')),
     ["key drive_frequency", "150 kHz", ("152 kHz", "152000"), "off resonance"]),
    ("drive-frequency-on-mode-by-reference",
     camp(step("charge_calibration", drive_frequency='{ setup = "trap.frequency_z" }')),
     ["key drive_frequency", "trap.frequency_z", ("48 kHz", "48000"), "off resonance"]),
    ("charge-steps-two-entries", camp(step("charge_calibration", charge_steps="[0, -1]")),
     ["key charge_steps", "[0, -1]", "at least 3"]),
    ("stop-axes-with-w", camp(step("gain_sweep", stop_axes='["x", "w"]')),
     ["key stop_axes", q("w"), '"x", "y", "z"']),
    ("axis-q", camp(step("sideband_thermometry", axis='"q"')),
     ["key axis", q("q"), "x, y, z"]),
    ("n-boot-too-few", camp(reheat(n_boot="5")), ["key n_boot", "5", ">= 10"]),
    ("records-zero", camp(step("thermal_calibration", records="0")),
     ["key records", "0", ">= 1"]),
    ("density-negative", camp(step("pressure_sweep", density='"-1 kg/m^3"')),
     ["key density", "-1 kg/m^3", "> 0"]),
    # --- references
    ("ref-to-missing-step", camp(CHARGE, step("thermal_calibration", "thermal",
                                              mass='{ from = "chrge", result = "mass" }')),
     ["step 1 ('thermal') key mass", q("chrge"), "charge"]),
    ("ref-to-later-step", camp(step("thermal_calibration", "thermal",
                                    mass='{ from = "charge", result = "mass" }'), CHARGE),
     ["step 0 ('thermal') key mass", q("charge"), "earlier", "before"]),
    ("ref-to-itself", camp(step("thermal_calibration", "thermal",
                                mass='{ from = "thermal", result = "mass" }')),
     ["key mass", q("thermal"), "earlier"]),
    ("ref-result-not-given", camp(CHARGE, step("thermal_calibration", "thermal",
                                               mass='{ from = "charge", result = "radius" }')),
     ["step 1 ('thermal') key mass", "'radius'", "charge, mass"]),
    ("ref-result-missing", camp(CHARGE, step("thermal_calibration", "thermal",
                                             mass='{ from = "charge" }')),
     ["key mass", "result", "charge, mass"]),
    ("ref-wrong-kind-mass-into-gain",
     camp(CHARGE, reheat(feedback_gain='{ from = "charge", result = "mass", '
                                       'clip = ["5000 1/s", "9000 1/s"] }')),
     ["step 1 ('reheat') key feedback_gain", "'mass'", "rate"]),
    ("ref-device-setting-without-clip",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain" }')),
     ["key feedback_gain", "'optimal_gain'", "clip = [lowest, highest]"]),
    ("ref-clip-lo-not-below-hi",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["9000 1/s", "5000 1/s"] }')),
     ["key feedback_gain", "9000 1/s", "below"]),
    ("ref-clip-equal-ends",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["5000 1/s", "5000 1/s"] }')),
     ["key feedback_gain", "5000 1/s", "below"]),
    ("ref-clip-wrong-units",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["5 V", "10 V"] }')),
     ["key feedback_gain", "5 V", "1/s"]),
    ("ref-clip-three-values",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["5 1/s", "10 1/s", "20 1/s"] }')),
     ["key feedback_gain", "clip", "[lowest, highest]"]),
    ("ref-clip-outside-limit",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["5000 1/s", "900000 1/s"] }')),
     ["key feedback_gain", "900000", "150000"]),
    ("ref-otherwise-wrong-units",
     camp(GAINS, reheat(feedback_gain='{ from = "gains", result = "optimal_gain", '
                                      'clip = ["5000 1/s", "9000 1/s"], otherwise = "3 mbar" }')),
     ["key feedback_gain", "3 mbar", "1/s"]),
    ("ref-unknown-key", camp(GAINS, reheat(feedback_gain=GAIN_REF[:-2] + ', clipp = 1 }')),
     ["key feedback_gain", "clipp", "from, result"]),
    ("ref-result-not-text", camp(CHARGE, step("thermal_calibration", "thermal",
                                              mass='{ from = "charge", result = 3 }')),
     ["key mass", "3", "result"]),
    ("ref-times-zero", camp(GAINS, reheat(feedback_gain=GAIN_REF[:-2] + ", times = 0 }")),
     ["key feedback_gain", "times", "0", "> 0"]),
    ("ref-times-text", camp(GAINS, reheat(feedback_gain=GAIN_REF[:-2] + ', times = "2" }')),
     ["key feedback_gain", "times", q("2"), "> 0"]),
    ("setup-ref-unknown-path",
     camp(step("thermal_calibration", pressure='{ setup = "trap.loss_presure" }')),
     ["key pressure", q("trap.loss_presure"), "trap.loss_pressure"]),
    ("setup-ref-wrong-kind",
     camp(step("thermal_calibration", pressure='{ setup = "trap.frequency_x" }')),
     ["key pressure", q("trap.frequency_x"), "frequency", "trap.loss_pressure"]),
    ("setup-ref-times-zero",
     camp(step("thermal_calibration", pressure='{ setup = "trap.loss_pressure", times = 0 }')),
     ["key pressure", "times", "0", "> 0"]),
    ("setup-ref-times-negative",
     camp(step("thermal_calibration", pressure='{ setup = "trap.loss_pressure", times = -3 }')),
     ["key pressure", "times", "-3", "> 0"]),
    ("setup-ref-unknown-key",
     camp(step("thermal_calibration", pressure='{ setup = "trap.loss_pressure", time = 3 }')),
     ["key pressure", "time", "setup and optionally times"]),
    ("setup-ref-over-limit",
     camp(step("thermal_calibration", pressure='{ setup = "limits.pressure_max", times = 2 }')),
     ["key pressure", "limits.pressure_max", ("1100 mbar", "110000] Pa")]),
    ("estimate-unknown-key", camp(step("thermal_calibration",
                                       mass='{ value = 1e-18, stdev = 1e-20 }')),
     ["key mass", "stdev", "value and stderr"]),
    ("estimate-negative-stderr", camp(step("thermal_calibration",
                                           mass="{ value = 2.7e-18, stderr = -1e-19 }")),
     ["key mass", "-1e-19", ">= 0"]),
    ("mass-with-a-voltage-unit", camp(step("thermal_calibration", mass='"1e-18 V"')),
     ["key mass", "1e-18 V", "kg"]),
    ("calibration-two-values", camp(step("gain_sweep", calibration='["1 V/um", "1 V/um"]')),
     ["key calibration", "3 values"]),
    ("plan-a-list", HEAD + '[[step]]\nid = "a"\nplan = ["thermal_calibration"]\n',
     ["step 0 ('a') key plan", "thermal_calibration", "allowed"]),
    ("ref-from-a-list", camp(CHARGE, step("thermal_calibration", "thermal",
                                          mass='{ from = ["charge"], result = "mass" }')),
     ["key mass", "from", "charge"]),
    ("setup-ref-path-a-list",
     camp(step("thermal_calibration", pressure='{ setup = ["trap.loss_pressure"] }')),
     ["key pressure", "trap.loss_pressure", "allowed"]),
    ("result-ref-inside-a-list",
     camp(GAINS, step("gain_sweep", "again",
                      gains='["3000 1/s", { from = "gains", result = "optimal_gain" }, "9 kHz"]')),
     ["step 1 ('again') key gains[1]", "optimal_gain", "whole"]),
    # --- unsafe orders
    ("sideband-undamped-below-loss-first",
     camp(step("sideband_thermometry", "sidebands", pressure='"1e-8 mbar"')),
     ["step 0 ('sidebands') key pressure", "unsafe", "1e-8 mbar", "loss pressure",
      "feedback_gain"]),
    ("gain-sweep-after-all-charge-removed",
     camp(step("charge_calibration", "charge", charge_steps="[0, -7, 0]"),
          step("gain_sweep", "gains", pressure='"1e-8 mbar"')),
     ["step 1 ('gains')", "charged particle", "0 e", "charge_steps"]),
    ("reheating-after-all-charge-removed",
     camp(step("charge_calibration", "charge", charge_steps="[-3, -2, -2]"),
          reheat(pressure='"1e-8 mbar"')),
     ["step 1 ('reheat')", "charged particle", "0 e", "charge_steps"]),
    ("thermal-below-loss-after-pumpdown",
     camp(PUMP, step("thermal_calibration", "thermal", pressure='"0.5 mbar"')),
     ["step 1 ('thermal') key pressure", "0.5 mbar", "loss pressure"]),
]

assert len(CASES) >= 60


def _write(tmp_path: Path, text: str | bytes) -> Path:
    path = tmp_path / "bad-campaign.toml"
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def _one_line(capsys, argv: list[str]) -> str:
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 2, f"exit {code}; stdout {out!r}; stderr {err!r}"
    lines = err.splitlines()
    assert len(lines) == 1, err
    line = lines[0]
    assert "Traceback" not in line and "internal error" not in line, line
    return line


def _has(line: str, fragment) -> bool:
    options = fragment if isinstance(fragment, tuple) else (fragment,)
    return any(o in line for o in options)


@pytest.mark.parametrize(("text", "fragments"), [c[1:] for c in CASES],
                         ids=[c[0] for c in CASES])
def test_bad_campaign_gets_one_line(tmp_path, capsys, text, fragments):
    path = _write(tmp_path, text)
    line = _one_line(capsys, ["check", str(path), "--setup", "amber"])
    assert line.startswith("quietwell check: error: "), line
    assert str(path) in line, line
    missing = [f for f in fragments if not _has(line, f)]
    assert not missing, f"{missing} not in: {line}"


def test_case_ids_are_unique():
    ids = [c[0] for c in CASES]
    assert len(ids) == len(set(ids))


def test_every_required_parameter_is_covered():
    """The table has a missing-parameter case for every required parameter of every
    step (found by removing each parameter of the minimal good step in turn)."""
    setup = load_setup(ROOT / "profiles" / "amber")
    covered = {c[0] for c in CASES}
    for plan, params in GOOD.items():
        for key in params:
            text = camp(step(plan, drop=(key,)))
            try:
                check_campaign(parse_campaign(text, "x.toml"), setup)
            except InputError:
                assert f"missing-{key}-{plan}" in covered, (plan, key)


# --- unsafe and safe orders ------------------------------------------------------------


def test_thermal_calibration_right_after_a_pump_down_passes(tmp_path, capsys):
    # The thermal calibration raises the pressure (feedback still on) before it
    # switches the feedback off, so after a pump-down to 1e-8 mbar it is safe.
    path = _write(tmp_path, camp(PUMP, THERMAL))
    assert main(["check", str(path), "--setup", "amber", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["plan_name"] for s in out["steps"]] == ["pressure_sweep", "thermal_calibration"]
    assert out["steps"][1]["needs"]["pressure"] == pytest.approx(300.0)  # 3 mbar in Pa


def test_gain_sweep_with_charge_left_passes(tmp_path, capsys):
    # The refusal above is about the charge: remove 6 of amber's 7 charges and it passes.
    path = _write(tmp_path, camp(step("charge_calibration", "charge", charge_steps="[0, -6, 0]"),
                                 step("gain_sweep", "gains", pressure='"1e-8 mbar"')))
    assert main(["check", str(path), "--setup", "amber"]) == 0


def test_setup_references_inside_a_list_and_si_numbers_pass(tmp_path, capsys):
    # pressures from the setup's loss pressure (amber: 1 mbar = 100 Pa), a mass in kg
    path = _write(tmp_path, camp(
        step("pressure_sweep", pressures='[{ setup = "trap.loss_pressure", times = 10 }, '
                                         '"3 mbar", { setup = "trap.loss_pressure", times = 2 }]'),
        step("thermal_calibration", "t", mass="2.7e-18")))
    assert main(["check", str(path), "--setup", "amber", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["steps"][0]["parameters"]["pressures"] == pytest.approx([1000.0, 300.0, 200.0])
    assert doc["steps"][1]["parameters"]["mass"] == {"value": 2.7e-18, "stderr": 0.0}


def test_sideband_with_feedback_below_loss_passes(tmp_path):
    path = _write(tmp_path, camp(step("sideband_thermometry", pressure='"1e-8 mbar"',
                                      feedback_gain='"8000 1/s"')))
    assert main(["check", str(path), "--setup", "amber"]) == 0


def test_a_refusal_at_run_time_names_the_reference_as_written():
    # ``quietwell run`` validates each step again with the earlier steps' results; a
    # result that is no positive mass is refused naming the step, key and reference.
    camp_ = parse_campaign(camp(CHARGE, step("thermal_calibration", "thermal",
                                             mass='{ from = "charge", result = "mass" }')),
                           "c.toml")
    setup = load_setup(ROOT / "profiles" / "amber")
    step_ = camp_.steps[1]
    params, deferred = resolve_params(step_, setup, {"charge": {"mass": {"value": -1.0,
                                                                        "stderr": 0.1}}})
    assert deferred == ["mass"]
    with pytest.raises(InputError) as info:
        STEPS[step_.plan].validate(setup, params)
    line = step_error(step_, info.value, "c.toml")
    assert line.startswith("c.toml: step 1 ('thermal') key mass = "), line
    assert '{ from = "charge", result = "mass" }' in line and "-1" in line, line


# --- the wrong kind of file, and paths that are not files ------------------------------


def test_setup_file_given_as_the_campaign(capsys):
    path = ROOT / "profiles" / "amber" / "setup.toml"
    line = _one_line(capsys, ["check", str(path), "--setup", "amber"])
    assert str(path) in line and "setup file" in line and "--setup" in line, line


def test_campaign_file_given_as_the_setup(capsys):
    path = SHIPPED[1]
    line = _one_line(capsys, ["check", str(path), "--setup", str(path)])
    assert str(path) in line and "campaign file" in line and "setup profile" in line, line


def test_campaign_path_is_a_folder(tmp_path, capsys):
    line = _one_line(capsys, ["check", str(tmp_path), "--setup", "amber"])
    assert str(tmp_path) in line and "folder" in line and ".toml" in line, line


def test_campaign_path_does_not_exist(tmp_path, capsys):
    path = tmp_path / "nowhere" / "campaign.toml"
    line = _one_line(capsys, ["check", str(path), "--setup", "amber"])
    assert str(path) in line and "no such" in line and "campaigns/" in line, line


def test_unknown_setup_profile(tmp_path, capsys):
    path = _write(tmp_path, camp(THERMAL))
    line = _one_line(capsys, ["check", str(path), "--setup", "no-such-profile"])
    assert "'no-such-profile'" in line and "setup.toml" in line, line


def test_run_refuses_a_bad_campaign_before_anything_opens(tmp_path, capsys):
    path = _write(tmp_path, camp(step("thermal_calibration", pressure='"2000 mbar"')))
    data = tmp_path / "data"
    line = _one_line(capsys, ["run", str(path), "--setup", "amber", "--data-dir", str(data)])
    assert line.startswith("quietwell run: error: ") and str(path) in line, line
    assert "key pressure" in line and "2000 mbar" in line, line
    assert not data.exists()  # refused before the store was created


# --- good files --------------------------------------------------------------------------


@pytest.mark.parametrize("path", SHIPPED, ids=[p.name for p in SHIPPED])
def test_shipped_campaigns_pass_unchanged_on_both_setups(path, capsys):
    text = path.read_text(encoding="utf-8")
    totals = {}
    for setup in ("amber", "cobalt"):
        assert main(["check", str(path), "--setup", setup, "--json"]) == 0
        out, err = capsys.readouterr()
        assert err == ""
        assert len(out.strip().splitlines()) == 1  # one JSON object
        doc = json.loads(out)
        assert doc["setup"] == setup
        steps = doc["steps"]
        assert [s["name"] for s in steps] == [s.id for s in parse_campaign(text).steps]
        for s in steps:
            assert s["plan_name"] in STEPS
            assert s["duration_s"] > 0
            for key, value in s["parameters"].items():
                assert key in STEPS[s["plan_name"]].params
                _assert_si(value)
        assert doc["duration_s"] == pytest.approx(sum(s["duration_s"] for s in steps),
                                                  rel=1e-12)
        totals[setup] = doc
    assert path.read_text(encoding="utf-8") == text  # unchanged by the checks
    # the same file, and it resolved its setup references to each setup's own values
    assert totals["amber"]["campaign_sha256"] == totals["cobalt"]["campaign_sha256"]
    p_amber = totals["amber"]["steps"][0]["parameters"]["pressure"]
    p_cobalt = totals["cobalt"]["steps"][0]["parameters"]["pressure"]
    assert (p_amber, p_cobalt) == (pytest.approx(3 * 100.0), pytest.approx(3 * 300.0))


def _assert_si(value):
    """A parameter in SI: a number, text, a value with error, or a list of them."""
    if isinstance(value, list):
        for v in value:
            _assert_si(v)
    elif isinstance(value, dict):
        assert set(value) == {"value", "stderr"}
        assert math.isfinite(value["value"])
    elif value is not None and not isinstance(value, str):
        assert isinstance(value, int | float) and not isinstance(value, bool)
        assert math.isfinite(value)


def test_shipped_pressures_are_si(capsys):
    # "1e-8 mbar" is 1e-6 Pa (1 mbar = 100 Pa exactly, common practice, no source).
    assert main(["check", str(SHIPPED[1]), "--setup", "amber", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    gains = next(s for s in doc["steps"] if s["name"] == "gains")
    assert gains["parameters"]["pressure"] == pytest.approx(1e-6)
    assert gains["parameters"]["gains"][0] == pytest.approx(2000.0)
    charge = doc["steps"][0]["parameters"]
    assert charge["drive_frequency"] == pytest.approx(0.85 * 152e3)


# --- random input: only quietwell's own errors ---------------------------------------------

_SETUP = load_setup(ROOT / "profiles" / "amber")

_scalar = st.one_of(
    st.booleans(), st.integers(-2**63, 2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["3 mbar", "1e-8 mbar", "2000 mbar", "5 1/s", "3 V", "10 ms", "1 MHz",
                     "1e-18 kg", "x", "y", "w", "a", "b", "charge", "mass", "optimal_gain",
                     "calibration", "trap.loss_pressure", "trap.frequency_x", "-1", "0 s",
                     "1e400 Pa", "nan Pa"]),
)
_key = st.sampled_from(sorted({k for s in STEPS.values() for k in s.params}
                              | {"id", "plan", "note", "from", "result", "clip", "otherwise",
                                 "times", "setup", "value", "stderr", "bogus"}))
_value = st.recursive(_scalar, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(_key, inner, max_size=4)), max_leaves=8)
_ids = st.sampled_from(["a", "b", "c", "a b"])
_result_ref = st.fixed_dictionaries(
    {"from": st.one_of(_ids, _value)},
    optional={"result": st.one_of(st.sampled_from(sorted({r for s in STEPS.values()
                                                          for r in s.results})), _value),
              "clip": st.one_of(st.lists(_scalar, max_size=3), _value),
              "otherwise": _value, "times": _value})
_setup_ref = st.fixed_dictionaries(
    {"setup": st.one_of(st.sampled_from(sorted(SETUP_VALUES)), _value)},
    optional={"times": _value})
_estimate = st.fixed_dictionaries({"value": _value}, optional={"stderr": _value})
_param = st.one_of(_value, _result_ref, _setup_ref, _estimate,
                   st.lists(st.one_of(_scalar, _setup_ref, _result_ref), max_size=4))


#: The minimal good steps as Python values (a random step starts from one of them).
_GOOD_VALUES = {plan: tomllib.loads("\n".join(f"{k} = {v}" for k, v in params.items()))
                for plan, params in GOOD.items()}


@st.composite
def _step_table(draw):
    plan = draw(st.one_of(st.sampled_from([*STEPS, "nope"]), _value))
    table = {"id": draw(st.one_of(_ids, _value)), "plan": plan}
    if isinstance(plan, str) and plan in GOOD and draw(st.booleans()):
        table.update(_GOOD_VALUES[plan])  # mostly valid: reaches the validate functions
    keys = list(STEPS[plan].params) if isinstance(plan, str) and plan in STEPS else ["pressure"]
    for key in draw(st.lists(st.sampled_from([*keys, "bogus", "note"]), max_size=5,
                             unique=True)):
        table[key] = draw(_param)
    return table


def _toml_value(v) -> str:
    """``v`` as TOML text (None as a bare word, which TOML refuses: a syntax error)."""
    if v is None:
        return "none"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v == math.inf else
                                            "-inf" if v == -math.inf else repr(v))
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"


def _check_text(text: str) -> None:
    try:
        check_campaign(parse_campaign(text, "random.toml"), _SETUP)
    except (InputError, LimitError) as exc:
        msg = str(exc)
        assert msg.startswith("random.toml"), msg
        assert "\n" not in msg.strip() or "TOML" in msg, msg


@settings(max_examples=160, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_step_table(), min_size=1, max_size=4))
def test_random_step_tables_raise_only_quietwell_errors(steps):
    text = HEAD + "".join(
        "[[step]]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in s.items()) + "\n"
        for s in steps)
    _check_text(text)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(st.sampled_from(["campaign", "step", "setup", "trap", "other"]),
                       st.one_of(_value, st.lists(_step_table(), max_size=2)), max_size=3))
def test_random_top_level_tables_raise_only_quietwell_errors(data):
    _check_text("".join(f"{k} = {_toml_value(v)}\n" for k, v in data.items()))


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.text(alphabet=st.sampled_from(list('[]{}="\',.#\n -_abcdeimprst0123456789')),
               max_size=120))
def test_random_toml_ish_text_raises_only_quietwell_errors(tail):
    _check_text(HEAD + tail)
    _check_text(tail)
