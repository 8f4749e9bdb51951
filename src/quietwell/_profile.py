"""Build the apparatus of a setup profile: the one place where runtime code of
``src/`` reaches the simulated laboratory, and only when the setup asks for it."""

from __future__ import annotations

from pathlib import Path

from ._errors import InputError
from .setup import Setup, load_setup

__all__ = ["build_apparatus", "find_profile", "connect_apparatus"]


def find_profile(name_or_path: str | Path) -> Path:
    """The folder of a profile: a path, or a name looked up in ``./profiles`` and in the
    ``profiles/`` folder of the source checkout."""
    p = Path(name_or_path)
    if (p / "setup.toml").exists() or p.suffix == ".toml":
        return p
    for root in (Path.cwd() / "profiles", Path(__file__).resolve().parents[2] / "profiles"):
        if (root / str(name_or_path) / "setup.toml").exists():
            return root / str(name_or_path)
    raise InputError(f"setup profile {str(name_or_path)!r} not found (looked for "
                     f"{p / 'setup.toml'} and profiles/{name_or_path}/setup.toml); give a "
                     "profile folder holding setup.toml")


def build_apparatus(setup: Setup | str | Path, raw_dir: str | Path):
    """The :class:`~quietwell.plans.Apparatus` of ``setup``; HDF5 traces go to ``raw_dir``.

    A setup of kind ``sim`` gets the simulated laboratory. quietwell ships no drivers
    for real instruments: a ``hardware`` setup needs backends written for them.
    """
    if not isinstance(setup, Setup):
        setup = load_setup(find_profile(setup))
    if setup.kind == "sim":
        import quietwell_sim

        return quietwell_sim.build_sim_apparatus(setup, Path(raw_dir))
    raise InputError(f"{setup.source}: [setup] kind = 'hardware', but quietwell ships no "
                     f"drivers for real instruments; implement the backend protocols of "
                     "quietwell.devices for your hardware (see DEVELOPERS.md) or use a "
                     "profile of kind 'sim'")


def connect_apparatus(apparatus, timeout: float = 10.0) -> None:
    """Connect every device of ``apparatus`` in the RunEngine's event loop.

    A :class:`bluesky.RunEngine` must exist first (it runs the loop the devices
    belong to). Connecting adopts the hardware's state and sends nothing to it.
    Uses ``bluesky.run_engine.call_in_bluesky_event_loop`` with ophyd-async's
    ``wait_for_connection``, as ``ophyd_async.core.init_devices`` does.

    Raises
    ------
    InputError
        If no RunEngine event loop is running.
    """
    from bluesky.run_engine import call_in_bluesky_event_loop
    from ophyd_async.core import wait_for_connection

    devices = apparatus.devices()
    coros = {dev.name: dev.connect(timeout=timeout) for dev in devices}
    try:
        call_in_bluesky_event_loop(wait_for_connection(**coros))
    except RuntimeError as exc:
        if "event loop not running" not in str(exc):
            raise
        for c in coros.values():
            c.close()
        raise InputError(
            "no RunEngine event loop is running; create bluesky.RunEngine() before "
            "connect_apparatus(apparatus)"
        ) from None
