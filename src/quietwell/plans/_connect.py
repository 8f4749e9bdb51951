"""Connect the devices of an apparatus in the RunEngine's event loop."""

from __future__ import annotations

from typing import TYPE_CHECKING

from .._errors import InputError

if TYPE_CHECKING:
    from ._common import Apparatus

__all__ = ["connect_apparatus"]


def connect_apparatus(apparatus: Apparatus, timeout: float = 10.0) -> None:
    """Connect every device of ``apparatus`` in the RunEngine's event loop.

    A :class:`bluesky.RunEngine` must exist first (it runs the loop the devices
    belong to). Connecting adopts the hardware's state and sends nothing to it.
    Uses ``bluesky.run_engine.call_in_bluesky_event_loop`` with ophyd-async's
    ``wait_for_connection``, as ``ophyd_async.core.init_devices`` does. The same
    function serves every backend (the simulated laboratory and real instruments).

    Parameters
    ----------
    apparatus : Apparatus
        As built by ``quietwell._profile.build_apparatus`` (or a builder directly).
    timeout : float
        Seconds each device may take to connect.

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
