"""Progress of long work: a bar on a terminal, a plain line every few seconds in a log.

A logged ``gasgap ingest`` or ``replay`` must not sit silent for minutes, and a bar's
carriage returns make a log unreadable, so where stderr is not a terminal the same
progress is printed as whole lines, at most one every ``every`` seconds.
"""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO


class Progress:
    """Counts of one phase of work (``update``), shown as a bar or as lines."""

    def __init__(
        self,
        label: str,
        *,
        unit: str,
        total: int | None = None,
        enabled: bool = True,
        stream: TextIO | None = None,
        every: float = 10.0,
        clock: Any = time.monotonic,
    ) -> None:
        self.label = label
        self.unit = unit
        self.total = total
        self.done = 0
        self.stream = stream or sys.stderr
        self.every = every
        self._clock = clock
        self._started = clock()
        self._last = self._started
        self._bar: Any = None
        self.enabled = enabled
        if enabled and self.stream.isatty():
            from tqdm import tqdm

            self._bar = tqdm(
                total=total,
                desc=label,
                unit=f" {unit}",
                dynamic_ncols=True,
                leave=False,
                file=self.stream,
            )

    def update(self, n: int = 1) -> None:
        self.done += n
        if not self.enabled:
            return
        if self._bar is not None:
            self._bar.update(n)
            return
        now = self._clock()
        if now - self._last >= self.every:
            self._last = now
            self._line(now)

    def _line(self, now: float) -> None:
        of = f" of {self.total:,}" if self.total else ""
        rate = self.done / max(now - self._started, 1e-9)
        self.stream.write(
            f"{self.label}: {self.done:,}{of} {self.unit} ({rate:,.0f}/s, "
            f"{now - self._started:,.0f} s)\n"
        )
        self.stream.flush()

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
        elif self.enabled and self.done:
            self._line(self._clock())
