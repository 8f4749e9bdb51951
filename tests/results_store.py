"""A small real store for the results and README tests, and what its plans returned.

Runs, in this order, on the simulated setups (short records; about 30 s in all):

===  =======  ====================  ========  ====  ===========================
 #   setup    plan                  campaign  step  ends
===  =======  ====================  ========  ====  ===========================
 0   amber    thermal_calibration   c-one     0#1   success
 1   amber    pressure_sweep        c-one     1#1   success
 2   amber    reheating_cycles      c-one     2#1   success (1e-6 mbar)
 3   amber    reheating_cycles      c-one     3#1   abort (RequestAbort mid-run),
                                                    superseded by run 4
 4   amber    reheating_cycles      c-one     3#2   success (1e-7 mbar)
 5   amber    reheating_cycles      c-two     0#1   fail (an error mid-run)
 6   amber    reheating_cycles      c-two     0#2   success (1e-8 mbar)
 7   cobalt   thermal_calibration   -         -     success
===  =======  ====================  ========  ====  ===========================

Each start document carries what the campaign runner writes (``campaign_id``,
``campaign_step``, ``campaign_attempt``, ``campaign_step_id``); run 3 is marked
``superseded_by`` run 4 the way the runner marks it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

MBAR = 100.0


@dataclass
class Written:
    """One run as the test wrote it: its uid, setup, plan, metadata and plan result."""

    uid: str
    setup: str
    plan: str
    exit_status: str
    campaign_id: str | None = None
    campaign_step: int | None = None
    campaign_attempt: int | None = None
    superseded_by: str | None = None
    result: dict[str, Any] = field(default_factory=dict)
    time: float = 0.0


def _md(cid: str, step: int, attempt: int) -> dict:
    return {"campaign_id": cid, "campaign_step": step, "campaign_attempt": attempt,
            "campaign_step_id": f"s{step}"}


def _cut(plan, saves: int, exc: BaseException):
    """``plan``, with ``exc`` thrown into it after ``saves`` events (its cleanup runs)."""
    n = 0
    try:
        msg = plan.send(None)
        while True:
            reply = yield msg
            if msg.command == "save":
                n += 1
                if n == saves:  # raised where the plan waits for its save
                    msg = plan.throw(exc)
                    continue
            msg = plan.send(reply)
    except StopIteration as stop:
        return stop.value


def build(data_dir: Path) -> list[Written]:
    """Write the runs of the table above into ``data_dir``; what was written."""
    from bluesky.utils import RequestAbort

    from quietwell.plans import LabState, pressure_sweep, reach_state, reheating_cycles, thermal_calibration
    from quietwell.session import open_session

    out: list[Written] = []

    def run(s, plan, setup, name, status, md=None, expect_error=False):
        try:
            res = s.RE(plan)
        except Exception:  # noqa: BLE001 - the failed and aborted runs raise
            if not expect_error:
                raise
            res = None
        if res is not None and res.run_start_uids:
            uid = res.run_start_uids[-1]
            result = dict(res.plan_result or {}) if status == "success" else {}
        else:  # the run that raised: the last journal written
            uid = sorted((Path(data_dir) / "journal").glob("*.jsonl"),
                         key=lambda p: p.stat().st_mtime)[-1].name.split(".")[0]
            result = {}
        md = md or {}
        w = Written(uid=uid, setup=setup, plan=name, exit_status=status,
                    campaign_id=md.get("campaign_id"), campaign_step=md.get("campaign_step"),
                    campaign_attempt=md.get("campaign_attempt"), result=result)
        out.append(w)
        return w

    det = dict(sample_rate=1e6, record_length=65536, input_range=2.0)
    reheat = dict(feedback_gain=2e4, off_time=4e-3, sample_rate=1e6, input_range=0.02,
                  n_boot=50)
    with open_session("amber", data_dir) as s:
        app = s.apparatus
        s.RE(reach_state(app, LabState(pressure=3 * MBAR, feedback="off")))
        md = _md("c-one", 0, 1)
        run(s, thermal_calibration([app.detector], 3 * MBAR, apparatus=app, records=3,
                                   settle_time=0.1, md=md, **det),
            "amber", "thermal_calibration", "success", md)
        md = _md("c-one", 1, 1)
        run(s, pressure_sweep([app.detector], [10 * MBAR, 5 * MBAR, 1e-3 * MBAR, 1e-8 * MBAR],
                              apparatus=app, records_per_step=2, settle_time=0.1, md=md, **det),
            "amber", "pressure_sweep", "success", md)
        md = _md("c-one", 2, 1)
        run(s, reheating_cycles([app.detector], 3, apparatus=app, pressure=1e-6 * MBAR, md=md,
                                **reheat), "amber", "reheating_cycles", "success", md)
        md = _md("c-one", 3, 1)
        old = run(s, _cut(reheating_cycles([app.detector], 3, apparatus=app,
                                           pressure=1e-7 * MBAR, md=md, **reheat),
                          1, RequestAbort()), "amber", "reheating_cycles", "abort", md,
                  expect_error=True)
        md = _md("c-one", 3, 2)
        new = run(s, reheating_cycles([app.detector], 3, apparatus=app, pressure=1e-7 * MBAR,
                                      md=md, **reheat), "amber", "reheating_cycles",
                  "success", md)
        node = s.store.client[old.uid]  # as the campaign runner marks a redone run
        node.update_metadata(metadata={**dict(node.metadata), "superseded_by": new.uid})
        old.superseded_by = new.uid
        md = _md("c-two", 0, 1)
        run(s, _cut(reheating_cycles([app.detector], 3, apparatus=app, pressure=1e-8 * MBAR,
                                     md=md, **reheat), 1, RuntimeError("test failure")),
            "amber", "reheating_cycles", "fail", md, expect_error=True)
        md = _md("c-two", 0, 2)
        run(s, reheating_cycles([app.detector], 3, apparatus=app, pressure=1e-8 * MBAR, md=md,
                                **reheat), "amber", "reheating_cycles", "success", md)
    with open_session("cobalt", data_dir) as s:
        app = s.apparatus
        s.RE(reach_state(app, LabState(pressure=9 * MBAR, feedback="off")))
        run(s, thermal_calibration([app.detector], 9 * MBAR, apparatus=app, records=3,
                                   settle_time=0.1, **det),
            "cobalt", "thermal_calibration", "success")
    return out


_BUILT: dict[str, tuple[Path, list[Written]]] = {}


def shared_store(tmp_path_factory) -> tuple[Path, list[Written]]:
    """The store above, built once per test session (the results and README tests)."""
    if "store" not in _BUILT:
        d = tmp_path_factory.mktemp("results-store")
        _BUILT["store"] = (d, build(d))
    return _BUILT["store"]
