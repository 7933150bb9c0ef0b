"""The demo generator's working state: trades booked so far, each night's marks, the pool open for new trades."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.demo.market import IntArray, StrikeIndex


@dataclass(frozen=True, slots=True)
class PlantedFault:
    """A fault planted in the marks of one night; for ``noisy_marks`` the key is the underlying."""

    as_of: dt.date
    book: str
    instrument_or_trade: str
    kind: str
    detail: str



@dataclass(slots=True)
class Trades:
    """Every trade booked so far (append-only) and the rows held tonight."""

    book: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    instrument: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    quantity: FloatArray = field(default_factory=lambda: np.zeros(0))
    trade_date: NDArray[np.datetime64] = field(default_factory=lambda: np.zeros(0, "datetime64[D]"))
    trade_price: FloatArray = field(default_factory=lambda: np.zeros(0))
    package: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    strategy: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))  # index into build.STRATEGIES
    live: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    counts: dict[str, int] = field(default_factory=lambda: dict.fromkeys(
        ("new", "unpriced", "closed", "expired", "amended"), 0))


@dataclass(slots=True)
class Night:
    """One date: live instruments with their marks (as written), bounds, and the positions held."""

    live: IntArray
    price: FloatArray
    vol: FloatArray          # NaN where implied_vol is written as null
    keep: NDArray[np.bool_]  # False where the mark row is left out
    tau: FloatArray
    lower: FloatArray
    upper: FloatArray
    rows: IntArray
    quantity: FloatArray
    spot: FloatArray         # the rest of each live instrument's state, to reprice a planted mark
    rate: FloatArray
    div: FloatArray
    clean_price: FloatArray  # the model mark before any planted fault
    delta: FloatArray        # BSM delta at the clean vol (for the book's hedges)
    exercise_region: NDArray[np.bool_]  # an American option whose clean mark sits in its exercise region


@dataclass(frozen=True, slots=True)
class Pool:
    """Instruments open for new trades tonight (at least the minimum days to expiry), with their clean marks."""

    instrument: IntArray
    und: IntArray
    series: IntArray         # (expiry, underlying, call/put) as one integer; flipping bit 0 flips call/put
    strikes: StrikeIndex     # the pool's strikes sorted by series, for nearest-strike searches
    is_call: NDArray[np.bool_]
    log_strike: FloatArray
    spot: FloatArray
    tau: FloatArray
    vol: FloatArray
    rate: FloatArray
    div: FloatArray
    price: FloatArray
    weight: FloatArray
