"""Year fractions under the job's time basis, vectorised over dates.

* ``ACT/365F``: calendar days / 365 (the default).
* ``BUS/252``: business days / 252, weekends and the job's holidays excluded.

The same basis measures time to expiry and the time that passes between the prior date and the
run date, so a Friday-to-Monday night is 3/365 of a year under ACT/365F and 1/252 under BUS/252.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

DAYS_PER_YEAR_CALENDAR = 365.0
DAYS_PER_YEAR_BUSINESS = 252.0


@dataclass(frozen=True, slots=True)
class TimeBasis:
    """A day-count basis: ``ACT/365F`` or ``BUS/252`` with a holiday list."""

    name: str = "ACT/365F"
    holidays: tuple[dt.date, ...] = ()

    def _holidays(self) -> NDArray[np.datetime64]:
        return np.array(self.holidays, dtype="datetime64[D]")

    def year_fraction(self, start: NDArray[np.datetime64] | dt.date,
                      end: NDArray[np.datetime64] | dt.date) -> NDArray[np.float64]:
        """Years from ``start`` to ``end`` (negative when end is before start), element-wise."""
        a = np.atleast_1d(np.asarray(start, dtype="datetime64[D]"))
        b = np.atleast_1d(np.asarray(end, dtype="datetime64[D]"))
        if self.name == "BUS/252":
            days = np.busday_count(a, b, holidays=self._holidays())
            return days.astype(float) / DAYS_PER_YEAR_BUSINESS
        return (b - a).astype("timedelta64[D]").astype(float) / DAYS_PER_YEAR_CALENDAR

    def next_business_day(self, day: dt.date) -> dt.date:
        """The first business day after ``day`` (weekends and holidays skipped)."""
        nxt = np.busday_offset(np.datetime64(day, "D"), 1, roll="forward", holidays=self._holidays())
        if np.datetime64(day, "D") == nxt:  # pragma: no cover - busday_offset with offset 1 always moves
            nxt = nxt + 1
        return nxt.astype(dt.date)

    def is_business_day(self, day: dt.date) -> bool:
        """True on a weekday that is not a holiday."""
        return bool(np.is_busday(np.datetime64(day, "D"), holidays=self._holidays()))

    def business_days_between(self, start: dt.date, end: dt.date) -> list[dt.date]:
        """Business days strictly after ``start`` and strictly before ``end`` (weekends and holidays skipped)."""
        days = np.arange(np.datetime64(start, "D") + 1, np.datetime64(end, "D"), dtype="datetime64[D]")
        return [d.astype(dt.date) for d in days[np.is_busday(days, holidays=self._holidays())]]
