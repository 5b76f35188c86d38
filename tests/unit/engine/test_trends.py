"""Trends over invented series of derivations (Hollowmere General Hospital, invented).

Theil-Sen is checked against a hand-computed example and, when SciPy is installed,
against ``scipy.stats.theilslopes`` (a reference implementation of the same estimator).
"""

from dataclasses import replace
from datetime import datetime

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine.errors import InvalidInput
from monitor.engine.model import Derivation, FiO2Source, QualityFlag, Specimen
from monitor.engine.trends import (
    aa_change_vs_previous,
    aa_ratio_series,
    best_pf,
    fio2_escalation,
    is_trendable,
    pf_change_from_best,
    pf_series,
    pf_slope,
    theil_sen_slope,
)
from tests.unit.engine.readings_factory import T0, hours, minutes

NOW = T0 + hours(24)


def gas(at: datetime, pf: float | None = None, **kw: object) -> Derivation:
    """An invented arterial derivation; the P/F is set directly (no formula here)."""
    base = Derivation(
        patient_key="HGH-TEST-0001",
        sample_id=f"pao2-{at:%d%H%M}",
        drawn_at=at,
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=80.0,
        fio2=0.4,
        fio2_source=FiO2Source.CHARTED,
        pf_ratio=pf,
    )
    return replace(base, **kw)  # type: ignore[arg-type]


# --- Theil-Sen ---------------------------------------------------------------------------


def test_theil_sen_on_a_straight_line_is_its_slope() -> None:
    points = [(T0 + hours(h), 300.0 - 10.0 * h) for h in range(5)]
    assert theil_sen_slope(points) == pytest.approx(-10.0)


def test_theil_sen_hand_example_with_one_outlier() -> None:
    # Values 0, 1, 100, 3 at 0, 1, 2, 3 h. Pairwise slopes: 1, 50, 1, 99, 1, -97;
    # sorted -97, 1, 1, 1, 50, 99 -> median 1 per hour (computed by hand).
    points = [(T0, 0.0), (T0 + hours(1), 1.0), (T0 + hours(2), 100.0), (T0 + hours(3), 3.0)]
    assert theil_sen_slope(points) == pytest.approx(1.0)


def test_theil_sen_is_per_hour_and_ignores_same_time_pairs() -> None:
    points = [(T0, 200.0), (T0 + minutes(30), 190.0), (T0 + minutes(30), 150.0)]
    # Pairs with different times: -20/h and -100/h; median -60/h.
    assert theil_sen_slope(points) == pytest.approx(-60.0)


@pytest.mark.parametrize(
    "points", [[], [(T0, 1.0)], [(T0, 1.0), (T0, 2.0)]], ids=["none", "one", "same time"]
)
def test_theil_sen_needs_two_distinct_times(points: list[tuple[datetime, float]]) -> None:
    assert theil_sen_slope(points) is None


def test_theil_sen_refuses_a_value_that_is_not_finite() -> None:
    with pytest.raises(InvalidInput, match="trend point value"):
        theil_sen_slope([(T0, 1.0), (T0 + hours(1), float("nan"))])


_series = st.lists(
    st.tuples(st.integers(0, 24 * 60), st.floats(-500.0, 500.0)),
    min_size=2,
    max_size=15,
    unique_by=lambda p: p[0],
)


@settings(max_examples=200, deadline=None)
@given(raw=_series)
def test_theil_sen_matches_scipy(raw: list[tuple[int, float]]) -> None:
    from scipy import stats  # installed with fluids, one of the reference libraries

    points = [(T0 + minutes(m), v) for m, v in raw]
    expected = stats.theilslopes([v for _, v in raw], [m / 60.0 for m, _ in raw])[0]
    assert theil_sen_slope(points) == pytest.approx(expected, rel=1e-9, abs=1e-9)


@settings(max_examples=200, deadline=None)
@given(
    slope=st.floats(-50.0, 50.0),
    n=st.integers(5, 12),
    bad=st.floats(-1e4, 1e4),
    where=st.integers(0, 11),
)
def test_theil_sen_is_robust_to_one_bad_sample(
    slope: float, n: int, bad: float, where: int
) -> None:
    points = [(T0 + hours(h), 250.0 + slope * h) for h in range(n)]
    points[where % n] = (points[where % n][0], bad)
    # With n >= 5, one bad point spoils n - 1 of n(n-1)/2 slopes, fewer than half.
    assert theil_sen_slope(points) == pytest.approx(slope, abs=1e-6)


# --- best P/F and change from it ----------------------------------------------------------


def test_best_pf_is_the_highest_trendable_in_the_window() -> None:
    series = [
        gas(NOW - hours(25), 480.0),  # outside 24 h
        gas(NOW - hours(20), 400.0),
        gas(NOW - hours(10), 420.0, flags=frozenset({QualityFlag.PAO2_ABOVE_ALVEOLAR})),
        gas(NOW - hours(9), 450.0, specimen=Specimen.VENOUS),
        gas(NOW - hours(8), 460.0, estimated=True),
        gas(NOW - hours(7), 470.0, flags=frozenset({QualityFlag.ESTIMATED_FIO2})),
        gas(NOW + hours(1), 490.0),  # after now: not yet happened
        gas(NOW - hours(2), 300.0),
        gas(NOW - hours(1), None),
    ]
    found = best_pf(series, NOW)
    assert found is not None
    assert found[0] == 400.0 and found[1].drawn_at == NOW - hours(20)


