"""Run a campaign step by step into the store, with a ledger; resume after a crash.

The step, not the bluesky message, is the unit of redo. The plans keep no bluesky
checkpoint inside their runs, so a pause, a suspender or a signal ends the step's run
(``exit_status`` ``abort`` with a stated reason) instead of rewinding it: a rewind would
re-emit events while the recorder's records, the pending fits and the pressure pick
stay where they were. The step is then run again from its preconditions, as a new run;
the interrupted run stays in the catalog, marked ``superseded_by`` the new one.

Before each step the runner brings the apparatus into the state the step needs
(pressure and cold damping, in the safe order of :func:`~quietwell.plans.reach_state`),
which after a crash is also how the step's preconditions are restored.
"""

from __future__ import annotations

import logging
import math
import threading
import time
import uuid
from collections.abc import Callable, Generator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .. import __version__
from .._errors import InputError, QuietwellError
from ..physics import Estimate
from ..plans import STEPS, Checked, LabState, reach_state
from ..plans._monitors import MonitorStop, ParticleLostError
from ..plans._state import ANY, ON, safe_state
from ..setup import Setup, load_setup
from ._file import (
    Campaign,
    CheckedCampaign,
    check_campaign,
    load_campaign,
    parse_campaign,
    resolve_params,
    step_error,
)
from ._ledger import Ledger, campaign_dirs, read_ledger
from ._process import Faults, Signals, log_to, quiet_re
from ._progress import Progress

__all__ = ["run_campaign", "resume_campaign", "campaign_plan", "CampaignInterrupted", "CampaignOutcome",
           "ParticleLost", "MonitorStopped",
           "find_resumable", "CAUTIONS"]

CAUTIONS = (
    "Caution: this runs a levitation setup unattended. Laser radiation (trap lasers are "
    "typically class 4), high voltage on the feedback electrodes and vacuum hardware can "
    "hurt: follow your local codes and your laser-safety officer; the setup's limits are a "
    "software guard, not an interlock.")

_log = logging.getLogger("quietwell.campaign")


class MonitorStopped(QuietwellError):
    """A monitor stopped the campaign (exit status 3 of ``quietwell run``)."""


class ParticleLost(MonitorStopped):
    """The particle was lost: the campaign stopped, and resumes only when told that a
    particle is loaded again (``--particle-reloaded``)."""


class CampaignInterrupted(QuietwellError):
    """A signal ended the campaign; ``exit_code`` is 130 (SIGINT) or 143 (SIGTERM)."""

    def __init__(self, message: str, exit_code: int) -> None:
        super().__init__(message)
        self.exit_code = exit_code


@dataclass
class CampaignOutcome:
    """What a campaign did: its id, folder, and per step id the uid and summary."""

    campaign_id: str
    folder: Path
    uids: dict[str, str] = field(default_factory=dict)
    summaries: dict[str, dict] = field(default_factory=dict)
    adopted: list[str] = field(default_factory=list)
    superseded: dict[str, str] = field(default_factory=dict)


def _new_id(name: str) -> str:
    return f"{time.strftime('%Y%m%d-%H%M%S')}-{name}-{uuid.uuid4().hex[:6]}"


def run_campaign(campaign: str | Path | Campaign, profile: str | Path | Setup,
                 data_dir: str | Path, *, progress: Progress | None = None,
                 on_step: Callable | None = None, session: Any = None) -> CampaignOutcome:
    """Check ``campaign`` on ``profile`` and run it into ``data_dir``.

    ``on_step(step, uid, summary, session)`` (a CampaignStep) is called after each completed step.
    ``session``: an open :class:`~quietwell.session.Session` to use (else one is
    opened and closed here). Raises :class:`CampaignInterrupted` on SIGINT/SIGTERM and
    :class:`~quietwell.QuietwellError` when a step fails (the ledger says which).
    """
    from .._profile import find_profile

    camp = campaign if isinstance(campaign, Campaign) else load_campaign(campaign)
    if isinstance(profile, Setup):
        setup, profile_path = profile, Path(profile.source)
    else:
        profile_path = find_profile(profile)
        setup = load_setup(profile_path)
    checked = check_campaign(camp, setup)
    return _new_runner(checked, profile_path, data_dir, progress, on_step).run(session)


