"""``make demo``: the main job on the embedded default, SQLite.

Replays the invented Hollowmere General Hospital feed (``fixtures/demo``: three days,
twelve invented patients, HL7 v2 from the laboratory and FHIR from the record system)
through the same pipeline as the service, on a simulated clock, into a SQLite file under
``demo-out/``; writes the report to ``demo-out/report/``; prints a summary table of the
flags and where the report is. Opens nothing, sends nothing: notifications stay in the
outbox of ``demo-out/demo.db``.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from monitor.config import SiteConfig

from monitor.engine.model import ADVISORY

ROOT = Path(__file__).resolve().parent.parent
FEED_DIR = ROOT / "fixtures" / "demo"
FEEDS = ("feed-lab.hl7", "feed-late.hl7", "feed-ehr.ndjson")
SITE_CONFIG = ROOT / "fixtures" / "site-example.toml"


def demo_config() -> SiteConfig:
    """The example site configuration: Hollowmere, 1,600 m, its fixed UTC+02:00."""
    from monitor.config import load_config

    return load_config(SITE_CONFIG)


def run(out_dir: Path, *, progress: bool = False) -> int:
    from monitor.bootstrap import pipeline_settings, source_context
    from monitor.cli.replay import flag_table
    from monitor.replay import replay
    from monitor.report import write_report

    out_dir.mkdir(parents=True, exist_ok=True)
    db_file = out_dir / "demo.db"
    for stale in (db_file, db_file.with_name("demo.db-wal"), db_file.with_name("demo.db-shm")):
        stale.unlink(missing_ok=True)  # a demo starts from nothing
    config = demo_config()
    print("gasgap demo: three invented days at Hollowmere General Hospital (1,600 m)")
    print(f"replaying {', '.join(FEEDS)} on SQLite ({db_file}) ...", flush=True)
    result = replay(
        [FEED_DIR / name for name in FEEDS],
        pipeline_settings(config),
        source_context(config),
        db_url=f"sqlite:///{db_file}",
        progress=progress,
        label=SITE_CONFIG.name,
    )
    try:
        page = write_report(
            result, out_dir / "report", title="gasgap demo replay: Hollowmere General Hospital"
        )
        c = result.counts
        print(
            f"{c.readings} readings read, {c.stored} stored, {c.quarantined} quarantined, "
            f"{c.derivations} derivations, {sum(c.flags.values())} flags, "
            f"{c.notifications} notifications captured (not sent)\n"
        )
        print(flag_table(result.events))
        print(f"\nreport: {page}")
        print(f"database: {db_file}")
        print()
        print(ADVISORY)
    finally:
        result.close()
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m monitor.demo", description=__doc__)
    parser.add_argument("--out", type=Path, default=Path("demo-out"), help="output folder")
    args = parser.parse_args(argv)
    return run(args.out, progress=sys.stderr.isatty())


if __name__ == "__main__":
    sys.exit(main())
