"""Command-line commands of the running service: ``serve``, ``db upgrade``,
``config check``, ``alerts`` and ``alerts ack``.

``monitor.cli`` calls ``add_serve_commands(sub)``; each sub-parser sets ``run=`` to a
function taking the parsed arguments and returning an exit code. The work is done by
``monitor.service``, ``monitor.config`` and ``storage``.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from monitor.engine.model import ADVISORY

EXIT_CONFIG = 2


def add_serve_commands(sub: Any) -> None:
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
    _add_target(upgrade)
    upgrade.set_defaults(run=_run_db_upgrade)

    config = sub.add_parser("config", help="site configuration")
    config_sub = config.add_subparsers(dest="config_command", required=True)
    check = config_sub.add_parser("check", help="check a site configuration file")
    check.add_argument("file", type=Path)
    check.set_defaults(run=_run_config_check)

    alerts = sub.add_parser("alerts", help="list open flags, or acknowledge one")
    alerts.add_argument("--unit", help="only this unit")
    alerts.add_argument("--json", action="store_true", help="one JSON object")
    _add_target(alerts)
    alerts.set_defaults(run=_run_alerts)
    alerts_sub = alerts.add_subparsers(dest="alerts_command", required=False)
    ack = alerts_sub.add_parser("ack", help="acknowledge a flag, recording who")
    ack.add_argument("alert_id")
    ack.add_argument("--by", required=True, help="the person acknowledging")
    _add_target(ack)
    ack.set_defaults(run=_run_alerts_ack)


def _add_target(parser: argparse.ArgumentParser) -> None:
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--db", dest="db_url", help="database URL (default sqlite:///gasgap.db)")
    where.add_argument("--config", type=Path, help="site configuration naming the database")
    parser.add_argument("--secrets-file", type=Path, help="KEY=VALUE secrets file")


def _fail(message: str) -> int:
    print(f"gasgap: {message}", file=sys.stderr)
    return EXIT_CONFIG


def _load(path: Path) -> Any:
    from monitor.config import load_config

    return load_config(path)


def _url(args: argparse.Namespace) -> str | None:
    if getattr(args, "db_url", None):
        return str(args.db_url)
    if getattr(args, "config", None):
        from monitor.service import database_url

        return database_url(_load(args.config), args.secrets_file)
    return None


def _run_serve(args: argparse.Namespace) -> int:
    from monitor.config import ConfigError
    from monitor.service import run

    try:
        return run(args.config, secrets_file=args.secrets_file)
    except ConfigError as exc:
        return _fail(str(exc))


def _run_db_upgrade(args: argparse.Namespace) -> int:
    from monitor.config import ConfigError
    from storage.db import DEFAULT_URL, upgrade

    try:
        url = _url(args) or DEFAULT_URL
    except ConfigError as exc:
        return _fail(str(exc))
    upgrade(url)
    print("database schema is up to date")
    return 0


def _run_config_check(args: argparse.Namespace) -> int:
    from monitor.config import check_config

    problems = check_config(args.file)
    if problems:
        for problem in problems:
            print(f"{args.file}: {problem}", file=sys.stderr)
        return EXIT_CONFIG
    print(f"{args.file}: configuration is valid")
    return 0


def _open(args: argparse.Namespace) -> Any:
    from storage.db import open_database

    return open_database(_url(args))


def _run_alerts(args: argparse.Namespace) -> int:
    from monitor.config import ConfigError
    from monitor.web.api import alert_json
    from storage.alerts import open_alerts

    try:
        db = _open(args)
    except ConfigError as exc:
        return _fail(str(exc))
    try:
        with db.begin(read_only=True) as conn:
            found = open_alerts(conn, unit=args.unit)
    finally:
        db.dispose()
    if args.json:
        print(json.dumps({"flags": [alert_json(a) for a in found], "advisory": ADVISORY}, indent=2))
        return 0
    if not found:
        print("no open flags" + (f" in {args.unit}" if args.unit else ""))
    for a in found:
        where = a.location.label() if a.location else "location unknown"
        print(
            f"{a.priority.value.upper():6} {a.state.value:12} {a.rule:18} {where:24} {a.alert_id}"
        )
        print(f"       {a.summary}")
    print()
    print(ADVISORY)
    return 0


def _run_alerts_ack(args: argparse.Namespace) -> int:
    from monitor.config import ConfigError, default_config
    from monitor.engine.errors import MonitorError
    from monitor.pipeline import Pipeline

    by = " ".join(args.by.split())
    if not by:
        return _fail("--by: must name the person acknowledging")
    try:
        config = _load(args.config) if args.config else default_config()
        db = _open(args)
    except ConfigError as exc:
        return _fail(str(exc))
    try:
        alert = Pipeline(db, config.to_pipeline_settings()).acknowledge(
            args.alert_id, by, now=datetime.now(UTC)
        )
    except LookupError as exc:
        return _fail(str(exc))
    except MonitorError as exc:
        return _fail(f"flag {args.alert_id} cannot be acknowledged: {exc}")
    finally:
        db.dispose()
    print(f"flag {alert.alert_id} acknowledged by {alert.acknowledged_by}")
    return 0


def main(argv: list[str] | None = None) -> int:
    """``python -m monitor.cli_serve ...``: the same commands, for when the main
    ``gasgap`` command does not include them."""
    parser = argparse.ArgumentParser(prog="gasgap", description="gasgap service. " + ADVISORY)
    add_serve_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return int(args.run(args))


if __name__ == "__main__":
    sys.exit(main())
