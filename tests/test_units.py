"""Units at the edge (pint): strings in files become SI values, bad strings one-line errors.

Reference values come from scipy.constants (CODATA 2018 and the SI prefixes). The bar is
1e5 Pa by definition, so 1 mbar = 100 Pa (SI brochure, 9th edition, 2019, Table 8); the
torr is 101325/760 Pa (scipy.constants.torr).
"""

from __future__ import annotations

import doctest
import math
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from scipy import constants as sc

import quietwell
import quietwell.setup._units as units_module
from quietwell import InputError
from quietwell.setup import KINDS, display, parse_quantity

MBAR = sc.milli * sc.bar

GOOD = [
    # (value, kind, SI value from an outside reference)
    ("5e-7 Torr", "pressure", 5e-7 * sc.torr),
    ("2 mTorr", "pressure", 2 * sc.milli * sc.torr),
    ("760 Torr", "pressure", sc.atm),  # the torr is 1/760 of the standard atmosphere
    ("1e-8 mbar", "pressure", 1e-8 * MBAR),
    ("3 mbar", "pressure", 3 * MBAR),
    (" 3mbar ", "pressure", 3 * MBAR),
    ("1 bar", "pressure", sc.bar),
    ("2.5 hPa", "pressure", 2.5 * sc.hecto),
    ("1.5e3 Pa", "pressure", 1.5e3),
    ("1.2 GHz", "frequency", 1.2 * sc.giga),
    ("0.85 kHz", "frequency", 0.85 * sc.kilo),
    ("152 kHz", "frequency", 152 * sc.kilo),
    ("2e4 1/s", "rate", 2e4),
    ("2e4 s^-1", "rate", 2e4),
    # a rate in Hz is read as 1/s (common practice, no source)
    ("3 kHz", "rate", 3 * sc.kilo),
    ("20 mW", "power", 20 * sc.milli),
    ("0.3 W", "power", 0.3),
    ("300 mK", "temperature", 300 * sc.milli),
    ("4.2 K", "temperature", 4.2),
    ("5 kV", "voltage", 5 * sc.kilo),
    ("-12 mV", "voltage", -12 * sc.milli),
    ("10 ms", "time", 10 * sc.milli),
    ("2 h", "time", 2 * sc.hour),
    ("5 min", "time", 5 * sc.minute),
    ("3 us", "time", 3 * sc.micro),
    ("3 \u00b5s", "time", 3 * sc.micro),  # micro sign
    ("3 fg", "mass", 3 * sc.femto * sc.gram),
    ("1 kg", "mass", 1.0),
    ("2 kg/m^3", "density", 2.0),
    ("2.2 g/cm^3", "density", 2.2 * sc.gram / sc.centi**3),
    ("1.2 V/um", "calibration", 1.2 / sc.micro),
    ("0.8 mV/nm", "calibration", 0.8 * sc.milli / sc.nano),
    ("10 fm/Hz^0.5", "amplitude_density", 10 * sc.femto),
    ("10 fm/sqrt(Hz)", "amplitude_density", 10 * sc.femto),
    ("3 pm/sqrt( Hz )", "amplitude_density", 3 * sc.pico),
    ("2 kV/m", "field", 2 * sc.kilo),
    ("1064 nm", "length", 1064 * sc.nano),
    ("3 \u03bcm", "length", 3 * sc.micro),  # Greek mu
    (".5 mm", "length", 0.5 * sc.milli),
    ("1 1/um^2", "inverse_area", 1 / sc.micro**2),
    ("15 %", "dimensionless", 0.15),
    ("0.3", "dimensionless", 0.3),
    # numbers are SI already
    (1e-7, "pressure", 1e-7),
    (3, "length", 3.0),
    (2e4, "rate", 2e4),
]


@pytest.mark.parametrize(("value", "kind", "si"), GOOD)
def test_good_values_convert_to_si(value, kind, si):
    got = parse_quantity(value, kind, "f.toml: [t] key")
    assert type(got) is float
    assert got == pytest.approx(si, rel=1e-12, abs=0.0)


