"""One entry point that builds a working session from a setup profile.

``open_session(profile, data_dir)`` loads the setup, opens its store (the embedded one,
or the lab's catalog server if the profile's ``[data]`` says so), makes
the RunEngine (``call_returns_result=True``, no SIGINT handler of its own: a campaign
handles signals itself), subscribes the store's writer and connects the apparatus.
The campaign runner, the demo, the tests and the benches all use it, so there is one
assembly with one set of RunEngine options.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .setup import Setup, load_setup

__all__ = ["Session", "open_session"]


@dataclass
class Session:
    """A setup, its connected apparatus, a RunEngine and the store it writes to.

    Attributes
    ----------
    setup : Setup
    profile : Path
        The profile folder (or setup file) the setup came from.
    RE : bluesky.RunEngine
    apparatus : quietwell.plans.Apparatus
    store : quietwell.store.EmbeddedStore or quietwell.store.ServerStore
        As the profile's ``[data]`` says (embedded by default).
    data_dir : Path
    stop_reason : str
        If set when a run ends with ``exit_status`` ``abort`` or ``fail``, it becomes
        the ``reason`` of that run's stop document (bluesky 1.15.1 does not carry the
        reason given to ``RE.abort`` into the stop document of a wrapped plan).
    """

    setup: Setup
    profile: Path
    RE: Any
    apparatus: Any
    store: Any
    data_dir: Path
    stop_reason: str = ""
    _subscribed: list = field(default_factory=list)

    @property
    def lab(self) -> Any:
        """The simulated laboratory of a ``sim`` setup (None for hardware)."""
        return self.apparatus.extras.get("lab")

    def _write(self, name: str, doc: dict) -> None:
        if name == "stop" and self.stop_reason and doc.get("exit_status") != "success":
            doc = {**doc, "reason": self.stop_reason}
        self.store.writer(name, doc)

    def close(self) -> dict[str, str]:
        """Close the store (finishing the catalog's work); the runs it could not take."""
        for token in self._subscribed:
            self.RE.unsubscribe(token)
        self._subscribed.clear()
        return self.store.close()

    def __enter__(self) -> Session:
        return self

    def __exit__(self, exc_type, *exc) -> None:
        from ._errors import QuietwellError

        failed = self.close()
        if failed and exc_type is None:
            raise QuietwellError(f"the catalog could not take run(s) {', '.join(failed)}; "
                                 f"rebuild them with `quietwell recover --data-dir "
                                 f"{self.data_dir}`")


def open_session(profile: str | Path | Setup, data_dir: str | Path, *,
                 batch_size: int = 100) -> Session:
    """Build a :class:`Session` for ``profile`` (a name, folder or setup) into ``data_dir``.

    Use it as a context manager; closing it finishes the catalog's work::

        with open_session("amber", "quietwell-data") as s:
            s.RE(pressure_sweep([s.apparatus.detector], [...], apparatus=s.apparatus))
    """
    from bluesky import RunEngine

    from ._profile import apparatus_builder, find_profile
    from .plans import connect_apparatus
    from .store import open_store

    if isinstance(profile, Setup):
        setup, where = profile, Path(profile.source)
    else:
        where = find_profile(profile)
        setup = load_setup(where)
    build = apparatus_builder(setup)  # refused before the store starts
    store = open_store(setup, data_dir, batch_size=batch_size)  # [data] of the profile
    try:
        RE = RunEngine({}, context_managers=[], call_returns_result=True)
        app = build(setup, store.raw_dir)
        connect_apparatus(app)
    except BaseException:
        store.close()
        raise
    session = Session(setup=setup, profile=where, RE=RE, apparatus=app, store=store,
                      data_dir=store.data_dir)
    session._subscribed.append(RE.subscribe(session._write))
    return session
