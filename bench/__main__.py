"""``python -m bench`` (``make bench``): every benchmark, figures and ratios printed.

    python -m bench                      # all, default sizes (about 15 minutes)
    python -m bench --quick              # all, small sizes (about 2 minutes)
    python -m bench --only replay --replay-beds 30 --replay-days 365 --factor 1

Figures are for comparing within one run (ratios); the machine line printed first says
what they were measured on. Nothing here is a test: no figure fails anything.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from bench import ingest, latency, postgres, replay
from bench.common import feed, machine

BENCHMARKS = ("ingest", "replay", "latency", "postgres")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m bench",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument(
        "--only", choices=BENCHMARKS, action="append", help="run only this benchmark (repeatable)"
    )
    p.add_argument("--quick", action="store_true", help="small sizes, for a first look")
    p.add_argument("--ingest-beds", type=int, help="ICU beds for ingest (default 30; quick 3)")
    p.add_argument("--ingest-days", type=float, help="days for ingest (default 30; quick 7)")
    p.add_argument("--replay-beds", type=int, help="ICU beds for replay (default 3)")
    p.add_argument(
        "--replay-days", type=float, help="days of the shorter replay (default 36.5; quick 3)"
    )
    p.add_argument(
        "--factor",
        type=int,
        default=10,
        help="the longer replay is this many times longer (default 10)",
    )
    p.add_argument(
        "--replay-db",
        choices=["file", "memory"],
        default="file",
        help="replay database: SQLite file (default) or in memory",
    )
    p.add_argument("--gases", type=int, help="gases for latency (default 1000; quick 100)")
    p.add_argument("--pace", type=float, default=20.0, help="gases per second sent (default 20)")
    p.add_argument(
        "--history-days",
        type=float,
        default=0,
        help="also measure latency while `gasgap ingest` loads this many days of a 30-bed ICU",
    )
    p.add_argument("--pg-beds", type=int, help="ICU beds for PostgreSQL (default 30; quick 3)")
    p.add_argument("--pg-days", type=float, help="days for PostgreSQL (default 7; quick 3)")
    p.add_argument("--json", type=Path, help="also write every figure to this JSON file")
    return p


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    quick = args.quick
    chosen = args.only or list(BENCHMARKS)
    host = machine()
    print("gasgap benchmarks: " + ", ".join(f"{k} {v}" for k, v in host.items()), flush=True)
    results: dict[str, Any] = {"machine": host, "quick": quick}
    if "ingest" in chosen:
        results["ingest"] = ingest.run(
            beds=args.ingest_beds or (3 if quick else 30),
            days=args.ingest_days or (7 if quick else 30),
        )
    if "replay" in chosen:
        results["replay"] = replay.run(
            beds=args.replay_beds or 3,
            days=args.replay_days or (3 if quick else 36.5),
            factor=args.factor,
            db=args.replay_db,
        )
    if "latency" in chosen:
        results["latency"] = latency.run(
            gases=args.gases or (100 if quick else 1000), pace_per_s=args.pace
        )
        if args.history_days:
            results["latency_with_history"] = latency.run(
                gases=args.gases or (100 if quick else 1000),
                pace_per_s=args.pace,
                history=feed(30, args.history_days),
            )
    if "postgres" in chosen:
        results["postgres"] = postgres.run(
            beds=args.pg_beds or (3 if quick else 30), days=args.pg_days or (3 if quick else 7)
        )
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=2, sort_keys=True, default=str) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
