"""A setup profile as a startup directory of bluesky's queue server, and the one plan
it allows: ``campaign``.

``write_startup_dir(profile, data_dir, out)`` writes the directory that
``start-re-manager --startup-dir`` runs in its worker, in alphabetical order, in one
namespace:

* ``00-session.py``: :func:`open_queue_session` (through
  :func:`quietwell.session.open_session`): the RunEngine first, then the apparatus of
  the profile (ophyd-async devices connect in the RunEngine's loop), its limits, and
  the store's subscription; the store is closed when the worker ends;
* ``10-devices.py``: the devices, each under its own name (a Python identifier);
* ``20-plans.py``: the plan ``campaign(path, resume, campaign_id, particle_reloaded)``,
  :func:`quietwell.campaign.campaign_plan` on this session, and nothing else;

plus ``user_group_permissions.yaml`` (the ``primary`` group may run ``campaign`` only),
``existing_plans_and_devices.yaml`` (made with ``qserver-list-plans-devices``) and
``quietwell-queue.json`` (profile, data directory, setup name) for ``quietwell
queue-serve``. The command line: ``quietwell queue-startup``, ``queue-serve``,
``queue-add`` (see the README, "Tonight's queue").
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import subprocess
import sys
import tempfile
import threading
from pathlib import Path
from typing import Any

from ._errors import InputError, QuietwellError

__all__ = ["write_startup_dir", "open_queue_session", "devices", "campaign_plan_for",
           "redis_answers", "serve_command", "add_campaign", "STARTUP_INFO",
           "DEFAULT_CONTROL_ADDR", "DEFAULT_INFO_ADDR", "DEFAULT_REDIS_ADDR"]

STARTUP_INFO = "quietwell-queue.json"
DEFAULT_CONTROL_ADDR = "tcp://127.0.0.1:60615"
DEFAULT_INFO_ADDR = "tcp://127.0.0.1:60625"
DEFAULT_REDIS_ADDR = "127.0.0.1:6379"
#: Set in the environment of ``qserver-list-plans-devices`` so that listing the plans
#: and devices opens a throw-away store, not the setup's data directory.
DATA_DIR_OVERRIDE = "QUIETWELL_QUEUE_DATA_DIR"

_SESSION_PY = '''\
"""Setup {setup!r} for bluesky's queue server (written by quietwell queue-startup;
regenerate it from the profile rather than editing it).

The RunEngine first, then the apparatus of the profile with the setup's limits, then
the store's subscription: quietwell.session.open_session builds them in that order."""
import quietwell.queue as _qw_queue

