"""Tests of attribution.controls: residual limit states of books and positions."""

from __future__ import annotations

import numpy as np

from attribution.controls import book_states, position_states, worst


def test_absolute_limit_breach_watch_and_within():
    """|residual| above the limit breaches, from the watch share watches, below is within."""
    states, applied = book_states([30_000, -21_000, 5_000], [0, 0, 0], 25_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["breach", "watch", "within"]
    np.testing.assert_allclose(applied, 25_000)


def test_relative_limit_applies_only_above_its_floor():
    """10 % of a 1M actual is 100k; the absolute 250k limit is wider, so the relative one binds."""
    states, applied = book_states([150_000, 150_000], [1_000_000, 50_000], 250_000, 0.1, 100_000, 0.8)
    assert states.tolist() == ["breach", "within"]
    np.testing.assert_allclose(applied, [100_000, 250_000])


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