def _new_runner(checked: CheckedCampaign, profile_path: str | Path, data_dir: str | Path,
                progress: Progress | None, on_step: Callable | None) -> _Runner:
    """A runner for a new campaign: its folder and the ledger's first entry."""
    camp, setup = checked.campaign, checked.setup
    cid = _new_id(camp.name)
    folder = Path(data_dir).expanduser().resolve() / "campaigns" / cid
    ledger = Ledger(folder / "ledger.jsonl")
    ledger.append("campaign", campaign_id=cid, campaign_file=str(Path(camp.source).resolve())
                  if Path(camp.source).exists() else camp.source,
                  campaign_name=camp.name, campaign_text=camp.text, campaign_sha256=camp.sha256,
                  setup=setup.name, setup_profile=str(Path(profile_path).resolve()),
                  setup_sha256=setup.sha256, quietwell_version=__version__,
                  steps=[{"index": s.step.index, "id": s.step.id, "plan": s.step.plan,
                          "duration_s": s.checked.duration_s} for s in checked.steps],
                  duration_s=checked.duration_s)
    return _Runner(checked, cid, folder, ledger, data_dir, progress, on_step)


def find_resumable(data_dir: str | Path) -> Path:
    """The folder of the latest campaign in ``data_dir`` that did not complete."""
    dirs = campaign_dirs(data_dir)
    if not dirs:
        raise InputError(f"--data-dir {data_dir}: no campaign was run here (no campaigns/*/"
                         "ledger.jsonl); give the data directory of an interrupted campaign")
    latest = dirs[-1]
    entries = read_ledger(latest / "ledger.jsonl")
    if any(e["event"] == "end" and e.get("status") == "completed" for e in entries):
        raise InputError(f"--data-dir {data_dir}: the latest campaign {latest.name} completed; "
                         "there is nothing to resume (start a new one with quietwell run)")
    return latest


def resume_campaign(data_dir: str | Path, *, progress: Progress | None = None,
                    on_step: Callable | None = None,
                    particle_reloaded: bool = False) -> CampaignOutcome:
    """Continue the interrupted campaign in ``data_dir`` (see the module docstring).

    A campaign that a particle loss stopped is resumed only with
    ``particle_reloaded=True``: the user says a particle is trapped again.
    """
    runner = _reopened_runner(find_resumable(data_dir), data_dir, progress, on_step,
                              particle_reloaded)
    return runner.run(None, resume=True)


def _reopened_runner(folder: Path, data_dir: str | Path, progress: Progress | None,
                     on_step: Callable | None, particle_reloaded: bool,
                     setup: Setup | None = None) -> _Runner:
    """A runner that continues the campaign of ``folder`` (refused, in one line, after a
    particle loss without ``particle_reloaded``, or when the setup changed)."""
    ledger = Ledger(folder / "ledger.jsonl")
    entries = ledger.entries()
    head = entries[0]
    ends = [e for e in entries if e["event"] == "end"]
    if ends and ends[-1].get("particle_lost") and not particle_reloaded:
        raise InputError(f"{folder / 'ledger.jsonl'}: campaign {head['campaign_id']} stopped "
                         f"because the particle was lost ({ends[-1]['reason']}); load a "
                         "particle, then resume with --particle-reloaded")
    if ends and ends[-1].get("particle_lost"):
        ledger.append("particle_reloaded", reason="the user said a particle is loaded")
    camp = parse_campaign(head["campaign_text"], head.get("campaign_file", "<ledger>"))
    try:
        if setup is None:
            setup = load_setup(head["setup_profile"])
    except InputError as exc:
        raise InputError(f"{folder / 'ledger.jsonl'}: the campaign's setup cannot be loaded "
                         f"({exc}); restore {head['setup_profile']}") from None
    if setup.sha256 != head["setup_sha256"]:
        raise InputError(f"{head['setup_profile']}: the setup changed since campaign "
                         f"{head['campaign_id']} started (sha256 {setup.sha256[:12]}, was "
                         f"{head['setup_sha256'][:12]}); restore it, or start a new campaign")
    checked = check_campaign(camp, setup)
    return _Runner(checked, head["campaign_id"], folder, ledger, data_dir, progress, on_step)


