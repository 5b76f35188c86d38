"""``gasgap replay``: play recorded feeds through the service's pipeline, report, compare.

``monitor.cli`` calls ``add_replay_command(sub)``; the sub-parser sets ``run=`` to a
function taking the parsed arguments and returning an exit code. The site's settings
come from ``monitor.bootstrap``; the work is done by ``monitor.replay`` and
``monitor.report``. A replay keeps its own database (``--db``, default in memory), never
the site's.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from monitor.cli.common import Subparsers, fail
from monitor.engine.model import ADVISORY

if TYPE_CHECKING:
    from monitor.config import SiteConfig
    from monitor.replay import ReplayEvent, ReplayResult
    from monitor.report import Comparison


def _speed(text: str) -> float | None:
    if text == "max":
        return None
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is neither 'max' nor a number") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive finite number")
    return value


def _workers(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"--workers {text!r}: must be a whole number >= 1")
    return n


def add_replay_command(sub: Subparsers) -> None:
    """Register ``replay`` on ``sub`` (the parser's sub-parsers)."""
    p = sub.add_parser(
        "replay",
        help="replay recorded HL7 v2 / FHIR files through the pipeline on a simulated clock",
        description="Replay recorded feeds in order of record time through the same "
        "pipeline as the service, with the clock at each input's record time. "
        "Notifications are captured in the replay database, not sent. " + ADVISORY,
    )
    p.add_argument(
        "paths",
        nargs="+",
        type=Path,
        metavar="PATH",
        help="HL7 v2 files, FHIR NDJSON or Bundle/resource JSON files",
    )
    p.add_argument("--config", type=Path, help="site configuration (TOML); default: built-in")
    p.add_argument(
        "--db",
        dest="db_url",
        default=None,
        help="database URL to keep the replay in (default: a temporary SQLite file)",
    )
    p.add_argument(
        "--workers",
        type=_workers,
        default=None,
        metavar="N",
        help="processes computing patients (default: the machine's cores)",
    )
    p.add_argument(
        "--dask",
        metavar="ADDRESS",
        help="compute patients on this Dask scheduler ('local': a cluster on this machine)",
    )
    p.add_argument(
        "--report", type=Path, metavar="DIR", help="write the HTML report and plots here"
    )
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument(
        "--speed",
        type=_speed,
        default=None,
        metavar="max|N",
        help="'max' (default) or N times faster than the recorded times",
    )
    p.add_argument(
        "--compare",
        type=Path,
        metavar="OTHER.toml",
        help="replay again under this second configuration and compare",
    )
    p.add_argument(
        "--deliver",
        action="store_true",
        help="after the replay, send the captured notifications via the channels",
    )
    p.add_argument("--secrets-file", type=Path, help="KEY=VALUE secrets file (with --deliver)")
    p.set_defaults(run=run_replay)


def run_replay(args: argparse.Namespace) -> int:
    from monitor.bootstrap import load_site
    from monitor.config import ConfigError
    from monitor.ingest import FileKindError
    from monitor.replay import deliver_captured
    from monitor.report import compare, write_report

    for path in args.paths:
        if not path.is_file():
            return fail(f"PATH: {path} is not a file")
    try:
        config = load_site(args.config)
        other = load_site(args.compare) if args.compare else None
    except (ConfigError, OSError, ValueError) as exc:
        return fail(f"--config/--compare: {exc}")
    try:
        first = _replay_once(args, config, args.db_url, str(args.config or "built-in defaults"))
    except (FileKindError, FileNotFoundError, ValueError) as exc:
        return fail(f"PATH: {exc}")
    second = None
    try:
        if args.deliver:
            first.delivered = deliver_captured(first, config, secrets_file=args.secrets_file)
        if other is not None:  # the second replay runs in its own temporary database
            second = _replay_once(args, other, None, str(args.compare))
        comparison = compare(first, second) if second is not None else None
        page = write_report(first, args.report, comparison=comparison) if args.report else None
        if args.json:
            _print_json(first, second, comparison, page)
        else:
            _print_text(first, comparison, page)
        return 0
    finally:
        first.close()
        if second is not None:
            second.close()


def _replay_once(
    args: argparse.Namespace, config: SiteConfig, db_url: str | None, label: str
) -> ReplayResult:
    """The files of ``args`` replayed under ``config`` into ``db_url`` (None: a temporary
    database of its own)."""
    from monitor.bootstrap import pipeline_settings, source_context
    from monitor.replay import replay

    return replay(
        args.paths,
        pipeline_settings(config),
        source_context(config),
        db_url=db_url,
        speed=args.speed,
        progress=not args.json,
        label=label,
        workers=args.workers,
        dask=args.dask,
    )


def _print_json(
    first: ReplayResult,
    second: ReplayResult | None,
    comparison: Comparison | None,
    page: Path | None,
) -> None:
    """``--json``: the replay, and the comparison, report page and deliveries if any,
    as one JSON object on one line."""
    out = first.as_json()
    if comparison is not None:
        out["comparison"] = comparison.as_json()
        out["comparison_counts"] = second.counts.as_json() if second else None
    if page is not None:
        out["report"] = str(page)
    if first.delivered is not None:
        out["delivered"] = first.delivered
    sys.stdout.write(json.dumps(out, sort_keys=True) + "\n")


def _print_text(first: ReplayResult, comparison: Comparison | None, page: Path | None) -> None:
    """The summary and flag table, the comparison, deliveries and report page if any,
    then the advisory sentence."""
    from monitor.report import comparison_table

    print(summary_text(first))
    if comparison is not None:
        print()
        print(comparison_table(comparison))
    if first.delivered is not None:
        print(f"\n{first.delivered} captured notifications delivered.")
    if page is not None:
        print(f"\nreport: {page}")
    print()
    print(ADVISORY)


def summary_text(result: ReplayResult) -> str:
    """Counts and a table of flags: patient, rule, highest priority, events in order."""
    c = result.counts
    lines = [
        f"replayed {c.units} units: {c.readings} readings read, {c.stored} stored, "
        f"{c.duplicates} duplicates, {c.quarantined} quarantined; {c.derivations} "
        f"derivations; {c.notifications} notifications captured",
        "",
        flag_table(result.events),
    ]
    return "\n".join(lines)


@dataclass
class _FlagRow:
    """One flag of the table: its patient, rule, highest priority and events so far."""

    patient: str
    rule: str
    priority: str
    events: list[str] = field(default_factory=list)


def flag_table(events: Sequence[ReplayEvent]) -> str:
    """One row per flag: patient, rule, highest priority reached, its events in order."""
    ranks = {"low": 1, "medium": 2, "high": 3}
    flags: dict[str, _FlagRow] = {}
    for e in events:
        f = flags.setdefault(e.alert_id, _FlagRow(e.patient, e.rule, e.priority))
        if ranks.get(e.priority, 0) > ranks.get(f.priority, 0):
            f.priority = e.priority
        f.events.append(e.event)
    if not flags:
        return "no flags"
    rows = sorted(flags.values(), key=lambda f: (f.patient, f.rule))
    lines = [f"{'patient':12} {'rule':18} {'priority':8} events"]
    lines += [f"{f.patient:12} {f.rule:18} {f.priority:8} {', '.join(f.events)}" for f in rows]
    return "\n".join(lines)
