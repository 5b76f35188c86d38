"""One send of one outbox item through one channel, and what happens to it next
(sent, retried later with backoff, or given up).

No SQL and no clock here: the outbox loop (``storage/outbox.py``: ``claim_due``,
``mark_sent``, ``mark_failed``) claims due items, calls ``deliver_once`` and ``plan``,
and records the answer. ``now`` and the random source are arguments, so a replay or a
test gets the same schedule every time.

Backoff: the n-th retry waits ``min(cap, base * 2**(n-1))`` less a random part of up to
``jitter`` of it ("exponential backoff with jitter", a common practice with no single
standard; the jitter keeps many items that failed together from retrying together).
"""

import logging
import random
from dataclasses import dataclass
from datetime import datetime, timedelta
from enum import StrEnum

from adapters.notify.base import Channel, DeliveryFailed, DeliveryResult, log_ref
from monitor.engine.model import Notification

DEFAULT_BASE = timedelta(seconds=30)
DEFAULT_CAP = timedelta(hours=1)
DEFAULT_JITTER = 0.25

_log = logging.getLogger("gasgap.dispatch")


@dataclass(frozen=True, slots=True)
class DispatchPolicy:
    """How hard to try. ``max_attempts`` counts every send, the first included; after
    that many retryable failures the item is given up (dead) and needs a person."""

    max_attempts: int = 10
    base: timedelta = DEFAULT_BASE
    cap: timedelta = DEFAULT_CAP
    jitter: float = DEFAULT_JITTER

    def __post_init__(self) -> None:
        if self.max_attempts < 1:
            raise ValueError(f"max_attempts must be at least 1, not {self.max_attempts}")
        if self.base <= timedelta(0) or self.cap < self.base:
            raise ValueError(f"need 0 < base <= cap, not base={self.base} cap={self.cap}")
        if not 0.0 <= self.jitter < 1.0:
            raise ValueError(f"jitter must be a fraction in [0, 1), not {self.jitter}")


def backoff_delay(
    attempts: int,
    base: timedelta = DEFAULT_BASE,
    cap: timedelta = DEFAULT_CAP,
    *,
    jitter: float = DEFAULT_JITTER,
    rng: random.Random | None = None,
) -> timedelta:
    """The wait after ``attempts`` failed sends (attempts >= 1).

    Without jitter: base, 2 base, 4 base, ... never above ``cap``. With jitter the wait
    lies in ``[(1 - jitter) * d, d]`` for that un-jittered ``d``, so it never exceeds
    ``cap``; with jitter <= 0.5 waits never shrink from one attempt to the next until
    the cap is reached (the next step's shortest wait is this step's longest).
    """
    if attempts < 1:
        raise ValueError(f"attempts must be at least 1 (sends already made), not {attempts}")
    if not 0.0 <= jitter < 1.0:
        raise ValueError(f"jitter must be a fraction in [0, 1), not {jitter}")
    # 2**62 * any positive base exceeds any sensible cap; the bound keeps the float finite.
    scale = 2.0 ** min(attempts - 1, 62)
    ceiling = min(cap.total_seconds(), base.total_seconds() * scale)
    draw = (rng or random.Random()).random() if jitter else 0.0
    return timedelta(seconds=ceiling * (1.0 - jitter * draw))


def next_attempt(
    attempts: int,
    now: datetime,
    base: timedelta = DEFAULT_BASE,
    cap: timedelta = DEFAULT_CAP,
    *,
    jitter: float = DEFAULT_JITTER,
    rng: random.Random | None = None,
) -> datetime:
    """When to try again after ``attempts`` failed sends, counted from ``now``."""
    return now + backoff_delay(attempts, base, cap, jitter=jitter, rng=rng)


def deliver_once(item_notification: Notification, channel: Channel) -> DeliveryResult:
    """One send. Never raises: a channel that breaks its contract by raising counts as a
    retryable failure (logged with its traceback), so one bad channel cannot stop the
    loop or lose the item."""
    try:
        return channel.send(item_notification)
    except DeliveryFailed as failed:
        return failed.as_result()
    except Exception as exc:  # a bug in a channel must not take the outbox down
        _log.exception(
            "channel %s raised instead of answering (ref %s)",
            getattr(channel, "alias", type(channel).__name__),
            log_ref(item_notification),
        )
        return DeliveryResult.retry(f"channel raised {type(exc).__name__}")


class Outcome(StrEnum):
    SENT = "sent"
    RETRY = "retry"
    DEAD = "dead"


@dataclass(frozen=True, slots=True)
class Plan:
    """What the outbox records after one attempt: ``retry_at`` is set only for RETRY."""

    outcome: Outcome
    attempts: int
    detail: str
    retry_at: datetime | None = None


def plan(
    result: DeliveryResult,
    attempts: int,
    now: datetime,
    policy: DispatchPolicy | None = None,
    *,
    rng: random.Random | None = None,
) -> Plan:
    """Turn one attempt's result into the outbox's next step.

    ``attempts`` counts sends made so far, this one included.
    """
    policy = policy or DispatchPolicy()
    if result.ok:
        return Plan(Outcome.SENT, attempts, result.detail)
    if not result.retryable:
        return Plan(Outcome.DEAD, attempts, result.detail)
    if attempts >= policy.max_attempts:
        return Plan(Outcome.DEAD, attempts, f"gave up after {attempts} attempts: {result.detail}")
    when = next_attempt(attempts, now, policy.base, policy.cap, jitter=policy.jitter, rng=rng)
    return Plan(Outcome.RETRY, attempts, result.detail, when)