def campaign_plan(session: Any, campaign: str | Path, *, resume: bool = True,
                  campaign_id: str = "", particle_reloaded: bool = False) -> Generator:
    """A whole campaign as one bluesky plan, for a RunEngine that runs it (the queue
    server's worker): checked first, then the same steps, ledger and log as
    ``quietwell run``, into ``session``'s store and ``session.data_dir/campaigns/``.

    Safe to run again: with ``resume`` (the default) it continues the latest campaign of
    the same file text on the same setup in ``session.data_dir`` that did not complete
    (the steps done per the ledger are skipped, the interrupted one is redone), and
    starts a new campaign only when there is none. ``campaign_id`` continues that
    campaign exactly (a completed one: nothing to do); ``resume=False`` always starts a
    new one. Bad input raises :class:`~quietwell.InputError` with one line before
    anything moves.
    """
    camp = load_campaign(campaign)
    setup = session.setup
    checked = check_campaign(camp, setup)
    data_dir = Path(session.data_dir)
    if campaign_id:
        folder = data_dir / "campaigns" / campaign_id
        if not (folder / "ledger.jsonl").exists():
            raise InputError(f"campaign_id {campaign_id!r}: no campaign of that id in "
                             f"{data_dir / 'campaigns'}; give the id of a campaign run there, "
                             "or leave campaign_id empty")
        head = read_ledger(folder / "ledger.jsonl")
        if head[0].get("campaign_sha256") != camp.sha256:
            raise InputError(f"{camp.source}: campaign {campaign_id} ran another text of the "
                             "campaign file (sha256 differs); give its own file, or leave "
                             "campaign_id empty to start a new campaign")
        if any(e["event"] == "end" and e.get("status") == "completed" for e in head):
            _log.info("campaign %s completed already: nothing to do", campaign_id)
            return CampaignOutcome(campaign_id, folder)
    else:
        folder = _unfinished_campaign(data_dir, camp, setup) if resume else None
    if folder is None:
        runner = _new_runner(checked, session.profile, data_dir, None, None)
    else:
        entries = read_ledger(folder / "ledger.jsonl")
        ends = [e for e in entries if e["event"] == "end"]
        if ends and ends[-1].get("particle_lost") and not particle_reloaded:
            raise InputError(f"{folder / 'ledger.jsonl'}: campaign {folder.name} stopped "
                             f"because the particle was lost ({ends[-1]['reason']}); load a "
                             "particle, then queue it with particle_reloaded=True")
        runner = _reopened_runner(folder, data_dir, None, None, particle_reloaded, setup=setup)
    return (yield from runner.plan(session, resume=folder is not None))


def _unfinished_campaign(data_dir: Path, camp: Campaign, setup: Setup) -> Path | None:
    """The latest campaign in ``data_dir`` of this file text on this setup, if it did not
    complete (None if there is none, or the latest such campaign completed)."""
    for folder in reversed(campaign_dirs(data_dir)):
        try:
            entries = read_ledger(folder / "ledger.jsonl")
        except InputError:
            continue
        head = entries[0]
        if head.get("campaign_sha256") != camp.sha256 or head.get("setup") != setup.name:
            continue
        if any(e["event"] == "end" and e.get("status") == "completed" for e in entries):
            return None
        return folder
    return None


