"""The shipped campaign files and the README's example check on every shipped setup.

A campaign is meant to be shared between setups that differ in laser, particle and
gauges: the same file must pass ``check`` unchanged on ``amber`` and ``cobalt``.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from quietwell._profile import find_profile
from quietwell.campaign import check_campaign, load_campaign, parse_campaign
from quietwell.physics import Estimate, sphere_mass
from quietwell.setup import load_setup

ROOT = Path(__file__).resolve().parents[1]
FILES = sorted((ROOT / "campaigns").glob("*.toml")) + [ROOT / "tests/data/tiny-campaign.toml"]


def _readme_campaign() -> str:
    text = (ROOT / "README.md").read_text()
    (block,) = [b for b in re.findall(r"```toml\n(.*?)```", text, re.S) if "[campaign]" in b]
    return block


@pytest.mark.parametrize("setup", ["amber", "cobalt"])
@pytest.mark.parametrize("path", FILES, ids=lambda p: p.name)
def test_shipped_campaigns_check_unchanged_on_every_setup(path, setup):
    checked = check_campaign(load_campaign(path), load_setup(find_profile(setup)))
    assert checked.duration_s > 0 and len(checked.steps) >= 5


@pytest.mark.parametrize("setup", ["amber", "cobalt"])
def test_the_readme_campaign_example_checks(setup):
    s = load_setup(find_profile(setup))
    checked = check_campaign(parse_campaign(_readme_campaign(), "README.md"), s)
    by_id = {c.step.id: c for c in checked.steps}
    # units at the edge, SI inside: 3 Torr = 400 Pa (scipy.constants.torr, CODATA)
    from scipy.constants import torr

    assert by_id["thermal"].checked.params["pressure"] == pytest.approx(3 * torr)
    # a setup reference: 0.85 x the x frequency of this setup
    assert by_id["charge"].checked.params["drive_frequency"] == pytest.approx(
        0.85 * s.trap.frequencies[0])
    # check uses the nominal mass (sphere of the setup's radius and density) as stand-in
    m = by_id["thermal"].checked.params["mass"]
    assert isinstance(m, Estimate)
    assert m.value == pytest.approx(float(sphere_mass(s.particle.radius, s.particle.density)))
    # a clipped result is checked at both ends; the reheating step leaves cold damping on
    assert "feedback_gain" in by_id["reheat"].deferred
    assert checked.steps[-1].after.feedback == "on"
