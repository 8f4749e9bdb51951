"""Build the apparatus of a setup profile through the builder registered for its kind.

A package provides the apparatus of a setup kind by registering a builder under the
entry point group :data:`APPARATUS_ENTRY_POINTS` (``quietwell.apparatus``), named by
the kind, in its ``pyproject.toml``::

    [project.entry-points."quietwell.apparatus"]
    hardware = "mylab_backends:build_apparatus"

A builder is called as ``builder(setup, raw_dir)`` with the parsed
:class:`~quietwell.setup.Setup` and the folder (:class:`~pathlib.Path`) for the HDF5
traces, and returns a :class:`quietwell.plans.Apparatus` whose devices are built with
the setup's limits (not yet connected). quietwell registers the simulated laboratory
as ``sim = "quietwell_sim:build_sim_apparatus"``. No module of ``quietwell`` imports
``quietwell_sim``: it is named here by string and loaded only when a setup asks for it.
"""

from __future__ import annotations

from importlib.metadata import EntryPoint, entry_points
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ._errors import InputError
from .setup import Setup, load_setup

if TYPE_CHECKING:  # re-exported lazily through __getattr__ below
    from .plans import connect_apparatus

__all__ = [
    "APPARATUS_ENTRY_POINTS",
    "apparatus_builder",
    "apparatus_builders",
    "build_apparatus",
    "connect_apparatus",
    "find_profile",
]

#: Entry point group of the apparatus builders, one entry point per setup kind.
APPARATUS_ENTRY_POINTS = "quietwell.apparatus"

# The simulated laboratory ships in the same distribution as quietwell and is declared
# under APPARATUS_ENTRY_POINTS in pyproject.toml. Entry points come from the installed
# metadata (dist-info), so a source checkout run with PYTHONPATH=src:sim_devices, or an
# install made before the entry point was declared, would not see it. For that case
# the kinds below are filled in by default for any kind that no installed entry point
# names: an installed entry point always wins, and the default is a "module:function"
# string loaded with importlib only when asked (no static import of quietwell_sim).
_DEFAULT_BUILDERS = {"sim": "quietwell_sim:build_sim_apparatus"}


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


def _origin(ep: EntryPoint) -> str:
    dist = getattr(ep, "dist", None)
    return f"{ep.value!r} (package {dist.name})" if dist is not None else repr(ep.value)


def apparatus_builders() -> dict[str, EntryPoint]:
    """The registered apparatus builders by setup kind (not loaded).

    Installed entry points of the group ``quietwell.apparatus`` first; the built-in
    ``sim = "quietwell_sim:build_sim_apparatus"`` fills in when no installed entry
    point names ``sim``.

    Raises
    ------
    InputError
        If two installed packages register a builder for the same kind.
    """
    found: dict[str, EntryPoint] = {}
    for ep in entry_points(group=APPARATUS_ENTRY_POINTS):
        if ep.name in found and found[ep.name].value != ep.value:
            raise InputError(
                f"entry point group {APPARATUS_ENTRY_POINTS!r}: setup kind {ep.name!r} has two "
                f"builders, {_origin(found[ep.name])} and {_origin(ep)}; uninstall one of "
                "the packages or register it under another kind"
            )
        found.setdefault(ep.name, ep)
    for kind, value in _DEFAULT_BUILDERS.items():
        found.setdefault(kind, EntryPoint(name=kind, value=value, group=APPARATUS_ENTRY_POINTS))
    return found


def build_apparatus(setup: Setup | str | Path, raw_dir: str | Path) -> Any:
    """The :class:`~quietwell.plans.Apparatus` of ``setup``; HDF5 traces go to ``raw_dir``.

    Parameters
    ----------
    setup : Setup, str or Path
        A parsed setup, or a profile name or folder (see :func:`find_profile`).
    raw_dir : str or Path
        Folder for the HDF5 traces.

    The builder is the one registered for the setup's ``kind`` (see the module
    docstring): ``sim`` gets the simulated laboratory. quietwell ships no drivers for
    real instruments: a ``hardware`` setup needs a builder registered by a package
    that implements the backend protocols of :mod:`quietwell.devices`.

    Raises
    ------
    InputError
        If no builder is registered for the kind, or the registered one cannot be
        loaded.
    """
    if not isinstance(setup, Setup):
        setup = load_setup(find_profile(setup))
    return apparatus_builder(setup)(setup, Path(raw_dir))


def apparatus_builder(setup: Setup) -> Any:
    """The loaded builder registered for ``setup.kind`` (see :func:`build_apparatus`).

    Raises :class:`~quietwell.InputError` (one line) when there is none or it cannot be
    loaded: callers resolve it before they open a store or any device.
    """
    builders = apparatus_builders()
    ep = builders.get(setup.kind)
    if ep is None:
        available = ", ".join(repr(k) for k in sorted(builders)) or "none"
        raise InputError(
            f"{setup.source}: [setup] kind = {setup.kind!r} has no apparatus builder "
            f"(kinds available: {available}); quietwell ships no drivers for real "
            "instruments: implement the backend protocols of quietwell.devices and "
            f"register a builder for {setup.kind!r} under the entry point group "
            f"{APPARATUS_ENTRY_POINTS!r} (see DEVELOPERS.md), or use a profile of kind 'sim'"
        )
    try:
        builder = ep.load()
    except (ImportError, AttributeError) as exc:
        raise InputError(
            f"{setup.source}: [setup] kind = {setup.kind!r}: its builder {_origin(ep)} "
            f"cannot be loaded ({type(exc).__name__}: {exc}); fix or reinstall that "
            f"package, or remove its entry point from the group {APPARATUS_ENTRY_POINTS!r}"
        ) from None
    return builder


def __getattr__(name: str) -> Any:
    # connect_apparatus lives in quietwell.plans (beside Apparatus); re-exported here for
    # the callers of this module, loaded on first use so that importing this module does
    # not load bluesky.
    if name == "connect_apparatus":
        from .plans import connect_apparatus

        return connect_apparatus
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