class _Runner:
    def __init__(self, checked: CheckedCampaign, cid: str, folder: Path, ledger: Ledger,
                 data_dir: str | Path, progress: Progress | None, on_step: Callable | None):
        self.checked, self.cid, self.folder, self.ledger = checked, cid, folder, ledger
        self.data_dir = data_dir
        self.progress = progress or Progress(quiet=True)
        self.on_step = on_step
        self.outcome = CampaignOutcome(cid, folder)
        self.faults = Faults.from_env()
        self._lost = False

    # --- the ledger's view -------------------------------------------------------
    def _state_from_ledger(self) -> tuple[dict[str, dict], dict[int, int], dict[int, list[str]]]:
        results: dict[str, dict] = {}
        attempts: dict[int, int] = {}
        failed_uids: dict[int, list[str]] = {}
        superseded = set()
        for e in self.ledger.entries():
            ev = e["event"]
            if ev == "attempt":
                attempts[e["step"]] = max(attempts.get(e["step"], 0), e["attempt"])
            elif ev == "done":
                sid = self.checked.steps[e["step"]].step.id
                results[sid] = e["results"]
                self.outcome.uids[sid] = e["uid"]
                self.outcome.summaries[sid] = e["summary"]
            elif ev in ("failed", "run"):
                failed_uids.setdefault(e["step"], [])
                if e.get("uid") and e["uid"] not in failed_uids[e["step"]]:
                    failed_uids[e["step"]].append(e["uid"])
            elif ev == "superseded":
                superseded.add(e["uid"])
        for k, uids in failed_uids.items():
            done_uid = self.outcome.uids.get(self.checked.steps[k].step.id)
            failed_uids[k] = [u for u in uids if u != done_uid and u not in superseded]
        return results, attempts, failed_uids

    # --- running -------------------------------------------------------------------
    # One step loop (:meth:`_steps`) serves both ways of running a campaign. It is a
    # generator that hands each bluesky plan it wants run (a state move, a step's plan,
    # the safe state) to its driver as a :class:`_Sub` and gets back an :class:`_Outcome`
    # or the exception the plan raised. :func:`_drive` runs each plan with its own call of
    # the RunEngine (``quietwell run``); :func:`_drive_inside` yields it from inside a
    # running RunEngine (the queue server's ``campaign`` plan). The ledger, the log and
    # the handling of every ending are the same code for both.
    def run(self, session: Any, *, resume: bool = False) -> CampaignOutcome:
        from ..session import open_session

        handler = log_to(self.folder / "log.txt")
        logging.captureWarnings(True)  # the fits' warnings into the log, not the terminal
        own = session is None
        try:
            if own:
                session = open_session(self.checked.setup, self.data_dir)
            self.session = session
            self._docs = _DocWatch(self)
            token = session.RE.subscribe(self._docs)
            if self.faults.point == "trigger":
                session.RE.msg_hook = self.faults.on_msg
            try:
                with Signals(session) as sig:
                    self.signals = sig
                    try:
                        if resume:
                            self._recover()
                        _drive(self._steps(), session.RE)
                    except CampaignInterrupted:
                        raise
                    except ParticleLost:
                        self._lost = True
                        raise
                    finally:
                        if not self._lost and (sig.reason is not None or sys_exc_pending()):
                            _drive(self._safe_state(), session.RE)
                    if sig.reason is not None:
                        raise self._interrupted()
            finally:
                session.RE.unsubscribe(token)
                self.progress.close()
                try:  # the rebuild must end before the store closes
                    self._recovered()
                except QuietwellError as exc:
                    _log.error("%s", exc)
        finally:
            if own and session is not None:
                session.close()
            logging.getLogger().removeHandler(handler)
            logging.captureWarnings(False)
            handler.close()
        return self.outcome

    def plan(self, session: Any, *, resume: bool = False) -> Generator:
        """The campaign as one bluesky plan, for a RunEngine that is already running it
        (the queue server's worker): the same steps, ledger and log as :meth:`run`.

        An abort, stop or halt of the RunEngine ends the step's run (kept, and marked in
        the ledger as the queue's doing), puts the apparatus into its safe state and ends
        the plan; running the plan again resumes the campaign.
        """
        from bluesky.utils import RunEngineControlException

        handler = log_to(self.folder / "log.txt")
        self.session = session
        self.signals = _NoSignals()
        self._docs = _DocWatch(self)
        token = session.RE.subscribe(self._docs)
        try:
            if resume:
                self._recover()
            try:
                yield from _drive_inside(self._steps(), self._docs)
            except RunEngineControlException as exc:
                reason = _control_reason(exc)
                self.ledger.append("end", status="stopped", reason=reason)
                _log.warning("campaign %s stopped: %s", self.cid, reason)
                yield from _drive_inside(self._safe_state(), self._docs)
                raise
            except ParticleLost:
                raise
            except Exception:
                yield from _drive_inside(self._safe_state(), self._docs)
                raise
        finally:
            session.RE.unsubscribe(token)
            try:
                self._recovered()
            except QuietwellError as exc:
                _log.error("%s", exc)
            logging.getLogger().removeHandler(handler)
            handler.close()
        return self.outcome

    def _interrupted(self) -> CampaignInterrupted:
        sig = self.signals
        self.ledger.append("end", status="stopped", reason=sig.reason)
        _log.warning("campaign %s stopped: %s", self.cid, sig.reason)
        return CampaignInterrupted(
            f"{sig.reason}; the run in progress was ended and kept; resume with: quietwell run "
            f"--resume --data-dir {Path(self.data_dir)}", sig.code)

    def _recover(self) -> None:
        """Adopt completed runs from their journals; rebuild unfinished runs in the
        catalog in the background (the journals, not the catalog, decide what is done,
        so the redo need not wait for the catalog: see :meth:`_recovered`)."""
        store = self.session.store
        self._recovery_error: BaseException | None = None
        journal_dir = getattr(store, "journal_dir", None)
        if journal_dir is None or not hasattr(store, "recover"):
            # a store without a local journal: the ledger alone says what is done
            _log.info("the store keeps no journal here: resuming from the ledger alone")
            self.faults.hit("resume")
            return
        journal_runs = _journal_runs(journal_dir, self.cid)  # before any rename

        def rebuild() -> None:
            try:
                recovered = store.recover()
                if recovered:
                    _log.info("recovered %d run(s) from their journals: %s", len(recovered),
                              ", ".join(recovered))
            except BaseException as exc:  # noqa: BLE001 - reported by _recovered()
                self._recovery_error = exc

        self._recovery = threading.Thread(target=rebuild, name="quietwell-recover",
                                          daemon=True)
        self._recovery.start()
        self.faults.hit("resume")
        results, _, _ = self._state_from_ledger()
        done = {self.checked.steps[i].step.id for i in range(len(self.checked.steps))
                if self.checked.steps[i].step.id in results}
        for run in journal_runs:
            sid = self.checked.steps[run["step"]].step.id
            if sid in done or run["exit_status"] != "success" or run["summary"] is None:
                continue
            spec = STEPS[self.checked.steps[run["step"]].step.plan]
            self.ledger.append("done", step=run["step"], attempt=run["attempt"], uid=run["uid"],
                               summary=run["summary"], results=_results(spec, run["summary"]),
                               adopted=True)
            done.add(sid)
            self.outcome.adopted.append(run["uid"])
            _log.info("step %d (%s): adopted run %s, complete in its journal", run["step"], sid,
                      run["uid"])
        # runs of this campaign the ledger never heard of (killed before it wrote them)
        known = {e.get("uid") for e in self.ledger.entries()}
        for run in journal_runs:
            if run["uid"] not in known:
                self.ledger.append("failed", step=run["step"], attempt=run["attempt"],
                                   uid=run["uid"], exit_status=run["exit_status"] or "abort",
                                   reason="the process ended during the run")

    def _steps(self) -> Generator:
        """The step loop: every step not yet done per the ledger, in order (yields
        :class:`_Sub` requests to its driver)."""
        results, attempts, stale = self._state_from_ledger()
        steps = self.checked.steps
        todo = [s for s in steps if s.step.id not in results]
        self.progress.start(self.cid, steps, done=len(steps) - len(todo))
        for cs in todo:
            if self.signals.reason is not None:
                return
            i = cs.step.index
            attempt = attempts.get(i, 0) + 1
            yield from self._step(cs, attempt, results, stale.get(i, []))
            results, _, _ = self._state_from_ledger()
        self.ledger.append("end", status="completed", reason="")
        _log.info("campaign %s completed", self.cid)

    def _before(self, index: int) -> LabState | None:
        return self.checked.steps[index - 1].after if index > 0 else None

    def _step(self, cs, attempt: int, results: dict, stale: list[str]) -> Generator:
        session, step = self.session, cs.step
        spec = STEPS[step.plan]
        params, _ = resolve_params(step, self.checked.setup, results,
                                   source=self.checked.campaign.source)
        try:
            checked: Checked = spec.validate(self.checked.setup, params)
        except (InputError, QuietwellError) as exc:
            self._fail(cs, attempt, None, "refused", str(exc))
            raise QuietwellError(step_error(step, exc, self.checked.campaign.source)) from None
        self.ledger.append("attempt", step=step.index, attempt=attempt, plan=step.plan,
                           params=_jsonable_params(checked.params))
        _log.info("step %d (%s, %s) attempt %d: %s", step.index, step.id, step.plan, attempt,
                  _jsonable_params(checked.params))
        self.progress.step(step.index, step.id, step.plan, checked.duration_s)
        target = _target(self._before(step.index), checked.needs)
        yield _Sub(reach_state(session.apparatus, target))
        self._inject_faults(step)
        md = {"campaign_id": self.cid, "campaign_step": step.index, "campaign_attempt": attempt,
              "campaign_step_id": step.id}
        self._docs.expect(step.index, attempt)
        session.stop_reason = ""
        from bluesky.utils import RunEngineControlException, RunEngineInterrupted

        uid = None
        try:
            res = yield _Sub(spec.plan(session.apparatus, checked, md))
            uid, status, reason = res.uid, res.exit_status, res.reason
            summary = dict(res.plan_result or {})
        except RunEngineInterrupted:
            uid = self._docs.uid
            status, reason, summary = "abort", self.signals.reason or "interrupted", {}
        except RunEngineControlException as exc:  # the queue's RunEngine was told to end
            self._fail(cs, attempt, self._docs.uid, "abort", _control_reason(exc))
            raise
        except ParticleLostError as exc:
            uid = self._docs.uid
            self._fail(cs, attempt, uid, "fail", str(exc))
            yield from self._lost_state()
            self.ledger.append("end", status="stopped", reason=str(exc), particle_lost=True)
            _log.error("campaign %s stopped: %s", self.cid, exc)
            raise ParticleLost(
                f"step {step.index} ({step.id}): {exc}; the apparatus is in its safe state "
                f"and the campaign stopped; load a particle, then resume with quietwell run "
                f"--resume --particle-reloaded --data-dir {Path(self.data_dir)}") from None
        except MonitorStop as exc:
            uid = self._docs.uid
            self._fail(cs, attempt, uid, "fail", str(exc))
            if exc.policy == "skip":
                self.ledger.append("skipped", step=step.index, attempt=attempt, uid=uid,
                                   reason=str(exc))
                _log.warning("step %d (%s) skipped: %s", step.index, step.id, exc)
                return
            self.ledger.append("end", status="stopped", reason=str(exc))
            raise MonitorStopped(f"step {step.index} ({step.id}): {exc}; the campaign stopped; "
                                 f"resume with quietwell run --resume --data-dir "
                                 f"{Path(self.data_dir)}") from None
        except Exception as exc:  # noqa: BLE001 - recorded in the ledger, then re-raised
            uid = self._docs.uid
            if self.signals.reason is not None:
                status, reason, summary = "abort", self.signals.reason, {}
            else:
                self._fail(cs, attempt, uid, "fail", f"{type(exc).__name__}: {exc}")
                raise QuietwellError(f"step {step.index} ({step.id}, {step.plan}) failed: "
                                     f"{' '.join(str(exc).split())}; the ledger "
                                     f"{self.ledger.path} has it; fix the cause and resume "
                                     f"with quietwell run --resume --data-dir "
                                     f"{Path(self.data_dir)}") from None
        if status != "success" or self.signals.reason is not None:
            self._fail(cs, attempt, uid, status if status != "success" else "abort",
                       self.signals.reason or reason or "the run did not succeed")
            if self.signals.reason is None:
                raise QuietwellError(f"step {step.index} ({step.id}) ended with {status}: "
                                     f"{reason}; resume with quietwell run --resume --data-dir "
                                     f"{Path(self.data_dir)}")
            return
        summary = {k: _first(v) for k, v in summary.items()}
        self.ledger.append("done", step=step.index, attempt=attempt, uid=uid, summary=summary,
                           results=_results(spec, summary))
        self.faults.hit("done", step.index)
        self.outcome.uids[step.id] = uid
        self.outcome.summaries[step.id] = summary
        _log.info("step %d (%s) done: run %s", step.index, step.id, uid)
        self.progress.step_done(step.index, step.id, uid, summary)
        for old in stale:
            self._supersede(old, uid)
        if self.on_step is not None:
            self.on_step(step, uid, summary, session)

    def _inject_faults(self, step) -> None:
        """Schedule the campaign's ``[[sim.fault]]`` of this step in the simulated lab."""
        lab = self.session.lab
        for f in self.checked.campaign.faults:
            if f.step != step.id or lab is None:
                continue
            at = lab.now + f.after_s
            lab.schedule_fault(f.kind, at_s=at, **f.params)
            self.ledger.append("fault_scheduled", step=step.index, kind=f.kind, at_s=at,
                               params=f.params)
            _log.info("sim fault %s scheduled at sim time %.1f s (step %s): %s", f.kind, at,
                      step.id, f.params)

    def _fail(self, cs, attempt: int, uid: str | None, status: str, reason: str) -> None:
        self.ledger.append("failed", step=cs.step.index, attempt=attempt, uid=uid,
                           exit_status=status, reason=reason)
        _log.error("step %d (%s) attempt %d: %s (%s)", cs.step.index, cs.step.id, attempt,
                   status, reason)

    def _recovered(self) -> None:
        """Wait for the background rebuild of interrupted runs (see :meth:`_recover`)."""
        thread = getattr(self, "_recovery", None)
        if thread is None:
            return
        thread.join()
        self._recovery = None
        if self._recovery_error is not None:
            raise QuietwellError(f"rebuilding the interrupted runs from their journals failed "
                                 f"({self._recovery_error}); run quietwell recover --data-dir "
                                 f"{Path(self.data_dir)}, then resume again")

    def _supersede(self, old: str, new: str) -> None:
        self._recovered()
        try:
            node = self.session.store.client[old]
            node.update_metadata(metadata={**dict(node.metadata), "superseded_by": new})
        except Exception as exc:  # noqa: BLE001 - the ledger keeps it; retried next resume
            _log.error("run %s: could not mark it superseded by %s: %s", old, new, exc)
            return
        self.ledger.append("superseded", uid=old, by=new)
        self.outcome.superseded[old] = new
        _log.info("run %s superseded by %s", old, new)

    def _lost_state(self) -> Generator:
        """The profile's safe state after a particle loss ([monitors] safe_feedback,
        safe_laser_power); the Coulomb drive off."""
        import bluesky.plan_stubs as bps

        from ..plans import set_feedback

        spec, app = self.checked.setup.monitors, self.session.apparatus

        def plan():
            yield from bps.mv(app.electrodes.drive_enabled, False)
            if spec.safe_feedback == "off":
                yield from set_feedback(app, None)
            if spec.safe_laser_power > 0:
                yield from bps.mv(app.laser.power, spec.safe_laser_power)

        try:
            yield _Sub(plan())
        except Exception as exc:  # noqa: BLE001 - logged; the store must still close
            _log.error("could not put the apparatus into its safe state: %s", exc)

    def _safe_state(self) -> Generator:
        """Drive off; cold damping on below the loss pressure (the particle is kept)."""
        try:
            gain = next((cs.after.gain for cs in reversed(self.checked.steps)
                         if cs.after is not None and cs.after.gain), None)
            yield _Sub(safe_state(self.session.apparatus, gain))
        except Exception as exc:  # noqa: BLE001 - logged; the store must still close
            _log.error("could not put the apparatus into its safe state: %s", exc)


