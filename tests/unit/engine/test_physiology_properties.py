"""Rules of the physiology core that hold for all inputs (hypothesis)."""

from __future__ import annotations

import pytest
from hypothesis import assume, given
from hypothesis import strategies as st

from monitor.engine import physiology as phys
from monitor.engine.errors import InvalidInput

fio2s = st.floats(0.21, 1.0)
pressures = st.floats(400.0, 800.0)
paco2s = st.floats(10.0, 120.0)
rqs = st.floats(0.6, 1.3)


@given(f1=fio2s, f2=fio2s, paco2=paco2s, pb=pressures, rq=rqs)
def test_alveolar_po2_rises_with_fio2(
    f1: float, f2: float, paco2: float, pb: float, rq: float
) -> None:
    low, high = sorted((f1, f2))
    assume(high - low > 1e-6)
    for eq in phys.Equation:
        assert phys.alveolar_po2(high, paco2, pb, 47, rq, eq) > phys.alveolar_po2(
            low, paco2, pb, 47, rq, eq
        )


@given(fio2=fio2s, paco2=paco2s, p1=pressures, p2=pressures, rq=rqs)
def test_alveolar_po2_rises_with_pressure(
    fio2: float, paco2: float, p1: float, p2: float, rq: float
) -> None:
    low, high = sorted((p1, p2))
    assume(high - low > 1e-6)
    assert phys.alveolar_po2(fio2, paco2, high, 47, rq) > phys.alveolar_po2(
        fio2, paco2, low, 47, rq
    )


@given(fio2=fio2s, c1=paco2s, c2=paco2s, pb=pressures, rq=rqs)
def test_alveolar_po2_falls_with_paco2(
    fio2: float, c1: float, c2: float, pb: float, rq: float
) -> None:
    low, high = sorted((c1, c2))
    assume(high - low > 1e-6)
    assume(fio2 < 1.0 - 1e-9)  # at FiO2 1 the equation still falls: PIO2 - PaCO2
    assert phys.alveolar_po2(fio2, high, pb, 47, rq) < phys.alveolar_po2(fio2, low, pb, 47, rq)


@given(fio2=fio2s, paco2=paco2s, pb=pressures)
def test_full_and_simplified_agree_at_rq_one(fio2: float, paco2: float, pb: float) -> None:
    full = phys.alveolar_po2(fio2, paco2, pb, 47, 1.0, "full")
    simplified = phys.alveolar_po2(fio2, paco2, pb, 47, 1.0, "simplified")
    assert full == pytest.approx(simplified, abs=1e-9)


@given(paco2=paco2s, pb=pressures, rq=rqs)
def test_full_form_at_pure_oxygen_is_pio2_minus_paco2(paco2: float, pb: float, rq: float) -> None:
    # Sheet s.1: at FiO2 = 1.0 the full form reduces to PIO2 - PaCO2.
    full = phys.alveolar_po2(1.0, paco2, pb, 47, rq, "full")
    assert full == pytest.approx(phys.inspired_po2(1.0, pb, 47) - paco2, abs=1e-9)


@given(fio2=fio2s, paco2=paco2s, pb=pressures, rq=st.floats(0.6, 0.999))
def test_simplified_under_reads_by_the_correction_term(
    fio2: float, paco2: float, pb: float, rq: float
) -> None:
    # Sheet s.1: F = PaCO2 FiO2 (1 - R) / R.
    full = phys.alveolar_po2(fio2, paco2, pb, 47, rq, "full")
    simplified = phys.alveolar_po2(fio2, paco2, pb, 47, rq, "simplified")
    assert full - simplified == pytest.approx(paco2 * fio2 * (1 - rq) / rq, abs=1e-9)


@given(so2=st.floats(1.0, 99.9))
def test_severinghaus_inverse_round_trips(so2: float) -> None:
    assert phys.so2_from_po2(phys.po2_from_so2(so2)) == pytest.approx(so2, abs=1e-6)


@given(po2=st.floats(5.0, 700.0))
def test_severinghaus_forward_then_inverse_round_trips(po2: float) -> None:
    s = phys.so2_from_po2(po2)
    assume(s < 99.999)  # the curve is flat up there; the inverse loses precision
    assert phys.po2_from_so2(s) == pytest.approx(po2, rel=1e-5)


@given(t1=st.floats(25, 45), t2=st.floats(25, 45))
def test_water_vapour_rises_with_temperature(t1: float, t2: float) -> None:
    low, high = sorted((t1, t2))
    assume(high - low > 1e-6)
    assert phys.water_vapour_pressure(high) > phys.water_vapour_pressure(low)


@given(z1=st.floats(0, 5000), z2=st.floats(0, 5000))
def test_pressure_falls_with_elevation(z1: float, z2: float) -> None:
    low, high = sorted((z1, z2))
    assume(high - low > 1e-3)
    assert phys.barometric_pressure_at_elevation(high) < phys.barometric_pressure_at_elevation(low)


@given(pf=st.floats(20, 700), pb=st.floats(400, 800))
def test_adjusted_ratio_never_lowers_pf_at_altitude(pf: float, pb: float) -> None:
    adjusted = phys.pf_ratio_altitude_adjusted(pf, pb)
    if pb < 760:
        assert adjusted > pf
    elif pb > 760:
        assert adjusted < pf
    else:
        assert adjusted == pytest.approx(pf, rel=1e-12)


# The floor is 0.209 (20.9 %, room air as often written; issue 12 point 9).
@given(bad=st.one_of(st.floats(max_value=0.20899), st.floats(min_value=1.0001)))
def test_fio2_outside_range_is_refused_with_its_name(bad: float) -> None:
    with pytest.raises(InvalidInput) as caught:
        phys.pf_ratio(80, bad)
    assert caught.value.name == "fio2"


@given(fio2=fio2s, pb=pressures, extra=st.floats(0, 100))
def test_paco2_at_or_above_dry_pressure_is_refused(fio2: float, pb: float, extra: float) -> None:
    with pytest.raises(InvalidInput, match="paco2"):
        phys.alveolar_po2(fio2, pb - 47 + extra, pb, 47)
