"""A synthetic night of any size, written to the data contract (for ``attribution bench``).

Two business dates of an invented desk: positions spread over books, instruments over
underlyings and three currencies, with every lifecycle case (most positions carried, some
closed, new with and without trade price, and expiring on the run date). Marks are model prices
from the package's own pricer, with implied vols given for most and left null for a few, so the
night goes through the vol solver too. Vectorised throughout.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from attribution.loading import CONTRACT_SCHEMAS
from attribution.pricing import bsm_price

PRIOR, RUN = dt.date(2026, 11, 26), dt.date(2026, 11, 27)
CURRENCIES = ("USD", "EUR", "JPY")
FX = {"USD": 1.0, "EUR": 1.09, "JPY": 0.0067}
CURVE_TENORS = np.array([0.25, 1.0, 2.0, 5.0])
CURVE_RATES = np.array([0.03, 0.033, 0.036, 0.04])  # one curve shape for every currency

@dataclass(frozen=True, slots=True)
class SyntheticNight:
    """Where the night was written, and its size."""

    data_root: Path
    prior: dt.date
    run: dt.date
    positions: int
    books: int
    instruments: int
    underlyings: int


def _names(prefix: str, n: int) -> np.ndarray:
    return np.char.add(prefix, np.char.zfill(np.arange(n).astype(str), len(str(max(n - 1, 1))))).astype(object)


def _write(folder: Path, kind: str, columns: dict[str, object]) -> None:
    schema = CONTRACT_SCHEMAS[kind]
    arrays = [pa.array(columns[f.name], type=f.type, from_pandas=True) for f in schema]
    pq.write_table(pa.Table.from_arrays(arrays, schema=schema), folder / f"{kind}.parquet")


def write_synthetic_night(root: Path, positions: int = 1_000_000, books: int = 1_000, instruments: int = 20_000,
                          underlyings: int = 500, seed: int = 5) -> SyntheticNight:
    """Write the two dates' folders under ``root``."""
    rng = np.random.default_rng(seed)
    und = _names("SYN", underlyings)
    und_ccy = np.array(CURRENCIES, dtype=object)[rng.integers(0, len(CURRENCIES), underlyings)]
    spot0 = rng.uniform(20.0, 400.0, underlyings)
    spot1 = spot0 * np.exp(rng.normal(0.0, 0.015, underlyings))
    div0 = rng.uniform(0.0, 0.04, underlyings)
    div1 = div0 + rng.normal(0.0, 0.0005, underlyings)
    atm0 = rng.uniform(0.15, 0.5, underlyings)
    atm1 = atm0 * np.exp(rng.normal(0.0, 0.03, underlyings))

    i_und = rng.integers(0, underlyings, instruments)
    ids = _names("SYN-O", instruments)
    is_call = rng.random(instruments) < 0.5
    strike = np.round(spot0[i_und] * np.exp(rng.normal(0.0, 0.15, instruments)), 2)
    expiry_days = rng.integers(1, 720, instruments)
    expiry_days[: max(instruments // 100, 1)] = 1           # 1 % expire on the run date
    expiry = np.datetime64(PRIOR, "D") + expiry_days
    skew = rng.uniform(-0.15, 0.0, instruments) * np.log(strike / spot0[i_und])

    p_inst = rng.integers(0, instruments, positions)
    trade_ids = _names("SYN-T", positions)
    p_book = _names("Book ", books)[rng.integers(0, books, positions)]
    qty = rng.integers(1, 100, positions) * np.where(rng.random(positions) < 0.5, -1.0, 1.0)
    fate = rng.random(positions)
    in_prior = fate >= 0.02                                  # 2 % new on the run date
    in_run = (fate < 0.02) | (fate >= 0.04)                  # 2 % closed
    in_run &= expiry_days[p_inst] > 1                        # expiring positions are gone on the run date
    trade_price = np.where(rng.random(positions) < 0.9, 1.0, np.nan)  # scaled to the mark below

    curves = {"currency": np.repeat(np.array(CURRENCIES, dtype=object), 4),
              "tenor_years": np.tile(CURVE_TENORS, len(CURRENCIES))}
    for as_of, spot, div, atm, shift in ((PRIOR, spot0, div0, atm0, 0.0), (RUN, spot1, div1, atm1, 0.0005)):
        folder = root / f"as_of={as_of.isoformat()}"
        folder.mkdir(parents=True, exist_ok=True)
        tau = (expiry - np.datetime64(as_of, "D")).astype(float) / 365.0
        live = tau >= 0
        vol = np.clip(atm[i_und] + skew, 0.05, None)
        rate = np.interp(tau, CURVE_TENORS, CURVE_RATES + shift)
        price = np.full(instruments, np.nan)
        price[live] = bsm_price(spot[i_und][live], strike[live], tau[live], vol[live], rate[live],
                                div[i_und][live], is_call[live])
        time_value = price - np.maximum(np.where(is_call, 1.0, -1.0) * (
            spot[i_und] * np.exp(-div[i_und] * tau) - strike * np.exp(-rate * tau)), 0.0)
        # 3 % of the marks carry no vol (solved by the job), only where there is time value to solve from
        marked_vol = np.where((rng.random(instruments) < 0.97) | ~(time_value > 1e-6 * spot[i_und]), vol, np.nan)
        keep = in_prior if as_of == PRIOR else in_run
        new = keep & ~in_prior
        mark = price[p_inst]
        _write(folder, "positions", {
            "trade_id": trade_ids[keep], "book": p_book[keep], "instrument_id": ids[p_inst][keep],
            "quantity": qty[keep], "trade_date": np.full(int(keep.sum()), np.datetime64(as_of, "D")),
            "trade_price": np.where(new, mark * trade_price * 1.01, np.nan)[keep]})
        _write(folder, "instruments", {
            "instrument_id": ids[live], "underlying": und[i_und][live],
            "option_type": np.where(is_call, "call", "put").astype(object)[live],
            "exercise": np.full(int(live.sum()), "european", dtype=object), "strike": strike[live],
            "expiry": expiry[live], "multiplier": np.full(int(live.sum()), 100.0),
            "currency": und_ccy[i_und][live]})
        _write(folder, "option_marks", {"instrument_id": ids[live], "price": price[live],
                                        "implied_vol": np.where(tau[live] > 0, marked_vol[live], np.nan)})
        _write(folder, "underlying_marks", {"underlying": und, "spot": spot, "dividend_yield": div})
        _write(folder, "rate_curves", {**curves, "zero_rate": np.tile(CURVE_RATES, len(CURRENCIES)) + shift})
        _write(folder, "fx_rates", {"currency": np.array(list(FX), dtype=object),
                                    "rate": np.array(list(FX.values()))})
    return SyntheticNight(root, PRIOR, RUN, positions, books, instruments, underlyings)