@dataclass
class _Sub:
    """A bluesky plan the step loop asks its driver to run."""

    plan: Generator


@dataclass
class _Outcome:
    """How a plan run for the step loop ended: its first run's uid, the exit status and
    reason of that run, and the plan's return value."""

    uid: str | None
    exit_status: str
    reason: str
    plan_result: Any


class _NoSignals:
    """Inside the queue server the worker, not the runner, handles signals."""

    reason: str | None = None
    code = 0


_quiet_re = quiet_re  # the RunEngine call of quietwell run (the bench times it)


def _drive(loop: Generator, RE: Any) -> Any:
    """Run the step loop ``loop`` with one RunEngine call per plan it asks for; a plan's
    exception (``RunEngineInterrupted`` after a signal) is thrown back into the loop."""
    value: Any = None
    error: BaseException | None = None
    while True:
        try:
            sub = loop.throw(error) if error is not None else loop.send(value)
        except StopIteration as stop:
            return stop.value
        value, error = None, None
        try:
            res = _quiet_re(RE, sub.plan)
        except Exception as exc:  # noqa: BLE001 - handed to the step loop, which decides
            error = exc
        else:
            value = _Outcome(res.run_start_uids[0] if res.run_start_uids else None,
                             res.exit_status, res.reason, res.plan_result)


