"""Commands on recorded data: ``gasgap ingest`` (files in), ``gasgap patient`` (one
patient's series out, as a table, JSON or a plot) and ``gasgap outbox``.

The site's database, secrets, pipeline and channels come from ``monitor.bootstrap``
(through ``monitor.cli.common.open_site``), as for every command."""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor.cli.common import Subparsers, add_site_options, fail, open_site
from monitor.engine.model import ADVISORY, Derivation

if TYPE_CHECKING:
    from monitor.bootstrap import Shell
    from monitor.outbox import RoundReport


def add_record_commands(sub: Subparsers) -> None:
    ingest = sub.add_parser(
        "ingest",
        help="load FHIR NDJSON/Bundle and HL7 v2 files",
        description="Load files through the pipeline (stored, derived, judged) in order of "
        "record time. Re-loading a file stores nothing new.",
    )
    ingest.add_argument("paths", nargs="+", type=Path, metavar="PATH")
    add_site_options(ingest)
    ingest.add_argument("--no-progress", action="store_true", help="no progress bar")
    ingest.add_argument("--json", action="store_true", help="print the summary as JSON")
    ingest.set_defaults(run=_run_ingest)

    patient = sub.add_parser(
        "patient",
        help="one patient's series of derived values",
        description="The patient's gases with the FiO2 and where it came from, PAO2, A-a, "
        "a/A, P/F and the quality flags. " + ADVISORY,
    )
    patient.add_argument("patient_key", metavar="PATIENT")
    add_site_options(patient)
    patient.add_argument("--json", action="store_true", help="one JSON object")
    patient.add_argument("--plot", type=Path, metavar="FILE", help="write a trend plot (PNG)")
    patient.add_argument(
        "--estimated", action="store_true", help="include S/F estimates from SpO2 between gases"
    )
    patient.set_defaults(run=_run_patient)

    box = sub.add_parser(
        "outbox",
        help="notifications waiting to be sent; send them now",
        description="Show the outbox by status and channel, or (with `send`) deliver what "
        "is due through the configured channels once, as the service's dispatcher does.",
    )
    add_site_options(box)
    box.add_argument("--json", action="store_true", help="one JSON object")
    box.add_argument("action", nargs="?", choices=["show", "send"], default="show")
    box.set_defaults(run=_run_outbox)


def _run_ingest(args: argparse.Namespace) -> int:
    from monitor.ingest import FileKindError, ingest_files

    missing = [str(p) for p in args.paths if not p.is_file()]
    if missing:
        return fail(f"PATH: no such file: {', '.join(missing)}")
    shell = open_site(args)
    try:
        report = ingest_files(
            args.paths,
            shell.pipeline,
            shell.context,
            now=lambda: datetime.now(UTC),
            progress=not args.no_progress and sys.stderr.isatty(),
        )
    except FileKindError as exc:
        return fail(f"PATH: {exc}")
    finally:
        shell.close()
    summary = {
        "read": report.read,
        "stored": report.stored,
        "duplicates": report.duplicates,
        "skipped_codes": sum(report.skipped_codes.values()),
        "ignored": report.ignored,
        "quarantined": report.quarantined,
        "top_quarantine_reasons": report.quarantine_reasons.most_common(5),
        "derivations": report.derivations,
        "flag_events": len(report.alert_events),
        "notifications_queued": report.notifications,
    }
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    print(
        f"read {report.read}, stored {report.stored}, duplicates {report.duplicates}, "
        f"skipped codes {summary['skipped_codes']}, quarantined {report.quarantined}"
    )
    for reason, count in report.quarantine_reasons.most_common(5):
        print(f"  quarantined {count} x {reason}")
    for code, count in report.skipped_codes.most_common(5):
        print(f"  skipped code {code} x {count}")
    print(
        f"derivations {report.derivations}, flag events {len(report.alert_events)}, "
        f"notifications queued {report.notifications}"
    )
    return 0


def _run_outbox(args: argparse.Namespace) -> int:
    from collections import Counter

    from storage.outbox import outbox_items

    shell = open_site(args)
    try:
        sent = _send(shell) if args.action == "send" else None
        with shell.db.begin(read_only=True) as conn:
            items = outbox_items(conn)
    finally:
        shell.close()
    counts = Counter((i.channel, i.status.value) for i in items)
    by_channel = {f"{c}/{s}": n for (c, s), n in sorted(counts.items())}
    summary: dict[str, object] = {
        "by_channel": by_channel,
    }
    if sent is not None:
        summary["this_round"] = {
            "claimed": sent.claimed,
            "sent": sent.sent,
            "retrying": sent.retrying,
            "dead": sent.dead,
        }
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    for key, n in by_channel.items():
        print(f"{key:40} {n}")
    if sent is not None:
        print(
            f"this round: claimed {sent.claimed}, sent {sent.sent}, "
            f"retrying {sent.retrying}, dead {sent.dead}"
        )
    return 0


