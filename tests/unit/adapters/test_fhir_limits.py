"""The nesting guard: any depth is measured without recursion, and the kept head is
JSON that Python's own json module reads back (for values it can write)."""

from __future__ import annotations

import json
import sys

from hypothesis import given
from hypothesis import strategies as st

from adapters.fhir.limits import MAX_DEPTH, bounded_head, nesting_depth, split_too_deep, too_deep

JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.text(max_size=8),
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=4), inner, max_size=4)
    ),
    max_leaves=30,
)


def _nested(levels: int) -> dict[str, object]:
    value: dict[str, object] = {}
    for _ in range(levels - 1):
        value = {"x": value}
    return value


def test_depth_far_past_the_recursion_limit_is_measured() -> None:
    levels = sys.getrecursionlimit() * 5
    assert nesting_depth(_nested(levels)) == levels
    assert too_deep({"resourceType": "Observation", "id": "d", "x": _nested(700)}) is not None
    assert too_deep({"resourceType": "Observation", "id": "ok", "code": {"coding": [{}]}}) is None


@given(JSON_VALUES)
def test_bounded_head_round_trips_through_json(value: object) -> None:
    assert json.loads(bounded_head(value, limit=10**9)) == value


@given(JSON_VALUES)
def test_depth_agrees_with_a_plain_recursive_count(value: object) -> None:
    def depth(v: object) -> int:  # the obvious definition, for small values
        if isinstance(v, dict):
            return 1 + max((depth(c) for c in v.values()), default=0)
        if isinstance(v, list):
            return 1 + max((depth(c) for c in v), default=0)
        return 0

    assert nesting_depth(value) == depth(value)


def test_split_keeps_the_shallow_and_refuses_the_deep() -> None:
    kept, refused = split_too_deep([{"a": 1}, _nested(MAX_DEPTH + 5), {"b": [1]}])
    assert kept == [0, 2] and [i for i, _, _ in refused] == [1]
    assert len(refused[0][2]) <= 65_536
