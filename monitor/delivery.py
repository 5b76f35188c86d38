"""Moved to ``monitor.outbox.dispatcher``; this name is kept for existing imports."""

from monitor.outbox.dispatcher import OutboxDispatcher, RoundReport

__all__ = ["OutboxDispatcher", "RoundReport"]
