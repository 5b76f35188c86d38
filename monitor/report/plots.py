"""The replay report's plots (matplotlib, PNG): per patient the P/F, A–a and FiO2 over
time with the flag events marked; for the whole feed the flags per patient-day, the time
to flag and the share of flags later retracted. The values plotted are the stored
derivations; nothing is recomputed here."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import tzinfo
from pathlib import Path
from typing import Any, TypeAlias

from monitor.engine.model import Derivation
from monitor.report.data import PatientSeries
from monitor.report.timing import TimeToFlag

PRIORITIES = ("low", "medium", "high")

#: Our own palette: a priority reads from light to dark, not by traffic-light colours.
PRIORITY_COLOUR = {"low": "#8fb8de", "medium": "#4a78b0", "high": "#1d2f6f"}
#: Marker of each flag event, by the engine's event names (``AlertEvent.event``).
EVENT_MARKER = {
    "raised": "^",
    "worsened": "^",
    "escalated": "D",
    "acknowledged": "s",
    "resolved": "o",
    "retracted": "x",
}


# --- plots ---------------------------------------------------------------------------------


#: A matplotlib ``Axes``. Left untyped on purpose: matplotlib's stubs accept only numbers
#: for the data, while its date converter plots the ``datetime`` values given here.
PlotAxes: TypeAlias = Any


def _agg() -> None:
    """Draw to files (no display): the Agg backend, chosen before pyplot is imported."""
    import matplotlib

    matplotlib.use("Agg", force=True)


Points = Sequence[tuple[Derivation, bool]]  # (derivation, retracted)


def _line(ax: PlotAxes, items: Points, attr: str, tz: tzinfo, **kw: object) -> None:
    pts = [
        (d.drawn_at.astimezone(tz), getattr(d, attr))
        for d, retracted in items
        if getattr(d, attr) is not None and not retracted
    ]
    if pts:
        ax.plot([t for t, _ in pts], [v for _, v in pts], **kw)


def _crossed(ax: PlotAxes, gases: Points, attr: str, tz: tzinfo) -> None:
    """Withdrawn results stay visible, crossed out."""
    pts = [
        (d.drawn_at.astimezone(tz), getattr(d, attr))
        for d, retracted in gases
        if retracted and getattr(d, attr) is not None
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


def _pf_panel(ax: PlotAxes, gases: Points, estimates: Points, tz: tzinfo) -> None:
    _line(ax, gases, "pf_ratio", tz, marker="o", color="#555555", label="P/F measured")
    _line(
        ax,
        gases,
        "pf_ratio_adjusted",
        tz,
        marker="s",
        color="#2a6f97",
        label="P/F altitude-adjusted",
    )
    _crossed(ax, gases, "pf_ratio", tz)
    _line(
        ax,
        estimates,
        "sf_ratio",
        tz,
        linestyle="none",
        marker=".",
        color="#a0a0a0",
        label="S/F (estimate)",
        alpha=0.6,
    )
    ax.set_ylabel("ratio (mmHg)")


def _aa_panel(ax: PlotAxes, gases: Points, tz: tzinfo) -> None:
    _line(ax, gases, "aa_gradient", tz, marker="o", color="#7b4f9d", label="A–a gradient")
    _line(
        ax,
        gases,
        "aa_gradient_expected",
        tz,
        linestyle="--",
        marker="_",
        markersize=14,
        color="#9b7fb5",
        label="age-expected (room air)",
    )
    _crossed(ax, gases, "aa_gradient", tz)
    ax.set_ylabel("A–a (mmHg)")


def _fio2_panel(ax: PlotAxes, gases: Points, estimates: Points, tz: tzinfo) -> None:
    _line(ax, gases, "fio2", tz, marker="o", color="#3c8d5a", label="FiO2 at gas")
    _line(
        ax,
        estimates,
        "fio2",
        tz,
        linestyle="none",
        marker=".",
        color="#9cc9a8",
        label="FiO2 at SpO2",
        alpha=0.6,
    )
    ax.set_ylabel("FiO2")
    ax.set_ylim(0.15, 1.05)


def _mark_events(axes: Sequence[PlotAxes], series: PatientSeries, tz: tzinfo) -> None:
    """Flag events as markers on the top panel and thin lines across all three."""
    ax_pf = axes[0]
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


def plot_patient(series: PatientSeries, path: Path, tz: tzinfo) -> None:
    """Three panels over time: P/F (measured, adjusted), A–a (and expected), FiO2;
    flag events as markers on the P/F panel and as thin lines across all three."""
    _agg()
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    gases = [(d, r) for d, r in series.derivations if not d.estimated]
    estimates = [(d, r) for d, r in series.derivations if d.estimated]
    fig, axes = plt.subplots(
        3, 1, figsize=(9, 7.2), sharex=True, gridspec_kw={"height_ratios": [1.4, 1, 0.8]}
    )
    ax_pf, ax_aa, ax_fio2 = axes
    _pf_panel(ax_pf, gases, estimates, tz)
    _aa_panel(ax_aa, gases, tz)
    _fio2_panel(ax_fio2, gases, estimates, tz)
    _mark_events(axes, series, tz)
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
    _agg()
    import matplotlib.pyplot as plt

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
    _agg()
    import matplotlib.pyplot as plt

    known = [(t, t.hours) for t in items if t.hours is not None]
    rule_ids = sorted({t.rule for t, _ in known}) or ["(none)"]
    fig, ax = plt.subplots(figsize=(9, 3.8))
    for t, hours in known:
        ax.scatter(
            [hours],
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
    _agg()
    import matplotlib.pyplot as plt

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
