"""Replay: a generated ICU feed (``fixtures.generate icu``) played through
``monitor.replay.replay`` (the historical path: files stored first, then each
patient's timeline stepped once), each run in its own process so its peak memory
(``ru_maxrss``) is its own.

Two lengths of the same ICU: the base and ten times as long. The memory question is
about duration: a replay streams its input and holds one patient at a time, so a
feed ten times longer should need
under 1.5 times the peak memory (goal). The replay database is a SQLite file here (an
in-memory database holds every stored reading in RAM by design; ``--replay-db memory``
measures that instead).
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path
from typing import Any

from bench.common import emit, feed, feed_files, heading, line, rate, run_worker, stopwatch

MODULE = "bench.replay"


def replay_once(directory: Path, db_url: str) -> dict[str, Any]:
    from monitor.config import default_config
    from monitor.ingest import SourceContext
    from monitor.replay import replay

    config = default_config()
    context = SourceContext(site_tz=config.zone(), patient_id_system=config.site.patient_id_system)
    with stopwatch() as watch:
        result = replay(
            feed_files(directory), config.to_pipeline_settings(), context, db_url=db_url
        )
    counts = result.counts
    result.close()
    return {
        "seconds": round(watch.seconds, 2),
        "units": counts.units,
        "readings": counts.readings,
        "derivations": counts.derivations,
        "flags": sum(counts.flags.values()),
        "notifications": counts.notifications,
        "units_per_s": round(rate(counts.units, watch.seconds), 1),
        "readings_per_s": round(rate(counts.readings, watch.seconds), 1),
    }


def run(*, beds: int, days: float, factor: int = 10, db: str = "file") -> dict[str, Any]:
    heading(
        f"replay: {beds}-bed ICU, {days:g} days and {days * factor:g} days "
        f"(fixtures.generate icu), {db} SQLite"
    )
    results: dict[str, Any] = {}
    for label, length in (("base", days), (f"x{factor}", days * factor)):
        directory = feed(beds, length)
        size = sum(p.stat().st_size for p in feed_files(directory)) / 1e6
        with tempfile.TemporaryDirectory(prefix="gasgap-bench-") as tmp:
            url = "sqlite://" if db == "memory" else f"sqlite:///{tmp}/replay.db"
            figures = run_worker(MODULE, ["--dir", str(directory), "--db-url", url])
        results[label] = figures
        line(
            f"{length:g} days: input",
            f"{size:.1f} MB, {figures['units']} units, {figures['readings']} readings",
        )
        line(
            f"{length:g} days: wall time",
            f"{figures['seconds']:.1f} s = "
            f"{figures['units_per_s']:,.0f} units/s = {figures['readings_per_s']:,.0f} readings/s",
        )
        line(
            f"{length:g} days: derivations, flags, notifications",
            f"{figures['derivations']}, {figures['flags']}, {figures['notifications']}",
        )
        line(f"{length:g} days: peak memory", f"{figures['peak_rss_mib']:.0f} MiB")
    ratio = results[f"x{factor}"]["peak_rss_mib"] / results["base"]["peak_rss_mib"]
    line(
        f"peak memory x{factor} / base",
        f"{ratio:.2f} (goal < 1.5: {'met' if ratio < 1.5 else 'missed'})",
    )
    # The longer run's rate: start-up (migrations, imports' first use) is spread thinner.
    speed = results[f"x{factor}"]["units_per_s"]
    year_units = results["base"]["units"] * (365 / days) * (30 / beds)
    line(
        "extrapolated: 30 beds x 365 days at the longer run's rate",
        f"{year_units:,.0f} units, about {year_units / speed / 60:,.0f} min "
        "(units scale with beds; per-unit cost assumed not to)",
    )
    results["memory_ratio"] = round(ratio, 3)
    return results


def _worker(argv: list[str]) -> None:
    parser = argparse.ArgumentParser(prog=f"python -m {MODULE} --worker")
    parser.add_argument("--dir", type=Path, required=True)
    parser.add_argument("--db-url", required=True)
    args = parser.parse_args(argv)
    emit(replay_once(args.dir, args.db_url))


if __name__ == "__main__":
    import sys

    if sys.argv[1:2] == ["--worker"]:
        _worker(sys.argv[2:])
    else:
        run(beds=3, days=3)
