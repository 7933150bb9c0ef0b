"""Tests of attribution.controls: residual limit states of books and positions."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from attribution.controls import book_states, limit_usage, position_states, worst


def test_absolute_limit_breach_watch_and_within():
    """|residual| above the limit breaches, from the watch share watches, below is within."""
    states, applied = book_states([30_000, -21_000, 5_000], [0, 0, 0], 25_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["breach", "watch", "within"]
    np.testing.assert_allclose(applied, 25_000)


def test_relative_limit_widens_the_absolute_one_above_its_floor():
    """10 % of a 3M actual is 300k, wider than the 250k absolute limit, so it applies; below the floor, 250k."""
    states, applied = book_states([280_000, 280_000, 280_000], [3_000_000, 1_000_000, 50_000],
                                  250_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["watch", "breach", "breach"]
    np.testing.assert_allclose(applied, [300_000, 250_000, 250_000])


def test_the_issue_example_is_within_at_every_actual():
    """Residual 18,474 under a 25k / 10 % / 100k floor limit: within at actual 99k, 101k and 240k alike."""
    states, applied = book_states([18_474] * 3, [99_000, 101_000, 240_000], 25_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["within"] * 3
    np.testing.assert_allclose(applied, [25_000, 25_000, 25_000])


amounts = st.floats(min_value=0, max_value=1e12, allow_nan=False)


@given(residual=amounts, actual=amounts, extra=amounts, abs_limit=amounts,
       rel=st.floats(min_value=0, max_value=5), floor=amounts)
def test_a_larger_actual_never_tightens_the_limit(residual, actual, extra, abs_limit, rel, floor):
    """Property: for the same residual, a larger |actual| gives a limit at least as wide and a usage no higher."""
    usage_a, limit_a = limit_usage(residual, actual, abs_limit, rel, floor)
    usage_b, limit_b = limit_usage(residual, -(actual + extra), abs_limit, rel, floor)
    assert limit_b >= limit_a >= abs_limit
    assert usage_b <= usage_a


def test_exactly_at_the_limit_is_not_a_breach():
    """The limit itself is allowed; breach is strictly above it."""
    states, _ = book_states([25_000], [0], 25_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["watch"]


def test_position_states_and_worst():
    """Per-position states, and the worst of a set."""
    states = position_states([12_000, 8_500, 10], 10_000, 0.8)
    assert states.tolist() == ["breach", "watch", "within"]
    assert worst(states) == "breach"
    assert worst([]) == "within"
