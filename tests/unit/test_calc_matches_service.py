"""`gasgap calc` and the service decide alike (issue 14, point 2).

For any gas, the indices ``monitor.calc`` prints are the indices the service derives
when the same values arrive as readings of one arterial panel with a charted FiO2, at a
site configured at the same elevation: which indices apply, the altitude-adjusted P/F
that counts, the Berlin band and the PaO2-above-PAO2 margin are decided once. The
published check values themselves are tested in tests/unit/test_cli_calc.py and
tests/unit/engine/test_derive.py; this file checks only that the two paths agree.
"""

from __future__ import annotations

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from monitor import calc
from monitor.engine.derive import DerivationSettings, derive
from monitor.engine.errors import InvalidInput
from monitor.engine.model import Kind, QualityFlag, Reading
from monitor.engine.pairing import PairingSettings, pair
from tests.unit.engine.readings_factory import T0, fio2, lab, minutes, pao2, reading

#: Keys that are fields of the service's Derivation (the imputed PaO2 is an estimate the
#: service makes for SpO2 readings between gases, tested in test_derive.py).
SHARED = [k for k in calc.KEYS if k != "pao2_imputed_from_spo2"]


def _service(gas: calc.GasInput) -> dict[str, object]:
    assert gas.pao2 is not None and gas.fio2 is not None
    context: list[Reading] = [fio2(gas.fio2, T0 - minutes(30))]
    for kind, value in (
        (Kind.PACO2, gas.paco2),
        (Kind.SAO2, gas.sao2),
        (Kind.HAEMOGLOBIN, gas.haemoglobin),
    ):
        if value is not None:
            context.append(lab(kind, value))
    for kind, value in (
        (Kind.PEEP, gas.peep),
        (Kind.MEAN_AIRWAY_PRESSURE, gas.mean_airway_pressure),
        (Kind.SPO2, gas.spo2),
    ):
        if value is not None:
            context.append(reading(kind, value, T0 - minutes(5)))
    sample = pao2(gas.pao2)
    snapshot = pair(sample, [sample, *context], PairingSettings(site_elevation_m=gas.elevation_m))
    d = derive(snapshot, DerivationSettings())
    return {key: getattr(d, key) for key in SHARED} | {"flags": d.flags}


gases = st.builds(
    calc.GasInput,
    pao2=st.floats(30.0, 600.0),
    paco2=st.one_of(st.none(), st.floats(15.0, 120.0)),
    fio2=st.floats(0.21, 1.0),
    elevation_m=st.one_of(st.none(), st.floats(0.0, 4000.0)),
    spo2=st.one_of(st.none(), st.floats(70.0, 100.0)),
    peep=st.one_of(st.none(), st.floats(0.0, 20.0)),
    mean_airway_pressure=st.one_of(st.none(), st.floats(5.0, 30.0)),
    haemoglobin=st.one_of(st.none(), st.floats(5.0, 20.0)),
    sao2=st.one_of(st.none(), st.floats(60.0, 100.0)),
)


@settings(max_examples=200, deadline=None)
@given(gases)
# Either side of the PaO2-above-PAO2 margin (10 mmHg, common practice, no source): PAO2
# 101.8 on room air at 760 with PaCO2 40 (reference sheet section 1), so 111 and 112.
@example(calc.GasInput(pao2=111.0, paco2=40.0, fio2=0.21))
@example(calc.GasInput(pao2=112.0, paco2=40.0, fio2=0.21))
# Either side of the altitude adjustment (Berlin adjusts above 1000 m, PB 674 mmHg).
@example(calc.GasInput(pao2=95.0, paco2=40.0, fio2=0.5, peep=8.0, elevation_m=990.0))
@example(calc.GasInput(pao2=95.0, paco2=40.0, fio2=0.5, peep=8.0, elevation_m=1010.0))
def test_calc_gives_the_services_indices_for_any_gas(gas: calc.GasInput) -> None:
    service = _service(gas)
    try:
        result = calc.calculate(gas)
    except InvalidInput:
        # calc refuses what the service keeps but never acts on: a PAO2 at or below
        # zero (PaO2 then above it) or a formula's refusal, which the service notes.
        assert (
            service["alveolar_po2"] is None or QualityFlag.PAO2_ABOVE_ALVEOLAR in service["flags"]
        )  # type: ignore[operator]
        return
    for key in SHARED:
        theirs, ours = service[key], result.values[key]
        if isinstance(theirs, float):
            assert ours == pytest.approx(theirs, rel=1e-12), key
        else:
            assert ours == theirs, key
    margin_flag = str(QualityFlag.PAO2_ABOVE_ALVEOLAR)
    assert (margin_flag in result.flags) is (
        QualityFlag.PAO2_ABOVE_ALVEOLAR in service["flags"]  # type: ignore[operator]
    )


def test_o2_content_needs_a_measured_sao2_as_in_the_service() -> None:
    # CaO2 = 1.34 x Hb x SaO2 + 0.003 x PaO2 (reference sheet section 9, Hufner 1.34 and
    # 0.003 mL/dL/mmHg): Hb 15, SaO2 98 %, PaO2 100 -> 19.698 + 0.3 = 19.998 mL/dL.
    measured = calc.calculate(calc.GasInput(pao2=100.0, fio2=0.21, haemoglobin=15.0, sao2=98.0))
    assert measured.values["arterial_o2_content"] == pytest.approx(19.998, abs=1e-3)
    # An SpO2 is never put in the SaO2's place (calc once did; the service never did).
    pulse = calc.calculate(calc.GasInput(pao2=100.0, fio2=0.21, haemoglobin=15.0, spo2=98.0))
    assert pulse.values["arterial_o2_content"] is None
