"""HL7 v2 acknowledgements (original mode): the error that knows its answer, and the ACK.

Acknowledgement codes (HL7 v2 Table 0008, original mode):

- ``AA`` accepted: the message was stored and needs no resending;
- ``AE`` error: the message itself has a problem (resending it unchanged fails again);
  gasgap keeps it in quarantine with the reason (MSA-3 and ERR);
- ``AR`` rejected: gasgap could not process it now (storage down or locked, ERR code
  207: resend later), or does not take this kind of message (type, event or version,
  ERR 200/201/203: kept in quarantine). Senders commonly retry AR.

ACK text is built from gasgap's own reasons only; ``safe_text`` also drops anything
that looks like a link or a database statement, should one slip into a reason.

Error codes in ERR are from HL7 Table 0357 (from memory, not checked against the
standard's text): 100 segment sequence error, 101 required field missing, 102 data
type error, 200 unsupported message type, 201 unsupported event code, 203 unsupported
version id, 207 application internal error.

The ACK is built by hand rather than with python-hl7's ``create_ack`` because it must
also answer messages that python-hl7 cannot parse: whatever MSH fields can be read
from the raw bytes are reused, the rest take defaults.
"""

import re
from collections.abc import Mapping
from dataclasses import dataclass

from monitor.engine.errors import MonitorError

ACK_CODES = frozenset({"AA", "AE", "AR"})
_DEFAULT_ENCODING_CHARS = "^~\\&"
_DEFAULT_VERSION = "2.5.1"
#: MSA-3 is 80 characters long in v2.3-2.5.1; the full reason goes in ERR as well.
_MSA_TEXT_MAX = 80
_ERR_TEXT_MAX = 250


class Hl7Error(MonitorError, ValueError):
    """A whole HL7 v2 message cannot be taken; ``ack_code`` is the answer to send.

    ``reason`` says which segment or field was wrong and how, never a patient
    identifier (it goes into logs and back to the sender). ``error_code`` is the
    HL7 Table 0357 code for ERR.
    """

    def __init__(self, reason: str, ack_code: str = "AE", error_code: str = "207") -> None:
        if ack_code not in ("AE", "AR"):
            raise ValueError(f"ack_code must be AE or AR for an error, not {ack_code!r}")
        self.reason = reason
        self.ack_code = ack_code
        self.error_code = error_code
        super().__init__(reason)


@dataclass(frozen=True, slots=True)
class Header:
    """The MSH fields an ACK needs, as far as they could be read from a raw message."""

    field_sep: str = "|"
    encoding_chars: str = _DEFAULT_ENCODING_CHARS
    sending_application: str = ""
    sending_facility: str = ""
    receiving_application: str = ""
    receiving_facility: str = ""
    trigger: str = ""
    control_id: str = ""
    processing_id: str = "P"
    version: str = _DEFAULT_VERSION


def recover_header(message: bytes | str | None) -> Header:
    """Read what can be read of MSH from a message that may be broken or undecodable.

    Never raises: a message without a usable MSH gives the default header (``|^~\\&``,
    version 2.5.1, empty control id).
    """
    if message is None:
        return Header()
    text = message.decode("latin-1") if isinstance(message, bytes) else message
    start = text.find("MSH")
    if start < 0 or len(text) < start + 8:
        return Header()
    first = text[start:].replace("\n", "\r").split("\r", 1)[0]
    if len(first) < 4:
        return Header()  # a bare "MSH" line: no separator to read
    sep = first[3]
    if sep.isalnum() or sep.isspace():
        return Header()
    fields = first.split(sep)
    enc = fields[1] if len(fields) > 1 else ""
    if len(enc) < 4 or sep in enc or any(c.isalnum() or c.isspace() for c in enc):
        enc = _DEFAULT_ENCODING_CHARS
    enc = enc[:4]

    def msh(n: int) -> str:  # MSH-n is fields[n - 1] because MSH-1 is the separator itself
        return fields[n - 1] if len(fields) >= n else ""

    def first_component(value: str) -> str:
        return value.split(enc[0], 1)[0].split(enc[1], 1)[0]

    msg_type = msh(9).split(enc[1], 1)[0].split(enc[0])
    version = first_component(msh(12)) or _DEFAULT_VERSION
    return Header(
        field_sep=sep,
        encoding_chars=enc,
        sending_application=msh(3).split(enc[1], 1)[0],
        sending_facility=msh(4).split(enc[1], 1)[0],
        receiving_application=msh(5).split(enc[1], 1)[0],
        receiving_facility=msh(6).split(enc[1], 1)[0],
        trigger=msg_type[1] if len(msg_type) > 1 else "",
        control_id=first_component(msh(10))[:199],
        processing_id=first_component(msh(11)) or "P",
        version=version if _looks_like_version(version) else _DEFAULT_VERSION,
    )


def _looks_like_version(version: str) -> bool:
    parts = version.split(".")
    return 2 <= len(parts) <= 3 and all(p.isdigit() and len(p) <= 2 for p in parts)


