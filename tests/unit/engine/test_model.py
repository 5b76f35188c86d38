"""The canonical Reading refuses what no store could keep, naming the field."""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime

import pytest

from monitor.engine.errors import InvalidReading
from monitor.engine.model import Kind, Location, Reading, known_time, stored_reading

AT = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)
GOOD = Reading(
    patient_key="HGH-3001",
    kind=Kind.PAO2,
    value=72.0,
    effective_at=AT,
    received_at=AT,
    source_system="lab",
    logical_id="l1",
    delivery_id="d1",
)


@pytest.mark.parametrize("field", ["patient_key", "original_value", "code", "panel_id"])
def test_a_nul_character_in_text_is_refused_with_the_field_named(field: str) -> None:
    with pytest.raises(InvalidReading) as caught:
        replace(GOOD, **{field: "HGH\x003001"})
    assert caught.value.name == field and "NUL" in str(caught.value)


def test_a_nul_in_the_location_is_refused() -> None:
    with pytest.raises(InvalidReading, match="location"):
        replace(GOOD, location=Location(unit="ICU\x00North"))


@pytest.mark.parametrize(
    ("kind", "value"), [(Kind.PAO2, 4000.0), (Kind.FIO2, 1.4), (Kind.BODY_TEMPERATURE, 50.0)]
)
def test_values_outside_any_physiology_are_refused(kind: Kind, value: float) -> None:
    # "PaO2 of 4000" is the issue's own example of a value out of any physiological range.
    with pytest.raises(InvalidReading, match=str(kind)):
        replace(GOOD, kind=kind, value=value, unit="")


def test_naive_times_are_refused() -> None:
    with pytest.raises(InvalidReading, match="effective_at"):
        replace(GOOD, effective_at=datetime(2026, 3, 2, 8, 0))


def test_a_stored_reading_is_the_reading_that_was_stored() -> None:
    fields = {name: getattr(GOOD, name) for name in Reading.__dataclass_fields__}
    assert stored_reading(**fields) == GOOD
    # a row kept without its unit gets the canonical one, as Reading(...) gives it
    assert stored_reading(**(fields | {"unit": ""})).unit == GOOD.unit == "mm[Hg]"


def test_a_stored_reading_needs_every_field_and_no_other() -> None:
    fields = {name: getattr(GOOD, name) for name in Reading.__dataclass_fields__}
    with pytest.raises(TypeError, match="fields"):
        stored_reading(**{k: v for k, v in fields.items() if k != "known_at"})
    with pytest.raises(TypeError, match="fields"):
        stored_reading(**fields, ward="ICU-North")


def test_a_known_time_is_the_stated_one_never_after_receipt() -> None:
    later = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
    assert known_time(AT, later) == AT
    assert known_time(later, AT) == AT  # a clock that runs ahead
    assert known_time(None, AT) == AT
