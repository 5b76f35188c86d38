"""Moved to ``monitor.outbox.retry``; this name is kept for existing imports."""

from monitor.outbox.retry import (
    DEFAULT_BASE,
    DEFAULT_CAP,
    DEFAULT_JITTER,
    DispatchPolicy,
    Outcome,
    Plan,
    backoff_delay,
    deliver_once,
    next_attempt,
    plan,
)

__all__ = [
    "DEFAULT_BASE",
    "DEFAULT_CAP",
    "DEFAULT_JITTER",
    "DispatchPolicy",
    "Outcome",
    "Plan",
    "backoff_delay",
    "deliver_once",
    "next_attempt",
    "plan",
]
