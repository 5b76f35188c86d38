"""One person, two feeds, learnt late: an HL7 gas keyed by MRN and FHIR oxygen charted
under a ``Patient/<id>`` reference become one patient when the FHIR Patient resource
(with that MRN as its identifier) arrives, and the gas is derived again with the FiO2.

Messages and resources are invented (Hollowmere General Hospital, MRN system
urn:oid:2.999.1.1.1). The expected P/F is PaO2 / FiO2 (reference sheet s.5):
68 mmHg on FiO2 0.40 charted by the record system is 170.
"""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from monitor.ingest import SourceContext, fhir_builder, inbound_from_fhir, inbound_from_hl7
from monitor.pipeline import Pipeline
from storage import derivations as derivations_store
from storage.db import open_database
from storage.readings import patient_keys
from storage.register import load_register
from tests import fhir_samples as fs
from tests import hl7_samples as hs

MRN = "HM100234"  # the patient of tests.hl7_samples.abg (invented)
RECEIVED = datetime(2026, 3, 15, 8, 50, tzinfo=UTC)


def _gas_without_fio2() -> bytes:
    return hs.message(
        hs.msh("LATE01"),
        hs.pid(MRN),
        hs.pv1(),
        hs.obr("F-20260315-0077"),
        hs.obx(1, "2703-7", "68", "mm[Hg]", text="PO2 arterial"),
        hs.obx(2, "2019-8", "44", "mm[Hg]", text="PCO2 arterial"),
        hs.spm(),
    ).encode()


def test_a_link_learnt_late_joins_the_patient_and_derives_the_gas_again(db_url: str) -> None:
    db = open_database(db_url)
    try:
        with db.begin(read_only=True) as conn:
            register = load_register(
                conn, SourceContext(patient_id_system=fs.MRN_SYSTEM).register_settings()
            )
        context = SourceContext(patient_id_system=fs.MRN_SYSTEM, register=register)
        pipeline = Pipeline(db)
        builder = fhir_builder(context, lambda: RECEIVED)

        # 1. The record system's FiO2 (40 %), charted 08:20 UTC under Patient/hg-late:
        #    nobody knows yet whose it is.
        fio2 = fs.quantity_obs(
            "hg-late-fio2",
            "3150-0",
            40,
            "%",
            pid="hg-late",
            eid=None,
            when="2026-03-15T08:20:00+00:00",
        )
        pipeline.accept(inbound_from_fhir(builder.read_all([fio2]), "ehr"), now=RECEIVED)
        # 2. The laboratory's gas, drawn 08:30 (OBR-7, site zone UTC), keyed by MRN.
        lab_context = SourceContext(patient_id_system=fs.MRN_SYSTEM, register=register, site_tz=UTC)
        pipeline.accept(
            inbound_from_hl7(_gas_without_fio2(), received_at=RECEIVED, context=lab_context),
            now=RECEIVED,
        )
        with db.begin(read_only=True) as conn:
            assert len(patient_keys(conn)) == 2  # two keys: not known to be one person
            gas = derivations_store.current_derivations(conn, MRN, include_estimated=False)
        assert gas and gas[0].derivation.fio2 is None  # no FiO2: no P/F yet

        # 3. The Patient resource arrives: Patient/hg-late has identifier MRN HM100234.
        person = fs.patient("hg-late", mrn=MRN)
        report = pipeline.accept(inbound_from_fhir(builder.read_all([person]), "ehr"), now=RECEIVED)
        assert report.derivations >= 1  # the gas was derived again
        with db.begin(read_only=True) as conn:
            keys = patient_keys(conn)
            gas = derivations_store.current_derivations(conn, MRN, include_estimated=False)
        assert keys == [MRN]  # one patient now, under the site's MRN
        assert gas[0].derivation.fio2 == pytest.approx(0.40)
        assert gas[0].derivation.pf_ratio == pytest.approx(68 / 0.40)
    finally:
        db.dispose()