def escape_text(text: str, header: Header) -> str:
    """Escape free text for an HL7 field (HL7 v2 section 2.7 escape sequences)."""
    chars = header.encoding_chars
    comp, rep, esc, sub = chars[0], chars[1], chars[2], chars[3]
    replacements = [
        (esc, f"{esc}E{esc}"),
        (header.field_sep, f"{esc}F{esc}"),
        (comp, f"{esc}S{esc}"),
        (sub, f"{esc}T{esc}"),
        (rep, f"{esc}R{esc}"),
    ]
    out = []
    for char in " ".join(text.split()):  # no CR/LF/tabs in a field
        for plain, escaped in replacements:
            if char == plain:
                out.append(escaped)
                break
        else:
            out.append(char if char.isprintable() else "?")
    return "".join(out)


_LINK = re.compile(r"(?i)\b(?:https?|ftp|file)://\S*|\bwww\.\S+")
_DRIVER_TAIL = re.compile(r"(?is)\s*(\(Background on this error.*|\[SQL:.*|\[parameters:.*)$")


def safe_text(text: str) -> str:
    """``text`` without links or a database driver's statement dump (for MSA-3/ERR)."""
    return _LINK.sub("(link removed)", _DRIVER_TAIL.sub("", text)).strip()


#: Skipped-code labels meaning "this OBX had no code to read" (parse.py's counter keys).
_NO_CODE = "(no code)"


def unreadable_reason(skipped_codes: Mapping[str, int], readings: int, rejected: int) -> str | None:
    """Why a message must be kept whole and answered AE although nothing in it was
    refused: none of its OBX gave a reading or a rejection, and some had no readable
    OBX-3 code (an AA would drop them silently). None when the message was read (a
    message of other tests only, e.g. a potassium, is answered AA and ignored)."""
    if readings or rejected:
        return None
    unreadable = sum(
        n
        for code, n in skipped_codes.items()
        if code == _NO_CODE or not code.split("^", 1)[0].strip()
    )
    if not unreadable:
        return None
    return (
        f"no result could be read: {unreadable} OBX without an OBX-3 code (kept whole for review)"
    )


def ack_for_batch(*, stored: int, duplicates: int, quarantined: int) -> tuple[str, str]:
    """The answer for a committed message: AE when everything in it was refused (it is
    in quarantine), else AA. Returns (code, text)."""
    if quarantined and not stored and not duplicates:
        return "AE", f"{quarantined} result(s) refused; kept in quarantine for review"
    return "AA", ""


def _clip(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def build_ack(
    message: bytes | str | None,
    ack_code: str,
    text: str = "",
    *,
    control_id: str,
    error_code: str | None = None,
    timestamp: str = "",
) -> bytes:
    """The ACK for ``message``: MSH, MSA and, for AE/AR, ERR carrying the reason.

    ``control_id`` is the ACK's own MSH-10; MSA-2 echoes the message's MSH-10 (empty if
    it could not be read). ``timestamp`` (HL7 DTM) fills MSH-7 when given: this module
    reads no clock. Segments are separated by CR; the result is not MLLP-framed.
    """
    if ack_code not in ACK_CODES:
        raise ValueError(f"ack_code must be one of {sorted(ACK_CODES)}, not {ack_code!r}")
    h = recover_header(message)
    sep, comp = h.field_sep, h.encoding_chars[0]
    msg_type = f"ACK{comp}{h.trigger}{comp}ACK"  # MSH-9.3, the structure, names ACK
    if h.version == "2.3" and h.trigger:
        msg_type = f"ACK{comp}{h.trigger}"  # MSH-9.3 (message structure) exists from v2.3.1 on
    msh = sep.join(
        [
            "MSH",
            h.encoding_chars,
            escape_text(h.receiving_application, h),
            escape_text(h.receiving_facility, h),
            escape_text(h.sending_application, h),
            escape_text(h.sending_facility, h),
            timestamp,
            "",
            msg_type,
            escape_text(control_id, h),
            escape_text(h.processing_id, h),
            h.version,
        ]
    )
    text = safe_text(text)
    msa_text = escape_text(_clip(text, _MSA_TEXT_MAX), h)
    segments = [msh, sep.join(["MSA", ack_code, escape_text(h.control_id, h), msa_text])]
    if ack_code != "AA":
        code = error_code or ("200" if ack_code == "AR" else "207")
        segments.append(_err_segment(h, code, _clip(text, _ERR_TEXT_MAX)))
    return ("\r".join(segments) + "\r").encode("utf-8")


_ERROR_NAMES = {
    "100": "Segment sequence error",
    "101": "Required field missing",
    "102": "Data type error",
    "200": "Unsupported message type",
    "201": "Unsupported event code",
    "203": "Unsupported version id",
    "207": "Application internal error",
}


def _err_segment(h: Header, code: str, text: str) -> str:
    sep, comp, _rep, _esc, sub = h.field_sep, *h.encoding_chars[:4]
    name = _ERROR_NAMES.get(code, "Application internal error")
    if h.version.startswith(("2.3", "2.4")):
        # ERR-1 (ELD): segment^sequence^field^code identifying coded element (CE as subcomponents)
        return sep.join(["ERR", f"{comp}{comp}{comp}{code}{sub}{name}{sub}HL70357"])
    # v2.5+: ERR-3 HL7 error code (CWE), ERR-4 severity E, ERR-8 user message
    fields = [
        "ERR",
        "",
        "",
        f"{code}{comp}{name}{comp}HL70357",
        "E",
        "",
        "",
        "",
        escape_text(text, h),
    ]
    return sep.join(fields)
