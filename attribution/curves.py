"""Zero rates from per-currency curves: linear in zero rate between points, flat beyond the ends."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import NDArray


def zero_rates(curves: pd.DataFrame, currency: NDArray[np.object_],
               tau_years: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """The continuously compounded zero rate of each (currency, tau), and whether a curve exists.

    ``curves`` has columns currency, tenor_years, zero_rate (clean rows). A curve of one point is
    flat. Where the currency has no curve the rate is NaN and the flag False. The loop runs over
    currencies (a handful), never over positions.
    """
    rates = np.full(len(currency), np.nan)
    found = np.zeros(len(currency), dtype=bool)
    for code, points in curves.groupby("currency", sort=False):
        mask = currency == code
        if not mask.any():
            continue
        points = points.sort_values("tenor_years")
        rates[mask] = np.interp(tau_years[mask], points["tenor_years"].to_numpy(float),
                                points["zero_rate"].to_numpy(float))
        found |= mask
    return rates, found