def test_mmhg_is_the_conventional_millimetre_of_mercury():
    # pint's mmHg is the conventional one (13595.1 kg/m^3 of mercury under standard gravity),
    # 1.4e-7 above the torr that scipy.constants.mmHg equals; both agree within 1e-6.
    got = parse_quantity("1 mmHg", "pressure", "k")
    assert got == pytest.approx(sc.mmHg, rel=1e-6)
    assert got == pytest.approx(13595.1 * sc.g * sc.milli, rel=1e-12)


WHERE = "profiles/amber/setup.toml: [vacuum] base_pressure"

BAD = [
    # (value, kind, what the message must say)
    ("1,5 mbar", "pressure", r"a comma is not allowed"),
    ("1e-8,2e-8 mbar", "pressure", r"a comma is not allowed"),
    ("3 mbarr", "pressure", r"unit 'mbarr' is not known"),
    ("3 MBAR", "pressure", r"unit 'MBAR' is not known \(unit names are case-sensitive\)"),
    ("3 KHz", "frequency", r"unit 'KHz' is not known.*use one of Hz, kHz, MHz, GHz"),
    ("3 mHz", "pressure",
     r"unit 'mHz' has dimension 1/\[time\] \(a frequency or a rate\), but a pressure has dimension "
     r"\[mass\]/\[length\]/\[time\]\^2; use one of Pa, hPa, mbar, bar, Torr, mTorr"),
    ("0.3 mbar", "power", r"but a power has dimension.*use one of W, mW"),
    ("2 V/m", "inverse_area", r"\(a calibration or a field\), but an inverse area has"),
    ("3 m", "dimensionless", r"but a dimensionless number has no dimension; use one of no unit, %"),
    ("20 degC", "temperature", r"unit 'degC' is an offset scale.*K, mK"),
    ("70 degF", "temperature", r"unit 'degF' is an offset scale"),
    ("3 rad/s", "frequency", r"contains an angle.*2π times the frequency in Hz"),
    ("300 rpm", "rate", r"contains an angle"),
    ("3 deg", "dimensionless", r"contains an angle"),
    (True, "pressure", r"expected a pressure, not a boolean"),
    (False, "length", r"expected a length, not a boolean"),
    ([3, "mbar"], "pressure", r"expected a number or a string like '1e-8 mbar'"),
    ({"v": 3}, "pressure", r"expected a number or a string"),
    (None, "time", r"expected a number or a string like '10 ms'"),
    ("", "pressure", r"not a number with a unit"),
    ("   ", "pressure", r"not a number with a unit"),
    ("mbar", "pressure", r"not a number with a unit"),
    ("nan mbar", "pressure", r"not a number with a unit"),
    ("inf mbar", "pressure", r"not a number with a unit"),
    ("3 2 mbar", "pressure", r"not a number with a unit"),  # pint alone would read 6 mbar
    ("3 mbar * 2", "pressure", r"not a number with a unit"),
    ("3 m^", "length", r"not a number with a unit"),
    ("300", "pressure", r"no unit; a pressure in a string needs one of Pa.*plain number is read in Pa"),
    (10**400, "length", r"the number is too large"),
]


@pytest.mark.parametrize(("value", "kind", "pattern"), BAD)
def test_bad_values_are_refused_with_one_line(value, kind, pattern):
    with pytest.raises(InputError) as info:
        parse_quantity(value, kind, WHERE)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(f"{WHERE} = ")
    shown = repr(value)
    assert (shown if len(shown) <= 80 else shown[:77] + "...") in msg
    assert msg.endswith("fix the file")
    assert re.search(pattern, msg), msg


def test_the_comma_guard_is_needed():
    # pint on its own reads "1,5 mbar" as 15 mbar (the reason for the guard)
    import pint

    assert pint.get_application_registry().Quantity("1,5 mbar").to("mbar").magnitude == 15


