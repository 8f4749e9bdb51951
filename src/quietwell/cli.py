"""The ``quietwell`` command.

Subcommands are entries of a small registry: a function that adds its
arguments to an :mod:`argparse` subparser and a function that runs it and
returns the exit status.  Add one with :func:`subcommand`::

    @subcommand("demo", help="...")
    def _demo_arguments(parser): ...

    @_demo_arguments.runner
    def _demo(args) -> int: ...

Exit status: 0 success, 2 bad input (one line on stderr, never a traceback),
3 (analyze) some channels failed and are reported with their reasons,
1 an unexpected internal error (also one line).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from quietwell._errors import QuietwellError

__all__ = ["main", "subcommand", "SUBCOMMANDS"]

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_MONITOR = 3  # a campaign stopped by a monitor (particle lost, pressure, saturation)


class _UsageError(Exception):
    """Raised by the parser instead of printing usage and exiting."""

    def __init__(self, prog: str, message: str):
        super().__init__(message)
        self.prog = prog


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # noqa: D401 - argparse hook
        raise _UsageError(self.prog, f"{message}; see '{self.prog} --help'")


@dataclass
class Subcommand:
    """One entry of the registry: its name, help, arguments and runner."""

    name: str
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int] | None = None

    def runner(self, func: Callable[[argparse.Namespace], int]):
        """Decorator that sets the function running this subcommand."""
        self.run = func
        return func


#: The registered subcommands by name, in the order ``--help`` lists them.
SUBCOMMANDS: dict[str, Subcommand] = {}


def subcommand(name: str, *, help: str):  # noqa: A002 - mirrors argparse
    """Register a subcommand; decorates the function that adds its arguments."""

    def register(add_arguments: Callable[[argparse.ArgumentParser], None]) -> Subcommand:
        if name in SUBCOMMANDS:
            raise ValueError(f"subcommand {name!r} is registered twice")
        entry = Subcommand(name=name, help=help, add_arguments=add_arguments)
        SUBCOMMANDS[name] = entry
        return entry

    return register


def _build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The parser; with ``only``, the arguments of that subcommand alone (the others'
    may import modules for their defaults, which a command that does not use them
    should not wait for)."""
    parser = _Parser(
        prog="quietwell",
        description="Characterise an optically levitated nanoparticle.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for entry in SUBCOMMANDS.values():
        p = sub.add_parser(entry.name, help=entry.help, description=entry.help)
        if only is None or entry.name == only:
            entry.add_arguments(p)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``quietwell`` command with ``argv`` (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        0 on success, 2 on bad input, 1 on an unexpected error.
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = _build_parser(argv[0] if argv and argv[0] in SUBCOMMANDS else None)
    prog = "quietwell"
    if argv and argv[0] in SUBCOMMANDS:
        prog = f"quietwell {argv[0]}"
    try:
        args = parser.parse_args(argv)
        prog = f"quietwell {args.command}"
        return SUBCOMMANDS[args.command].run(args)
    except _UsageError as exc:
        print(f"{exc.prog}: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except SystemExit as exc:  # --help: argparse prints and exits 0
        return exc.code if isinstance(exc.code, int) else EXIT_OK
    except (QuietwellError, OSError) as exc:
        print(f"{prog}: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"{prog}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the command never shows a traceback
        if _is_http_error(exc):  # the catalog server's answers and silences: one line
            from quietwell.store import explain_http_error

            print(f"{prog}: error: {explain_http_error(exc)}", file=sys.stderr)
            return EXIT_BAD_INPUT
        print(
            f"{prog}: internal error: {type(exc).__name__}: {_one_line(exc)}; "
            "please report it with the command line you used",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def _is_http_error(exc: BaseException) -> bool:
    httpx = sys.modules.get("httpx")  # loaded only if a catalog was used
    return httpx is not None and isinstance(exc, httpx.HTTPError)


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


# --------------------------------------------------------------------------
# analyze
# --------------------------------------------------------------------------

@subcommand("analyze", help="Welch PSD and maximum-likelihood fit of the peaks of a record.")
def _analyze_arguments(parser: argparse.ArgumentParser) -> None:
    from quietwell._analyze_cli import add_arguments

    add_arguments(parser)


@_analyze_arguments.runner
def _analyze(args: argparse.Namespace) -> int:
    from quietwell._analyze_cli import run

    return run(args)


# --------------------------------------------------------------------------
# demo, recover


@subcommand("demo", help="run a whole characterisation on the simulated laboratory")
def _demo_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--data-dir", required=True, metavar="DIR",
                        help="data directory of the embedded store (created if missing)")
    parser.add_argument("--setup", default="amber", metavar="PROFILE",
                        help="setup profile name or folder (default: amber)")
    parser.add_argument("--quick", action="store_true",
                        help="a reduced run (fewer reheating cycles and steps)")


@_demo_arguments.runner
def _demo(args: argparse.Namespace) -> int:
    import dataclasses

    from quietwell.demo import DemoConfig, format_report, run_demo

    cfg = DemoConfig.quick() if args.quick else DemoConfig()
    cfg = dataclasses.replace(cfg, profile=args.setup)
    result = run_demo(args.data_dir, cfg)
    print()
    print(format_report(result))
    print(f"\nstored in {result.data_dir}; read it back with "
          f"quietwell.open_catalog({str(result.data_dir)!r})")
    return EXIT_OK


@subcommand("recover", help="rebuild runs whose process died from the store's journal")
def _recover_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--data-dir", required=True, metavar="DIR",
                        help="data directory of the embedded store")


@_recover_arguments.runner
def _recover(args: argparse.Namespace) -> int:
    from pathlib import Path

    from quietwell import InputError
    from quietwell.store import EmbeddedStore
    from quietwell.store._server import store_for_data_dir

    server_store = store_for_data_dir(args.data_dir)  # runs that went to the lab's server
    if server_store is None and not (Path(args.data_dir) / "catalog" / "catalog.db").exists():
        raise InputError(f"--data-dir {args.data_dir} is not a quietwell data directory (no "
                         "catalog/catalog.db); give the directory a run wrote to")
    with server_store or EmbeddedStore(args.data_dir) as store:
        uids = store.recover()
    print(f"recovered {len(uids)} run(s)" + (": " + ", ".join(uids) if uids else ""))
    return EXIT_OK


# --------------------------------------------------------------------------
# campaigns: check, run


def _setup_of(args) -> tuple:
    from quietwell._profile import find_profile
    from quietwell.setup import load_setup

    path = find_profile(args.setup)
    if path.suffix == ".toml" and path.exists() and "[campaign]" in path.read_text(
            encoding="utf-8", errors="replace"):
        from quietwell import InputError

        raise InputError(f"--setup {args.setup}: this is a campaign file, not a setup; give a "
                         "setup profile (a folder of profiles/ or its setup.toml) with --setup")
    return path, load_setup(path)


@subcommand("check", help="validate a campaign on a setup and show what it would do")
def _check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", metavar="CAMPAIGN", help="campaign file (.toml)")
    parser.add_argument("--setup", required=True, metavar="PROFILE",
                        help="setup profile name or folder (e.g. amber)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


@_check_arguments.runner
def _check(args: argparse.Namespace) -> int:
    from quietwell.campaign import check_campaign, load_campaign

    camp = load_campaign(args.campaign)
    _, setup = _setup_of(args)
    checked = check_campaign(camp, setup)
    if args.json:
        print(json.dumps(_checked_json(checked), default=_json_default))
    else:
        print(_checked_table(checked))
    return EXIT_OK


def _json_default(obj):
    from quietwell.physics import Estimate

    if isinstance(obj, Estimate):
        return {"value": obj.value, "stderr": obj.stderr}
    raise TypeError(type(obj).__name__)


def _checked_json(checked) -> dict:
    return {"campaign": checked.campaign.name, "campaign_sha256": checked.campaign.sha256,
            "setup": checked.setup.name, "setup_sha256": checked.setup.sha256,
            "steps": [{"index": s.step.index, "name": s.step.id, "plan_name": s.step.plan,
                       "parameters": s.checked.params, "from_results": list(s.deferred),
                       "duration_s": s.move_s + s.checked.duration_s,
                       "needs": s.checked.needs.as_dict(), "leaves": s.after.as_dict()}
                      for s in checked.steps],
            "duration_s": checked.duration_s}


def _show(key: str, value, kind: str | None) -> str:
    from quietwell.physics import Estimate
    from quietwell.setup._units import KINDS, display

    unit_kind = kind if kind in KINDS else None
    if isinstance(value, Estimate):
        if value.stderr == 0:
            return _show(key, value.value, kind)
        if unit_kind:
            return f"{display(value.value, unit_kind)} ± {display(value.stderr, unit_kind)}"
        return f"{value.value:.4g} ± {value.stderr:.2g}"
    if isinstance(value, list):
        if len(value) > 6:
            return (f"[{_show(key, value[0], kind)} ... {_show(key, value[-1], kind)}] "
                    f"({len(value)} values)")
        return "[" + ", ".join(_show(key, v, kind) for v in value) + "]"
    if unit_kind and isinstance(value, float):
        return display(value, unit_kind)
    return str(value)


def _checked_table(checked) -> str:
    lines = [f"campaign {checked.campaign.name!r} on setup {checked.setup.name!r}: "
             f"{len(checked.steps)} steps, about {_hms(checked.duration_s)} of lab time "
             "(estimate; analysis runs beside it)"]
    for s in checked.steps:
        lines.append(f"{s.step.index:>3}  {s.step.id:<18} {s.step.plan:<22} "
                     f"{_hms(s.move_s + s.checked.duration_s):>9}  starts at "
                     f"{_hms(s.start_s)}")
        from quietwell.plans import STEPS

        for k, param in STEPS[s.step.plan].params.items():
            v = s.checked.params.get(k)
            if v is None:
                continue
            if k in s.deferred:
                ref = s.step.params[k]
                text = f"result {ref.result!r} of step {ref.step!r}"
                if ref.clip:
                    text += (f", clipped to [{_show(k, ref.clip[0], param.kind)}, "
                             f"{_show(k, ref.clip[1], param.kind)}]")
                if ref.otherwise is not None:
                    text += f", otherwise {_show(k, ref.otherwise, param.kind)}"
                how = ("checked at both ends" if ref.clip
                       else f"checked with the nominal {_show(k, v, param.kind)}")
                lines.append(f"       {k} = {text} ({how})")
            else:
                lines.append(f"       {k} = {_show(k, v, param.kind)}")
    lines.append("nothing was moved and no device was opened")
    return "\n".join(lines)


def _hms(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"


@subcommand("run", help="run a campaign on a setup into a data directory, or resume one")
def _run_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", metavar="CAMPAIGN", nargs="?", help="campaign file (.toml)")
    parser.add_argument("--setup", metavar="PROFILE", help="setup profile name or folder")
    parser.add_argument("--data-dir", required=True, metavar="DIR",
                        help="data directory of the embedded store (created if missing)")
    parser.add_argument("--resume", action="store_true",
                        help="continue the interrupted campaign in DIR")
    parser.add_argument("--particle-reloaded", action="store_true",
                        help="with --resume: a particle is trapped again after a particle loss")


@_run_arguments.runner
def _run(args: argparse.Namespace) -> int:
    from quietwell import InputError
    from quietwell.campaign import (
        CAUTIONS,
        CampaignInterrupted,
        MonitorStopped,
        Progress,
        check_campaign,
        load_campaign,
        resume_campaign,
        run_campaign,
    )

    if args.resume:
        if args.campaign or args.setup:
            raise InputError("quietwell run --resume takes only --data-dir (the campaign and "
                             "its setup are in the ledger); drop CAMPAIGN and --setup")
    elif not args.campaign or not args.setup:
        raise InputError("quietwell run needs CAMPAIGN and --setup PROFILE (or --resume "
                         "--data-dir DIR); see 'quietwell run --help'")
    if not args.resume:  # bad input is refused with one line, before anything is opened
        path, setup = _setup_of(args)
        camp = load_campaign(args.campaign)
        check_campaign(camp, setup)
    print(CAUTIONS, file=sys.stderr)
    try:
        if args.resume:
            out = resume_campaign(args.data_dir, progress=Progress(),
                                  particle_reloaded=args.particle_reloaded)
        else:
            out = run_campaign(camp, setup, args.data_dir, progress=Progress())
    except CampaignInterrupted as exc:
        print(f"quietwell run: {exc}", file=sys.stderr)
        return exc.exit_code
    except MonitorStopped as exc:
        print(f"quietwell run: stopped by a monitor: {_one_line(exc)}", file=sys.stderr)
        return EXIT_MONITOR
    print(f"campaign {out.campaign_id} completed: {len(out.uids)} steps; ledger and log in "
          f"{out.folder}")
    return EXIT_OK


# --------------------------------------------------------------------------
# lab-catalog: the lab's shared tiled server on PostgreSQL


@subcommand("lab-catalog", help="set up and start the lab's shared catalog server "
            "(PostgreSQL; see deploy/)")
def _lab_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", parser_class=_Parser)
    sub.required = True
    init = sub.add_parser("init", help="create the role and databases on a PostgreSQL server "
                          "and initialise the catalog")
    init.add_argument("--admin-uri", required=True, metavar="URI",
                      help="postgresql://ADMIN@HOST:PORT/postgres (password from PGPASSWORD "
                           "or ~/.pgpass)")
    init.add_argument("--role", default="quietwell", help="database role (default quietwell)")
    init.add_argument("--catalog-db", default="quietwell_catalog", metavar="NAME")
    init.add_argument("--tables-db", default="quietwell_tables", metavar="NAME")
    init.add_argument("--password-env", default="QUIETWELL_LAB_DB_PASSWORD", metavar="NAME",
                      help="environment variable with the role's password")
    serve = sub.add_parser("serve", help="check the configuration, then run the server")
    serve.add_argument("--config", required=True, metavar="FILE",
                       help="tiled configuration (deploy/lab-catalog.yml)")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    check = sub.add_parser("check", help="check the configuration and its environment only")
    check.add_argument("--config", required=True, metavar="FILE")


@_lab_arguments.runner
def _lab(args: argparse.Namespace) -> int:
    from quietwell.store import _lab as lab

    if args.action == "init":
        made, catalog, tables = lab.init_lab_catalog(
            args.admin_uri, role=args.role, catalog_db=args.catalog_db,
            tables_db=args.tables_db, password_env=args.password_env)
        print(f"created: {', '.join(made) or 'nothing (all existed)'}; catalog initialised")
        print(f"PGUSER={args.role}")
        print(f"QUIETWELL_LAB_CATALOG_DB={catalog}")
        print(f"QUIETWELL_LAB_TABLES_DB={tables}")
        return EXIT_OK
    if args.action == "check":
        found = lab.check_lab_config(args.config)
        print(f"{args.config}: ok (catalog {found['catalog']}, tables {found['tables']}, "
              f"raw {', '.join(found['raw'])}, key from ${found['key_var']})")
        return EXIT_OK
    lab.serve_lab_catalog(args.config, host=args.host, port=args.port)
    return EXIT_INTERNAL  # not reached: the process became the server


# --------------------------------------------------------------------------
# queue: bluesky's queue server for a setup

@subcommand("queue-startup", help="write a setup's startup directory for bluesky's queue server")
def _queue_startup_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("profile", metavar="PROFILE", help="setup profile name or folder")
    parser.add_argument("--data-dir", required=True, metavar="DIR",
                        help="data directory the queued campaigns write to")
    parser.add_argument("-o", "--output", required=True, metavar="STARTUP_DIR",
                        help="folder for the startup scripts (created if missing)")


@_queue_startup_arguments.runner
def _queue_startup(args: argparse.Namespace) -> int:
    from quietwell.queue import serve_command, write_startup_dir

    out = write_startup_dir(args.profile, args.data_dir, args.output)
    print(f"startup directory written: {out}\nstart the queue server with: quietwell "
          f"queue-serve {out}\n(that is: {' '.join(serve_command(out))})")
    return EXIT_OK


@subcommand("queue-serve", help="start bluesky's queue server (RE manager) for a startup directory")
def _queue_serve_arguments(parser: argparse.ArgumentParser) -> None:
    from quietwell.queue import DEFAULT_CONTROL_ADDR, DEFAULT_INFO_ADDR, DEFAULT_REDIS_ADDR

    parser.add_argument("startup_dir", metavar="STARTUP_DIR",
                        help="folder written by quietwell queue-startup")
    parser.add_argument("--redis-addr", default=DEFAULT_REDIS_ADDR, metavar="HOST:PORT",
                        help=f"Redis that keeps the queue and history (default {DEFAULT_REDIS_ADDR})")
    parser.add_argument("--redis-prefix", default="", metavar="NAME",
                        help="prefix of the queue's Redis keys (default quietwell_<setup>)")
    parser.add_argument("--control-addr", default=DEFAULT_CONTROL_ADDR, metavar="ZMQ",
                        help=f"control address (default {DEFAULT_CONTROL_ADDR})")
    parser.add_argument("--info-addr", default=DEFAULT_INFO_ADDR, metavar="ZMQ",
                        help=f"console output address (default {DEFAULT_INFO_ADDR})")


@_queue_serve_arguments.runner
def _queue_serve(args: argparse.Namespace) -> int:
    from quietwell.queue import exec_manager, redis_answers, serve_command

    argv = serve_command(args.startup_dir, redis_addr=args.redis_addr,
                         redis_prefix=args.redis_prefix, control_addr=args.control_addr,
                         info_addr=args.info_addr)
    redis_answers(args.redis_addr)
    exec_manager(argv)
    return EXIT_OK  # pragma: no cover - exec does not return


@subcommand("queue-add", help="check a campaign on a setup, then add it to the queue server")
def _queue_add_arguments(parser: argparse.ArgumentParser) -> None:
    from quietwell.queue import DEFAULT_CONTROL_ADDR

    parser.add_argument("campaign", metavar="CAMPAIGN", help="campaign file (.toml)")
    parser.add_argument("--setup", required=True, metavar="PROFILE",
                        help="setup profile of the queue server (for the check)")
    parser.add_argument("--control-addr", default=DEFAULT_CONTROL_ADDR, metavar="ZMQ",
                        help=f"the queue server's control address (default {DEFAULT_CONTROL_ADDR})")
    parser.add_argument("--new", action="store_true",
                        help="start a new campaign even if one of this file did not complete")
    parser.add_argument("--start", action="store_true",
                        help="open the environment if needed and start the queue")


@_queue_add_arguments.runner
def _queue_add(args: argparse.Namespace) -> int:
    from quietwell.campaign import CAUTIONS
    from quietwell.queue import add_campaign

    item = add_campaign(args.campaign, args.setup, control_addr=args.control_addr,
                        resume=not args.new, start=args.start)
    print(CAUTIONS, file=sys.stderr)
    print(f"queued: campaign({item['args'][0]!r}) as item {item['item_uid']}"
          + (" and the queue started" if args.start else ""))
    return EXIT_OK


# --------------------------------------------------------------------------
# report (quietwell.report)


@subcommand("report", help="write a campaign's morning report as one HTML page")
def _report_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("uids", nargs="*", metavar="UID",
                        help="report these runs instead of a campaign")
    parser.add_argument("--data-dir", required=True, metavar="DIR",
                        help="data directory of the store")
    parser.add_argument("--campaign", metavar="ID",
                        help="campaign id (default: the latest campaign in DIR)")
    parser.add_argument("-o", "--output", required=True, metavar="FILE.html",
                        help="the HTML file to write")


@_report_arguments.runner
def _report(args: argparse.Namespace) -> int:
    from quietwell import InputError
    from quietwell.report import write_report

    if args.uids and args.campaign:
        raise InputError("give --campaign ID or run UIDs, not both; see 'quietwell report "
                         "--help'")
    data = write_report(args.data_dir, args.output, campaign=args.campaign, uids=args.uids)
    if data.running:
        print(f"quietwell report: campaign {data.campaign_id} is still running; the report "
              "shows it as it stands", file=sys.stderr)
    print(f"wrote {args.output}")
    return EXIT_OK


# --------------------------------------------------------------------------
# runs (quietwell.results)


@subcommand("runs", help="list the runs of a store: status, campaign, derived values")
def _runs_arguments(parser: argparse.ArgumentParser) -> None:
    from quietwell.results._cli import add_arguments

    add_arguments(parser)


@_runs_arguments.runner
def _runs(args: argparse.Namespace) -> int:
    from quietwell.results._cli import run

    return run(args)


if __name__ == "__main__":
    # Run the registry of the imported module, where other modules register too.
    from quietwell.cli import main as _main

    sys.exit(_main())
