"""The ``gasgap`` command (``python -m monitor.cli`` runs it too). It parses arguments
and calls the shell's functions; the work is done elsewhere, wired by
``monitor.bootstrap``.

One module a group of commands, each registering its sub-parsers explicitly here:

- ``monitor.cli.calc``: ``calc`` (one gas by hand);
- ``monitor.cli.records``: the commands on recorded data (``ingest``, ``patient``,
  ``outbox``);
- ``monitor.cli.serve``: the service's commands (``serve``, ``db``, ``config``, ``flags``);
- ``monitor.cli.replay``: ``replay``;
- ``monitor.cli.fhir``: ``fhir jwks``, ``fhir backfill``;
- ``monitor.cli.quarantine``: ``quarantine list|show|reprocess|purge``;
- ``monitor.cli.common``: what they share (the one-line failure, the options that name a
  site, opening that site through the composition root).

Bad input gets one line on stderr naming the option and what was wrong, and exit code 2;
any other refusal of the service (``MonitorError``: a database that cannot be reached,
a channel that cannot be built) one line and exit code 1.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Sequence

from monitor.cli.common import EXIT_USAGE, Parser, Subparsers, UsageError
from monitor.engine.errors import MonitorError
from monitor.engine.model import ADVISORY

#: Kept for the tests and scripts that build a parser of their own.
_Parser = Parser

__all__ = ["EXIT_USAGE", "UsageError", "build_parser", "main"]


def _command_modules() -> list[Callable[[Subparsers], None]]:
    """Every group of commands, each registered by the module that runs it."""
    from monitor.cli.calc import add_calc_command
    from monitor.cli.fhir import add_fhir_commands
    from monitor.cli.quarantine import add_quarantine_commands
    from monitor.cli.records import add_record_commands
    from monitor.cli.replay import add_replay_command
    from monitor.cli.serve import add_serve_commands

    return [
        add_calc_command,
        add_record_commands,
        add_serve_commands,
        add_replay_command,
        add_fhir_commands,
        add_quarantine_commands,
    ]


def build_parser() -> Parser:
    parser = Parser(prog="gasgap", description="Blood-gas oxygenation indices. " + ADVISORY)
    sub = parser.add_subparsers(dest="command", required=True, parser_class=Parser)
    for register in _command_modules():
        register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.run(args))
    except UsageError as exc:
        print(f"gasgap: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except MonitorError as exc:
        print(f"gasgap: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
