"""What every benchmark needs: the machine it ran on, generated feeds, worker
subprocesses (so each measurement has its own peak memory), and printing.

Benchmarks print figures; they are not tests and assert nothing. Compare figures as
ratios within one run: the machine is shared and noisy.
"""

from __future__ import annotations

import json
import os
import platform
import resource
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[1]
#: Where generated feeds are kept between runs (they are deterministic: same seed,
#: same beds and days, same bytes), so a second run does not pay for generation.
CACHE = Path(os.environ.get("GASGAP_BENCH_CACHE", "/tmp/gasgap-bench"))


def machine() -> dict[str, str]:
    """CPU count, CPU model, memory and Python: the line every figure is read against."""
    model = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    memory = "unknown"
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                memory = f"{int(line.split()[1]) / 1024 / 1024:.1f} GiB"
                break
    except OSError:
        pass
    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    return {
        "cpus": str(os.cpu_count()),
        "cpu": model,
        "memory": memory,
        "python": platform.python_version(),
        "load": load,
        "date": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
    }


def feed(beds: int, days: float, seed: int = 20260301) -> Path:
    """A generated ICU feed (``fixtures.generate icu``): a directory with
    ``feed-lab.hl7`` and ``feed-ehr.ndjson``, made once and kept in ``CACHE``."""
    out = CACHE / f"icu-{beds}b-{days:g}d-{seed}"
    done = out / ".complete"
    if not done.exists():
        out.mkdir(parents=True, exist_ok=True)
        subprocess.run(
            [
                sys.executable,
                "-m",
                "fixtures.generate",
                "icu",
                "--beds",
                str(beds),
                "--days",
                f"{days:g}",
                "--seed",
                str(seed),
                "--out",
                str(out),
            ],
            cwd=REPO,
            check=True,
            stdout=subprocess.DEVNULL,
        )
        done.write_text("")
    return out


def feed_files(directory: Path) -> list[Path]:
    return sorted(directory.glob("feed-*"))


def peak_rss_mib() -> float:
    """This process's peak resident memory so far (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_worker(module: str, args: Sequence[str], *, timeout: float | None = None) -> dict[str, Any]:
    """Run ``python -m <module> --worker ...`` in a fresh process and return the JSON
    object it prints last (its figures, peak memory included)."""
    command = [sys.executable, "-m", module, "--worker", *args]
    done = subprocess.run(
        command, cwd=REPO, capture_output=True, text=True, timeout=timeout, check=False
    )
    if done.returncode != 0:
        raise RuntimeError(
            f"benchmark worker {' '.join(command)} exited {done.returncode}:\n{done.stderr[-4000:]}"
        )
    lines = [line for line in done.stdout.splitlines() if line.startswith("{")]
    return dict(json.loads(lines[-1]))


def start_worker(module: str, args: Sequence[str]) -> subprocess.Popen[str]:
    """The same worker, started and left running (for two at once)."""
    return subprocess.Popen(
        [sys.executable, "-m", module, "--worker", *args],
        cwd=REPO,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def finish_worker(process: subprocess.Popen[str], timeout: float | None = None) -> dict[str, Any]:
    out, err = process.communicate(timeout=timeout)
    if process.returncode != 0:
        raise RuntimeError(f"benchmark worker exited {process.returncode}:\n{err[-4000:]}")
    lines = [line for line in out.splitlines() if line.startswith("{")]
    return dict(json.loads(lines[-1]))


def emit(figures: dict[str, Any]) -> None:
    """A worker's last line: its figures as one JSON object."""
    figures["peak_rss_mib"] = round(peak_rss_mib(), 1)
    sys.stdout.write(json.dumps(figures, sort_keys=True) + "\n")
    sys.stdout.flush()


@dataclass
class Stopwatch:
    started: float = 0.0
    seconds: float = 0.0


@contextmanager
def stopwatch() -> Iterator[Stopwatch]:
    watch = Stopwatch(started=time.perf_counter())
    try:
        yield watch
    finally:
        watch.seconds = time.perf_counter() - watch.started


def rate(count: float, seconds: float) -> float:
    return count / seconds if seconds > 0 else float("nan")


def heading(text: str) -> None:
    print(f"\n== {text}", flush=True)


def line(label: str, value: str) -> None:
    print(f"  {label:<44} {value}", flush=True)


def percentile(values: Sequence[float], fraction: float) -> float:
    """Nearest-rank percentile (``fraction`` in 0..1) of ``values``."""
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    rank = max(1, min(len(ordered), int(-(-fraction * len(ordered) // 1))))
    return ordered[rank - 1]
