"""Backoff and the decision after each attempt (monitor.outbox.retry): no I/O, no clock.

The schedule is exponential backoff with jitter: a common practice with no single
standard. The expected waits below are worked by hand from that definition
(30 s doubling: 30, 60, 120, 240, 480, 960, 1920, then 3840 capped at 3600).
"""

from datetime import UTC, datetime, timedelta
from random import Random

import pytest
from hypothesis import given
from hypothesis import strategies as st

from adapters.notify.base import DeliveryFailed, DeliveryResult
from monitor.engine.model import ADVISORY, Notification, Priority
from monitor.outbox.retry import (
    DispatchPolicy,
    Outcome,
    backoff_delay,
    deliver_once,
    next_attempt,
    plan,
)

NOW = datetime(2026, 3, 14, 7, 0, tzinfo=UTC)
BASE = timedelta(seconds=30)
CAP = timedelta(hours=1)


def notification() -> Notification:
    return Notification(
        idempotency_key="alert-0001:raised:1",
        alert_id="alert-0001",
        patient_key="hgh-pt-0001",
        patient_display="HGH bed ICU-N-1",
        location=None,
        rule="pf_ratio_low",
        priority=Priority.MEDIUM,
        event="raised",
        summary="P/F 180 mmHg",
        detail="",
        created_at=NOW,
        advisory=ADVISORY,
    )


@pytest.mark.parametrize(
    ("attempts", "seconds"),
    [(1, 30), (2, 60), (3, 120), (4, 240), (5, 480), (6, 960), (7, 1920), (8, 3600), (50, 3600)],
)
def test_backoff_without_jitter_doubles_from_30_s_up_to_the_one_hour_cap(
    attempts: int, seconds: int
) -> None:
    assert backoff_delay(attempts, BASE, CAP, jitter=0.0) == timedelta(seconds=seconds)


def test_next_attempt_counts_from_now() -> None:
    assert next_attempt(3, NOW, jitter=0.0) == NOW + timedelta(seconds=120)


def test_very_many_attempts_stay_capped_without_overflow() -> None:
    assert backoff_delay(10_000, BASE, CAP, jitter=0.0) == CAP


@given(
    attempts=st.integers(min_value=1, max_value=200),
    jitter=st.floats(min_value=0.0, max_value=0.99),
    seed=st.integers(min_value=0, max_value=2**32),
)
def test_jittered_wait_lies_between_its_floor_and_the_unjittered_wait(
    attempts: int, jitter: float, seed: int
) -> None:
    ceiling = backoff_delay(attempts, BASE, CAP, jitter=0.0)
    wait = backoff_delay(attempts, BASE, CAP, jitter=jitter, rng=Random(seed))
    assert ceiling * (1 - jitter) - timedelta(microseconds=1) <= wait <= ceiling <= CAP
    assert wait > timedelta(0)


@given(
    attempts=st.integers(min_value=1, max_value=60),
    base_s=st.integers(min_value=1, max_value=600),
    cap_factor=st.integers(min_value=1, max_value=10_000),
)
def test_unjittered_waits_never_shrink_and_never_pass_the_cap(
    attempts: int, base_s: int, cap_factor: int
) -> None:
    base, cap = timedelta(seconds=base_s), timedelta(seconds=base_s * cap_factor)
    this = backoff_delay(attempts, base, cap, jitter=0.0)
    after = backoff_delay(attempts + 1, base, cap, jitter=0.0)
    assert this <= after <= cap


@given(
    attempts=st.integers(min_value=1, max_value=6),
    seed_a=st.integers(min_value=0, max_value=2**32),
    seed_b=st.integers(min_value=0, max_value=2**32),
)
def test_jitter_up_to_half_keeps_waits_monotone_below_the_cap(
    attempts: int, seed_a: int, seed_b: int
) -> None:
    # Attempts 1..7 stay below the one-hour cap with a 30 s base (1920 s at attempt 7).
    this = backoff_delay(attempts, BASE, CAP, jitter=0.5, rng=Random(seed_a))
    after = backoff_delay(attempts + 1, BASE, CAP, jitter=0.5, rng=Random(seed_b))
    assert this <= after


def test_same_seed_gives_the_same_schedule() -> None:
    first = [next_attempt(a, NOW, rng=Random(42)) for a in range(1, 10)]
    again = [next_attempt(a, NOW, rng=Random(42)) for a in range(1, 10)]
    assert first == again


@pytest.mark.parametrize("attempts", [0, -1])
def test_backoff_refuses_attempts_below_one_naming_the_input(attempts: int) -> None:
    with pytest.raises(ValueError, match="attempts must be at least 1"):
        backoff_delay(attempts)


@pytest.mark.parametrize(
    "kwargs",
    [
        {"max_attempts": 0},
        {"base": timedelta(0)},
        {"base": timedelta(minutes=5), "cap": timedelta(minutes=1)},
        {"jitter": 1.0},
    ],
)
def test_dispatch_policy_refuses_settings_that_cannot_work(kwargs: dict[str, object]) -> None:
    with pytest.raises(ValueError):
        DispatchPolicy(**kwargs)  # type: ignore[arg-type]


def test_plan_marks_a_delivered_item_sent() -> None:
    step = plan(DeliveryResult.delivered("HTTP 200"), 1, NOW)
    assert step.outcome is Outcome.SENT and step.retry_at is None


def test_plan_marks_a_refused_item_dead_at_once() -> None:
    step = plan(DeliveryResult.dead("HTTP 400"), 1, NOW, DispatchPolicy(max_attempts=5))
    assert step.outcome is Outcome.DEAD and step.retry_at is None


def test_plan_schedules_a_retry_in_the_backoff_window() -> None:
    step = plan(DeliveryResult.retry("HTTP 503"), 2, NOW, rng=Random(1))
    assert step.outcome is Outcome.RETRY and step.retry_at is not None
    # attempt 2: un-jittered 60 s, default jitter 0.25 -> within [45 s, 60 s].
    assert NOW + timedelta(seconds=45) <= step.retry_at <= NOW + timedelta(seconds=60)


def test_plan_gives_up_after_max_attempts() -> None:
    policy = DispatchPolicy(max_attempts=3)
    assert plan(DeliveryResult.retry("down"), 2, NOW, policy).outcome is Outcome.RETRY
    last = plan(DeliveryResult.retry("down"), 3, NOW, policy)
    assert last.outcome is Outcome.DEAD and "3 attempts" in last.detail


class Raising:
    alias = "broken"

    def __init__(self, error: Exception) -> None:
        self.error = error

    def send(self, notification: Notification) -> DeliveryResult:
        raise self.error

    def close(self) -> None:
        pass


def test_deliver_once_turns_a_channel_bug_into_a_retryable_result(
    caplog: pytest.LogCaptureFixture,
) -> None:
    result = deliver_once(notification(), Raising(KeyError("oops")))
    assert not result.ok and result.retryable and "KeyError" in result.detail
    assert "broken" in caplog.text
    assert "hgh-pt-0001" not in caplog.text  # no patient key in the logs


def test_deliver_once_keeps_the_decision_a_delivery_failure_carries() -> None:
    dead = deliver_once(notification(), Raising(DeliveryFailed("refused", retryable=False)))
    assert not dead.ok and not dead.retryable


def test_delivery_result_cannot_be_both_ok_and_retryable() -> None:
    with pytest.raises(ValueError, match="retryable"):
        DeliveryResult(ok=True, retryable=True, detail="contradiction")
