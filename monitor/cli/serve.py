"""Command-line commands of the running service: ``serve``, ``db upgrade``,
``config check``, ``flags`` and ``flags ack`` (``alerts`` is the old name of ``flags``,
still accepted).

``monitor.cli`` calls ``add_serve_commands(sub)``; each sub-parser sets ``run=`` to a
function taking the parsed arguments and returning an exit code. The site's database,
secrets and pipeline come from ``monitor.bootstrap`` (through
``monitor.cli.common.open_site``), as for every command.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime
from pathlib import Path

from monitor.cli.common import (
    EXIT_USAGE,
    Subparsers,
    add_site_options,
    fail,
    site_database_url,
)
from monitor.engine.model import ADVISORY

EXIT_CONFIG = EXIT_USAGE


def add_serve_commands(sub: Subparsers) -> None:
    """Register the service's commands on ``sub`` (the parser's sub-parsers)."""
    serve = sub.add_parser(
        "serve",
        help="run the service (MLLP, FHIR polls, board, API)",
        description="Run gasgap until SIGTERM. " + ADVISORY,
    )
    serve.add_argument("--config", type=Path, required=True, help="site configuration (TOML)")
    serve.add_argument(
        "--secrets-file",
        type=Path,
        help="KEY=VALUE file read for secrets not set in the environment",
    )
    serve.set_defaults(run=_run_serve)

    db = sub.add_parser("db", help="database maintenance")
    db_sub = db.add_subparsers(dest="db_command", required=True)
    upgrade = db_sub.add_parser("upgrade", help="bring the database schema to the newest version")
    add_site_options(upgrade)
    upgrade.set_defaults(run=_run_db_upgrade)

    config = sub.add_parser("config", help="site configuration")
    config_sub = config.add_subparsers(dest="config_command", required=True)
    check = config_sub.add_parser("check", help="check a site configuration file")
    check.add_argument("file", type=Path)
    check.set_defaults(run=_run_config_check)

    flags = sub.add_parser(
        "flags",
        aliases=["alerts"],
        help="list open flags, or acknowledge one ('alerts' is the old name)",
    )
    flags.add_argument("--unit", help="only this unit")
    flags.add_argument("--json", action="store_true", help="one JSON object")
    add_site_options(flags)
    flags.set_defaults(run=_run_alerts)
    flags_sub = flags.add_subparsers(dest="alerts_command", required=False)
    ack = flags_sub.add_parser("ack", help="acknowledge a flag, recording who")
    ack.add_argument("alert_id", metavar="FLAG_ID")
    ack.add_argument("--by", required=True, help="the person acknowledging")
    add_site_options(ack)
    ack.set_defaults(run=_run_alerts_ack)


def _run_serve(args: argparse.Namespace) -> int:
    from monitor.config import ConfigError
    from monitor.service import run

    try:
        return run(args.config, secrets_file=args.secrets_file)
    except ConfigError as exc:
        return fail(str(exc))


def _run_db_upgrade(args: argparse.Namespace) -> int:
    from storage.db import upgrade

    upgrade(site_database_url(args))
    print("database schema is up to date")
    return 0


def _run_config_check(args: argparse.Namespace) -> int:
    from monitor.config import check_config, file_notes

    for note in file_notes(args.file):
        print(f"{args.file}: note: {note}", file=sys.stderr)
    problems = check_config(args.file)
    if problems:
        for problem in problems:
            print(f"{args.file}: {problem}", file=sys.stderr)
        return EXIT_CONFIG
    print(f"{args.file}: configuration is valid")
    for name in _unset_secrets(args.file):
        # valid as a file; but the service or `outbox send` will stop on this one
        print(
            f"{args.file}: note: secret {name} is not set in this environment "
            "(nor in a --secrets-file); set it where gasgap runs",
            file=sys.stderr,
        )
    return 0


def _unset_secrets(path: Path) -> list[str]:
    """The variables the site file names for channels' secrets that are not set here."""
    from monitor.bootstrap import Secrets, channel_secrets, load_site, named_variables

    config = load_site(path)
    missing: list[str] = []
    for alias in sorted(config.channels):
        options = config.channel_options(alias)
        found = channel_secrets(options, Secrets())
        missing += [n for n in named_variables(options) if n not in found and n not in missing]
    return missing


def _run_alerts(args: argparse.Namespace) -> int:
    from monitor.bootstrap import load_site
    from monitor.cli.common import open_site
    from monitor.cli.records import alerts_table, unit_problem
    from monitor.shapes import alert_json
    from storage import board as board_store
    from storage.alerts import open_alerts

    if args.command == "alerts":
        print("gasgap: 'alerts' is now 'flags'; the old name still works", file=sys.stderr)
    shell = open_site(args, existing=True)  # never an empty database to say "no open flags"
    db = shell.db
    try:
        with db.begin(read_only=True) as conn:
            problem = unit_problem(board_store.known_units(conn), args.unit)
            found = [] if problem else open_alerts(conn, unit=args.unit)
            drawn = board_store.draw_times(conn, found)
    finally:
        db.dispose()
    if problem is not None:
        return fail(problem)
    if args.json:
        print(json.dumps({"flags": [alert_json(a) for a in found], "advisory": ADVISORY}, indent=2))
        return 0
    if not found:
        print("no open flags" + (f" in {args.unit}" if args.unit else ""))
    else:
        print(alerts_table(found, load_site(args.config).zone(), datetime.now(UTC), drawn))
    print()
    print(ADVISORY)
    return 0


def _run_alerts_ack(args: argparse.Namespace) -> int:
    from monitor.cli.common import open_site
    from monitor.engine.errors import IllegalTransition

    by = " ".join(args.by.split())
    if not by:
        return fail("--by: must name the person acknowledging")
    shell = open_site(args, existing=True)
    try:
        alert = shell.pipeline.acknowledge(args.alert_id, by, now=datetime.now(UTC))
    except LookupError as exc:
        return fail(str(exc))
    except IllegalTransition as exc:
        return fail(f"flag {args.alert_id} cannot be acknowledged: {exc}")
    finally:
        shell.close()
    print(f"flag {alert.alert_id} acknowledged by {alert.acknowledged_by}")
    return 0