_qw = _qw_queue.open_queue_session({profile!r}, {data_dir!r})
RE = _qw.RE
'''

_DEVICES_PY = '''\
"""The devices of setup {setup!r}, each under its own name."""
globals().update(_qw_queue.devices(_qw))
'''

_PLANS_PY = '''\
"""The one plan of this queue: a whole campaign file, checked first, resumable."""
campaign = _qw_queue.campaign_plan_for(_qw)
'''

_PERMISSIONS = """\
# Written by quietwell queue-startup. The queue runs hardware unattended: the primary
# group may queue only the campaign plan (checked against the setup's limits first).
user_groups:
  root:
    allowed_plans:
      - null
    forbidden_plans:
      - ":^_"
    allowed_devices:
      - null
    forbidden_devices:
      - ":^_:?.*"
    allowed_functions:
      - null
    forbidden_functions:
      - ":^_"
  primary:
    allowed_plans:
      - ":^campaign$"
    forbidden_plans:
      - null
    allowed_devices:
      - ":?.*:depth=3"
    forbidden_devices:
      - null
    allowed_functions:
      - null
    forbidden_functions:
      - null
"""


def write_startup_dir(profile: str | Path, data_dir: str | Path, out: str | Path, *,
                      list_plans: bool = True) -> Path:
    """Write the queue server's startup directory of ``profile`` into ``out``.

    ``data_dir`` is where the worker's session stores its runs and campaign ledgers.
    With ``list_plans`` the plans and devices are listed by running the startup scripts
    once in ``qserver-list-plans-devices`` (with a throw-away data directory).
    Raises :class:`~quietwell.InputError` (one line) for a profile that does not exist
    or cannot be built, or a device name that is not a Python identifier.
    """
    from ._profile import apparatus_builder, find_profile
    from .setup import load_setup

    where = find_profile(profile).resolve()
    setup = load_setup(where)
    apparatus_builder(setup)  # a kind without a builder is refused here, not in the worker
    _check_names([g.name for g in setup.vacuum.gauges], setup.source)
    out = Path(out).expanduser()
    if out.exists() and not out.is_dir():
        raise InputError(f"-o {out}: exists and is not a folder; give a folder for the "
                         "startup scripts")
    out.mkdir(parents=True, exist_ok=True)
    data = Path(data_dir).expanduser().resolve()
    fields = {"setup": setup.name, "profile": str(where), "data_dir": str(data)}
    (out / "00-session.py").write_text(_SESSION_PY.format(**fields), encoding="utf-8")
    (out / "10-devices.py").write_text(_DEVICES_PY.format(**fields), encoding="utf-8")
    (out / "20-plans.py").write_text(_PLANS_PY, encoding="utf-8")
    (out / "user_group_permissions.yaml").write_text(_PERMISSIONS, encoding="utf-8")
    (out / STARTUP_INFO).write_text(json.dumps(fields, indent=1) + "\n", encoding="utf-8")
    if list_plans:
        _list_plans_devices(out)
    return out


def _list_plans_devices(out: Path) -> None:
    exe = shutil.which("qserver-list-plans-devices")
    if exe is None:
        raise InputError("qserver-list-plans-devices not found: install the queue server "
                         "(python -m pip install -e '.[lab]'), then run this again")
    with tempfile.TemporaryDirectory(prefix="quietwell-listing-") as tmp:
        env = {**os.environ, DATA_DIR_OVERRIDE: tmp}
        proc = subprocess.run([exe, "--startup-dir", str(out), "--file-dir", str(out)],
                              env=env, capture_output=True, text=True)
    target = out / "existing_plans_and_devices.yaml"
    if proc.returncode != 0 or not target.exists():
        tail = " ".join((proc.stderr or proc.stdout).strip().splitlines()[-1:])
        raise QuietwellError(f"{out}: qserver-list-plans-devices failed ({tail or 'no output'}); "
                             f"run it by hand to see why: qserver-list-plans-devices "
                             f"--startup-dir {out} --file-dir {out}")


def _check_names(names: list[str], source: Any) -> None:
    for name in names:
        if not name.isidentifier() or name in ("RE", "campaign"):
            raise InputError(f"{source}: device name {name!r} cannot name a device of the queue "
                             "server (it needs a Python identifier other than RE and "
                             "campaign); rename it with letters, digits and underscores")


class _OneLineErrors(logging.Filter):
    """bluesky logs a plan's exception with its traceback ("Run aborted"); for quietwell's
    own refusals (bad campaign file, a step refused) the worker's log gets one line."""

    def filter(self, record: logging.LogRecord) -> bool:
        exc = record.exc_info[1] if record.exc_info else None
        if isinstance(exc, QuietwellError):
            record.msg = f"{record.getMessage()}: {' '.join(str(exc).split())}"
            record.args = ()
            record.exc_info = None
            record.exc_text = None
        return True


def open_queue_session(profile: str | Path, data_dir: str | Path) -> Any:
    """The session of the queue server's worker (see the module docstring): opened with
    :func:`~quietwell.session.open_session`, closed (the catalog's work finished) when
    the worker process ends."""
    import multiprocessing.util

    from .session import open_session

    data_dir = os.environ.get(DATA_DIR_OVERRIDE) or data_dir
    session = open_session(profile, data_dir)
    lock, closed = threading.Lock(), []

    def close() -> None:
        with lock:
            if not closed:
                closed.append(True)
                failed = session.close()
                if failed:
                    logging.getLogger("quietwell.queue").error(
                        "the catalog could not take run(s) %s; rebuild them with quietwell "
                        "recover --data-dir %s", ", ".join(failed), session.data_dir)

    # the worker is a multiprocessing child: its finalizers, not atexit, run at its end
    multiprocessing.util.Finalize(session, close, exitpriority=10)
    session.close_once = close
    logging.getLogger("bluesky").addFilter(_OneLineErrors())
    for handler in logging.getLogger("bluesky").handlers:
        handler.addFilter(_OneLineErrors())
    return session


def devices(session: Any) -> dict[str, Any]:
    """The apparatus's devices by their names (each a Python identifier)."""
    out: dict[str, Any] = {}
    for dev in session.apparatus.devices():
        _check_names([dev.name], session.setup.source)
        if dev.name in out:
            raise InputError(f"{session.setup.source}: two devices are named {dev.name!r}; "
                             "give each gauge its own name")
        out[dev.name] = dev
    return out


def campaign_plan_for(session: Any):
    """The plan ``campaign`` of the queue, bound to ``session``."""
    from .campaign import campaign_plan

    def campaign(path: str, resume: bool = True, campaign_id: str = "",
                 particle_reloaded: bool = False):
        """Run a campaign file on this setup, checked first, with a ledger; resumable.

        ``path``: the campaign file (absolute, or relative to the folder the queue
        server was started in), checked against the setup's limits before anything
        moves; the runs and the ledger are those of ``quietwell run``. Safe to queue
        again after an interruption: with ``resume`` the latest unfinished campaign of
        the same file on this setup continues (completed steps are skipped, the
        interrupted one is redone); ``resume=False`` starts a new campaign;
        ``campaign_id`` continues that campaign; ``particle_reloaded`` after a particle
        loss, once a particle is trapped again.
        """
        outcome = yield from campaign_plan(session, path, resume=resume,
                                           campaign_id=campaign_id,
                                           particle_reloaded=particle_reloaded)
        _wait_store(session)
        return {"campaign_id": outcome.campaign_id, "runs": dict(outcome.uids)}

    # real types, not the strings of postponed annotations: the queue server converts
    # and checks each parameter of a queued item by its annotation
    campaign.__annotations__ = {"path": str, "resume": bool, "campaign_id": str,
                                "particle_reloaded": bool}
    return campaign


def _wait_store(session: Any) -> None:
    wait = getattr(session.store, "wait", None)
    if wait is not None:
        wait()


# --- the office side: start the manager, queue a campaign ------------------------------
def redis_answers(addr: str, timeout: float = 2.0) -> None:
    """Raise :class:`~quietwell.QuietwellError` (one line) unless Redis at ``addr``
    (``host[:port][/db]``) answers a PING within ``timeout`` seconds."""
    import redis

    host, _, rest = addr.partition(":")
    port, _, db = rest.partition("/")
    try:
        client = redis.Redis(host=host or "127.0.0.1", port=int(port or 6379),
                             db=int(db or 0), socket_timeout=timeout,
                             socket_connect_timeout=timeout)
        client.ping()
    except ValueError:
        raise InputError(f"--redis-addr {addr!r}: not host[:port][/db]; give e.g. "
                         f"{DEFAULT_REDIS_ADDR}") from None
    except redis.RedisError as exc:
        raise QuietwellError(f"Redis at {addr} does not answer ({' '.join(str(exc).split())}); "
                             "start it (redis-server --bind 127.0.0.1 --port 6379 --save '' "
                             "--daemonize yes) or give its address with --redis-addr") from None


def read_startup_info(startup_dir: str | Path) -> dict:
    p = Path(startup_dir) / STARTUP_INFO
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raise InputError(f"{startup_dir}: not a startup directory of quietwell (no readable "
                         f"{STARTUP_INFO}); make one with quietwell queue-startup PROFILE "
                         "--data-dir DIR -o STARTUP_DIR") from None


def serve_command(startup_dir: str | Path, *, redis_addr: str = DEFAULT_REDIS_ADDR,
                  redis_prefix: str = "", control_addr: str = DEFAULT_CONTROL_ADDR,
                  info_addr: str = DEFAULT_INFO_ADDR) -> list[str]:
    """The ``start-re-manager`` command line for ``startup_dir`` (its Redis keys under
    ``redis_prefix``, by default ``quietwell_<setup>``)."""
    info = read_startup_info(startup_dir)
    d = Path(startup_dir).resolve()
    exe = shutil.which("start-re-manager")
    if exe is None:
        raise InputError("start-re-manager not found: install the queue server "
                         "(python -m pip install -e '.[lab]')")
    return [exe, "--startup-dir", str(d),
            "--existing-plans-devices", str(d / "existing_plans_and_devices.yaml"),
            "--user-group-permissions", str(d / "user_group_permissions.yaml"),
            "--redis-addr", redis_addr,
            "--redis-name-prefix", redis_prefix or f"quietwell_{info['setup']}",
            "--zmq-control-addr", control_addr, "--zmq-info-addr", info_addr]


def _manager(control_addr: str, timeout: float = 5.0) -> Any:
    from bluesky_queueserver_api.zmq import REManagerAPI

    api = REManagerAPI(zmq_control_addr=control_addr, timeout_recv=timeout)
    try:
        api.status()
    except Exception as exc:  # noqa: BLE001 - the API raises several kinds; one line
        api.close()
        raise QuietwellError(f"the queue server at {control_addr} does not answer "
                             f"({type(exc).__name__}: {' '.join(str(exc).split()) or 'timeout'}); "
                             "start it with quietwell queue-serve STARTUP_DIR, or give its "
                             "address with --control-addr") from None
    return api


def add_campaign(campaign: str | Path, profile: str | Path, *,
                 control_addr: str = DEFAULT_CONTROL_ADDR, resume: bool = True,
                 start: bool = False, user: str = "quietwell") -> dict:
    """Check ``campaign`` on ``profile`` (nothing moves), then add it to the queue at
    ``control_addr`` as ``campaign(path, resume=...)``; with ``start``, open the
    worker's environment if needed and start the queue. Returns the queue's item."""
    from bluesky_queueserver_api import BPlan

    from ._profile import find_profile
    from .campaign import check_campaign, load_campaign
    from .setup import load_setup

    path = Path(campaign).expanduser().resolve()
    check_campaign(load_campaign(path), load_setup(find_profile(profile)))
    api = _manager(control_addr)
    try:
        api.user = user
        reply = api.item_add(BPlan("campaign", str(path), resume=resume))
        if start:
            status = api.status()
            if not status["worker_environment_exists"]:
                api.environment_open()
                api.wait_for_idle(timeout=600)
            api.queue_start()
        return reply["item"]
    except Exception as exc:  # noqa: BLE001 - the API raises several kinds; one line
        raise QuietwellError(f"the queue server at {control_addr} refused: "
                             f"{' '.join(str(exc).split())}") from None
    finally:
        api.close()


def exec_manager(argv: list[str]) -> None:  # pragma: no cover - replaces the process
    sys.stdout.flush()
    os.execv(argv[0], argv)
