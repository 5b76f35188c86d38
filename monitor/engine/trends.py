"""Trends: how a patient's oxygenation moves over time, from a series of derivations.

Pure: the series and ``now`` are arguments; nothing here reads a clock or a store.
Functions that compare numbers across samples use only *trendable* derivations:
arterial, reliable (no PAO2_ABOVE_ALVEOLAR or NOT_ARTERIAL), not estimated from SpO2,
and not on a FiO2 estimated from device and flow (reference sheet section 8: such a
FiO2 scatters by +/-0.04-0.15, enough to fake a trend) or charted only after the draw
(it may describe a change made after the sample). Samples drawn after ``now``
are ignored, so a replay sees only what had happened.

Slopes are Theil-Sen estimates (the median of all pairwise slopes; Theil 1950, Sen
1968), per hour: one bad sample among several cannot swing them, as it can a
least-squares line.
"""

import math
from collections.abc import Callable, Iterable, Sequence
from datetime import datetime, timedelta
from statistics import median

from monitor.engine.errors import InvalidInput
from monitor.engine.model import Derivation, QualityFlag, Specimen

__all__ = [
    "aa_change_vs_previous",
    "aa_ratio_series",
    "best_pf",
    "fio2_escalation",
    "is_trendable",
    "pf_change_from_best",
    "pf_series",
    "pf_slope",
    "theil_sen_slope",
]

_HOUR_SECONDS = 3600.0


def is_trendable(d: Derivation) -> bool:
    """Arterial, reliable, not estimated and on a FiO2 documented at or before the draw
    (not estimated from device and flow, not charted after the draw)."""
    return (
        d.specimen is Specimen.ARTERIAL
        and not d.unreliable
        and not d.estimated
        and QualityFlag.ESTIMATED_FIO2 not in d.flags
        and QualityFlag.FIO2_CHARTED_AFTER_DRAW not in d.flags
    )


def _in_window(
    derivations: Iterable[Derivation], now: datetime, window: timedelta
) -> list[Derivation]:
    """Trendable derivations drawn in [now - window, now], oldest first."""
    inside = [d for d in derivations if is_trendable(d) and now - window <= d.drawn_at <= now]
    return sorted(inside, key=lambda d: (d.drawn_at, d.sample_id))


def best_pf(
    derivations: Iterable[Derivation],
    now: datetime,
    window: timedelta = timedelta(hours=24),
    *,
    value: Callable[[Derivation], float | None] | None = None,
) -> tuple[float, Derivation] | None:
    """The highest P/F (mmHg) among trendable samples drawn in [now - window, now], with
    its derivation (the latest one on a tie); None if there is none. ``value`` picks
    which P/F of a derivation counts (default ``pf_ratio``; the rules pass
    ``derive.counted_pf``)."""
    pick = value or (lambda d: d.pf_ratio)
    rows = [(pick(d), d) for d in _in_window(derivations, now, window)]
    with_pf = [(pf, d.drawn_at, d.sample_id, d) for pf, d in rows if pf is not None]
    if not with_pf:
        return None
    pf, _, _, best = max(with_pf, key=lambda row: row[:3])
    return pf, best


def pf_change_from_best(
    current: Derivation,
    derivations: Iterable[Derivation],
    now: datetime,
    window: timedelta = timedelta(hours=24),
) -> float | None:
    """Relative change of ``current``'s P/F from the best P/F in the window, as a
    fraction (-0.37 is 37 % below the best). None when either P/F is missing or
    ``current`` is not trendable. ``current`` may itself be in ``derivations``."""
    if current.pf_ratio is None or not is_trendable(current):
        return None
    best = best_pf([*derivations, current], now, window)
    if best is None:
        return None
    return (current.pf_ratio - best[0]) / best[0]


