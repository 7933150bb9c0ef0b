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
    currencies (a handful), never over positions; the curves' and the rows' currencies are each
    hashed once (no per-currency sub-frames: a night asks for rates a few times on tiny curves).
    """
    rates = np.full(len(currency), np.nan)
    found = np.zeros(len(currency), dtype=bool)
    if not len(curves) or not len(currency):
        return rates, found
    curve_code, names = pd.factorize(curves["currency"].to_numpy(dtype=object))  # a null currency: -1, no curve
    tenor_years = curves["tenor_years"].to_numpy(dtype=float)
    zero_rate = curves["zero_rate"].to_numpy(dtype=float)
    row_code = pd.Index(names, dtype=object).get_indexer(
        pd.Index(np.asarray(currency, dtype=object), dtype=object, copy=False))
    for code in range(len(names)):
        mask = row_code == code
        if not mask.any():
            continue
        points = np.flatnonzero(curve_code == code)
        points = points[np.argsort(tenor_years[points], kind="stable")]
        rates[mask] = np.interp(tau_years[mask], tenor_years[points], zero_rate[points])
        found |= mask
    return rates, found