def test_best_pf_window_edge_is_inside() -> None:
    found = best_pf([gas(NOW - hours(24), 400.0)], NOW)
    assert found is not None and found[0] == 400.0
    assert best_pf([gas(NOW - hours(24) - minutes(1), 400.0)], NOW) is None


def test_pf_change_from_best_is_relative() -> None:
    series = [gas(NOW - hours(12), 400.0), gas(NOW - hours(6), 320.0)]
    current = gas(NOW, 252.0)
    # (252 - 400) / 400 = -0.37 (hand-computed).
    assert pf_change_from_best(current, series, NOW) == pytest.approx(-0.37)


def test_pf_change_is_zero_when_the_current_gas_is_the_best() -> None:
    current = gas(NOW, 410.0)
    assert pf_change_from_best(current, [gas(NOW - hours(3), 300.0), current], NOW) == 0.0


def test_pf_change_needs_a_trendable_current_gas() -> None:
    current = gas(NOW, 200.0, estimated=True)
    assert pf_change_from_best(current, [gas(NOW - hours(3), 300.0)], NOW) is None


# --- A-a change at comparable FiO2 ------------------------------------------------------------


def test_aa_change_uses_the_latest_previous_gas_at_a_comparable_fio2() -> None:
    current = gas(NOW, 200.0, aa_gradient=180.0, fio2=0.5)
    series = [
        gas(NOW - hours(11), aa_gradient=100.0, fio2=0.45),
        gas(NOW - hours(6), aa_gradient=120.0, fio2=0.55),
        gas(NOW - hours(3), aa_gradient=150.0, fio2=0.7),  # not comparable
        gas(NOW - hours(13), aa_gradient=50.0, fio2=0.5),  # beyond 12 h
    ]
    found = aa_change_vs_previous(current, series)
    assert found is not None
    change, previous = found
    assert change == pytest.approx(60.0) and previous.drawn_at == NOW - hours(6)


def test_aa_change_fio2_tolerance_edge() -> None:
    current = gas(NOW, aa_gradient=180.0, fio2=0.5)
    assert (
        aa_change_vs_previous(current, [gas(NOW - hours(1), aa_gradient=150.0, fio2=0.56)]) is None
    )
    assert (
        aa_change_vs_previous(current, [gas(NOW - hours(1), aa_gradient=150.0, fio2=0.55)])
        is not None
    )


def test_aa_change_ignores_the_current_sample_and_unreliable_ones() -> None:
    current = gas(NOW, aa_gradient=180.0, fio2=0.5)
    unreliable = gas(
        NOW - hours(1),
        aa_gradient=10.0,
        fio2=0.5,
        flags=frozenset({QualityFlag.PAO2_ABOVE_ALVEOLAR}),
    )
    assert aa_change_vs_previous(current, [current, unreliable]) is None


# --- series, slope, escalation ----------------------------------------------------------------


def test_aa_ratio_series_is_in_time_order_and_trendable_only() -> None:
    series = [
        gas(NOW - hours(2), arterial_alveolar_ratio=0.5),
        gas(NOW - hours(4), arterial_alveolar_ratio=0.6),
        gas(NOW - hours(3), arterial_alveolar_ratio=0.1, specimen=Specimen.VENOUS),
        gas(NOW - hours(1)),
    ]
    assert aa_ratio_series(series, NOW) == [(NOW - hours(4), 0.6), (NOW - hours(2), 0.5)]


def test_pf_slope_is_theil_sen_over_the_window() -> None:
    series = [gas(NOW - hours(h), 300.0 - 10.0 * (10 - h)) for h in range(0, 11, 2)]
    series.append(gas(NOW - hours(13), 900.0))  # outside 12 h
    series.append(gas(NOW - hours(5), 50.0, estimated=True))  # not trendable
    assert pf_slope(series, NOW) == pytest.approx(-10.0)
    assert len(pf_series(series, NOW)) == 6


def test_pf_slope_needs_two_samples() -> None:
    assert pf_slope([gas(NOW - hours(1), 300.0)], NOW) is None


@pytest.mark.parametrize(
    ("points", "rise"),
    [
        ([], 0.0),
        ([(NOW - hours(8), 0.4), (NOW - hours(4), 0.3), (NOW - hours(1), 0.6)], 0.3),
        ([(NOW - hours(8), 0.4)], 0.0),  # unchanged all window
        ([(NOW - hours(8), 0.3), (NOW - hours(2), 0.5)], 0.2),  # value at window start counts
        ([(NOW - hours(3), 0.6), (NOW - hours(1), 0.4)], 0.0),  # weaning is not a rise
        ([(NOW - hours(1), 0.4), (NOW + hours(1), 1.0)], 0.0),  # the future is ignored
    ],
    ids=["none", "rise from the minimum", "flat", "opening value", "weaning", "future"],
)
def test_fio2_escalation(points: list[tuple[datetime, float]], rise: float) -> None:
    assert fio2_escalation(points, NOW) == pytest.approx(rise)


def test_is_trendable() -> None:
    assert is_trendable(gas(NOW, 300.0))
    assert not is_trendable(gas(NOW, 300.0, specimen=Specimen.UNKNOWN))
    assert not is_trendable(gas(NOW, 300.0, flags=frozenset({QualityFlag.NOT_ARTERIAL})))
