"""``gasgap quarantine``: see, re-process and purge refused input.

    gasgap quarantine list    --config site.toml [--source hl7:lab] [--limit 50] [--open]
    gasgap quarantine show ID --config site.toml [--raw]
    gasgap quarantine reprocess ID [ID ...] --config site.toml [--codes site-codes.toml]
    gasgap quarantine purge   --config site.toml (--older-than-days N | --id ID ...)

``reprocess`` reads the kept payload again (with the code table and any ``--codes``
files, so a mapping added since is used) and gives it to the pipeline like any new
input: what now reads is stored (a result already stored is a no-op), what still does
not is quarantined again with its reason, and the old item is marked re-processed with
the outcome. ``purge`` deletes items and, with their last item, their payloads. The
retention job purges items older than ``retention_days`` on its own.

The raw payload may identify a patient: ``show`` prints it only when asked (``--raw``),
to the terminal of someone who may read it, never to a log.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING

from monitor.cli.common import Subparsers
from monitor.shapes import iso_utc, payload_text, quarantine_item_json

if TYPE_CHECKING:
    from monitor.config import SiteConfig
    from monitor.ingest import SourceContext
    from monitor.pipeline import BatchReport, Pipeline
    from storage.db import Database
    from storage.quarantine import QuarantinedInput

EXIT_FAILED = 1
EXIT_CONFIG = 3


def add_quarantine_commands(sub: Subparsers) -> None:
    """Register ``gasgap quarantine ...`` on the main command's subparsers."""
    top = sub.add_parser(
        "quarantine",
        help="list, show, re-process and purge refused input",
        description=__doc__.split("\n\n")[0],
    )
    verbs = top.add_subparsers(dest="verb", required=True, parser_class=type(top))

    listing = verbs.add_parser("list", help="the most recent refused items")
    _target(listing)
    listing.add_argument("--source", help="only this source (e.g. hl7:lab, fhir:ehr)")
    listing.add_argument("--limit", type=int, default=50)
    listing.add_argument("--open", action="store_true", help="only items not re-processed")
    listing.add_argument("--json", action="store_true", help="one JSON object a line")
    listing.set_defaults(run=_run_list)

    show = verbs.add_parser("show", help="one item, with its reason (and payload)")
    _target(show)
    show.add_argument("id", type=int)
    show.add_argument("--raw", action="store_true", help="print the kept payload as well")
    show.set_defaults(run=_run_show)

    again = verbs.add_parser("reprocess", help="read items again and store what now reads")
    _target(again)
    again.add_argument("ids", type=int, nargs="+")
    again.add_argument(
        "--codes",
        type=Path,
        action="append",
        default=[],
        help="a site code table (TOML) used besides the shipped one",
    )
    again.set_defaults(run=_run_reprocess)

    purge = verbs.add_parser("purge", help="delete items (and their payloads)")
    _target(purge)
    which = purge.add_mutually_exclusive_group(required=True)
    which.add_argument("--older-than-days", type=int)
    which.add_argument("--id", type=int, nargs="+", dest="ids")
    purge.set_defaults(run=_run_purge)


