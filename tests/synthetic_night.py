"""A large synthetic desk written from the data contract: three business dates of one invented desk.

Sized so that each stage of a run lasts long enough to be interrupted from outside (a few
hundred thousand positions). Marks are priced here with a plain Black-Scholes-Merton formula
on ``scipy.special.ndtr`` (not the package's pricer), vectorised; every file gets the
contract's Arrow schema (tests/contract_files.py). Every position is carried over all three
dates, so the explain path does the full work.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
from scipy.special import ndtr

from tests.contract_files import COLUMNS, table, write_folder

DATES = (dt.date(2026, 11, 24), dt.date(2026, 11, 25), dt.date(2026, 11, 26))  # Tuesday, Wednesday, Thursday
DAYS_PER_YEAR = 365.0  # ACT/365F, the job's default basis


@dataclass(frozen=True, slots=True)
class SyntheticDesk:
    """Where the desk was written and its size."""

    root: Path
    dates: tuple[dt.date, ...]
    positions: int
    books: int
    instruments: int
    underlyings: int


def bsm_price(spot: np.ndarray, strike: np.ndarray, tau_years: np.ndarray, vol: np.ndarray, rate: float,
              div_yield: np.ndarray, is_call: np.ndarray) -> np.ndarray:
    """Generalised Black-Scholes-Merton premium per unit of underlying (Hull, Options, Futures and
    Other Derivatives, ch. 17, continuous dividend yield; written here from the textbook formula)."""
    sd = vol * np.sqrt(tau_years)
    d1 = (np.log(spot / strike) + (rate - div_yield + 0.5 * vol**2) * tau_years) / sd
    d2 = d1 - sd
    fwd_spot = spot * np.exp(-div_yield * tau_years)
    disc_strike = strike * np.exp(-rate * tau_years)
    call = fwd_spot * ndtr(d1) - disc_strike * ndtr(d2)
    put = disc_strike * ndtr(-d2) - fwd_spot * ndtr(-d1)
    return np.where(is_call, call, put)


def _arrow(kind: str, columns: dict[str, object]) -> pa.Table:
    schema = table(kind, []).schema
    return pa.table({name: pa.array(columns[name], type=schema.field(name).type) for name, _ in COLUMNS[kind]},
                    schema=schema)


def write_synthetic_desk(root: Path, positions: int = 200_000, books: int = 200, instruments: int = 4_000,
                         underlyings: int = 80, seed: int = 11) -> SyntheticDesk:
    """Write ``<root>/as_of=D/`` for the three dates of :data:`DATES`; returns the desk's description."""
    rng = np.random.default_rng(seed)
    und_names = np.array([f"SYN{k:03d}" for k in range(underlyings)], dtype=object)
    spot0 = rng.uniform(20.0, 400.0, underlyings)
    div = rng.uniform(0.0, 0.03, underlyings)
    base_vol = rng.uniform(0.15, 0.45, underlyings)

    inst_und = rng.integers(0, underlyings, instruments)
    is_call = rng.random(instruments) < 0.5
    strike = np.round(spot0[inst_und] * rng.uniform(0.8, 1.2, instruments), 2)
    expiry_days = rng.integers(30, 730, instruments)
    expiry = np.array([DATES[-1] + dt.timedelta(days=int(d)) for d in expiry_days], dtype="datetime64[D]")
    inst_ids = np.array([f"SYN-I{k:05d}" for k in range(instruments)], dtype=object)
    smile = rng.uniform(-0.03, 0.03, instruments)

    trade_ids = np.array([f"SYN-T{k:07d}" for k in range(positions)], dtype=object)
    book_names = np.array([f"Synthetic book {k:03d}" for k in range(books)], dtype=object)
    pos_book = book_names[rng.integers(0, books, positions)]
    pos_inst = inst_ids[rng.integers(0, instruments, positions)]
    quantity = rng.integers(1, 50, positions) * np.where(rng.random(positions) < 0.5, -1.0, 1.0)
    trade_date = np.full(positions, np.datetime64(DATES[0] - dt.timedelta(days=30), "D"))

    spot = spot0.copy()
    rate = 0.03
    for k, as_of in enumerate(DATES):
        if k:
            spot = spot * np.exp(rng.normal(0.0, 0.015, underlyings))
            base_vol = np.clip(base_vol + rng.normal(0.0, 0.005, underlyings), 0.08, None)
            rate += 0.0005
        vol = base_vol[inst_und] + smile
        tau = (expiry - np.datetime64(as_of, "D")).astype(float) / DAYS_PER_YEAR
        price = bsm_price(spot[inst_und], strike, tau, vol, rate, div[inst_und], is_call)
        write_folder(root, as_of, {
            "positions": _arrow("positions", {
                "trade_id": trade_ids, "book": pos_book, "instrument_id": pos_inst, "quantity": quantity,
                "trade_date": trade_date, "trade_price": np.full(positions, None, dtype=object)}),
            "instruments": _arrow("instruments", {
                "instrument_id": inst_ids, "underlying": und_names[inst_und],
                "option_type": np.where(is_call, "call", "put").astype(object),
                "exercise": np.full(instruments, "european", dtype=object), "strike": strike, "expiry": expiry,
                "multiplier": np.full(instruments, 100.0), "currency": np.full(instruments, "USD", dtype=object)}),
            "option_marks": _arrow("option_marks", {"instrument_id": inst_ids, "price": price, "implied_vol": vol}),
            "underlying_marks": _arrow("underlying_marks", {"underlying": und_names, "spot": spot,
                                                            "dividend_yield": div}),
            "rate_curves": [{"currency": "USD", "tenor_years": 1.0, "zero_rate": rate}],
            "fx_rates": [{"currency": "USD", "rate": 1.0}],
        })
    return SyntheticDesk(root, DATES, positions, books, instruments, underlyings)
