"""ISO 10816-3:2009 vibration-severity zones and operational limits.

Source: ISO 10816-3:2009, Annex A, Table A.1 (group 1: above 300 kW up to 50 MW) and
Table A.2 (group 2: above 15 kW up to 300 kW); velocity r.m.s. in mm/s over 10 Hz - 1 kHz.
Values as transcribed with conformance tests in the open repository jmrplens/phonometry
(src/phonometry/vibration/machinery/evaluation.py); not checked against the paper text
here. Operational limits: clauses 5.3/5.4 of the same standard, ALARM = min(baseline +
0.25 x B/C, 1.25 x B/C), TRIP at most 1.25 x C/D.
"""

from __future__ import annotations

import pytest

from agent.config.load import Support
from agent.core.limits import ISO10816_3_BOUNDARIES_MM_S, operational_limits, zone_of

# (group, support): (A/B, B/C, C/D) mm/s, ISO 10816-3:2009 Tables A.1 and A.2.
TABLE = [
    (1, Support.RIGID, (2.3, 4.5, 7.1)),
    (1, Support.FLEXIBLE, (3.5, 7.1, 11.0)),
    (2, Support.RIGID, (1.4, 2.8, 4.5)),
    (2, Support.FLEXIBLE, (2.3, 4.5, 7.1)),
]


@pytest.mark.parametrize(("group", "support", "edges"), TABLE)
def test_zone_boundaries(group: int, support: Support, edges: tuple[float, ...]) -> None:
    """The boundaries used are Annex A's for each group and support."""
    assert ISO10816_3_BOUNDARIES_MM_S[(group, support)] == edges


def test_group_2_rigid_is_not_the_flexible_row() -> None:
    """A common chart error prints group 2 rigid C/D as 7.1 (the flexible row); it is 4.5."""
    assert ISO10816_3_BOUNDARIES_MM_S[(2, Support.RIGID)][2] == 4.5


@pytest.mark.parametrize(("group", "support", "edges"), TABLE)
def test_a_value_on_a_boundary_is_in_the_lower_zone(group: int, support: Support,
                                                    edges: tuple[float, ...]) -> None:
    """Exactly on A/B is A, on B/C is B, on C/D is C; just above moves up a zone."""
    for edge, lower, upper in zip(edges, "ABC", "BCD", strict=True):
        assert zone_of(edge, edges) == lower
        assert zone_of(edge + 1e-9, edges) == upper
    assert zone_of(0.0, edges) == "A"
    assert zone_of(100.0, edges) == "D"


def test_worked_case_group_2_rigid_baseline_1() -> None:
    """Group 2 rigid, baseline 1.0 mm/s: ALARM = min(1.0 + 0.25 x 2.8, 1.25 x 2.8) = 1.7;
    TRIP = 1.25 x 4.5 = 5.625 mm/s."""
    alarm, trip = operational_limits(2, Support.RIGID, 1.0)
    assert alarm == pytest.approx(1.7)
    assert trip == pytest.approx(5.625)


def test_alarm_is_capped_at_1_25_times_b_c() -> None:
    """A high baseline cannot push ALARM past 1.25 x B/C (group 1 rigid: 5.625 mm/s)."""
    alarm, trip = operational_limits(1, Support.RIGID, 5.0)  # 5.0 + 1.125 > 5.625
    assert alarm == pytest.approx(1.25 * 4.5)
    assert trip == pytest.approx(1.25 * 7.1)
