"""The live view of a campaign: what a person sees on a terminal, and silence elsewhere."""

from __future__ import annotations

import io

from rich.console import Console

from quietwell._profile import find_profile
from quietwell.campaign import Progress, check_campaign, parse_campaign
from quietwell.setup import load_setup

TEXT = """
[campaign]
name = "view"

[[step]]
id = "cal"
plan = "thermal_calibration"
pressure = "3 mbar"
records = 4

[[step]]
id = "down"
plan = "pressure_sweep"
pressures = ["3 mbar", "1e-6 mbar"]
"""


def test_the_live_view_shows_step_records_time_left_fits_and_monitors():
    checked = check_campaign(parse_campaign(TEXT, "view.toml"), load_setup(find_profile("amber")))
    out = io.StringIO()
    view = Progress(quiet=False, console=Console(file=out, force_terminal=True, width=120))
    view.start("20261203-view", checked.steps)
    view.step(0, "cal", "thermal_calibration", checked.steps[0].checked.duration_s)
    view.record(3)
    view.fit({"f0_x": 152.1e3, "gamma_x": 12.5, "occupation_x": 3.2})
    view.monitor({"condition": "pressure_excursion", "action": "suspend"})
    view.step_done(0, "cal", "0123456789abcdef", {})
    view.close()
    text = out.getvalue()
    for words in ("step", "1 of 2: cal (thermal_calibration)", "records", "3",
                  "lab time left", "152.100 kHz", "n 3.2", "pressure_excursion -> suspend",
                  "done, run 01234567"):
        assert words in text, words


def test_the_live_view_is_silent_when_not_a_terminal(capsys):
    view = Progress(quiet=None)  # pytest's captured output is not a terminal
    view.start("x", [])
    view.record(1)
    view.close()
    assert capsys.readouterr().out == ""
