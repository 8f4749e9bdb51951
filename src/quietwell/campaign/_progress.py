"""The live view of a campaign on the terminal (rich), quiet when not a terminal.

One panel: step k of N with its name, records so far, the estimated lab time left
(from ``check``'s estimates), and the latest fitted values (frequency, linewidth,
occupation of each axis). Everything it shows also goes to the campaign's log file,
so an unattended run is followed with ``tail -f DIR/campaigns/<id>/log.txt``.
"""

from __future__ import annotations

import math
import sys
import time
from typing import Any

__all__ = ["Progress"]


def _hms(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "?"
    s = int(round(max(seconds, 0.0)))
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"


class Progress:
    """Progress of a campaign; ``quiet=None`` shows it only on a terminal."""

    def __init__(self, quiet: bool | None = None, console: Any = None) -> None:
        self.quiet = (not sys.stdout.isatty()) if quiet is None else quiet
        self._live = None
        self._console = console
        self._steps: list = []
        self._index = 0
        self._label = ""
        self._records = 0
        self._fit: dict = {}
        self._started = time.monotonic()
        self._step_started = time.monotonic()
        self._step_est = 0.0
        self._done_lines: list[str] = []

    # --- called by the runner -----------------------------------------------------------
    def start(self, cid: str, steps: list, done: int = 0) -> None:
        self._cid, self._steps = cid, steps
        if self.quiet:
            return
        from rich.console import Console
        from rich.live import Live

        self._console = self._console or Console(file=sys.__stdout__)
        self._live = Live(self._render(), console=self._console, refresh_per_second=4,
                          transient=False)
        self._live.start()

    def step(self, index: int, sid: str, plan: str, duration_s: float) -> None:
        self._index, self._label = index, f"{sid} ({plan})"
        self._records, self._fit = 0, {}
        self._step_started, self._step_est = time.monotonic(), duration_s
        self._refresh()

    def record(self, n: int) -> None:
        self._records = n
        self._refresh()

    def fit(self, data: dict) -> None:
        self._fit = data
        self._refresh()

    def monitor(self, data: dict) -> None:
        self._done_lines.append(f"monitor: {data.get('condition')} -> {data.get('action')}")
        self._refresh()

    def step_done(self, index: int, sid: str, uid: str, summary: dict) -> None:
        self._done_lines.append(f"step {index + 1}/{len(self._steps)} {sid}: done, run "
                                f"{uid[:8]}")
        self._refresh()

    def close(self) -> None:
        if self._live is not None:
            self._live.update(self._render())
            self._live.stop()
            self._live = None

    # --- rendering ----------------------------------------------------------------------
    def _left_s(self) -> float:
        rest = sum(s.move_s + s.checked.duration_s for s in self._steps[self._index + 1:])
        return rest + max(self._step_est - (time.monotonic() - self._step_started), 0.0)

    def _fit_text(self) -> str:
        parts = []
        for a in "xyz":
            f0, g = self._fit.get(f"f0_{a}"), self._fit.get(f"gamma_{a}")
            if isinstance(f0, float) and math.isfinite(f0):
                txt = f"{a}: {f0 / 1e3:.3f} kHz, gamma {g:.3g}/s"
                n = self._fit.get(f"occupation_{a}")
                if isinstance(n, float) and math.isfinite(n):
                    txt += f", n {n:.3g}"
                parts.append(txt)
        return "; ".join(parts) or "no fit yet"

    def _render(self):
        from rich.table import Table

        t = Table.grid(padding=(0, 2))
        t.add_column(style="bold")
        t.add_column()
        n = len(self._steps)
        t.add_row("campaign", getattr(self, "_cid", ""))
        t.add_row("step", f"{self._index + 1} of {n}: {self._label}")
        t.add_row("records", str(self._records))
        t.add_row("lab time left (est.)", _hms(self._left_s()))
        t.add_row("latest fit", self._fit_text())
        for line in self._done_lines[-3:]:
            t.add_row("", line)
        return t

    def _refresh(self) -> None:
        if self._live is not None:
            self._live.update(self._render())
