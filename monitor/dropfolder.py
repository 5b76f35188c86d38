"""A watched drop folder (``[[sources.files]]``): exported feeds put in a folder are
loaded through the pipeline and moved aside.

Each ``scan`` (a scheduled job) looks at the files directly in the folder:

- names starting with ``.`` or ending ``.part``/``.tmp`` are skipped: a sender should
  write under such a name and rename when done;
- a file is taken once it has *settled*: its size and modification time were the same
  at the previous scan and it is at least ``settle_seconds`` old (a copy in progress
  is left alone);
- settled files are loaded with ``monitor.ingest.ingest_files`` (committed in order of
  record time, bad items quarantined with their reason, as ``gasgap ingest`` does),
  then moved to ``loaded/`` with the time of loading in front of the name;
- a file that cannot be read at all (not HL7 v2 or FHIR JSON, unreadable) is moved to
  ``failed/`` with a ``.reason.txt`` beside it;
- when storage is down or locked nothing is moved: the file is loaded at a later scan
  (loading again is harmless: a stored result is not stored twice).

Files are never deleted; ``loaded/`` is the site's to archive or remove. With several
gasgap processes the job must run in one process a round (a fleet lock), as polls do.
"""

from __future__ import annotations

import logging
import shutil
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

from adapters.hl7v2.mllp import is_transient

if TYPE_CHECKING:
    from monitor.ingest import SourceContext
    from monitor.pipeline import BatchReport, Pipeline

log = logging.getLogger("gasgap.dropfolder")

LOADED = "loaded"
FAILED = "failed"
_SKIPPED_SUFFIXES = (".part", ".tmp", ".reason.txt")

#: ``ingest(paths)``: load the files through the pipeline; raises if nothing could be.
Ingest = Callable[[list[Path]], "BatchReport"]


@dataclass
class ScanResult:
    loaded: list[Path] = field(default_factory=list)
    failed: list[Path] = field(default_factory=list)
    waiting: list[Path] = field(default_factory=list)
    #: What the loaded files gave, added up (None when nothing was loaded).
    report: BatchReport | None = None

    def add(self, report: BatchReport) -> None:
        if self.report is None:
            self.report = report
        else:
            self.report.merge(report)


class DropFolder:
    """One watched folder. ``ingest`` loads a list of files (see ``ingest_from``)."""

    def __init__(
        self,
        name: str,
        folder: Path,
        ingest: Ingest,
        *,
        settle_seconds: float = 5.0,
        clock: Callable[[], datetime] = lambda: datetime.now(UTC),
    ) -> None:
        self.name = name
        self.folder = Path(folder)
        self.ingest = ingest
        self.settle_seconds = settle_seconds
        self.clock = clock
        self._seen: dict[str, tuple[int, int]] = {}

    def _candidates(self) -> list[Path]:
        if not self.folder.is_dir():
            raise FileNotFoundError(
                f"drop folder {self.folder} of source {self.name!r} does not exist"
            )
        return sorted(
            p
            for p in self.folder.iterdir()
            if p.is_file() and not p.name.startswith(".") and not p.name.endswith(_SKIPPED_SUFFIXES)
        )

    def settled(self) -> tuple[list[Path], list[Path]]:
        """(files ready to load, files still changing), remembering what was seen."""
        now = self.clock().timestamp()
        ready, waiting = [], []
        seen: dict[str, tuple[int, int]] = {}
        for path in self._candidates():
            try:
                stat = path.stat()
            except FileNotFoundError:  # moved away between listing and looking
                continue
            mark = (stat.st_size, stat.st_mtime_ns)
            seen[path.name] = mark
            old_enough = now - stat.st_mtime >= self.settle_seconds
            if self._seen.get(path.name) == mark and old_enough:
                ready.append(path)
            else:
                waiting.append(path)
        self._seen = seen
        return ready, waiting

    def scan(self) -> ScanResult:
        """Load what has settled and move it aside; see the module description."""
        ready, waiting = self.settled()
        result = ScanResult(waiting=waiting)
        if not ready:
            return result
        try:
            result.add(self.ingest(ready))
        except Exception as exc:
            if is_transient(exc):
                log.warning(
                    "drop folder %s: storage unavailable (%s); %d file(s) left for the next scan",
                    self.name,
                    type(exc).__name__,
                    len(ready),
                )
                raise
            # One file spoils the lot: load them one by one to find it.
            for path in ready:
                self._one(path, result)
            self._log_loaded(result)
            return result
        for path in ready:
            result.loaded.append(self._move(path, LOADED))
        self._log_loaded(result)
        return result

    def _log_loaded(self, result: ScanResult) -> None:
        """One line for the informatics team: counts only, no patient identifiers."""
        if not result.loaded or result.report is None:
            return
        report = result.report
        log.info(
            "drop folder %s: %d file(s) loaded: %d reading(s) stored, %d already stored, "
            "%d quarantined, %d flag event(s)",
            self.name,
            len(result.loaded),
            report.stored,
            report.duplicates,
            report.quarantined,
            len(report.alert_events),
        )

    def _one(self, path: Path, result: ScanResult) -> None:
        try:
            report = self.ingest([path])
        except Exception as exc:
            if is_transient(exc):
                raise
            log.error(
                "drop folder %s: %s could not be loaded (%s)",
                self.name,
                path.name,
                type(exc).__name__,
            )
            moved = self._move(path, FAILED)
            moved.with_name(moved.name + ".reason.txt").write_text(
                f"{type(exc).__name__}: {exc}\n", encoding="utf-8"
            )
            result.failed.append(moved)
        else:
            result.add(report)
            result.loaded.append(self._move(path, LOADED))

    def _move(self, path: Path, where: str) -> Path:
        target_dir = self.folder / where
        target_dir.mkdir(exist_ok=True)
        stamp = self.clock().astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
        target = target_dir / f"{stamp}-{path.name}"
        n = 1
        while target.exists():
            n += 1
            target = target_dir / f"{stamp}-{n}-{path.name}"
        shutil.move(str(path), target)
        self._seen.pop(path.name, None)
        return target


def ingest_from(
    pipeline: Pipeline, context: SourceContext, clock: Callable[[], datetime]
) -> Ingest:
    """The ``ingest`` a drop folder uses in the service: ``gasgap ingest``'s loader."""
    from monitor.ingest import ingest_files

    def ingest(paths: Iterable[Path]) -> BatchReport:
        return ingest_files(list(paths), pipeline, context, now=clock)

    return ingest