def _target(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", type=Path, required=True, help="site configuration")
    parser.add_argument("--secrets-file", type=Path, help="KEY=VALUE secrets file")


def _fail(message: str, code: int = EXIT_CONFIG) -> int:
    print(f"gasgap: {message}", file=sys.stderr)
    return code


def _open(args: argparse.Namespace) -> tuple[SiteConfig, Database]:
    from monitor.bootstrap import NoDatabase, Secrets, load_site, open_db
    from monitor.cli.common import UsageError

    config = load_site(args.config)
    try:  # never an empty database made to answer "nothing kept"
        return config, open_db(config, Secrets(args.secrets_file), existing=True)
    except NoDatabase as exc:
        raise UsageError(str(exc)) from None


def _run_list(args: argparse.Namespace) -> int:
    from storage.quarantine import list_quarantine

    _config, db = _open(args)
    try:
        with db.begin(read_only=True) as conn:
            items = list_quarantine(
                conn, args.limit, source=args.source, with_raw=False, unresolved_only=args.open
            )
    finally:
        db.dispose()
    for item in items:
        if args.json:
            print(json.dumps(quarantine_item_json(item)))
            continue
        times = f" x{item.occurrences}" if item.occurrences > 1 else ""
        done = " [re-processed]" if item.resolved_at else ""
        print(
            f"{item.id:>7}  {iso_utc(item.received_at, timespec='seconds')}  {item.source:<14} "
            f"{item.payload_size:>8} B{times}{done}  {item.reason[:100]}"
        )
    if not items:
        print("quarantine is empty" if not args.open else "no open items")
    return 0


def _run_show(args: argparse.Namespace) -> int:
    from storage.quarantine import get_quarantined

    _config, db = _open(args)
    try:
        with db.begin(read_only=True) as conn:
            item = get_quarantined(conn, args.id)
    finally:
        db.dispose()
    if item is None:
        return _fail(f"no quarantined item {args.id}", EXIT_FAILED)
    print(json.dumps(quarantine_item_json(item), indent=2))
    if args.raw:
        print("--- payload" + (" (cut at the storage limit)" if item.truncated else "") + " ---")
        print(payload_text(item.raw))
    return 0


def reprocess(
    item: QuarantinedInput, *, pipeline: Pipeline, context: SourceContext, now: datetime
) -> BatchReport:
    """Give a kept payload to the pipeline again; returns the BatchReport."""
    from adapters.fhir.limits import too_deep
    from adapters.hl7v2.ack import Hl7Error
    from monitor.ingest import fhir_builder, inbound_from_hl7
    from monitor.pipeline import Inbound, RejectedInput

    source, _, name = item.source.partition(":")
    raw = item.raw
    if item.truncated or raw is None:
        inbound = Inbound(
            rejected=[
                RejectedInput(
                    item.source,
                    raw or "",
                    "kept only in part (over the size limit): "
                    "cannot be re-processed; ask the sender to resend",
                )
            ]
        )
    elif source == "hl7":
        data = raw.encode("utf-8") if isinstance(raw, str) else raw
        try:
            inbound = inbound_from_hl7(data, received_at=now, context=context, source=name or None)
        except Hl7Error as exc:
            inbound = Inbound(rejected=[RejectedInput(item.source, data, str(exc))])
    elif source == "fhir":
        text = raw.decode("utf-8", "replace") if isinstance(raw, bytes) else raw
        try:
            resource = json.loads(text)
        except ValueError as exc:
            inbound = Inbound(rejected=[RejectedInput(item.source, raw, f"not JSON: {exc}")])
        else:
            deep = too_deep(resource)
            if deep or not isinstance(resource, dict):
                reason = deep or "not a FHIR resource (a JSON object)"
                inbound = Inbound(rejected=[RejectedInput(item.source, raw, reason)])
            else:
                batch = fhir_builder(context, lambda: now).read_all([resource])
                inbound = Inbound(
                    readings=list(batch.readings),
                    rejected=[
                        RejectedInput(item.source, r.raw, r.reason) for r in batch.rejections
                    ],
                    skipped_codes=batch.skipped_codes,
                    ignored=sum(batch.skipped.values()),
                )
    else:
        inbound = Inbound(
            rejected=[
                RejectedInput(
                    item.source,
                    raw,
                    f"source {item.source!r}: gasgap does not know how to read it again",
                )
            ]
        )
    return pipeline.accept(inbound, now=now)


def _run_reprocess(args: argparse.Namespace) -> int:
    from adapters.codes import CodeTable
    from monitor.ingest import SourceContext
    from monitor.pipeline import Pipeline
    from storage.quarantine import get_quarantined, mark_resolved

    config, db = _open(args)
    try:
        codes = CodeTable.load(args.codes)
    except (OSError, ValueError, KeyError) as exc:
        return _fail(f"--codes: {exc}")
    context = SourceContext(
        codes=codes, site_tz=config.zone(), patient_id_system=config.site.patient_id_system
    )
    pipeline = Pipeline(db, config.to_pipeline_settings())
    failed = 0
    try:
        for item_id in args.ids:
            with db.begin(read_only=True) as conn:
                item = get_quarantined(conn, item_id)
            if item is None:
                print(f"{item_id}: no such item", file=sys.stderr)
                failed += 1
                continue
            now = datetime.now(UTC)
            report = reprocess(item, pipeline=pipeline, context=context, now=now)
            if not (report.stored or report.duplicates or report.quarantined):
                unknown = ", ".join(sorted(report.skipped_codes)) or "none"
                print(
                    f"{item_id}: nothing read (codes not in the code table: {unknown}); left open"
                )
                failed += 1
                continue
            outcome = (
                f"{report.stored} stored, {report.duplicates} already stored, "
                f"{report.quarantined} refused again"
            )
            with db.begin() as conn:
                mark_resolved(conn, [item_id], at=now, resolution=outcome)
            print(f"{item_id}: {outcome}")
            if report.quarantined and not (report.stored or report.duplicates):
                failed += 1
    finally:
        db.dispose()
    return EXIT_FAILED if failed else 0


def _run_purge(args: argparse.Namespace) -> int:
    from storage.quarantine import delete_quarantined, purge_quarantine

    _config, db = _open(args)
    try:
        with db.begin() as conn:
            if args.ids:
                removed = delete_quarantined(conn, args.ids)
            else:
                if args.older_than_days < 0:
                    return _fail("--older-than-days must be 0 or more")
                cutoff = datetime.now(UTC) - timedelta(days=args.older_than_days)
                removed = purge_quarantine(conn, cutoff)
    finally:
        db.dispose()
    print(f"{removed} quarantined item(s) deleted")
    return 0