def _send(shell: Shell) -> RoundReport:
    """One drain of the outbox through the site's channels, as the service's job does."""
    from monitor.bootstrap import build_channels
    from monitor.outbox import OutboxDispatcher

    channels = build_channels(shell.config, shell.secrets)
    dispatcher = OutboxDispatcher(shell.db, channels, clock=lambda: datetime.now(UTC))
    try:
        return dispatcher.drain()
    finally:
        dispatcher.close()


# --- patient -------------------------------------------------------------------------------

def series_row(derivation: Derivation, version: int) -> dict[str, Any]:
    """One row of ``gasgap patient --json``: the API's shape plus the stored version."""
    from monitor.records import derivation_json

    return derivation_json(derivation) | {"version": version}


def _run_patient(args: argparse.Namespace) -> int:
    from storage.derivations import current_derivations

    shell = open_site(args)
    config, db = shell.config, shell.db
    with db.begin(read_only=True) as conn:
        stored = [
            s
            for s in current_derivations(conn, args.patient_key)
            if not s.retracted and (args.estimated or not s.derivation.estimated)
        ]
    db.dispose()
    if not stored:
        return fail(f"PATIENT: no derivations for {args.patient_key!r} in this database")
    rows = [series_row(s.derivation, s.version) for s in stored]
    if args.plot:
        write_trend_plot([s.derivation for s in stored], args.plot, title=args.patient_key)
    if args.json:
        print(
            json.dumps(
                {"patient": args.patient_key, "series": rows, "advisory": ADVISORY}, indent=2
            )
        )
        return 0
    tz = config.zone()
    print(_table(rows, tz))
    if args.plot:
        print(f"plot written to {args.plot}")
    print()
    print(ADVISORY)
    return 0


def _fmt(value: Any, digits: int = 0) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def _table(rows: list[dict[str, Any]], tz: Any) -> str:
    head = (
        f"{'drawn (site time)':17} {'PaO2':>5} {'FiO2':>5} {'FiO2 from':<30} "
        f"{'PAO2':>5} {'A-a':>5} {'a/A':>5} {'P/F':>5} {'P/F sl':>6}  flags"
    )
    lines = [head, "-" * len(head)]
    for r in rows:
        when = datetime.fromisoformat(r["drawn_at"]).astimezone(tz).strftime("%Y-%m-%d %H:%M")
        marks = list(r["flags"])
        if r["specimen"] != "arterial" and not r["estimated"]:
            marks.insert(0, f"{r['specimen']} sample")
        lines.append(
            f"{when:17} {_fmt(r['pao2']):>5} {_fmt(r['fio2'], 2):>5} {r['fio2_source'][:30]:<30} "
            f"{_fmt(r['alveolar_po2']):>5} {_fmt(r['aa_gradient']):>5} "
            f"{_fmt(r['arterial_alveolar_ratio'], 2):>5} {_fmt(r['pf_ratio']):>5} "
            f"{_fmt(r['pf_ratio_adjusted']):>6}  {'; '.join(marks)}"
        )
    return "\n".join(lines)


def write_trend_plot(derivations: list[Derivation], path: Path, *, title: str) -> None:
    """P/F (measured and at sea level), A-a and FiO2 over time, in one PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    gases = [d for d in derivations if not d.estimated and d.pf_ratio is not None]
    estimates = [d for d in derivations if d.estimated and d.sf_ratio is not None]
    fig, (ax_pf, ax_aa, ax_fio2) = plt.subplots(3, 1, figsize=(9, 7), sharex=True)
    if gases:
        ax_pf.plot([d.drawn_at for d in gases], [d.pf_ratio for d in gases], "o-", label="P/F")
        adjusted = [d for d in gases if d.pf_ratio_adjusted is not None]
        ax_pf.plot(
            [d.drawn_at for d in adjusted],
            [d.pf_ratio_adjusted for d in adjusted],
            "s--",
            label="P/F at sea level (x 760/PB)",
        )
    if estimates:
        ax_pf.plot(
            [d.drawn_at for d in estimates],
            [d.sf_ratio for d in estimates],
            ".",
            alpha=0.5,
            label="S/F (estimate)",
        )
    for level in (300, 200, 100):
        ax_pf.axhline(level, color="grey", linewidth=0.6, linestyle=":")
    ax_pf.set_ylabel("ratio")
    ax_pf.legend(loc="best", fontsize=8)
    with_aa = [d for d in derivations if d.aa_gradient is not None]
    ax_aa.plot(
        [d.drawn_at for d in with_aa], [d.aa_gradient for d in with_aa], "o-", color="tab:red"
    )
    ax_aa.set_ylabel("A-a (mmHg)")
    with_fio2 = [d for d in derivations if d.fio2 is not None]
    ax_fio2.step(
        [d.drawn_at for d in with_fio2],
        [d.fio2 for d in with_fio2],
        where="post",
        color="tab:green",
    )
    ax_fio2.set_ylabel("FiO2")
    ax_fio2.set_ylim(0.15, 1.05)
    first = min((d.drawn_at for d in derivations), default=datetime.now(UTC))
    ax_fio2.set_xlim(first - timedelta(hours=1), None)
    fig.suptitle(f"{title}: oxygenation trend (advisory; clinicians decide)")
    fig.autofmt_xdate()
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
