"""One contract, every channel: a peer that is down gives retryable failures; when it
comes back, a retry loop (``monitor.outbox.retry``) delivers every notification exactly once,
counted by idempotency key at the real receiver."""

import json
import logging
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from random import Random

import pytest

from adapters.notify import Channel, build_channel
from adapters.notify.base import log_ref
from monitor.engine.model import Notification
from monitor.outbox.retry import DispatchPolicy, Outcome, deliver_once, plan
from tests.integration.notify.conftest import (
    HttpReceiver,
    SmtpPeer,
    _smtp_peer,
    email_options,
    make_notification,
)

ROUNDS_WHILE_DOWN = 3
MAX_ROUNDS_AFTER = 5
NOTIFICATIONS = [make_notification(i) for i in range(1, 6)]


class LogCounter(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        from monitor.logs import JsonFormatter

        self.lines.append(JsonFormatter().format(record))


@dataclass
class Peer:
    """A channel with its receiver. ``can_go_down`` is False for the log: it has no peer,
    and its contract is that it always delivers."""

    channel: Channel
    down: Callable[[], None]
    up: Callable[[], None]
    keys: Callable[[], Counter[str]]
    can_go_down: bool = True


@pytest.fixture(params=["webhook", "email", "log"], ids=["webhook", "email", "log"])
def peer(request: pytest.FixtureRequest) -> Iterator[Peer]:
    if request.param == "webhook":
        receiver = HttpReceiver()
        receiver.up()
        channel = build_channel(
            "contract-hook", {"type": "webhook", "url": receiver.url, "timeout_s": 2}
        )
        yield Peer(channel, receiver.down, receiver.up, receiver.keys)
        receiver.down()
    elif request.param == "email":
        smtp: SmtpPeer = _smtp_peer(auth=False)
        smtp.up()
        channel = build_channel("contract-mail", email_options(smtp.port))
        yield Peer(channel, smtp.down, smtp.up, smtp.recorder.keys)
        smtp.down()
    else:
        handler = LogCounter()
        logger = logging.getLogger("gasgap.notify.contract-log")
        logger.addHandler(handler)
        channel = build_channel("contract-log", {"type": "log"})

        # The log line carries a digest of the key, never the key itself.
        ref_to_key = {log_ref(n): n.idempotency_key for n in NOTIFICATIONS}

        def keys() -> Counter[str]:
            return Counter(ref_to_key[json.loads(line)["flag_ref"]] for line in handler.lines)

        yield Peer(channel, lambda: None, lambda: None, keys, can_go_down=False)
        logger.removeHandler(handler)
    channel.close()


def _round(
    pending: dict[str, tuple[Notification, int]], channel: Channel, now: datetime
) -> list[Outcome]:
    """One pass of a retry loop over the pending items (what the outbox loop does)."""
    outcomes = []
    policy = DispatchPolicy(max_attempts=20)
    for key, (n, attempts) in list(pending.items()):
        step = plan(deliver_once(n, channel), attempts + 1, now, policy, rng=Random(7))
        outcomes.append(step.outcome)
        if step.outcome is Outcome.RETRY:
            pending[key] = (n, attempts + 1)
        else:
            del pending[key]
    return outcomes


def test_channel_down_then_back_delivers_each_notification_exactly_once(peer: Peer) -> None:
    pending = {n.idempotency_key: (n, 0) for n in NOTIFICATIONS}
    now = datetime(2026, 3, 14, 7, 0, tzinfo=UTC)

    peer.down()
    for _ in range(ROUNDS_WHILE_DOWN):
        outcomes = _round(pending, peer.channel, now)
        if peer.can_go_down:
            assert outcomes and all(o is Outcome.RETRY for o in outcomes)
        now += timedelta(minutes=5)
    if peer.can_go_down:
        assert len(pending) == len(NOTIFICATIONS)
        assert sum(peer.keys().values()) == 0

    peer.up()
    for _ in range(MAX_ROUNDS_AFTER):
        if not pending:
            break
        _round(pending, peer.channel, now)
        now += timedelta(minutes=5)

    assert not pending
    assert peer.keys() == Counter({n.idempotency_key: 1 for n in NOTIFICATIONS})
