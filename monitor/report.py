"""The replay report: one HTML page and PNG plots beside it, readable from disk.

Per patient: the P/F ratio (measured and altitude-adjusted), the A–a gradient (with the
age-expected value) and the FiO2 over time, with each flag event marked where it
happened in simulated time. For the whole feed: flags per patient-day by rule and
priority, the time from the first worsening gas to the flag, and the share of flags
later retracted. With a second rule set (``compare``): both side by side, the
difference and how much earlier or later the flags both raised came.

Every number is read back from the replay database at the end (nothing held during the
replay but the flag events); nothing is recomputed here: the values plotted are the
stored derivations. Every text is escaped; the page names the advisory sentence.
"""

from __future__ import annotations

import html
from collections import Counter, defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor.engine import rules as rules_mod
from monitor.engine.model import ADVISORY, Derivation
from storage import derivations as derivations_store
from storage import outbox as outbox_store
from storage import readings as readings_store

if TYPE_CHECKING:
    from monitor.replay import ReplayEvent, ReplayResult

PRIORITIES = ("low", "medium", "high")
EVENT_ORDER = ("raised", "updated", "escalated", "acknowledged", "resolved", "retracted")

#: Our own palette: a priority reads from light to dark, not by traffic-light colours.
PRIORITY_COLOUR = {"low": "#8fb8de", "medium": "#4a78b0", "high": "#1d2f6f"}
EVENT_MARKER = {
    "raised": "^",
    "updated": "^",
    "escalated": "D",
    "acknowledged": "s",
    "resolved": "o",
    "retracted": "x",
}

FIRST_WORSENING_DEFINITION = (
    "Time to flag is the simulated time the flag was raised minus the draw time of the "
    "first worsening gas. The first worsening gas is the earliest gas of the unbroken run "
    "of gases (current, not withdrawn; S/F estimates for the S/F rule) that ends with the "
    "gas the flag was raised on, in which every gas was already on the flag's side: for "
    "threshold rules (oxygenation band, A–a on room air, S/F) a gas whose value crossed "
    "the rule's lowest threshold (P/F as the band rule reads it at or below its low "
    "threshold; A–a above the age-expected value plus the margin; S/F at or below the "
    "threshold); for trend rules (P/F fall, A–a rise, oxygen escalation) a gas that moved "
    "in the flag's direction from the gas before it (a lower P/F, a higher A–a, a higher "
    "FiO2). The time includes the laboratory's turnaround: it is what the charge nurse "
    "would have waited."
)


# --- comparison of two replays ------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class TimingDifference:
    """A flag both rule sets raised for one patient and rule (the k-th raise of each),
    and how much later (positive) or earlier (negative) the second raised it."""

    patient: str
    rule: str
    first_at: datetime
    second_at: datetime

    @property
    def minutes(self) -> float:
        return (self.second_at - self.first_at).total_seconds() / 60.0


@dataclass(frozen=True, slots=True)
class Comparison:
    first_label: str
    second_label: str
    first: dict[tuple[str, str], float]
    second: dict[tuple[str, str], float]
    timing: list[TimingDifference]
    only_first: list[tuple[str, str]]
    only_second: list[tuple[str, str]]

    def rows(self) -> list[tuple[str, str, float, float, float]]:
        keys = sorted(set(self.first) | set(self.second))
        return [
            (
                rule,
                priority,
                self.first.get((rule, priority), 0.0),
                self.second.get((rule, priority), 0.0),
                self.second.get((rule, priority), 0.0) - self.first.get((rule, priority), 0.0),
            )
            for rule, priority in keys
        ]

    def as_json(self) -> dict[str, Any]:
        return {
            "first": self.first_label,
            "second": self.second_label,
            "flags_per_patient_day": [
                {
                    "rule": r,
                    "priority": p,
                    "first": round(a, 4),
                    "second": round(b, 4),
                    "difference": round(d, 4),
                }
                for r, p, a, b, d in self.rows()
            ],
            "timing": [
                {
                    "patient": t.patient,
                    "rule": t.rule,
                    "first_at": _iso(t.first_at),
                    "second_at": _iso(t.second_at),
                    "minutes_later": round(t.minutes, 1),
                }
                for t in self.timing
            ],
            "only_first": [{"patient": p, "rule": r} for p, r in self.only_first],
            "only_second": [{"patient": p, "rule": r} for p, r in self.only_second],
        }


