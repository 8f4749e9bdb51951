"""What a campaign process does around its runs: signals, bluesky's prints, the log file
and the fault injection of the crash tests."""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import threading
from pathlib import Path
from typing import Any

__all__ = ["Signals", "Faults", "quiet_re", "log_to"]

_log = logging.getLogger("quietwell.campaign")


class _PrintsToLog:
    """bluesky prints its state changes ("Aborting: ...") to standard output; during a
    campaign they go to the log instead, so the terminal shows the live view and one
    closing line."""

    def write(self, text: str) -> int:
        for line in text.splitlines():
            if line.strip():
                _log.info("bluesky: %s", line.strip())
        return len(text)

    def flush(self) -> None:
        pass


def quiet_re(RE: Any, plan: Any) -> Any:
    with contextlib.redirect_stdout(_PrintsToLog()):
        return RE(plan)


class Signals:
    """SIGINT and SIGTERM end the current run (abort, with a plain reason) and the
    campaign; a second signal while ending is ignored (the store must be closed)."""

    REASONS = {signal.SIGINT: ("interrupted by the user", 130),
               signal.SIGTERM: ("terminated", 143)}

    def __init__(self, session: Any) -> None:
        self.session = session
        self.reason: str | None = None
        self.code = 0
        self._old: dict = {}

    def __enter__(self) -> Signals:
        if threading.current_thread() is threading.main_thread():
            for sig in self.REASONS:
                self._old[sig] = signal.signal(sig, self._handle)
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)

    def _handle(self, signum: int, frame: object) -> None:
        if self.reason is not None:
            return
        self.reason, self.code = self.REASONS[signal.Signals(signum)]
        self.session.stop_reason = self.reason
        threading.Thread(target=self._abort, name="quietwell-abort", daemon=True).start()

    def _abort(self) -> None:
        from bluesky.utils import TransitionError

        try:
            self.session.RE.abort(self.reason)
        except (TransitionError, RuntimeError):
            pass  # idle between steps: the runner sees the flag before the next step


class Faults:
    """Fault injection for the crash tests (``QUIETWELL_FAULT=POINT:N``): the process
    kills itself with SIGKILL at the N-th time it passes POINT (``event``: a primary
    event, ``trigger``: 30 ms after a record began, ``stop``: a run's stop document,
    ``done``: step N written to the ledger, ``resume``: after recovery). Unset in use."""

    def __init__(self, point: str | None, n: int) -> None:
        self.point, self.n, self.seen = point, n, 0

    @classmethod
    def from_env(cls) -> Faults:
        spec = os.environ.get("QUIETWELL_FAULT", "")
        point, _, n = spec.partition(":")
        return cls(point or None, int(n or 1))

    def on_msg(self, msg: Any) -> None:
        if msg.command == "trigger" and getattr(msg.obj, "name", "") != "fitter":
            self.seen += 1
            if self.seen == self.n:
                threading.Timer(0.03, os.kill, (os.getpid(), signal.SIGKILL)).start()

    def hit(self, point: str, index: int | None = None) -> None:
        if point != self.point:
            return
        if index is not None:
            if index == self.n:
                os.kill(os.getpid(), signal.SIGKILL)
            return
        self.seen += 1
        if self.seen == self.n:
            os.kill(os.getpid(), signal.SIGKILL)


def log_to(path: Path) -> logging.Handler:
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    handler.setLevel(logging.INFO)
    # on the root logger: the libraries' warnings and errors (bluesky's "Run aborted"
    # with its traceback) go to the log file, not to the terminal
    logging.getLogger().addHandler(handler)
    ours = logging.getLogger("quietwell")
    if ours.level == logging.NOTSET or ours.level > logging.INFO:
        ours.setLevel(logging.INFO)
    return handler
