"""Tests of attribution.timebasis: ACT/365F and BUS/252 year fractions, weekends and holidays."""

from __future__ import annotations

import datetime as dt

import numpy as np

from attribution.timebasis import TimeBasis

FRIDAY, MONDAY = dt.date(2026, 11, 27), dt.date(2026, 11, 30)


def test_weekend_is_three_calendar_days_under_act365f():
    """Friday to Monday is 3/365 of a year under ACT/365F (common practice, no source)."""
    np.testing.assert_allclose(TimeBasis("ACT/365F").year_fraction(FRIDAY, MONDAY), 3 / 365, rtol=1e-15)


def test_weekend_is_one_business_day_under_bus252():
    """Friday to Monday is 1/252 of a year under BUS/252 (common practice, no source)."""
    np.testing.assert_allclose(TimeBasis("BUS/252").year_fraction(FRIDAY, MONDAY), 1 / 252, rtol=1e-15)


def test_holidays_are_skipped_by_the_business_basis_only():
    """A holiday on the Monday makes Friday -> Tuesday one business day, four calendar days."""
    tuesday = dt.date(2026, 12, 1)
    bus = TimeBasis("BUS/252", (MONDAY,))
    np.testing.assert_allclose(bus.year_fraction(FRIDAY, tuesday), 1 / 252, rtol=1e-15)
    np.testing.assert_allclose(TimeBasis("ACT/365F", (MONDAY,)).year_fraction(FRIDAY, tuesday), 4 / 365)
    assert bus.next_business_day(FRIDAY) == tuesday
    assert not bus.is_business_day(MONDAY)


def test_year_fraction_is_vectorised_and_signed():
    """Arrays of dates give arrays of fractions; an end before the start is negative."""
    ends = np.array(["2026-11-30", "2027-11-27", "2026-11-20"], dtype="datetime64[D]")
    out = TimeBasis().year_fraction(np.datetime64(FRIDAY), ends)
    np.testing.assert_allclose(out, [3 / 365, 1.0, -7 / 365], rtol=1e-15)


def test_next_business_day_after_friday_is_monday():
    """The next business day after a Friday is the Monday (no holiday)."""
    assert TimeBasis().next_business_day(FRIDAY) == MONDAY
