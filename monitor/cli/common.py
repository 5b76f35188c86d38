"""What every ``gasgap`` command shares: the one-line failure, the options that name a
site (``--config``, ``--db``, ``--secrets-file``), and opening that site's shell through
the composition root (``monitor.bootstrap``), so every command resolves the same
database from the same site file.

Bad input gets one line on stderr naming the option and what was wrong, and exit code 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, NoReturn, TypeAlias

from monitor.engine.errors import MonitorError

if TYPE_CHECKING:
    from monitor.bootstrap import Shell

EXIT_USAGE = 2


class UsageError(MonitorError):
    """A command-line input is wrong; the message names the option."""


class Parser(argparse.ArgumentParser):
    """argparse, failing in one line with exit code 2 and no usage dump."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USAGE, f"gasgap: {message}\n")


Subparsers: TypeAlias = "argparse._SubParsersAction[Parser]"


def fail(message: str) -> int:
    """Print ``gasgap: message`` on stderr; the usage exit code."""
    print(f"gasgap: {message}", file=sys.stderr)
    return EXIT_USAGE


def add_site_options(parser: argparse.ArgumentParser) -> None:
    """``--config`` (the site file; default: built-in), ``--db`` (overrides the site's
    database) and ``--secrets-file`` (KEY=VALUE secrets not set in the environment)."""
    parser.add_argument("--config", type=Path, help="site configuration (TOML)")
    parser.add_argument(
        "--db",
        dest="db_url",
        help="database URL (default: the site's [database], else sqlite:///gasgap.db)",
    )
    parser.add_argument("--secrets-file", type=Path, help="KEY=VALUE secrets file")


def site_database_url(args: argparse.Namespace) -> str:
    """The database URL a command with ``add_site_options`` uses (``--db``, else the
    site's ``[database]``), resolved as ``monitor.bootstrap`` resolves it."""
    from monitor.bootstrap import Secrets, database_url, load_site
    from monitor.config import ConfigError

    try:
        config = load_site(args.config)
        return database_url(config, Secrets(args.secrets_file), args.db_url)
    except ConfigError as exc:
        raise UsageError(f"--config: {exc}") from None


def open_site(args: argparse.Namespace, *, existing: bool = False) -> Shell:
    """The site's shell for a command with ``add_site_options``. A configuration or
    secret problem becomes a ``UsageError`` naming the option. ``existing``: the command
    only reads or acts on stored data, so a SQLite file that is not there is a
    ``UsageError`` (never an empty database made to answer "nothing here")."""
    from monitor.bootstrap import NoDatabase, open_shell
    from monitor.config import ConfigError

    try:
        return open_shell(
            args.config, db_url=args.db_url, secrets_file=args.secrets_file, existing=existing
        )
    except ConfigError as exc:
        raise UsageError(f"--config: {exc}") from None
    except NoDatabase as exc:
        raise UsageError(str(exc)) from None
