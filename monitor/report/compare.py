"""Two replays of the same feed under two rule sets, side by side: flags per
patient-day by rule and priority, and how much earlier or later the flags both raised
came."""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

from monitor.shapes import iso_utc

if TYPE_CHECKING:
    from monitor.replay import ReplayEvent, ReplayResult

#: One row of the comparison: rule, priority, first rate, second rate, difference.
Row = tuple[str, str, float, float, float]


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

    def rows(self) -> list[Row]:
        keys = sorted(set(self.first) | set(self.second))
        out: list[Row] = []
        for rule, priority in keys:
            a = self.first.get((rule, priority), 0.0)
            b = self.second.get((rule, priority), 0.0)
            out.append((rule, priority, a, b, b - a))
        return out

    def as_json(self) -> dict[str, object]:
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
                    "first_at": iso_utc(t.first_at, z=True),
                    "second_at": iso_utc(t.second_at, z=True),
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