def aa_change_vs_previous(
    current: Derivation,
    derivations: Iterable[Derivation],
    within: timedelta = timedelta(hours=12),
    fio2_tolerance: float = 0.05,
) -> tuple[float, Derivation] | None:
    """Change of the A-a gradient (mmHg, current minus previous) since the latest earlier
    trendable sample drawn within ``within`` before ``current`` at a comparable FiO2
    (|difference| <= ``fio2_tolerance``, fraction). The normal gradient grows with FiO2
    (reference sheet section 4), so gradients at different FiO2 are not compared."""
    if current.aa_gradient is None or current.fio2 is None or not is_trendable(current):
        return None
    start = current.drawn_at - within
    fio2 = current.fio2
    earlier = [
        (d.drawn_at, d.sample_id, d.aa_gradient, d)
        for d in derivations
        if is_trendable(d)
        and d.sample_id != current.sample_id
        and start <= d.drawn_at < current.drawn_at
        and d.aa_gradient is not None
        and d.fio2 is not None
        and abs(d.fio2 - fio2) <= fio2_tolerance + 1e-9
    ]
    if not earlier:
        return None
    _, _, previous_aa, previous = max(earlier, key=lambda row: row[:2])
    return current.aa_gradient - previous_aa, previous


def aa_ratio_series(
    derivations: Iterable[Derivation], now: datetime, window: timedelta = timedelta(hours=24)
) -> list[tuple[datetime, float]]:
    """The a/A ratio of trendable samples drawn in [now - window, now], oldest first.
    a/A is fairly stable across FiO2 (reference sheet section 5), which makes it the
    index to follow when FiO2 moves."""
    return [
        (d.drawn_at, d.arterial_alveolar_ratio)
        for d in _in_window(derivations, now, window)
        if d.arterial_alveolar_ratio is not None
    ]


def pf_series(
    derivations: Iterable[Derivation], now: datetime, window: timedelta = timedelta(hours=12)
) -> list[tuple[datetime, float]]:
    """P/F (mmHg) of trendable samples drawn in [now - window, now], oldest first."""
    return [
        (d.drawn_at, d.pf_ratio)
        for d in _in_window(derivations, now, window)
        if d.pf_ratio is not None
    ]


def theil_sen_slope(points: Sequence[tuple[datetime, float]]) -> float | None:
    """Theil-Sen slope in value units per hour: the median of the slopes of all pairs of
    points with different times. None with fewer than two distinct times. Raises
    ``InvalidInput`` for a value that is not a finite number."""
    for at, value in points:
        if not math.isfinite(value):
            raise InvalidInput("trend point value", value, f"at {at.isoformat()} must be finite")
    slopes = [
        (v2 - v1) / ((t2 - t1).total_seconds() / _HOUR_SECONDS)
        for i, (t1, v1) in enumerate(points)
        for t2, v2 in points[i + 1 :]
        if t2 != t1
    ]
    return median(slopes) if slopes else None


def pf_slope(
    derivations: Iterable[Derivation], now: datetime, window: timedelta = timedelta(hours=12)
) -> float | None:
    """Theil-Sen slope of P/F (mmHg per hour) over trendable samples in the window."""
    return theil_sen_slope(pf_series(derivations, now, window))


def fio2_escalation(
    fio2_points: Sequence[tuple[datetime, float]],
    now: datetime,
    window: timedelta = timedelta(hours=6),
) -> float:
    """Rise of the FiO2 in effect (fraction) over [now - window, now]: the value in
    effect at ``now`` minus the lowest value in effect at any time in the window (the
    value in effect when the window opened counts). 0.0 with no points; never negative.
    Points after ``now`` are ignored."""
    ordered = sorted((p for p in fio2_points if p[0] <= now), key=lambda p: p[0])
    if not ordered:
        return 0.0
    start = now - window
    opening = [value for at, value in ordered if at <= start][-1:]
    inside = [value for at, value in ordered if start < at]
    in_effect = opening + inside
    return max(0.0, ordered[-1][1] - min(in_effect))
