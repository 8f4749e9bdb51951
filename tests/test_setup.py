"""Setup descriptions: unit conversion at the edge and one-line errors for bad input."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from scipy import constants as sc

from quietwell import InputError
from quietwell.setup import load_setup, parse_quantity

PROFILES = Path(__file__).resolve().parents[1] / "profiles"
AMBER = (PROFILES / "amber" / "setup.toml").read_text()


def test_every_profile_loads_and_converts_to_si():
    names = sorted(p.name for p in PROFILES.iterdir() if (p / "setup.toml").exists())
    assert names == ["amber", "cobalt"]
    s = load_setup(PROFILES / "amber")
    assert s.trap.power == 0.3
    assert s.trap.wavelength == pytest.approx(1064e-9)
    assert s.detector.calibration == pytest.approx((1.2e6, 1.0e6, 0.6e6))
    assert s.vacuum.base_pressure == pytest.approx(2e-7)  # 2e-9 mbar in Pa
    assert s.limits.pressure_min == pytest.approx(1e-7)


def test_torr_conversion_uses_the_standard_atmosphere():
    # 1 Torr = 101325/760 Pa by definition (scipy.constants.torr).
    assert parse_quantity("1 Torr", "pressure", "k") == pytest.approx(sc.torr, rel=1e-12)
    assert parse_quantity("3 mbar", "pressure", "k") == pytest.approx(300.0)


def test_setup_hash_is_stable_and_sensitive():
    a = load_setup(PROFILES / "amber")
    assert a.sha256 == load_setup(PROFILES / "amber").sha256
    assert a.sha256 != load_setup(PROFILES / "cobalt").sha256
    assert a.as_dict()["trap"]["frequencies"] == [152e3, 171e3, 48e3]


@pytest.mark.parametrize(
    ("old", "new", "pattern"),
    [
        ('power = "0.3 W"', 'power = "0.3 parsec"', r"\[trap\] power = '0.3 parsec'.*unit 'parsec'.*W, mW"),
        ('power = "0.3 W"', 'power = "0.9 W"', r"\[trap\] power = '0.9 W' is out of range.*<= 0.5"),
        ('power = "0.3 W"', 'powr = "0.3 W"', r"\[trap\] powr is not a known key"),
        ('charge_e = 7', 'charge_e = 7.5', r"\[particle\] charge_e = 7.5: expected an integer"),
        ('gas = "N2"', 'gas = "Xe2"', r"\[vacuum\] gas = 'Xe2': expected one of N2, He"),
        ('frequencies = ["152 kHz", "171 kHz", "48 kHz"]', 'frequencies = ["152 kHz"]',
         r"\[trap\] frequencies = \['152 kHz'\]: expected a list of 3"),
        ('lo_sign = 1', 'lo_sign = 0', r"\[detector\] lo_sign = 0: expected \+1 or -1"),
        ('\n[limits]\n', '\n[limitz]\n', r"\[limitz\] is not a known section"),
        ('record_length = 262144', 'record_length = 99999999999',
         r"record_length = 99999999999: expected an integer from 1024 to 16777216"),
    ],
)
def test_bad_values_give_one_line_errors_naming_file_key_and_value(tmp_path, old, new, pattern):
    assert old in AMBER
    f = tmp_path / "setup.toml"
    f.write_text(AMBER.replace(old, new, 1))
    with pytest.raises(InputError) as info:
        load_setup(f)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(str(f))
    assert re.search(pattern, msg), msg
    assert "fix" in msg or "remove" in msg


def test_missing_file_and_bad_toml(tmp_path):
    with pytest.raises(InputError, match="no such setup file"):
        load_setup(tmp_path / "nowhere")
    f = tmp_path / "setup.toml"
    f.write_text("[setup\nname=1")
    with pytest.raises(InputError, match="not valid TOML"):
        load_setup(f)
