"""The lean models read what fhir.resources (the conformance oracle, R4B models for
R4) reads, for random valid Observations (hypothesis); the unit factors agree with
pint (reference sheet section 10, [COMP] Pint 0.25.3)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import pint
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adapters.codes import CodeTable
from adapters.fhir.observations import FhirReadingBuilder
from adapters.fhir.strict import oracle_observation, validation_problem
from monitor.engine.model import Kind
from tests import fhir_samples as s

UREG = pint.UnitRegistry()
CODES = CodeTable.load()
RECEIVED = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)

# code, unit, pint unit or None (None: no unit conversion to check), value range
QUANTITIES = [
    ("2703-7", "mm[Hg]", "mmHg", (20.0, 600.0)),
    ("2703-7", "kPa", "kPa", (3.0, 80.0)),
    ("2019-8", "kPa", "kPa", (2.0, 20.0)),
    ("2019-8", "mm[Hg]", "mmHg", (15.0, 120.0)),
    ("3150-0", "%", None, (21.0, 100.0)),
    ("8310-5", "Cel", None, (30.0, 42.0)),
    ("76248-4", "cm[H2O]", None, (0.0, 30.0)),
]


@st.composite
def observations(draw: st.DrawFn) -> dict:
    code, unit, _, (low, high) = draw(st.sampled_from(QUANTITIES))
    value = draw(st.floats(low, high, allow_nan=False).map(lambda v: round(v, 2)))
    offset_min = draw(st.integers(-12 * 60, 14 * 60))
    base = datetime(2026, 1, 1, tzinfo=UTC) + timedelta(minutes=draw(st.integers(0, 525_000)))
    when = base.astimezone(timezone(timedelta(minutes=offset_min)))
    status = draw(st.sampled_from(["final", "preliminary", "amended", "corrected"]))
    obs = s.quantity_obs(
        draw(st.from_regex(r"[a-z0-9]{1,20}", fullmatch=True)),
        code,
        value,
        unit,
        status=status,
        when=when.isoformat(),
        eid=None,
        version=draw(st.none() | st.integers(1, 99).map(str)),
    )
    if draw(st.booleans()):
        obs["effectivePeriod"] = {"start": obs.pop("effectiveDateTime")}
    return obs


@settings(max_examples=150, suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(observations())
def test_lean_and_strict_paths_read_the_same_values(obs: dict) -> None:
    assert validation_problem(obs) is None  # the generator makes valid FHIR
    oracle = oracle_observation(obs)
    lean = FhirReadingBuilder(CODES, source_system="h", received_at=RECEIVED).read(obs)
    strict = FhirReadingBuilder(CODES, source_system="h", received_at=RECEIVED, strict=True).read(
        obs
    )
    assert not lean.rejections and not strict.rejections
    assert lean.readings == strict.readings
    (reading,) = lean.readings
    assert float(reading.original_value) == oracle.value
    assert reading.original_unit == oracle.unit_code
    assert (reading.code_system, reading.code) == oracle.codes[0]
    assert oracle.effective is not None and reading.effective_at == oracle.effective
    assert reading.status.value == {"amended": "corrected"}.get(oracle.status, oracle.status)
    assert oracle.subject is not None
    assert reading.patient_key == f"ref:h:{oracle.subject}"  # provisional: no Patient read


@pytest.mark.parametrize(
    ("code", "unit", "pint_unit", "value"),
    [(q[0], q[1], q[2], v) for q in QUANTITIES if q[2] for v in (q[3][0], sum(q[3]) / 2)],
)
def test_pressures_match_pint(code: str, unit: str, pint_unit: str, value: float) -> None:
    obs = s.quantity_obs("p1", code, value, unit, eid=None)
    (reading,) = (
        FhirReadingBuilder(CODES, source_system="h", received_at=RECEIVED).read(obs).readings
    )
    assert reading.kind in (Kind.PAO2, Kind.PACO2)
    assert reading.value == pytest.approx(
        UREG.Quantity(value, pint_unit).to("mmHg").magnitude, rel=1e-9
    )


def test_strict_validation_names_what_is_wrong() -> None:
    obs = s.quantity_obs("o1", "2703-7", 9.0, "kPa")
    obs["valueQuantity"]["value"] = {"not": "a number"}
    problem = validation_problem(obs)
    assert problem is not None and "valueQuantity" in problem
    assert (
        validation_problem({"resourceType": "Teapot"})
        == "resourceType 'Teapot' is not a FHIR resource type"
    )