def flags_per_patient_day(result: ReplayResult) -> dict[tuple[str, str], float]:
    """Flags (each counted once, at the highest priority it reached) per patient-day,
    by (rule, priority). A patient-day is a patient with at least one reading drawn on
    that calendar day in the site's time zone."""
    days = max(result.counts.patient_days, 1)
    return {key: n / days for key, n in result.counts.flags.items()}


def compare(first: ReplayResult, second: ReplayResult) -> Comparison:
    """The two replays' flag rates side by side, and the timing of flags both raised."""
    raises_a = _raises(first.events)
    raises_b = _raises(second.events)
    timing: list[TimingDifference] = []
    only_a: list[tuple[str, str]] = []
    only_b: list[tuple[str, str]] = []
    for key in sorted(set(raises_a) | set(raises_b)):
        a, b = raises_a.get(key, []), raises_b.get(key, [])
        for at_a, at_b in zip(a, b, strict=False):
            timing.append(TimingDifference(key[0], key[1], at_a, at_b))
        only_a += [key] * max(len(a) - len(b), 0)
        only_b += [key] * max(len(b) - len(a), 0)
    return Comparison(
        first.label or "first",
        second.label or "second",
        flags_per_patient_day(first),
        flags_per_patient_day(second),
        timing,
        only_a,
        only_b,
    )


def _raises(events: Sequence[ReplayEvent]) -> dict[tuple[str, str], list[datetime]]:
    out: dict[tuple[str, str], list[datetime]] = defaultdict(list)
    for e in events:
        if e.event == "raised":
            out[(e.patient, e.rule)].append(e.at)
    return out


def comparison_table(c: Comparison) -> str:
    """The comparison as plain text for the terminal."""
    lines = [
        f"flags per patient-day: {c.first_label} vs {c.second_label}",
        f"{'rule':20} {'priority':8} {'first':>8} {'second':>8} {'diff':>8}",
    ]
    for rule, priority, a, b, d in c.rows():
        lines.append(f"{rule:20} {priority:8} {a:8.3f} {b:8.3f} {d:+8.3f}")
    if c.timing:
        lines.append("")
        lines.append("flags both raised (patient, rule): second minus first, minutes")
        for t in c.timing:
            lines.append(f"  {t.patient:12} {t.rule:20} {t.minutes:+8.0f}")
    for name, keys in ((c.second_label, c.only_second), (c.first_label, c.only_first)):
        if keys:
            lines.append(f"raised only by {name}: " + ", ".join(f"{p} {r}" for p, r in keys))
    return "\n".join(lines)


# --- what the report computes from the database -------------------------------------------


@dataclass(slots=True)
class PatientSeries:
    patient: str
    derivations: list[tuple[Derivation, bool]]  # (derivation, retracted)
    events: list[ReplayEvent]


@dataclass(slots=True)
class TimeToFlag:
    patient: str
    rule: str
    priority: str
    raised_at: datetime
    first_worsening: datetime | None

    @property
    def hours(self) -> float | None:
        if self.first_worsening is None:
            return None
        return (self.raised_at - self.first_worsening).total_seconds() / 3600.0


@dataclass(slots=True)
class ReportData:
    series: list[PatientSeries] = field(default_factory=list)
    time_to_flag: list[TimeToFlag] = field(default_factory=list)
    retracted_share: dict[str, tuple[int, int]] = field(default_factory=dict)
    outbox: Counter[tuple[str, str]] = field(default_factory=Counter)


