"""A flow just outside a device's usual range gives no FiO2 estimate, with the reason.

Ranges from the reference sheet section 8 (common practice, no source): simple mask
5-10 L/min ("do not use below 5"), reservoir mask 10-15 L/min, nasal cannula 1-6 L/min.
"""

from __future__ import annotations

import pytest

from monitor.engine import physiology
from monitor.engine.errors import InvalidInput
from monitor.engine.model import O2Device


@pytest.mark.parametrize(
    ("device", "inside", "outside"),
    [
        (O2Device.SIMPLE_MASK, 5.0, 4.0),
        (O2Device.SIMPLE_MASK, 10.0, 10.5),
        (O2Device.RESERVOIR_MASK, 10.0, 8.0),
        (O2Device.NASAL_CANNULA, 6.0, 7.0),
    ],
)
def test_flow_at_the_range_end_is_estimated_just_outside_is_not(
    device: O2Device, inside: float, outside: float
) -> None:
    assert 0.21 < physiology.estimated_fio2(device, inside) <= 1.0
    with pytest.raises(InvalidInput, match="L/min"):
        physiology.estimated_fio2(device, outside)
