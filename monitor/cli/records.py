"""Commands on recorded data: ``gasgap ingest`` (files in), ``gasgap patient`` (one
patient's series out, as a table, JSON or a plot) and ``gasgap outbox``.

The site's database, secrets, pipeline and channels come from ``monitor.bootstrap``
(through ``monitor.cli.common.open_site``), as for every command."""

from __future__ import annotations

import argparse
import json
from collections.abc import Mapping
from datetime import UTC, datetime, timedelta, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor.cli.common import Subparsers, add_site_options, fail, open_site
from monitor.engine.model import ADVISORY, CANONICAL_UNIT, Alert, CensoredValue, Derivation

if TYPE_CHECKING:
    from monitor.bootstrap import Shell
    from monitor.outbox import RoundReport
    from monitor.report.plots import PlotAxes


def add_record_commands(sub: Subparsers) -> None:
    ingest = sub.add_parser(
        "ingest",
        help="load FHIR NDJSON/Bundle and HL7 v2 files",
        description="Load files: every file is read and stored first, then each patient's "
        "timeline is computed in known-time order, so neither file nor line order matters. "
        "Re-loading a file stores nothing new; with no PATH, finish what an interrupted "
        "load left. Flags on data older than the site's horizon are recorded as "
        "historical and never sent.",
    )
    ingest.add_argument("paths", nargs="*", type=Path, metavar="PATH")
    ingest.add_argument(
        "--workers",
        type=int,
        default=1,
        metavar="N",
        help="processes computing patients (default 1)",
    )
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
    if args.workers < 1:
        return fail(f"--workers {args.workers}: must be 1 or more")
    shell = open_site(args)
    try:
        report = ingest_files(
            args.paths,
            shell.pipeline,
            shell.context,
            now=lambda: datetime.now(UTC),
            progress=not args.no_progress,
            workers=args.workers,
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
        "beyond_limits": report.censored,
        "derivations": report.derivations,
        "flag_events": len(report.alert_events),
        "historical_flag_events": report.historical_events,
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
    if report.censored:
        print(
            f"kept {report.censored} results sent as beyond a limit (e.g. '>500'): shown in "
            "the patient's series, not used for any index or flag"
        )
    print(
        f"derivations {report.derivations}, flag events {len(report.alert_events)} "
        f"({report.historical_events} recorded as historical, never sent), "
        f"notifications queued {report.notifications}"
    )
    return 0


def _run_outbox(args: argparse.Namespace) -> int:
    from collections import Counter

    from storage.outbox import outbox_items

    shell = open_site(args, existing=True)
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


def series_row(derivation: Derivation, version: int) -> dict[str, object]:
    """One row of ``gasgap patient --json``: the API's shape plus the stored version."""
    from monitor.shapes import derivation_json

    return derivation_json(derivation) | {"version": version}


def _run_patient(args: argparse.Namespace) -> int:
    from storage.censored import censored_for_patient
    from storage.derivations import current_derivations

    shell = open_site(args, existing=True)
    config, db = shell.config, shell.db
    with db.begin(read_only=True) as conn:
        stored = [
            s
            for s in current_derivations(conn, args.patient_key)
            if not s.retracted and (args.estimated or not s.derivation.estimated)
        ]
        censored = censored_for_patient(conn, args.patient_key)
    db.dispose()
    if not stored and not censored:
        return fail(f"PATIENT: no derivations for {args.patient_key!r} in this database")
    rows = [series_row(s.derivation, s.version) for s in stored]
    beyond = [censored_row(c) for c in censored]
    if args.plot and stored:
        write_trend_plot(
            [s.derivation for s in stored], args.plot, title=args.patient_key, tz=config.zone()
        )
    if args.json:
        out = {
            "patient": args.patient_key,
            "series": rows,
            "beyond_limits": beyond,
            "advisory": ADVISORY,
        }
        print(json.dumps(out, indent=2))
        return 0
    tz = config.zone()
    print(_table(rows, tz))
    if beyond:
        print()
        print("\n".join(_censored_table(beyond, tz)))
    if args.plot:
        print(f"plot written to {args.plot}")
    print()
    print(ADVISORY)
    return 0


def _fmt(value: object, digits: int = 0) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def _zone_label(tz: tzinfo, at: datetime) -> str:
    """ "site time, UTC-07:00": the offset written so its sign reads the right way
    round (an Etc/GMT-2 zone is UTC+02:00)."""
    delta = at.astimezone(tz).utcoffset() or timedelta(0)
    minutes = int(delta.total_seconds() // 60)
    if not minutes:
        return "site time, UTC"
    sign = "+" if minutes > 0 else "-"
    hours, mins = divmod(abs(minutes), 60)
    return f"site time, UTC{sign}{hours:02d}:{mins:02d}"


def _table(rows: list[dict[str, Any]], tz: tzinfo) -> str:
    """Gases first, then SpO2 estimates in a table of their own: an estimate never sits
    in a PaO2 or P/F column. A note on every row is said once above the table."""
    gases = [r for r in rows if not r["estimated"]]
    estimates = [r for r in rows if r["estimated"]]
    out: list[str] = []
    if gases:
        out.extend(_gas_table(gases, tz))
    if estimates:
        out.append("")
        out.extend(_estimate_table(estimates, tz))
    return "\n".join(out)


def _marks(r: dict[str, Any]) -> list[str]:
    marks = list(r["flags"])
    if r["specimen"] != "arterial" and not r["estimated"]:
        marks.insert(0, f"{r['specimen']} sample")
    return [m for m in marks if m != "estimated from SpO2"]


def _drawn(r: dict[str, Any], tz: tzinfo) -> str:
    return str(datetime.fromisoformat(r["drawn_at"]).astimezone(tz).strftime("%Y-%m-%d %H:%M"))


def _gas_table(rows: list[dict[str, Any]], tz: tzinfo) -> list[str]:
    adjusted = any(r["pf_ratio_adjusted"] is not None for r in rows)
    zone = _zone_label(tz, datetime.fromisoformat(rows[-1]["drawn_at"]))
    marks = [_marks(r) for r in rows]
    common = set.intersection(*(set(m) for m in marks)) if len(rows) > 1 else set()
    head = (
        f"{'drawn':16} {'PaO2':>5} {'FiO2':>5} {'FiO2 from':<30} {'PAO2':>5} {'A-a':>5} "
        f"{'a/A':>5} {'P/F':>5}" + (f" {'P/F alt.':>8}" if adjusted else "") + "  notes"
    )
    lines = [f"Blood gases (measured). Times: {zone}. Pressures in mmHg."]
    if adjusted:
        lines.append(
            "P/F is PaO2/FiO2 as measured; 'P/F alt.' is it adjusted for altitude "
            "(x 760 / barometric pressure), the value the rules compare."
        )
    if common:
        lines.append("On every gas: " + "; ".join(sorted(common)) + ".")
    lines += [head, "-" * len(head)]
    for r, m in zip(rows, marks, strict=True):
        alt = f" {_fmt(r['pf_ratio_adjusted']):>8}" if adjusted else ""
        lines.append(
            f"{_drawn(r, tz):16} {_fmt(r['pao2']):>5} {_fmt(r['fio2'], 2):>5} "
            f"{r['fio2_source'][:30]:<30} {_fmt(r['alveolar_po2']):>5} "
            f"{_fmt(r['aa_gradient']):>5} {_fmt(r['arterial_alveolar_ratio'], 2):>5} "
            f"{_fmt(r['pf_ratio']):>5}{alt}  {'; '.join(x for x in m if x not in common)}"
        )
    return lines


def censored_row(c: CensoredValue) -> dict[str, object]:
    """A result sent as beyond a limit, as ``gasgap patient --json`` gives it: what was
    sent, as sent, and the limit in canonical units where the unit was understood."""
    return {
        "kind": c.kind.value,
        "drawn_at": c.effective_at.isoformat(),
        "sent_as": f"{c.comparator}{c.original_value} {c.original_unit}".strip(),
        "comparator": c.comparator,
        "limit": c.limit,
        "unit": CANONICAL_UNIT[c.kind],
        "source": c.source_system,
        "result_id": c.logical_id,
        "used": False,
    }


def _censored_table(rows: list[dict[str, Any]], tz: tzinfo) -> list[str]:
    zone = _zone_label(tz, datetime.fromisoformat(rows[-1]["drawn_at"]))
    head = f"{'drawn':16} {'result':18} {'sent as':24}"
    lines = [
        "Results sent as beyond a limit (not exact numbers: nothing was derived from them, "
        f"no rule used them). Times: {zone}.",
        head,
        "-" * len(head),
    ]
    for r in rows:
        lines.append(f"{_drawn(r, tz):16} {r['kind'][:18]:18} {r['sent_as'][:24]:24}")
    return lines


def _estimate_table(rows: list[dict[str, Any]], tz: tzinfo) -> list[str]:
    zone = _zone_label(tz, datetime.fromisoformat(rows[-1]["drawn_at"]))
    head = f"{'read':16} {'SpO2 %':>6} {'FiO2':>5} {'FiO2 from':<30} {'S/F est.':>8}  notes"
    lines = [
        f"Estimates from SpO2 (not blood gases; S/F has no unit). Times: {zone}.",
        head,
        "-" * len(head),
    ]
    for r in rows:
        lines.append(
            f"{_drawn(r, tz):16} {_fmt(r.get('spo2')):>6} {_fmt(r['fio2'], 2):>5} "
            f"{r['fio2_source'][:30]:<30} {_fmt(r.get('sf_ratio')):>8}  {'; '.join(_marks(r))}"
        )
    return lines


def alerts_table(
    alerts: list[Alert], tz: tzinfo, now: datetime, drawn: Mapping[str, datetime] | None = None
) -> str:
    """``gasgap flags``: one line a flag with its priority in words, the rule in words,
    when the gas behind its current priority was drawn and when the flag was first
    raised (both with dates, site time), where, and the summary; the id last, for
    ``flags ack``. ``alerts`` are open flags; ``drawn`` holds the draw time of each
    flag's sample by alert id ("-" where unknown)."""
    from adapters.notify.render import rule_words

    zone = _zone_label(tz, now)
    drawn = drawn or {}
    head = f"{'priority':8} {'state':12} {'drawn':16} {'raised':16} {'rule':40} {'where':18} id"
    lines = [f"Open flags. Times: {zone}.", head, "-" * len(head)]
    for a in alerts:
        where = a.location.label() if a.location else "location unknown"
        raised = a.raised_at.astimezone(tz).strftime("%Y-%m-%d %H:%M")
        at = drawn.get(a.alert_id)
        drew = "-" if at is None else at.astimezone(tz).strftime("%Y-%m-%d %H:%M")
        lines.append(
            f"{a.priority.value:8} {a.state.value:12} {drew:16} {raised:16} "
            f"{rule_words(a.rule)[:40]:40} {where[:18]:18} {a.alert_id}"
        )
        lines.append(f"{'':8} {a.summary}")
    return "\n".join(lines)


def unit_problem(known_units: list[str], unit: str | None) -> str | None:
    """``alerts --unit X`` for a unit no record names: say so (and the near miss in
    case), never "no open flags"."""
    if unit is None or unit in known_units:
        return None
    near = [u for u in known_units if u.casefold() == unit.casefold()]
    hint = f" (did you mean {near[0]}?)" if near else ""
    return f"--unit: unknown unit {unit!r}{hint}; known units: {', '.join(known_units) or 'none'}"


def write_trend_plot(
    derivations: list[Derivation], path: Path, *, title: str, tz: tzinfo = UTC
) -> None:
    """P/F from gases (measured, and adjusted for altitude where that applies), FiO2 as
    steps, and S/F estimated from SpO2 on its own axis, over one time axis in site time
    (labelled)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    gases = [d for d in derivations if not d.estimated and d.pf_ratio is not None]
    estimates = [d for d in derivations if d.estimated and d.sf_ratio is not None]
    panels = 3 if estimates else 2
    fig, axes = plt.subplots(panels, 1, figsize=(9, 2.6 * panels), sharex=True)
    _pf_panel(axes[0], gases, tz)
    _fio2_panel(axes[1], derivations, tz)
    if estimates:
        _sf_panel(axes[2], estimates, tz)
    _time_axis(axes[-1], derivations, tz)
    fig.suptitle(f"{title}: oxygenation trend (advisory; clinicians decide)")
    fig.autofmt_xdate()
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _local(ds: list[Derivation], tz: tzinfo) -> list[datetime]:
    return [d.drawn_at.astimezone(tz) for d in ds]


def _pf_panel(ax: PlotAxes, gases: list[Derivation], tz: tzinfo) -> None:
    """P/F of the gases: adjusted for altitude (what the rules compare) and as measured
    where the site adjusts, else as measured; lines at 300, 200 and 100."""
    adjusted = [d for d in gases if d.pf_ratio_adjusted is not None]
    if adjusted:
        ax.plot(
            _local(adjusted, tz),
            [d.pf_ratio_adjusted for d in adjusted],
            "o-",
            color="black",
            label="P/F adjusted for altitude (rules compare this)",
        )
        ax.plot(
            _local(gases, tz),
            [d.pf_ratio for d in gases],
            "o:",
            color="grey",
            markerfacecolor="white",
            label="P/F as measured",
        )
    elif gases:
        ax.plot(_local(gases, tz), [d.pf_ratio for d in gases], "o-", color="black", label="P/F")
    for level in (300, 200, 100):
        ax.axhline(level, color="grey", linewidth=0.6, linestyle="--")
    ax.set_ylabel("P/F (mmHg)")
    ax.legend(loc="best", fontsize=8)


def _fio2_panel(ax: PlotAxes, derivations: list[Derivation], tz: tzinfo) -> None:
    """FiO2 as steps: it holds until the next known value."""
    with_fio2 = [d for d in derivations if d.fio2 is not None]
    ax.step(_local(with_fio2, tz), [d.fio2 for d in with_fio2], where="post", color="tab:green")
    ax.set_ylabel("FiO2 (fraction)")
    ax.set_ylim(0.15, 1.05)


def _sf_panel(ax: PlotAxes, estimates: list[Derivation], tz: tzinfo) -> None:
    """S/F estimated from SpO2, on an axis of its own (it has no unit)."""
    ax.plot(
        _local(estimates, tz),
        [d.sf_ratio for d in estimates],
        "s--",
        color="tab:purple",
        markerfacecolor="white",
        label="S/F estimate",
    )
    ax.set_ylabel("S/F from SpO2\n(estimate, no unit)")
    ax.legend(loc="best", fontsize=8)


def _time_axis(ax: PlotAxes, derivations: list[Derivation], tz: tzinfo) -> None:
    """The shared time axis: from an hour before the first value, dates and times in
    site time, the zone written in the label."""
    import matplotlib.dates as mdates

    first = min((d.drawn_at for d in derivations), default=datetime.now(UTC))
    ax.set_xlim(first.astimezone(tz) - timedelta(hours=1), None)
    formatter = mdates.DateFormatter("%d %b %H:%M", tz=tz)  # type: ignore[no-untyped-call]
    ax.xaxis.set_major_formatter(formatter)
    ax.set_xlabel("Time: " + _zone_label(tz, first))
