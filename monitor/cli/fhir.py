"""``gasgap fhir ...``: the commands of a FHIR source that are run by hand.

- ``gasgap fhir jwks``: print the public JWKS the site registers with its EHR for SMART
  Backend Services (the public key only);
- ``gasgap fhir backfill``: fetch history by FHIR Bulk Data ``$export`` and load it
  through the historical ingest path; run it again after a crash and it carries on.

The work is done in ``adapters.fhir.smart``, ``adapters.fhir.bulk`` and
``monitor.ingest``; this module parses arguments and prints.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypedDict

from monitor.engine.errors import MonitorError
from monitor.engine.model import ADVISORY

if TYPE_CHECKING:
    from adapters.codes import CodeTable
    from adapters.fhir.bulk import ExportResult
    from monitor.bootstrap import Secrets
    from monitor.cli.common import Subparsers
    from monitor.config import FhirSource, SiteConfig
    from monitor.pipeline import BatchReport

EXIT_USAGE = 2
EXIT_FAILED = 1


def add_fhir_commands(sub: Subparsers) -> None:
    """Register ``gasgap fhir`` on ``sub`` (the parser's sub-parsers)."""
    fhir = sub.add_parser("fhir", help="FHIR sources: SMART keys, bulk backfill")
    fhir_sub = fhir.add_subparsers(dest="fhir_command", required=True)

    jwks = fhir_sub.add_parser(
        "jwks",
        help="print the public JWKS to register with the EHR (SMART Backend Services)",
        description="Print the public key of a FHIR source's [sources.fhir.smart] settings "
        "as a JWKS (JSON). It holds no secret: give it to the EHR team, or publish it.",
    )
    _add_source(jwks)
    jwks.set_defaults(run=_run_jwks)

    backfill = fhir_sub.add_parser(
        "backfill",
        help="fetch history by FHIR Bulk Data $export and load it",
        description="Kick off a Bulk Data $export of Patient, Encounter and the Observations "
        "gasgap reads, wait for it, download the files into --dir, delete the job on the "
        "server and load the files like `gasgap ingest`. Run it again after a crash or "
        "a restart: it carries on where it stopped. " + ADVISORY,
    )
    _add_source(backfill)
    backfill.add_argument("--db", dest="db_url", help="database URL (default: the site's)")
    backfill.add_argument(
        "--level",
        choices=["system", "patient", "group"],
        default="system",
        help="export everything (system), all patients (patient), or one group",
    )
    backfill.add_argument("--group", help="Group id, with --level group")
    backfill.add_argument(
        "--since", type=_instant, help="only resources changed after this instant (ISO 8601)"
    )
    backfill.add_argument(
        "--all-observations",
        action="store_true",
        help="no _typeFilter: every Observation (for servers without _typeFilter)",
    )
    backfill.add_argument(
        "--dir",
        type=Path,
        required=True,
        help="download folder (kept: holds the files and the export's state)",
    )
    backfill.add_argument("--no-progress", action="store_true", help="no progress output")
    backfill.add_argument("--json", action="store_true", help="print the summary as JSON")
    backfill.set_defaults(run=_run_backfill)


def _add_source(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", type=Path, required=True, help="site configuration (TOML)")
    parser.add_argument("--source", help="the [[sources.fhir]] name (needed if several)")
    parser.add_argument("--secrets-file", type=Path, help="KEY=VALUE secrets file")


def _instant(text: str) -> datetime:
    try:
        when = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an ISO 8601 instant") from None
    if when.tzinfo is None:
        raise argparse.ArgumentTypeError(f"{text!r} has no time zone (add Z or +01:00)")
    return when


class CommandError(MonitorError):
    """One line for stderr."""


def _fail(message: str, code: int = EXIT_USAGE) -> int:
    print(f"gasgap: {message}", file=sys.stderr)
    return code


def _source(args: argparse.Namespace) -> tuple[SiteConfig, FhirSource]:
    from monitor.config import ConfigError, load_config

    try:
        config = load_config(args.config)
    except ConfigError as exc:
        raise CommandError(f"--config: {exc}") from None
    except OSError as exc:
        raise CommandError(f"--config: {exc.strerror}: {args.config}") from None
    sources = {s.name: s for s in config.sources.fhir}
    if args.source is not None:
        if args.source not in sources:
            known = ", ".join(sources) or "none"
            raise CommandError(f"--source: no FHIR source {args.source!r} (configured: {known})")
        return config, sources[args.source]
    if len(sources) != 1:
        raise CommandError(
            f"--source: {len(sources)} FHIR sources are configured; name one"
            + (f" ({', '.join(sources)})" if sources else "")
        )
    return config, next(iter(sources.values()))


def _secrets(args: argparse.Namespace) -> Secrets:
    from monitor.bootstrap import Secrets

    return Secrets(args.secrets_file)


# --- jwks ------------------------------------------------------------------------------------


def _run_jwks(args: argparse.Namespace) -> int:
    from adapters.fhir.smart import SmartKeyError, public_jwks

    try:
        _, source = _source(args)
        if source.smart is None:
            raise CommandError(f"--source: {source.name} has no [sources.fhir.smart] settings")
        jwks = public_jwks(source.smart, _secrets(args).get)
    except CommandError as exc:
        return _fail(str(exc))
    except SmartKeyError as exc:
        return _fail(str(exc))
    print(json.dumps(jwks, indent=2))
    return 0


# --- backfill --------------------------------------------------------------------------------


class LineProgress:
    """Progress as log lines (stderr not a terminal: a service log, a CI run)."""

    def __init__(self) -> None:
        self._last = ""

    def status(self, text: str, wait_s: float) -> None:
        line = f"export: {text}; next check in {wait_s:.0f} s"
        if line != self._last:
            print(line, file=sys.stderr, flush=True)
            self._last = line

    def file_started(self, name: str, index: int, count: int) -> None:
        print(f"export: downloading {name} ({index}/{count})", file=sys.stderr, flush=True)

    def file_bytes(self, size: int) -> None:
        pass

    def file_done(self, name: str, size: int) -> None:
        print(f"export: {name} done, {size} bytes", file=sys.stderr, flush=True)


class BarProgress(LineProgress):
    """A tqdm bar per file on a terminal."""

    def __init__(self) -> None:
        super().__init__()
        self._bar: Any = None

    def file_started(self, name: str, index: int, count: int) -> None:
        from tqdm import tqdm

        self._bar = tqdm(
            desc=f"{name} ({index}/{count})",
            unit="B",
            unit_scale=True,
            file=sys.stderr,
            leave=False,
        )

    def file_bytes(self, size: int) -> None:
        if self._bar is not None:
            self._bar.update(size)

    def file_done(self, name: str, size: int) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
        super().file_done(name, size)


class _Silent(LineProgress):
    def status(self, text: str, wait_s: float) -> None:
        pass

    def file_started(self, name: str, index: int, count: int) -> None:
        pass

    def file_done(self, name: str, size: int) -> None:
        pass


def _run_backfill(args: argparse.Namespace) -> int:
    from adapters.codes import CodeTable
    from adapters.fhir.bulk import (
        BulkExporter,
        BulkExportError,
        ExportLevel,
        ExportRequest,
        combine_for_loading,
        observation_type_filter,
    )
    from adapters.fhir.smart import SmartKeyError
    from monitor.bootstrap import fhir_source_auth

    try:
        config, source = _source(args)
        level = ExportLevel(args.level)
        if (level is ExportLevel.GROUP) != (args.group is not None):
            raise CommandError("--group: give it with --level group, and only then")
        codes = CodeTable.load()
        request = ExportRequest(
            level=level,
            group_id=args.group,
            type_filters=() if args.all_observations else (observation_type_filter(codes),),
            since=args.since,
        )
        auth = fhir_source_auth(source, _secrets(args))
    except CommandError as exc:
        return _fail(str(exc))
    except (SmartKeyError, ValueError) as exc:
        return _fail(str(exc))
    if args.no_progress:
        progress: LineProgress = _Silent()
    elif sys.stderr.isatty():
        progress = BarProgress()
    else:
        progress = LineProgress()
    try:
        with BulkExporter(source.base_url, args.dir, auth=auth, progress=progress) as exporter:
            result = exporter.run(request)
            if result.resumed:
                print(f"export: carried on from {args.dir / 'export-state.json'}", file=sys.stderr)
            load_file, lines = combine_for_loading(result.data_files, args.dir / "load.ndjson")
            report = _load(args, config, source, codes, load_file)
            exporter.mark_loaded(result.state)
    except BulkExportError as exc:
        return _fail(str(exc), EXIT_FAILED)
    finally:
        if auth is not None and hasattr(auth, "close"):
            auth.close()
    summary = _summary(report, result, lines)
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        _print_summary(summary)
    return 0


def _load(
    args: argparse.Namespace, config: SiteConfig, source: FhirSource, codes: CodeTable, path: Path
) -> BatchReport:
    from dataclasses import replace

    from monitor.bootstrap import Secrets, build_pipeline, open_db, source_context
    from monitor.ingest import ingest_files

    db = open_db(config, Secrets(args.secrets_file), args.db_url)
    # the poll's identity: backfill and poll meet, not repeat
    context = replace(source_context(config, codes), fhir_source=source.name)
    try:
        return ingest_files(
            [path],
            build_pipeline(db, config),
            context,
            now=lambda: datetime.now(UTC),
            progress=not args.no_progress and sys.stderr.isatty(),
        )
    finally:
        db.dispose()


class BackfillSummary(TypedDict):
    """What ``gasgap fhir backfill`` prints (``--json``: as it is)."""

    files: list[str]
    lines: int
    server_errors: list[str]
    transaction_time: str | None
    read: int
    stored: int
    duplicates: int
    skipped_codes: int
    quarantined: int
    top_quarantine_reasons: list[tuple[str, int]]
    derivations: int
    flag_events: int
    historical_flags: int | None
    notifications_queued: int


def _summary(report: BatchReport, result: ExportResult, lines: int) -> BackfillSummary:
    errors = []
    for path in result.error_files:
        for raw in path.read_text(errors="replace").splitlines()[:20]:
            try:
                issues = json.loads(raw).get("issue") or []
            except (ValueError, AttributeError):
                continue
            errors += [str(i.get("diagnostics") or i.get("code")) for i in issues]
    historical = report.historical_events
    return {
        "files": [p.name for p in result.data_files],
        "lines": lines,
        "server_errors": errors[:20],
        "transaction_time": result.transaction_time,
        "read": report.read,
        "stored": report.stored,
        "duplicates": report.duplicates,
        "skipped_codes": sum(report.skipped_codes.values()),
        "quarantined": report.quarantined,
        "top_quarantine_reasons": report.quarantine_reasons.most_common(5),
        "derivations": report.derivations,
        "flag_events": len(report.alert_events),
        "historical_flags": historical if isinstance(historical, int) else None,
        "notifications_queued": report.notifications,
    }


def _print_summary(summary: BackfillSummary) -> None:
    print(f"downloaded {len(summary['files'])} files, {summary['lines']} lines")
    for text in summary["server_errors"]:
        print(f"  server reported: {text}")
    print(
        f"read {summary['read']}, stored {summary['stored']}, duplicates "
        f"{summary['duplicates']}, skipped codes {summary['skipped_codes']}, "
        f"quarantined {summary['quarantined']}"
    )
    for reason, count in summary["top_quarantine_reasons"]:
        print(f"  quarantined {count} x {reason}")
    historical = summary["historical_flags"]
    print(
        f"derivations {summary['derivations']}, flag events {summary['flag_events']}"
        + (f" ({historical} recorded as historical)" if historical is not None else "")
        + f", notifications queued {summary['notifications_queued']}"
    )
    if summary["transaction_time"]:
        print(f"next backfill from here: --since {summary['transaction_time']}")
    print(ADVISORY)
