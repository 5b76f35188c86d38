"""The outbox's sending side: notifications written by the pipeline in the same
transaction as the flag change that caused them are sent from here.

- ``retry``: one send through one channel (never raises) and what follows it: sent,
  retried later with exponential backoff and jitter, or given up.
- ``dispatcher``: ``OutboxDispatcher`` claims what is due in storage, sends each item
  once and records the outcome.
"""

from monitor.outbox.dispatcher import OutboxDispatcher, RoundReport
from monitor.outbox.retry import (
    DispatchPolicy,
    Outcome,
    Plan,
    backoff_delay,
    deliver_once,
    next_attempt,
    plan,
)

__all__ = [
    "DispatchPolicy",
    "OutboxDispatcher",
    "Outcome",
    "Plan",
    "RoundReport",
    "backoff_delay",
    "deliver_once",
    "next_attempt",
    "plan",
]
