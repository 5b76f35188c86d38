"""The outbox dispatcher: claim what is due, send it, record what happened.

One round: ``claim_due`` in its own short transaction (the claim is a lease, committed
before any network call, so other senders see it), then each item through its channel
(``monitor.outbox.retry.deliver_once``, which never raises), then ``mark_sent`` or
``mark_failed`` with the backoff ``monitor.outbox.retry.plan`` chose, for the whole
round in one short transaction after its deliveries. Order per patient and channel is
kept by storage's claim: an item is not handed out while an earlier one for the same
patient and channel is still pending.

An item whose channel alias is no longer configured is marked dead with the reason
(the configuration changed under a queued message; a person must look).
"""

from __future__ import annotations

import logging
import random
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime

from adapters.notify.base import Channel, DeliveryResult, log_ref
from monitor.metrics import Metrics
from monitor.outbox.retry import DispatchPolicy, Outcome, Plan, deliver_once, plan
from storage import outbox
from storage.db import Database

log = logging.getLogger("gasgap.delivery")


@dataclass
class RoundReport:
    claimed: int = 0
    sent: int = 0
    retrying: int = 0
    dead: int = 0


class OutboxDispatcher:
    """Drains the outbox through the configured channels."""

    def __init__(
        self,
        db: Database,
        channels: Mapping[str, Channel],
        *,
        clock: Callable[[], datetime],
        policy: DispatchPolicy | None = None,
        metrics: Metrics | None = None,
        batch_size: int = 50,
        lease_seconds: float = 60,
        rng: random.Random | None = None,
    ) -> None:
        self.db = db
        self.channels = dict(channels)
        self.clock = clock
        self.policy = policy or DispatchPolicy()
        self.metrics = metrics
        self.batch_size = batch_size
        self.lease_seconds = lease_seconds
        self._rng = rng

    def run_once(self) -> RoundReport:
        """Claim up to ``batch_size`` due items and try each once."""
        report = RoundReport()
        with self.db.begin() as conn:
            items = outbox.claim_due(conn, self.clock(), self.batch_size, self.lease_seconds)
        report.claimed = len(items)
        done = [self._deliver(item) for item in items]
        # One short transaction records the whole round: while a historical load keeps
        # the database busy, a mark per item would make each next delivery wait behind
        # it. (A crash before this commit sends the round again when its lease runs
        # out: at least once, as documented.)
        if done:
            with self.db.begin() as conn:
                for item, step, now in done:
                    if step.outcome is Outcome.SENT:
                        outbox.mark_sent(conn, item.id, now)
                    else:
                        outbox.mark_failed(
                            conn,
                            item.id,
                            now,
                            step.detail,
                            step.retry_at or now,
                            dead=step.outcome is Outcome.DEAD,
                        )
        for item, step, _ in done:
            self._count(item, step.outcome, report)
            self._log(item, step)
        return report

    def drain(self, max_rounds: int = 20) -> RoundReport:
        """Rounds until nothing is due (or ``max_rounds``), for a scheduled run.

        A round hands out at most one item per patient and channel (order per patient
        is kept by the claim), so a short round does not mean the outbox is empty: only
        a round that claims nothing, or one whose every item failed, ends the drain.
        """
        total = RoundReport()
        for _ in range(max_rounds):
            one = self.run_once()
            total.claimed += one.claimed
            total.sent += one.sent
            total.retrying += one.retrying
            total.dead += one.dead
            if one.claimed == 0 or one.sent == 0:
                break
        return total

    def _deliver(self, item: outbox.OutboxItem) -> tuple[outbox.OutboxItem, Plan, datetime]:
        """Try ``item`` once; returns what to record (the item, the plan, when)."""
        channel = self.channels.get(item.channel)
        if channel is None:
            result = DeliveryResult.dead(f"channel alias {item.channel!r} is not configured")
        else:
            result = deliver_once(item.notification, channel)
        now = self.clock()
        return item, plan(result, item.attempts, now, self.policy, rng=self._rng), now

    def _log(self, item: outbox.OutboxItem, step: Plan) -> None:
        ref = log_ref(item.notification)
        if step.outcome is Outcome.SENT:
            log.info("notification %s sent via %s", ref, item.channel)
        elif step.outcome is Outcome.RETRY:
            log.warning(
                "notification %s via %s failed (attempt %d), retry at %s: %s",
                ref,
                item.channel,
                item.attempts,
                step.retry_at,
                step.detail,
            )
        else:
            log.error(
                "notification %s via %s given up after %d attempts: %s",
                ref,
                item.channel,
                item.attempts,
                step.detail,
            )

    def _count(self, item: outbox.OutboxItem, outcome: Outcome, report: RoundReport) -> None:
        if outcome is Outcome.SENT:
            report.sent += 1
        elif outcome is Outcome.RETRY:
            report.retrying += 1
        else:
            report.dead += 1
        if self.metrics is not None:
            self.metrics.deliveries.labels(channel=item.channel, outcome=outcome.value).inc()
            if outcome is not Outcome.SENT:
                self.metrics.delivery_failures.labels(channel=item.channel).inc()

    def close(self) -> None:
        for channel in self.channels.values():
            try:
                channel.close()
            except Exception:  # closing must not stop the shutdown
                log.exception("channel %s did not close cleanly", channel.alias)
