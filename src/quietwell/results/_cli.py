"""``quietwell runs``: one line a run of a store, newest last."""

from __future__ import annotations

import argparse
import json

from ._reader import DEFAULT_API_KEY_ENV

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    where = parser.add_mutually_exclusive_group(required=True)
    where.add_argument("--data-dir", metavar="DIR",
                       help="data directory of a store (read in this process, read-only)")
    where.add_argument("--uri", metavar="URI",
                       help="a tiled server (http://HOST:PORT/api/v1)")
    parser.add_argument("--api-key-env", metavar="NAME", default=DEFAULT_API_KEY_ENV,
                        help="with --uri: environment variable holding the API key "
                             f"(default {DEFAULT_API_KEY_ENV}; never printed)")
    parser.add_argument("--setup", metavar="NAME", help="only runs of this setup")
    parser.add_argument("--plan", metavar="NAME", help="only runs of this plan")
    parser.add_argument("--campaign", metavar="ID", help="only runs of this campaign")
    parser.add_argument("--since", metavar="DATE",
                        help="only runs started at or after DATE (YYYY-MM-DD[THH:MM], local)")
    parser.add_argument("--uid", metavar="UID", help="only the run with this uid (or prefix)")
    parser.add_argument("--json", action="store_true", help="print one JSON list of objects")


def run(args: argparse.Namespace) -> int:
    from .._errors import InputError
    from ._runs import find_runs, format_runs, parse_since, runs_json

    since = None if args.since is None else parse_since(args.since)  # refused before opening
    location = args.data_dir if args.data_dir is not None else args.uri
    records = find_runs(location, setup=args.setup, plan=args.plan, campaign=args.campaign,
                        since=since, uid=args.uid, api_key_env=args.api_key_env)
    shown = "--data-dir " + args.data_dir if args.data_dir is not None else "--uri"
    if not records and args.uid is not None:
        raise InputError(f"--uid {args.uid}: no run with this uid in {shown} (matching the "
                         "other filters); `quietwell runs` lists the runs and their uids")
    if not records and args.campaign is not None:
        raise InputError(f"--campaign {args.campaign}: no run of this campaign in {shown} "
                         "(matching the other filters); `quietwell runs` lists the campaigns")
    if args.json:
        print(json.dumps(runs_json(records)))
    else:
        print(format_runs(records))
    return 0