def _drive_inside(loop: Generator, docs: _DocWatch) -> Generator:
    """The step loop ``loop`` as one bluesky plan: each plan it asks for is yielded from,
    in the RunEngine that runs this one; a plan's exception (also the RunEngine's
    ``RequestAbort``) is thrown back into the loop."""
    value: Any = None
    error: BaseException | None = None
    while True:
        try:
            sub = loop.throw(error) if error is not None else loop.send(value)
        except StopIteration as stop:
            return stop.value
        value, error = None, None
        docs.stop = None
        try:
            result = yield from sub.plan
        except Exception as exc:  # noqa: BLE001 - handed to the step loop, which decides
            error = exc
        else:
            stop = docs.stop or {}
            value = _Outcome(docs.uid if docs.stop else None, stop.get("exit_status", "success"),
                             stop.get("reason", ""), result)


def _control_reason(exc: BaseException) -> str:
    """Words for the RunEngine's own abort, stop or halt."""
    from bluesky.utils import RequestStop

    if isinstance(exc, RequestStop):
        return "stopped from the queue server (re_stop)"
    return "aborted from the queue server (re_abort)"


def sys_exc_pending() -> bool:
    import sys

    return sys.exc_info()[0] is not None


def _target(before: LabState | None, needs: LabState) -> LabState:
    b = before or LabState()
    fb = needs.feedback if needs.feedback != ANY else b.feedback
    gain = needs.gain if needs.feedback != ANY else b.gain
    return LabState(pressure=needs.pressure if needs.pressure is not None else b.pressure,
                    feedback=fb, gain=gain if fb == ON else None)


