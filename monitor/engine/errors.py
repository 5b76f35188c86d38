"""The engine's exceptions.

Every error the core raises roots in ``MonitorError``::

    MonitorError
     +-- InvalidInput (ValueError)        an input to a formula is impossible or out of range
     |    +-- InvalidReading              a reading cannot stand as a canonical Reading
     +-- IllegalTransition (RuntimeError) the alert state machine was asked for a move it has not

Messages name the input and say what was wrong with it, e.g.
``fio2 must be a fraction in [0.21, 1.0], not 1.4``.
"""


class MonitorError(Exception):
    """Root of the engine's exceptions."""


class InvalidInput(MonitorError, ValueError):
    """An input is impossible or outside the range a formula is valid for."""

    def __init__(self, name: str, value: object, rule: str) -> None:
        self.name = name
        self.value = value
        self.rule = rule
        super().__init__(f"{name} {rule}, not {value!r}")


class InvalidReading(InvalidInput):
    """A reading cannot be accepted as a canonical Reading."""


class IllegalTransition(MonitorError, RuntimeError):
    """The alert state machine has no move for this event in this state."""

    def __init__(self, state: object, event: object) -> None:
        self.state = state
        self.event = event
        super().__init__(f"can't handle {event} in state {state}")
