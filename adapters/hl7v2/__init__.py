"""HL7 v2 inbound: ORU^R01 results over MLLP or from files, to canonical Readings.

- ``parse``: one message to Readings (pure);
- ``framing``: MLLP frames (sans I/O);
- ``ack``: the error that knows its answer, and the ACK;
- ``mllp``: the asyncio listener;
- ``files``: messages from a file, streamed.
"""

from adapters.hl7v2.ack import Hl7Error, build_ack
from adapters.hl7v2.framing import MessageTooLarge, MllpFramer, frame
from adapters.hl7v2.parse import ParsedMessage, Rejection, parse_oru

__all__ = [
    "Hl7Error", "MessageTooLarge", "MllpFramer", "ParsedMessage", "Rejection",
    "build_ack", "frame", "parse_oru",
]