def _on_flag_side(spec: Any, d: Derivation, previous: Derivation | None) -> bool:
    """Whether gas ``d`` already pointed the flag's way (see FIRST_WORSENING_DEFINITION)."""
    if isinstance(spec, rules_mod.OxygenationBandRule):
        pf = d.pf_ratio_adjusted if d.pf_ratio_adjusted is not None else d.pf_ratio
        return pf is not None and pf <= spec.low
    if isinstance(spec, rules_mod.AaRoomAirRule):
        return (
            d.aa_gradient is not None
            and d.aa_gradient_expected is not None
            and d.aa_gradient > d.aa_gradient_expected + spec.margin
        )
    if isinstance(spec, rules_mod.SfLowRule):
        return d.sf_ratio is not None and d.sf_ratio <= spec.threshold
    if previous is None:
        return False
    if isinstance(spec, rules_mod.PfFallRule):
        return (
            d.pf_ratio is not None
            and previous.pf_ratio is not None
            and d.pf_ratio < previous.pf_ratio
        )
    if isinstance(spec, rules_mod.AaRiseRule):
        return (
            d.aa_gradient is not None
            and previous.aa_gradient is not None
            and d.aa_gradient > previous.aa_gradient
        )
    if isinstance(spec, rules_mod.OxygenEscalationRule):
        return d.fio2 is not None and previous.fio2 is not None and d.fio2 > previous.fio2
    return False


def first_worsening(
    spec: Any, gases: Sequence[Derivation], sample_id: str | None
) -> datetime | None:
    """Draw time of the first worsening gas for a flag raised on ``sample_id``;
    ``gases`` in draw order (the flag's kind: arterial gases, or S/F estimates)."""
    index = next((i for i, d in enumerate(gases) if d.sample_id == sample_id), None)
    if index is None:
        return None
    first = gases[index].drawn_at
    i = index - 1
    while i >= 0:
        previous = gases[i - 1] if i > 0 else None
        if not _on_flag_side(spec, gases[i], previous):
            break
        first = gases[i].drawn_at
        i -= 1
    return first


def collect(result: ReplayResult) -> ReportData:
    """Read everything the report shows back from the replay database."""
    data = ReportData()
    specs = {r.rule_id: r for r in result.settings.rules.rules}
    by_patient: dict[str, list[ReplayEvent]] = defaultdict(list)
    for e in result.events:
        by_patient[e.patient].append(e)
    with result.db.begin(read_only=True) as conn:
        patients = readings_store.patient_keys(conn)
        for patient in sorted(set(patients) | set(by_patient)):
            stored = derivations_store.current_derivations(conn, patient, include_retracted=True)
            series = PatientSeries(
                patient, [(s.derivation, s.retracted) for s in stored], by_patient.get(patient, [])
            )
            data.series.append(series)
            for e in series.events:
                if e.event != "raised":
                    continue
                spec = specs.get(e.rule)
                # the gases of the flag's own kind (gases, or SpO2 estimates), not
                # withdrawn, plus the raising sample itself even if it was withdrawn later
                raising = next(
                    (d for d, _ in series.derivations if d.sample_id == e.sample_id), None
                )
                estimated = raising.estimated if raising is not None else False
                pool = [
                    d
                    for d, retracted in series.derivations
                    if d.estimated == estimated and (not retracted or d.sample_id == e.sample_id)
                ]
                worst = _final_priority(series.events, e.alert_id)
                data.time_to_flag.append(
                    TimeToFlag(
                        patient,
                        e.rule,
                        worst,
                        e.at,
                        first_worsening(spec, pool, e.sample_id) if spec else None,
                    )
                )
        for item in outbox_store.outbox_items(conn):
            data.outbox[(item.notification.event, item.channel)] += 1
    raised = Counter(e.rule for e in result.events if e.event == "raised")
    retracted = Counter(e.rule for e in result.events if e.event == "retracted")
    data.retracted_share = {rule: (retracted[rule], n) for rule, n in sorted(raised.items())}
    return data


def _final_priority(events: Sequence[ReplayEvent], alert_id: str) -> str:
    ranks = {p: i for i, p in enumerate(PRIORITIES)}
    found = [e.priority for e in events if e.alert_id == alert_id]
    return max(found, key=lambda p: ranks.get(p, -1)) if found else "low"


# --- plots ---------------------------------------------------------------------------------


