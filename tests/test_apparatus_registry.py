"""Apparatus builders by setup kind: the entry point group ``quietwell.apparatus``.

The simulated laboratory is registered as kind ``sim`` (pyproject.toml); a kind with no
registered builder is refused with one line. The physical checks compare the sim's
gauges with its true pressure within the accuracy stated in the profile file.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
import tomllib
from importlib.metadata import EntryPoint
from pathlib import Path

import pytest

import quietwell._profile as profile
from quietwell import InputError
from quietwell._profile import APPARATUS_ENTRY_POINTS, apparatus_builders, build_apparatus
from quietwell.setup import load_setup

ROOT = Path(__file__).resolve().parents[1]
PROFILES = ROOT / "profiles"


def _installed(monkeypatch, *eps: EntryPoint) -> None:
    # stand-in for the installed metadata: exactly these entry points of the group
    def fake(*, group):
        assert group == "quietwell.apparatus"
        return list(eps)

    monkeypatch.setattr(profile, "entry_points", fake)


def _profile_of_kind(tmp_path: Path, kind: str) -> Path:
    text = (PROFILES / "amber" / "setup.toml").read_text()
    assert 'kind = "sim"' in text
    path = tmp_path / "rig" / "setup.toml"
    path.parent.mkdir()
    path.write_text(text.replace('kind = "sim"', f'kind = "{kind}"'))
    return path


def test_the_group_is_the_one_declared_in_pyproject():
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())
    declared = meta["project"]["entry-points"][APPARATUS_ENTRY_POINTS]
    assert declared == {"sim": "quietwell_sim:build_sim_apparatus"}
    # the fallback for source checkouts names the same builder
    assert profile._DEFAULT_BUILDERS == declared


def test_a_kind_without_a_builder_is_one_line(tmp_path, monkeypatch):
    _installed(monkeypatch)  # nothing installed: only the built-in sim
    path = _profile_of_kind(tmp_path, "hardware")
    setup = load_setup(path)
    with pytest.raises(InputError) as info:
        build_apparatus(setup, tmp_path / "raw")
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(f"{path}: [setup] kind = 'hardware' has no apparatus builder")
    assert "kinds available: 'sim'" in msg
    assert "backend protocols of quietwell.devices" in msg
    assert "entry point group 'quietwell.apparatus'" in msg and "DEVELOPERS.md" in msg
    assert not (tmp_path / "raw").exists()  # refused before anything is built


def _write_plugin(tmp_path: Path, monkeypatch) -> None:
    (tmp_path / "rig_backends_for_test.py").write_text(textwrap.dedent("""
        CALLS = []

        def build(setup, raw_dir):
            CALLS.append((setup, raw_dir))
            return ("apparatus of", setup.name)
    """))
    monkeypatch.syspath_prepend(str(tmp_path))


def test_hardware_resolves_through_the_same_registry(tmp_path, monkeypatch):
    _write_plugin(tmp_path, monkeypatch)
    _installed(monkeypatch, EntryPoint("hardware", "rig_backends_for_test:build", APPARATUS_ENTRY_POINTS))
    import rig_backends_for_test as plugin

    setup = load_setup(_profile_of_kind(tmp_path, "hardware"))
    assert build_apparatus(setup, str(tmp_path / "raw")) == ("apparatus of", "amber")
    assert plugin.CALLS == [(setup, tmp_path / "raw")]  # raw_dir handed over as a Path
    assert sorted(apparatus_builders()) == ["hardware", "sim"]


def test_an_installed_sim_entry_point_wins_over_the_default(tmp_path, monkeypatch):
    _write_plugin(tmp_path, monkeypatch)
    _installed(monkeypatch, EntryPoint("sim", "rig_backends_for_test:build", APPARATUS_ENTRY_POINTS))
    assert build_apparatus("amber", tmp_path) == ("apparatus of", "amber")


def test_a_builder_that_cannot_be_loaded_is_one_line(tmp_path, monkeypatch):
    _installed(monkeypatch, EntryPoint("hardware", "rig_backends_missing_xq:build",
                                       APPARATUS_ENTRY_POINTS))
    path = _profile_of_kind(tmp_path, "hardware")
    with pytest.raises(InputError) as info:
        build_apparatus(load_setup(path), tmp_path)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(f"{path}: [setup] kind = 'hardware'")
    assert "'rig_backends_missing_xq:build'" in msg and "ModuleNotFoundError" in msg


def test_two_builders_for_one_kind_are_refused(monkeypatch):
    _installed(monkeypatch,
               EntryPoint("hardware", "a_backends:build", APPARATUS_ENTRY_POINTS),
               EntryPoint("hardware", "b_backends:build", APPARATUS_ENTRY_POINTS))
    with pytest.raises(InputError, match="kind 'hardware' has two builders, 'a_backends:build' and "
                                         "'b_backends:build'"):
        apparatus_builders()


def test_sim_resolves_to_the_simulated_laboratory(tmp_path):
    # the real registry (installed entry points, else the built-in default)
    import bluesky.plan_stubs as bps
    from bluesky import RunEngine
    from quietwell_sim import SimLab, build_sim_apparatus

    from quietwell.plans import Apparatus, connect_apparatus

    assert apparatus_builders()["sim"].load() is build_sim_apparatus
    RE = RunEngine({})
    app = build_apparatus("amber", tmp_path / "raw")
    assert isinstance(app, Apparatus) and isinstance(app.extras["lab"], SimLab)
    assert app.setup.name == "amber" and (tmp_path / "raw").is_dir()
    connect_apparatus(app)
    readings = {}

    def read(dev):
        readings.update((yield from bps.read(dev)))

    raw = tomllib.loads((PROFILES / "amber" / "setup.toml").read_text())
    accuracy = {g["name"]: g["accuracy"] for g in raw["vacuum"]["gauges"]}
    true_p = app.extras["lab"].pressure
    assert true_p == pytest.approx(10e2)  # start_pressure = "10 mbar"
    checked = []
    for gauge in app.gauges:
        if gauge.name in ("tc", "cdg"):  # the gauges in range at 10 mbar
            RE(read(gauge))
            value = readings[f"{gauge.name}-pressure"]["value"]
            assert abs(value / true_p - 1) <= accuracy[gauge.name]
            checked.append(gauge.name)
    assert sorted(checked) == ["cdg", "tc"]


def test_the_re_exports_are_one_function():
    import quietwell_sim

    from quietwell.plans import connect_apparatus

    assert profile.connect_apparatus is connect_apparatus
    assert quietwell_sim.connect_apparatus is connect_apparatus


def test_no_import_circle_and_no_eager_bluesky():
    # fresh interpreters: the sim does not load the profile loader, the profile loader
    # does not load the sim, and neither loads bluesky on import
    code = (
        "import sys, importlib\n"
        "importlib.import_module(sys.argv[1])\n"
        "print(sorted(m for m in ('quietwell._profile', 'quietwell_sim', 'bluesky') "
        "if m in sys.modules))\n"
    )
    for module, expected in (("quietwell_sim", "['quietwell_sim']"),
                             ("quietwell._profile", "['quietwell._profile']")):
        res = subprocess.run([sys.executable, "-W", "error", "-c", code, module],
                             capture_output=True, text=True, check=True)
        assert res.stdout.strip() == expected, (module, res.stdout, res.stderr)
