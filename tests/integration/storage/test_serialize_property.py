"""Property: whatever a Derivation holds, storage gives it back field for field.

Doubles are stored as REAL (SQLite) and double precision (PostgreSQL), both IEEE 754
binary64, so every finite value must come back bit for bit.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.engine.model import (
    Derivation,
    FiO2Source,
    InputUsed,
    Location,
    QualityFlag,
    Specimen,
)
from storage.db import Database
from storage.derivations import derivation_history, save_derivation
from storage.serialize import DERIVATION_NUMBERS
from tests.integration.storage import T0, database  # noqa: F401

numbers = st.none() | st.floats(allow_nan=False, allow_infinity=False)
times = st.datetimes(
    min_value=datetime(2000, 1, 1),
    max_value=datetime(2099, 12, 31),
    timezones=st.sampled_from([UTC, timezone(timedelta(hours=2)), timezone(timedelta(hours=-7))]),
)
text = st.text(
    st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=20
)
inputs = st.builds(
    InputUsed,
    role=text,
    value=st.none() | st.floats(allow_nan=False, allow_infinity=False) | text,
    reason=text,
    reading_id=st.none() | text.filter(bool),
    at=st.none() | times,
)


@st.composite
def derivations(draw: st.DrawFn) -> Derivation:
    return Derivation(
        patient_key="HMG-000505",
        sample_id=draw(text.filter(bool)),
        drawn_at=draw(times),
        specimen=draw(st.sampled_from(list(Specimen))),
        equation=draw(text),
        fio2_source=draw(st.sampled_from(list(FiO2Source))),
        berlin_band=draw(st.none() | text),
        **{name: draw(numbers) for name in DERIVATION_NUMBERS},
        # A Location with no field set is stored as "no location" (documented in
        # storage.serialize), so the strategy leaves it out.
        location=draw(
            st.none()
            | st.builds(Location, st.none() | text, st.none() | text, st.none() | text).filter(
                lambda loc: loc.label() != "unknown location"
            )
        ),
        estimated=draw(st.booleans()),
        preliminary=draw(st.booleans()),
        constants=draw(
            st.dictionaries(
                text, st.floats(allow_nan=False, allow_infinity=False) | text, max_size=3
            )
        ),
        inputs=tuple(draw(st.lists(inputs, max_size=4))),
        flags=frozenset(draw(st.sets(st.sampled_from(list(QualityFlag))))),
    )


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(original=derivations())
def test_any_derivation_round_trips_field_for_field(
    database: Database, original: Derivation
) -> None:
    with database.engine.connect() as conn:
        transaction = conn.begin()
        try:
            save_derivation(conn, original, at=T0, reason="property")
            [stored] = derivation_history(conn, original.patient_key, original.sample_id)
            again = save_derivation(conn, stored.derivation, at=T0, reason="unchanged")
        finally:
            transaction.rollback()
    assert stored.derivation == original
    assert stored.derivation.drawn_at.utcoffset() == timedelta(0)
    # What came back is recognised as the same content: no spurious new version.
    assert not again.changed
