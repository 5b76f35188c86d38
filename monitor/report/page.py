"""The replay report's page: ``index.html`` with its PNGs beside it, readable from
disk. HTML comes only from the autoescaped template ``templates/report.html``: every
value from a feed is text, never markup."""

from __future__ import annotations

from datetime import datetime, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING

from jinja2 import Environment, FileSystemLoader, select_autoescape

from monitor.engine.model import ADVISORY
from monitor.report.compare import Comparison, flags_per_patient_day
from monitor.report.data import PatientSeries, ReportData, collect
from monitor.report.plots import (
    plot_flag_rates,
    plot_patient,
    plot_retracted,
    plot_time_to_flag,
)
from monitor.report.timing import FIRST_WORSENING_DEFINITION

if TYPE_CHECKING:
    from monitor.replay import ReplayCounts, ReplayResult

TEMPLATES_DIR = Path(__file__).resolve().parent / "templates"

_env = Environment(
    loader=FileSystemLoader(TEMPLATES_DIR),
    autoescape=select_autoescape(default=True, default_for_string=True),
)


def _file_name(patient: str, index: int) -> str:
    safe = "".join(c if c.isalnum() or c in "-_" else "_" for c in patient)[:40]
    return f"patient-{index:03d}-{safe}.png"


def _count_rows(c: ReplayCounts) -> list[tuple[str, int]]:
    return [
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
    ]


def _plots(
    result: ReplayResult, data: ReportData, out_dir: Path, comparison: Comparison | None
) -> list[tuple[PatientSeries, str]]:
    tz = result.settings.site_tz
    plot_flag_rates(
        flags_per_patient_day(result),
        out_dir / "flags-per-patient-day.png",
        comparison.second if comparison else None,
        (comparison.first_label, comparison.second_label) if comparison else ("", ""),
    )
    plot_time_to_flag(data.time_to_flag, out_dir / "time-to-flag.png")
    plot_retracted(data.retracted_share, out_dir / "retracted.png")
    pngs: list[tuple[PatientSeries, str]] = []
    for i, series in enumerate(data.series, start=1):
        name = _file_name(series.patient, i)
        plot_patient(series, out_dir / name, tz)
        pngs.append((series, name))
    return pngs


def write_report(
    result: ReplayResult,
    out_dir: Path,
    *,
    comparison: Comparison | None = None,
    title: str = "gasgap replay",
) -> Path:
    """Write ``index.html`` and its PNGs into ``out_dir``; returns the HTML's path."""
    out_dir.mkdir(parents=True, exist_ok=True)
    tz: tzinfo = result.settings.site_tz
    data = collect(result)
    patient_pngs = _plots(result, data, out_dir, comparison)

    def when(at: datetime | None) -> str:
        return "" if at is None else at.astimezone(tz).strftime("%d %b %Y %H:%M")

    c = result.counts
    text = _env.get_template("report.html").render(
        title=title,
        advisory=ADVISORY,
        when=when,
        tz=str(tz),
        label=result.label,
        counts=c,
        count_rows=_count_rows(c),
        delivered=result.delivered,
        flags=sorted(c.flags.items()),
        rates=flags_per_patient_day(result),
        comparison=comparison,
        definition=FIRST_WORSENING_DEFINITION,
        time_to_flag=data.time_to_flag,
        events=result.events,
        outbox=sorted(data.outbox.items()),
        patients=[(series.patient, name) for series, name in patient_pngs],
    )
    page = out_dir / "index.html"
    page.write_text(text, encoding="utf-8")
    return page
