"""Coverage-guided fuzzing (atheris, libFuzzer) of the two readers every outside byte
goes through: ``parse_oru`` (HL7 v2) and the FHIR reading builder.

The contract checked for every input:
- ``parse_oru`` returns a parsed message or raises ``Hl7Error`` (AE/AR with a reason),
  never anything else;
- ``FhirReadingBuilder.read`` never raises for any JSON object: a bad resource becomes
  a rejection with a reason.

The first input byte picks the reader (even: HL7, odd: FHIR). Run bounded, e.g.
``python tests/reliability/fuzz_atheris.py -runs=20000 -max_total_time=30 CORPUS``;
``test_hostile_input.py`` does that when atheris is installed. Seeds are the invented
Hollowmere samples in tests/hl7_samples.py and tests/fhir_samples.py.
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import atheris

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

with atheris.instrument_imports(include=["adapters"]):
    from adapters.codes import CodeTable
    from adapters.fhir.observations import FhirReadingBuilder
    from adapters.hl7v2 import Hl7Error, parse_oru

CODES = CodeTable.load()
RECEIVED = datetime(2026, 3, 15, 9, 0, tzinfo=UTC)
SITE_TZ = timezone(timedelta(hours=-7))
MRN_SYSTEM = "urn:oid:2.999.1.1.1"


def _hl7(data: bytes) -> None:
    try:
        parse_oru(
            data,
            received_at=RECEIVED,
            codes=CODES,
            source_system="fuzz",
            site_tz=SITE_TZ,
            patient_id_system=MRN_SYSTEM,
        )
    except Hl7Error as exc:
        if exc.ack_code not in ("AE", "AR") or not exc.reason:
            raise AssertionError(f"Hl7Error without a proper answer: {exc!r}") from exc


def _fhir(data: bytes) -> None:
    try:
        resource = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return
    if not isinstance(resource, dict):
        return
    builder = FhirReadingBuilder(
        CODES, source_system="fuzz", patient_id_system=MRN_SYSTEM, received_at_fn=lambda: RECEIVED
    )
    batch = builder.read(resource)
    for rejection in batch.rejections:
        if not rejection.reason:
            raise AssertionError("a FHIR rejection without a reason")


def test_one_input(data: bytes) -> None:
    if not data:
        return
    if data[0] % 2 == 0:
        _hl7(data[1:])
    else:
        _fhir(data[1:])


def write_seeds(folder: Path) -> None:
    """The seed corpus: invented HL7 samples (prefix 0) and FHIR resources (prefix 1)."""
    from tests import fhir_samples as fs
    from tests import hl7_samples as hs

    folder.mkdir(parents=True, exist_ok=True)
    hl7 = [hs.ABG_251, hs.ABG_KPA_23, hs.VENOUS_SPM, hs.PULSE_OX, hs.VENT, hs.MIXED]
    fhir = [
        fs.patient(),
        fs.encounter(),
        fs.quantity_obs("s1", "2703-7", 9.1, "kPa"),
        fs.gas_panel_with_components(),
        fs.spo2_with_flow(),
        fs.device_obs(),
        fs.venous_po2(),
    ]
    for i, text in enumerate(hl7):
        (folder / f"hl7-{i}").write_bytes(b"\x00" + text.encode())
    for i, resource in enumerate(fhir):
        (folder / f"fhir-{i}").write_bytes(b"\x01" + json.dumps(resource).encode())


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--seeds":
        write_seeds(Path(sys.argv[2]))
        sys.exit(0)
    atheris.Setup(sys.argv, test_one_input)
    atheris.Fuzz()