def _pyplot() -> Any:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def plot_patient(series: PatientSeries, path: Path, tz: tzinfo) -> None:
    """Three panels over time: P/F (measured, adjusted), A–a (and expected), FiO2;
    flag events as markers on the P/F panel and as thin lines across all three."""
    plt = _pyplot()
    import matplotlib.dates as mdates

    gases = [(d, r) for d, r in series.derivations if not d.estimated]
    estimates = [(d, r) for d, r in series.derivations if d.estimated]
    fig, axes = plt.subplots(
        3, 1, figsize=(9, 7.2), sharex=True, gridspec_kw={"height_ratios": [1.4, 1, 0.8]}
    )
    ax_pf, ax_aa, ax_fio2 = axes

    def times(items: Sequence[tuple[Derivation, bool]]) -> list[datetime]:
        return [d.drawn_at.astimezone(tz) for d, _ in items]

    def line(ax: Any, items: Sequence[tuple[Derivation, bool]], attr: str, **kw: Any) -> None:
        pts = [
            (d.drawn_at.astimezone(tz), getattr(d, attr))
            for d, r in items
            if getattr(d, attr) is not None and not r
        ]
        if pts:
            ax.plot([t for t, _ in pts], [v for _, v in pts], **kw)

    line(ax_pf, gases, "pf_ratio", marker="o", color="#555555", label="P/F measured")
    line(
        ax_pf,
        gases,
        "pf_ratio_adjusted",
        marker="s",
        color="#2a6f97",
        label="P/F altitude-adjusted",
    )

    def crossed(ax: Any, attr: str) -> None:  # withdrawn results stay visible, crossed out
        pts = [
            (d.drawn_at.astimezone(tz), getattr(d, attr))
            for d, r in gases
            if r and getattr(d, attr) is not None
        ]
        if pts:
            ax.scatter(
                [t for t, _ in pts],
                [v for _, v in pts],
                marker="x",
                s=70,
                color="#b23a48",
                label="withdrawn result",
                zorder=4,
            )

    crossed(ax_pf, "pf_ratio")
    line(
        ax_pf,
        estimates,
        "sf_ratio",
        linestyle="none",
        marker=".",
        color="#a0a0a0",
        label="S/F (estimate)",
        alpha=0.6,
    )
    ax_pf.set_ylabel("ratio (mmHg)")
    line(ax_aa, gases, "aa_gradient", marker="o", color="#7b4f9d", label="A–a gradient")
    line(
        ax_aa,
        gases,
        "aa_gradient_expected",
        linestyle="--",
        marker="_",
        markersize=14,
        color="#9b7fb5",
        label="age-expected (room air)",
    )
    crossed(ax_aa, "aa_gradient")
    ax_aa.set_ylabel("A–a (mmHg)")
    line(ax_fio2, gases, "fio2", marker="o", color="#3c8d5a", label="FiO2 at gas")
    line(
        ax_fio2,
        estimates,
        "fio2",
        linestyle="none",
        marker=".",
        color="#9cc9a8",
        label="FiO2 at SpO2",
        alpha=0.6,
    )
    ax_fio2.set_ylabel("FiO2")
    ax_fio2.set_ylim(0.15, 1.05)

    top = ax_pf.get_ylim()[1] if ax_pf.has_data() else 500.0
    seen: set[str] = set()
    for e in series.events:
        at = e.at.astimezone(tz)
        colour = PRIORITY_COLOUR.get(e.priority, "#777777")
        for ax in axes:
            ax.axvline(at, color=colour, linewidth=0.6, alpha=0.5)
        label = e.event if e.event not in seen else None
        seen.add(e.event)
        marker = EVENT_MARKER.get(e.event, "*")
        edge = {} if marker == "x" else {"edgecolors": "black", "linewidths": 0.4}
        ax_pf.scatter(
            [at],
            [top],
            marker=marker,
            s=60,
            color=colour,
            label=label,
            zorder=5,
            clip_on=False,
            **edge,
        )
    for ax in axes:
        ax.grid(True, alpha=0.3)
        if ax.has_data():
            ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    ax_fio2.xaxis.set_major_formatter(mdates.DateFormatter("%d %b\n%H:%M", tz=tz))  # type: ignore[no-untyped-call]
    ax_pf.set_title(
        f"{series.patient}: oxygenation over time (flag colour = priority)", fontsize=10
    )
    fig.text(0.01, 0.005, "Advisory only: clinicians decide.", fontsize=7, color="#555555")
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def plot_flag_rates(
    rates: dict[tuple[str, str], float],
    path: Path,
    second: dict[tuple[str, str], float] | None = None,
    labels: tuple[str, str] = ("", ""),
) -> None:
    """Flags per patient-day by rule, stacked by priority (two bars per rule when
    comparing)."""
    plt = _pyplot()
    rule_ids = sorted({r for r, _ in rates} | {r for r, _ in (second or {})}) or ["(none)"]
    fig, ax = plt.subplots(figsize=(9, 4.2))
    sets = [(rates, labels[0] or "this rule set", 0.0)]
    width = 0.8
    if second is not None:
        width = 0.4
        sets = [(rates, labels[0] or "first", -0.2), (second, labels[1] or "second", 0.2)]
    for n, (values, name, offset) in enumerate(sets):
        bottom = [0.0] * len(rule_ids)
        for priority in PRIORITIES:
            heights = [values.get((r, priority), 0.0) for r in rule_ids]
            ax.bar(
                [i + offset for i in range(len(rule_ids))],
                heights,
                width,
                bottom=bottom,
                color=PRIORITY_COLOUR[priority],
                edgecolor="black",
                linewidth=0.4,
                hatch="//" if n else None,
                label=f"{priority}" + (f" ({name})" if second is not None else ""),
            )
            bottom = [b + h for b, h in zip(bottom, heights, strict=True)]
    ax.set_xticks(range(len(rule_ids)), rule_ids, rotation=15, fontsize=8)
    ax.set_ylabel("flags per patient-day")
    ax.set_title("Flags per patient-day by rule and highest priority reached", fontsize=10)
    ax.legend(fontsize=7)
    ax.grid(True, axis="y", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def plot_time_to_flag(items: Sequence[TimeToFlag], path: Path) -> None:
    """Hours from the first worsening gas to the flag, one dot per flag, by rule."""
    plt = _pyplot()
    known = [t for t in items if t.hours is not None]
    rule_ids = sorted({t.rule for t in known}) or ["(none)"]
    fig, ax = plt.subplots(figsize=(9, 3.8))
    for t in known:
        ax.scatter(
            [t.hours],
            [rule_ids.index(t.rule)],
            color=PRIORITY_COLOUR.get(t.priority),
            edgecolors="black",
            linewidths=0.4,
            s=50,
        )
    ax.set_yticks(range(len(rule_ids)), rule_ids, fontsize=8)
    ax.set_xlabel("hours from the first worsening gas to the flag")
    ax.set_title("Time to flag (colour = highest priority reached)", fontsize=10)
    ax.grid(True, axis="x", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def plot_retracted(share: dict[str, tuple[int, int]], path: Path) -> None:
    """Share of flags later retracted, by rule."""
    plt = _pyplot()
    rule_ids = list(share) or ["(none)"]
    values = [share[r][0] / share[r][1] if r in share and share[r][1] else 0.0 for r in rule_ids]
    fig, ax = plt.subplots(figsize=(9, 3.2))
    ax.bar(range(len(rule_ids)), values, color="#b23a48", edgecolor="black", linewidth=0.4)
    for i, r in enumerate(rule_ids):
        if r in share:
            ax.text(
                i,
                values[i],
                f"{share[r][0]} of {share[r][1]}",
                ha="center",
                va="bottom",
                fontsize=8,
            )
    ax.set_xticks(range(len(rule_ids)), rule_ids, rotation=15, fontsize=8)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("share retracted")
    ax.set_title(
        "Share of flags later retracted (a result they stood on was withdrawn)", fontsize=10
    )
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


# --- the page ------------------------------------------------------------------------------


def _iso(at: datetime | None) -> str | None:
    return None if at is None else at.astimezone(UTC).isoformat().replace("+00:00", "Z")


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _when(at: datetime | None, tz: tzinfo) -> str:
    return "" if at is None else at.astimezone(tz).strftime("%d %b %Y %H:%M")


def _file_name(patient: str, index: int) -> str:
    safe = "".join(c if c.isalnum() or c in "-_" else "_" for c in patient)[:40]
    return f"patient-{index:03d}-{safe}.png"


def write_report(
    result: ReplayResult,
    out_dir: Path,
    *,
    comparison: Comparison | None = None,
    title: str = "gasgap replay",
) -> Path:
    """Write ``index.html`` and its PNGs into ``out_dir``; returns the HTML's path."""
    out_dir.mkdir(parents=True, exist_ok=True)
    tz = result.settings.site_tz
    data = collect(result)
    rates = flags_per_patient_day(result)
    plot_flag_rates(
        rates,
        out_dir / "flags-per-patient-day.png",
        comparison.second if comparison else None,
        (comparison.first_label, comparison.second_label) if comparison else ("", ""),
    )
    plot_time_to_flag(data.time_to_flag, out_dir / "time-to-flag.png")
    plot_retracted(data.retracted_share, out_dir / "retracted.png")
    patient_pngs: list[tuple[PatientSeries, str]] = []
    for i, series in enumerate(data.series, start=1):
        name = _file_name(series.patient, i)
        plot_patient(series, out_dir / name, tz)
        patient_pngs.append((series, name))

    c = result.counts
    parts: list[str] = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{_e(title)}</title>",
        "<style>body{font-family:sans-serif;max-width:70em;margin:1em auto;padding:0 1em;"
        "color:#222}table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #bbb;"
        "padding:.2em .5em;text-align:left;font-size:.9em}th{background:#eef2f7}"
        ".advisory{border-left:.4em solid #4a78b0;background:#f3f6fa;padding:.6em 1em}"
        "img{max-width:100%}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        f"<p class='advisory'><strong>{_e(ADVISORY)}</strong></p>",
        f"<p>Simulated time from {_e(_when(c.first_record, tz))} to "
        f"{_e(_when(c.last_record, tz))} (times shown in {_e(tz)}). "
        f"Rule set: {_e(result.label or 'as configured')}.</p>",
        "<h2>Counts</h2><table>",
    ]
    for label, value in (
        ("units of input", c.units),
        ("readings read", c.readings),
        ("stored", c.stored),
        ("duplicates", c.duplicates),
        ("quarantined", c.quarantined),
        ("derivations written", c.derivations),
        ("derivations withdrawn", c.retracted_derivations),
        ("notifications captured (outbox)", c.notifications),
        ("patient-days", c.patient_days),
        ("flags", sum(c.flags.values())),
    ):
        parts.append(f"<tr><th>{_e(label)}</th><td>{_e(value)}</td></tr>")
    parts.append("</table>")
    if result.delivered is not None:
        parts.append(f"<p>{_e(result.delivered)} captured notifications were delivered.</p>")
    else:
        parts.append(
            "<p>Notifications were captured in the replay database's outbox, not sent.</p>"
        )

    parts.append(
        "<h2>Flags per patient-day</h2>"
        "<p>A patient-day is a patient with at least one reading drawn on that "
        "calendar day. Each flag counts once, at the highest priority it reached.</p>"
        "<img src='flags-per-patient-day.png' alt='flags per patient-day by rule and priority'>"
        "<table><tr><th>rule</th><th>priority</th><th>flags</th><th>per patient-day</th></tr>"
    )
    for (rule, priority), n in sorted(c.flags.items()):
        parts.append(
            f"<tr><td>{_e(rule)}</td><td>{_e(priority)}</td><td>{n}</td>"
            f"<td>{rates[(rule, priority)]:.3f}</td></tr>"
        )
    parts.append("</table>")

    if comparison is not None:
        parts.append(
            f"<h2>Rule sets compared: {_e(comparison.first_label)} and "
            f"{_e(comparison.second_label)}</h2><table><tr><th>rule</th><th>priority</th>"
            f"<th>{_e(comparison.first_label)}</th><th>{_e(comparison.second_label)}</th>"
            "<th>difference</th></tr>"
        )
        for rule, priority, a, b, d in comparison.rows():
            parts.append(
                f"<tr><td>{_e(rule)}</td><td>{_e(priority)}</td><td>{a:.3f}</td>"
                f"<td>{b:.3f}</td><td>{d:+.3f}</td></tr>"
            )
        parts.append(
            "</table><p>Flags both rule sets raised for the same patient and rule "
            "(minutes: positive when the second raised it later).</p><table>"
            "<tr><th>patient</th><th>rule</th><th>first</th><th>second</th><th>minutes</th></tr>"
        )
        for t in comparison.timing:
            parts.append(
                f"<tr><td>{_e(t.patient)}</td><td>{_e(t.rule)}</td>"
                f"<td>{_e(_when(t.first_at, tz))}</td><td>{_e(_when(t.second_at, tz))}</td>"
                f"<td>{t.minutes:+.0f}</td></tr>"
            )
        parts.append("</table>")
        for name, keys in (
            (comparison.second_label, comparison.only_second),
            (comparison.first_label, comparison.only_first),
        ):
            if keys:
                parts.append(
                    f"<p>Raised only by {_e(name)}: "
                    + _e(", ".join(f"{p} {r}" for p, r in keys))
                    + "</p>"
                )

    parts.append(
        "<h2>Time from the first worsening gas to the flag</h2>"
        f"<p>{_e(FIRST_WORSENING_DEFINITION)}</p>"
        "<img src='time-to-flag.png' alt='time from first worsening gas to flag'><table>"
        "<tr><th>patient</th><th>rule</th><th>priority</th><th>first worsening gas</th>"
        "<th>raised</th><th>hours</th></tr>"
    )
    for ttf in data.time_to_flag:
        hours = "" if ttf.hours is None else f"{ttf.hours:.1f}"
        parts.append(
            f"<tr><td>{_e(ttf.patient)}</td><td>{_e(ttf.rule)}</td><td>{_e(ttf.priority)}</td>"
            f"<td>{_e(_when(ttf.first_worsening, tz))}</td>"
            f"<td>{_e(_when(ttf.raised_at, tz))}</td><td>{hours}</td></tr>"
        )
    parts.append("</table>")

    parts.append(
        "<h2>Flags later retracted</h2><img src='retracted.png' alt='share of flags retracted'>"
    )

    parts.append(
        "<h2>Flag events</h2><p>Times are simulated (the record time of the input "
        "that caused them); the sample time is the draw time of the gas behind the event.</p>"
        "<table><tr><th>at</th><th>patient</th><th>rule</th><th>priority</th>"
        "<th>event</th><th>sample drawn</th></tr>"
    )
    for e in result.events:
        parts.append(
            f"<tr><td>{_e(_when(e.at, tz))}</td><td>{_e(e.patient)}</td><td>{_e(e.rule)}</td>"
            f"<td>{_e(e.priority)}</td><td>{_e(e.event)}</td>"
            f"<td>{_e(_when(e.sample_time, tz))}</td></tr>"
        )
    parts.append("</table>")
    if data.outbox:
        parts.append(
            "<h2>Notifications captured</h2><table><tr><th>event</th><th>channel</th>"
            "<th>count</th></tr>"
        )
        for (event, channel), n in sorted(data.outbox.items()):
            parts.append(f"<tr><td>{_e(event)}</td><td>{_e(channel)}</td><td>{n}</td></tr>")
        parts.append("</table>")

    parts.append(
        "<h2>Patients</h2><p>Markers on the top panel: ▲ raised or worsened, "
        "◆ escalated, ● resolved, ✕ retracted; colour = priority (light low, mid "
        "medium, dark high). Withdrawn results are crossed.</p>"
    )
    for series, name in patient_pngs:
        parts.append(
            f"<h3>{_e(series.patient)}</h3><img src='{_e(name)}' "
            f"alt='{_e('oxygenation of ' + series.patient)}'>"
        )
    parts.append(f"<p class='advisory'>{_e(ADVISORY)}</p></body></html>")
    page = out_dir / "index.html"
    page.write_text("\n".join(parts), encoding="utf-8")
    return page
