"""HL7 v2 inbound: ORU^R01 results over MLLP or from files, to canonical Readings.

- ``parse``: one message to Readings (pure);
- ``framing``: MLLP frames (sans I/O);
- ``ack``: the error that knows its answer, and the ACK;
- ``mllp``: the asyncio listener;
- ``files``: messages from a file, streamed.
"""

from adapters.hl7v2.ack import Hl7Error, build_ack
from adapters.hl7v2.files import iter_hl7_file
from adapters.hl7v2.framing import MessageTooLarge, MllpFramer, frame
from adapters.hl7v2.mllp import AckDecision, MllpListener
from adapters.hl7v2.parse import Hl7Rejection, ParsedMessage, parse_oru

__all__ = [
    "AckDecision",
    "Hl7Error",
    "MessageTooLarge",
    "MllpFramer",
    "MllpListener",
    "ParsedMessage",
    "Hl7Rejection",
    "build_ack",
    "frame",
    "iter_hl7_file",
    "parse_oru",
]
