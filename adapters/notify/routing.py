"""Which channel aliases hear about a notification: by the patient's unit, plus the
escalation route when a flag is escalated."""

from collections.abc import Mapping, Sequence

from monitor.engine.model import Notification

ESCALATED = "escalated"


def route(
    notification: Notification,
    routes: Mapping[str, Sequence[str]],
    default: Sequence[str],
    escalation: Sequence[str],
) -> list[str]:
    """Channel aliases for ``notification``, each once, in configured order.

    ``routes`` maps a unit name (``Location.unit``, compared without regard to case or
    surrounding spaces) to its aliases; a notification without a unit, or from a unit not
    listed, goes to ``default``. An ``escalated`` event goes to the unit's aliases *and*
    the ``escalation`` aliases: the unit keeps seeing its own flag while someone more
    senior is told (our choice; common practice, no source).
    """
    by_unit = {unit.strip().casefold(): aliases for unit, aliases in routes.items()}
    unit = notification.location.unit if notification.location else None
    chosen = list(by_unit.get(unit.strip().casefold(), default) if unit else default)
    if notification.event == ESCALATED:
        chosen.extend(escalation)
    return list(dict.fromkeys(chosen))
