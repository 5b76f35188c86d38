"""The engine's exceptions, and the root of every gasgap exception.

Every error gasgap raises on purpose roots in ``MonitorError``, so a caller may catch
them all in one place (the CLI prints one line and exits 1). Each keeps the built-in
class it stood for before (in brackets), so ``except ValueError`` still works. The
engine's own, here::

    MonitorError
     +-- InvalidInput (ValueError)        an input to a formula is impossible or out of range
     |    +-- InvalidReading              a reading cannot stand as a canonical Reading
     +-- IllegalTransition (RuntimeError) the alert state machine was asked for a move it has not
     +-- Unavailable                      something the shell needs cannot be used now: retry

and the roots the other rooms hang on it, where each lives::

     +-- StorageError                     storage.errors: storage refused or failed
     |    +-- StorageUnavailable          the database cannot be used now (also Unavailable)
     |    +-- DuplicateOpenAlert (ValueError)  storage.alerts: a second open flag
     +-- Hl7Error (ValueError)            adapters.hl7v2.ack: a message refused, with its ACK
     |    +-- MessageTooLarge             adapters.hl7v2.framing
     +-- ObservationRefused (ValueError)  adapters.fhir.observations: a resource unreadable
     +-- FhirSourceError (RuntimeError)   adapters.fhir.poller: a FHIR server not read
     +-- HookPayloadError (ValueError)    adapters.fhir.subscription: a hook body unreadable
     +-- BulkExportError (RuntimeError)   adapters.fhir.bulk: a bulk export cannot go on
     +-- SmartAuthError (RuntimeError)    adapters.fhir.smart: no access token
     +-- SmartKeyError (ValueError)       adapters.fhir.smart: a private key unusable
     +-- DeliveryFailed                   adapters.notify.base: a channel's send failed
     +-- ChannelConfigError (ValueError)  adapters.notify.base: a channel cannot be built
     +-- ConfigError (ValueError)         monitor.config.base: the site file is wrong
     +-- FileKindError (ValueError)       monitor.ingest: a file neither HL7 v2 nor FHIR
     +-- UsageError                       monitor.cli.common: a command's option is wrong
     +-- CommandError                     the ``gasgap fhir`` commands: one line for stderr

Messages name the input and say what was wrong with it, e.g.
``fio2 must be a fraction in [0.21, 1.0], not 1.4``.
"""


class MonitorError(Exception):
    """Root of the engine's exceptions."""


class Unavailable(MonitorError):
    """Something the shell needs (the database) cannot be used now; a later attempt may
    not meet it. Adapters recognise it without importing the room that raised it (an
    MLLP sender is told to resend, a drop folder keeps its files for the next scan)."""


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