def _first(v: Any) -> Any:
    if isinstance(v, list) and len(v) == 1:
        return v[0]
    return v


def _results(spec, summary: dict) -> dict:
    out: dict = {}
    for name, res in spec.results.items():
        vals = []
        for k in res.keys:
            v = summary.get(k)
            if v is None:
                vals.append(None)
            elif res.estimate:
                vals.append({"value": v, "stderr": summary.get(f"{k}_stderr", math.nan)})
            else:
                vals.append(v)
        out[name] = vals[0] if len(vals) == 1 else vals
    return out


def _jsonable_params(params: dict) -> dict:
    def conv(v):
        if isinstance(v, Estimate):
            return {"value": v.value, "stderr": v.stderr}
        if isinstance(v, list | tuple):
            return [conv(x) for x in v]
        return v

    return {k: conv(v) for k, v in params.items()}


def _journal_runs(journal_dir: Path, cid: str) -> list[dict]:
    """Runs of campaign ``cid`` in the journal: step, attempt, uid, exit status, summary."""
    import json

    out = []
    for path in sorted(Path(journal_dir).glob("*.jsonl")):
        try:
            with open(path, encoding="utf-8") as f:
                first = f.readline()
                name, start = json.loads(first)
                if name != "start" or start.get("campaign_id") != cid:
                    continue
                summary_desc, summary, status = None, None, None
                for line in f:
                    try:
                        n, doc = json.loads(line)
                    except json.JSONDecodeError:
                        break  # cut short by the crash
                    if n == "descriptor" and doc.get("name") == "summary":
                        summary_desc = doc["uid"]
                    elif n == "event" and doc.get("descriptor") == summary_desc:
                        summary = {k: _first(v) for k, v in doc["data"].items()}
                    elif n == "stop":
                        status = doc.get("exit_status")
        except (OSError, ValueError):
            continue
        out.append({"uid": start["uid"], "step": start["campaign_step"],
                    "attempt": start["campaign_attempt"], "exit_status": status,
                    "summary": summary, "time": start["time"]})
    return sorted(out, key=lambda r: r["time"])


