"""``gasgap replay``: the same flags as the ingest path and as live (one unit, one
transaction), deterministic output, its JSON shape, escalations at the live service's
timing, pacing, the progress bar's count.

Every flag is advisory: clinicians decide, following local policy and licensed practice.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Iterator, Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from monitor.cli import _Parser
from monitor.cli.replay import add_replay_command
from monitor.config import load_config
from monitor.demo import FEED_DIR, FEEDS
from monitor.engine.model import ADVISORY
from monitor.ingest import SourceContext, ingest_files
from monitor.pipeline import Pipeline
from monitor.replay import ReplayResult, count_units, replay
from storage.db import open_database

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "fixtures" / "site-example.toml"
PATHS = [FEED_DIR / f for f in FEEDS]
EVENTS = {
    "raised",
    "worsened",
    "lowered",
    "acknowledged",
    "resolved",
    "escalated",
    "retracted",
}


def gasgap(argv: Sequence[str]) -> int:
    parser = _Parser(prog="gasgap")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    add_replay_command(sub)
    args: argparse.Namespace = parser.parse_args(list(argv))
    return int(args.run(args))


def context_for(config: object) -> SourceContext:
    return SourceContext(site_tz=config.zone(), patient_id_system=config.site.patient_id_system)  # type: ignore[attr-defined]


@pytest.fixture(scope="module")
def example_replay() -> Iterator[ReplayResult]:
    config = load_config(EXAMPLE)
    result = replay(PATHS, config.to_pipeline_settings(), context_for(config))
    yield result
    result.close()


def test_ingest_one_unit_per_transaction_gives_the_same_flags(
    example_replay: ReplayResult, tmp_path: Path
) -> None:
    # The live service accepts each message (or resource) in its own transaction; so
    # does replay. ingest_files with batch_size=1 does the same, into a fresh SQLite file.
    config = load_config(EXAMPLE)
    db = open_database(f"sqlite:///{tmp_path / 'ingest.db'}")
    try:
        report = ingest_files(
            PATHS,
            Pipeline(db, config.to_pipeline_settings()),
            context_for(config),
            now=lambda: datetime.now(UTC),
            batch_size=1,
        )
    finally:
        db.dispose()
    ingested = {(e.patient_key, e.rule, e.event, e.priority.value) for e in report.alert_events}
    # ingest runs no escalation check (no clock passes between files): leave those out
    replayed = {
        (e.patient, e.rule, e.event, e.priority)
        for e in example_replay.events
        if e.event != "escalated"
    }
    assert ingested and ingested == replayed


def test_ingest_default_batches_give_the_same_flags(
    example_replay: ReplayResult, tmp_path: Path
) -> None:
    # ingest puts many units in one transaction but judges each at its own record
    # time, so a withdrawal batched with its result, or a late gas batched with a newer
    # one, still gives what live and replay give.
    config = load_config(EXAMPLE)
    db = open_database(f"sqlite:///{tmp_path / 'ingest.db'}")
    try:
        report = ingest_files(
            PATHS,
            Pipeline(db, config.to_pipeline_settings()),
            context_for(config),
            now=lambda: datetime.now(UTC),
        )
    finally:
        db.dispose()
    ingested = {(e.patient_key, e.rule, e.event, e.priority.value) for e in report.alert_events}
    replayed = {
        (e.patient, e.rule, e.event, e.priority)
        for e in example_replay.events
        if e.event != "escalated"
    }
    assert ingested == replayed


def test_json_is_deterministic_and_well_formed(capsys: pytest.CaptureFixture[str]) -> None:
    outputs = []
    for _ in range(2):
        assert gasgap(["replay", *map(str, PATHS), "--config", str(EXAMPLE), "--json"]) == 0
        outputs.append(capsys.readouterr().out)
    assert outputs[0] == outputs[1]
    lines = outputs[0].strip().splitlines()
    assert len(lines) == 1  # exactly one JSON object
    data = json.loads(lines[0])
    assert data["advisory"] == ADVISORY
    counts = data["counts"]
    for key in ("readings", "stored", "duplicates", "quarantined", "derivations", "flags"):
        assert key in counts
    assert counts["readings"] >= counts["stored"] > 0
    for rule, by_priority in counts["flags"].items():
        assert rule and set(by_priority) <= {"low", "medium", "high"}
    assert data["alerts"]
    for alert in data["alerts"]:
        assert set(alert) == {"patient", "rule", "priority", "event", "at", "sample_time"}
        assert alert["event"] in EVENTS
        assert alert["priority"] in {"low", "medium", "high"}
        at = datetime.fromisoformat(alert["at"])
        if alert["sample_time"] is not None:
            assert datetime.fromisoformat(alert["sample_time"]) <= at  # drawn before judged
    raised = sum(1 for a in data["alerts"] if a["event"] == "raised")
    assert sum(n for p in counts["flags"].values() for n in p.values()) == raised


def test_escalation_comes_when_the_live_check_would_run_it(example_replay: ReplayResult) -> None:
    # site-example.toml: escalate_after_min = 30; the service checks once a minute
    # (monitor.scheduling.ESCALATION_EVERY). Nobody acknowledges in a replay.
    after = timedelta(minutes=30)
    last_change: dict[str, datetime] = {}
    escalated = 0
    for e in example_replay.events:
        if e.event in ("raised", "worsened"):  # when the flag could first be seen
            last_change[e.alert_id] = e.at
        if e.event == "escalated":
            escalated += 1
            assert e.priority in ("medium", "high")
            waited = e.at - last_change[e.alert_id]
            assert after <= waited < after + timedelta(minutes=1)
    assert escalated > 0


def test_nothing_escalates_before_it_is_due(example_replay: ReplayResult) -> None:
    low = [e for e in example_replay.events if e.event == "escalated" and e.priority == "low"]
    assert low == []


def test_speed_paces_by_record_time(tmp_path: Path) -> None:
    # Three lab messages; at 3600x an hour of record time is a second of wall time.
    raw = (FEED_DIR / "feed-lab.hl7").read_bytes()
    messages = [m for m in raw.split(b"\n\n") if m.strip()][:3]
    small = tmp_path / "three.hl7"
    small.write_bytes(b"\n\n".join(messages) + b"\n\n")
    config = load_config(EXAMPLE)
    slept: list[float] = []
    result = replay(
        [small],
        config.to_pipeline_settings(),
        context_for(config),
        speed=3600.0,
        sleep=slept.append,
    )
    try:
        span = (result.counts.last_record - result.counts.first_record).total_seconds()  # type: ignore[operator]
        assert result.counts.units == 3 and span > 0
        # replay sleeps until each unit's deadline (record time offset / speed) on the wall
        # clock; the fake sleep does not pass time, so the last wait is nearly the whole
        # span at that speed, and no wait is longer
        assert slept, "a paced replay should wait between units spread over hours"
        assert all(0 < s <= span / 3600.0 for s in slept)
        assert slept[-1] > span / 3600.0 - 1.0
    finally:
        result.close()


def test_bad_speed_and_missing_file_are_named(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as exit_info:
        gasgap(["replay", str(PATHS[0]), "--speed", "fast"])
    assert exit_info.value.code == 2
    assert "--speed" in capsys.readouterr().err
    assert gasgap(["replay", str(tmp_path / "none.hl7")]) == 2
    assert "none.hl7" in capsys.readouterr().err


def test_unit_count_for_progress_matches_the_feed_description() -> None:
    # fixtures/demo/README.md: feed-lab.hl7 holds 33 messages, feed-late.hl7 one.
    assert count_units([FEED_DIR / "feed-lab.hl7"]) == 33
    assert count_units([FEED_DIR / "feed-late.hl7"]) == 1
    ndjson = FEED_DIR / "feed-ehr.ndjson"
    lines = sum(1 for line in ndjson.read_bytes().splitlines() if line.strip())
    assert count_units([ndjson]) == lines


def test_kept_database(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    url = f"sqlite:///{tmp_path / 'kept.db'}"
    assert (
        gasgap(["replay", str(FEED_DIR / "feed-late.hl7"), "--config", str(EXAMPLE), "--db", url])
        == 0
    )
    out = capsys.readouterr().out
    assert ADVISORY in out
    assert (tmp_path / "kept.db").stat().st_size > 0


def test_same_flags_on_both_databases(db_url: str) -> None:
    # The lab feed alone, kept in SQLite or PostgreSQL: the same flag events.
    config = load_config(EXAMPLE)
    lab = [FEED_DIR / "feed-lab.hl7"]
    memory = replay(lab, config.to_pipeline_settings(), context_for(config))
    kept = replay(lab, config.to_pipeline_settings(), context_for(config), db_url=db_url)
    try:
        assert memory.as_json() == kept.as_json()
        assert memory.events
    finally:
        memory.close()
        kept.close()


def test_deliver_sends_what_was_captured(capsys: pytest.CaptureFixture[str]) -> None:
    # site-strict.toml routes everything to its log channel only: nothing leaves the host.
    strict = ROOT / "fixtures" / "site-strict.toml"
    assert (
        gasgap(
            [
                "replay",
                str(FEED_DIR / "feed-lab.hl7"),
                "--config",
                str(strict),
                "--deliver",
                "--json",
            ]
        )
        == 0
    )
    data = json.loads(capsys.readouterr().out)
    captured = data["counts"]["notifications_captured"]
    assert captured > 0
    assert data["delivered"] == captured


def test_a_database_that_holds_data_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    url = f"sqlite:///{tmp_path / 'used.db'}"
    late = str(FEED_DIR / "feed-late.hl7")
    assert gasgap(["replay", late, "--db", url]) == 0
    capsys.readouterr()
    assert gasgap(["replay", late, "--db", url]) == 2
    assert "already holds" in capsys.readouterr().err