def test_unknown_kind_is_a_programming_error():
    with pytest.raises(ValueError, match="known kinds: length, frequency") as info:
        parse_quantity("3 m", "lenght", "k")
    assert not isinstance(info.value, InputError)
    with pytest.raises(ValueError, match="unknown quantity kind"):
        display(1.0, "lenght")


def test_kinds():
    assert KINDS == (
        "length", "frequency", "rate", "power", "pressure", "temperature", "voltage", "time",
        "mass", "density", "calibration", "amplitude_density", "field", "inverse_area",
        "dimensionless",
    )


DISPLAYED = [
    (300.0, "pressure", "3 mbar"),  # 1 mbar = 100 Pa
    (1e-6, "pressure", "1e-08 mbar"),
    (sc.torr, "pressure", "1.333 mbar"),
    (2e4, "rate", "2e+04 1/s"),
    (152e3, "frequency", "152 kHz"),
    (999.0, "frequency", "999 Hz"),
    (2.5e6, "frequency", "2.5 MHz"),
    (0.02, "power", "20 mW"),
    (1.5, "power", "1.5 W"),
    (5.0, "voltage", "5 V"),
    (0.3, "temperature", "0.3 K"),
    (5e-4, "time", "500 us"),
    (0.01, "time", "10 ms"),
    (90.0, "time", "90 s"),
    (5 * sc.minute, "time", "5 min"),
    (2 * sc.hour, "time", "2 h"),
    (1.15e-18, "mass", "1.15 fg"),
    (2e-15, "mass", "2 pg"),
    (1064e-9, "length", "1.064 um"),
    (1e-3, "length", "1 mm"),
    (50e-9, "length", "50 nm"),
    (1.2e6, "calibration", "1.2 V/um"),
    (1e-14, "amplitude_density", "10 fm/Hz^0.5"),
    (3e-12, "amplitude_density", "3 pm/Hz^0.5"),
    (2200.0, "density", "2200 kg/m^3"),
    (1e4, "field", "10 kV/m"),
    (0.15, "dimensionless", "0.15"),
    (0.0, "time", "0 s"),
    (-3e-7, "pressure", "-3e-09 mbar"),
    (math.nan, "pressure", "nan mbar"),
]


@pytest.mark.parametrize(("x", "kind", "text"), DISPLAYED)
def test_display(x, kind, text):
    assert display(x, kind) == text


@pytest.mark.parametrize("kind", KINDS)
def test_display_reads_back_within_four_digits(kind):
    for exponent in range(-20, 8):
        for mantissa in (1.0, 2.345678, 9.9996):
            x = mantissa * 10.0**exponent
            back = parse_quantity(display(x, kind), kind, "k")
            assert back == pytest.approx(x, rel=5e-4), (x, display(x, kind))


def test_docstring_examples_run():
    result = doctest.testmod(units_module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 5
    assert result.failed == 0


def test_pint_is_loaded_on_first_use_only_and_shares_the_application_registry():
    # In a fresh interpreter: importing quietwell.setup does not import pint; parsing
    # uses (and prepares) the application registry, including one set by the application
    # before or after quietwell's first use.
    script = textwrap.dedent("""
        import sys
        import quietwell.setup
        from quietwell.setup import load_setup, parse_quantity
        assert "pint" not in sys.modules, "pint imported by quietwell.setup"
        assert parse_quantity(3.0, "pressure", "k") == 3.0
        assert "pint" not in sys.modules, "pint imported for a plain number"
        import pint
        torr = 101325 / 760
        assert abs(parse_quantity("1 Torr", "pressure", "k") - torr) < 1e-12
        assert abs(pint.Quantity(1, "Torr").to("Pa").magnitude - torr) < 1e-12
        ours = pint.UnitRegistry()
        assert "Torr" not in ours
        pint.set_application_registry(ours)
        assert abs(parse_quantity("2 mTorr", "pressure", "k") - 2e-3 * torr) < 1e-15
        assert "Torr" in ours and "mTorr" in ours
        print("ok")
    """)
    src = Path(quietwell.__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(src), os.environ.get("PYTHONPATH", "")]))
    out = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "ok"