class _DocWatch:
    """Document callback: the ledger learns each run's uid at its start; the progress
    display counts records and shows the latest fits; test faults hook in here."""

    def __init__(self, runner: _Runner) -> None:
        self.runner = runner
        self.uid: str | None = None
        self.stop: dict | None = None  # the stop document of the run of ``uid``
        self._streams: dict[str, str] = {}
        self._step = self._attempt = 0
        self.records = 0

    def expect(self, step: int, attempt: int) -> None:
        self._step, self._attempt, self.uid, self.records = step, attempt, None, 0

    def __call__(self, name: str, doc: dict) -> None:
        r = self.runner
        if name == "start" and doc.get("campaign_id") == r.cid:
            self.uid = doc["uid"]
            r.ledger.append("run", step=self._step, attempt=self._attempt, uid=doc["uid"])
        elif name == "descriptor":
            self._streams[doc["uid"]] = doc.get("name", "")
        elif name == "event":
            stream = self._streams.get(doc["descriptor"])
            if stream == "primary":
                self.records += 1
                r.progress.record(self.records)
                r.faults.hit("event")
            elif stream == "fits":
                r.progress.fit(doc["data"])
            elif stream == "monitor":
                d = doc["data"]
                r.ledger.append("monitor", step=self._step, attempt=self._attempt,
                                uid=self.uid, condition=d.get("condition"),
                                action=d.get("action"), value=d.get("value"),
                                record=d.get("record"), message=d.get("message"))
                _log.warning("monitor: %s -> %s (%s)", d.get("condition"), d.get("action"),
                             d.get("message"))
                r.progress.monitor(d)
        elif name == "stop":
            if doc.get("run_start") == self.uid:
                self.stop = doc
            r.faults.hit("stop")


