"""A synthetic night of any size, written to the data contract (for ``attribution bench``).

Two business dates of an invented desk: positions spread over books, instruments over
underlyings and three currencies, with every lifecycle case (most positions carried, some
closed, new with and without trade price, and expiring on the run date). The positions' mix is
that of a hedged options desk: 10 % delta-one hedges (shares, futures and forwards: version 2's
instrument kinds, one of each per underlying), 30 % American options and 60 % European options.
Option marks are model prices from the package's own valuation entry point (American ones by its
American method), with implied vols given for most and left null for a few European ones, so the
night goes through the vol solver too; futures carry a small basis to S e^((r - q) tau).
Vectorised throughout.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from attribution.loading import CONTRACT_SCHEMAS, CONTRACT_SCHEMAS_V2
from attribution.valuation import FORWARD, FUTURE, KIND_NAMES, OPTION, UNDERLYING, MarketState, value

PRIOR, RUN = dt.date(2026, 11, 26), dt.date(2026, 11, 27)
CURRENCIES = ("USD", "EUR", "JPY")
FX = {"USD": 1.0, "EUR": 1.09, "JPY": 0.0067}
CURVE_TENORS = np.array([0.25, 1.0, 2.0, 5.0])
CURVE_RATES = np.array([0.03, 0.033, 0.036, 0.04])  # one curve shape for every currency
HEDGE_SHARE = 0.10      # positions in delta-one hedges (underlying, future, forward)
AMERICAN_SHARE = 0.30   # positions in American options
HEDGE_KINDS = (UNDERLYING, FUTURE, FORWARD)
FUTURE_DAYS, FORWARD_DAYS = 110, 200  # settlement and delivery, days after the prior date
BASIS_SD = 0.0003                     # a future's settlement price around S e^((r - q) tau)
KIND_TABLE = np.array([KIND_NAMES[code] for code in range(len(KIND_NAMES))], dtype=object)  # code -> name


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


@dataclass(frozen=True, slots=True)
class _Instruments:
    """The desk's instruments: hedges first (three per underlying), then options."""

    ids: np.ndarray
    und: np.ndarray          # index of the underlying
    kind: np.ndarray         # valuation kind codes
    american: np.ndarray
    is_call: np.ndarray
    strike: np.ndarray       # NaN for an underlying and a future
    expiry_days: np.ndarray  # days after the prior date (0 for an underlying: it has no expiry)
    multiplier: np.ndarray

    @property
    def option(self) -> np.ndarray:
        return self.kind == OPTION


def _names(prefix: str, n: int) -> np.ndarray:
    return np.char.add(prefix, np.char.zfill(np.arange(n).astype(str), len(str(max(n - 1, 1))))).astype(object)


def _write(folder: Path, kind: str, columns: dict[str, object], schema: pa.Schema | None = None) -> None:
    schema = schema or CONTRACT_SCHEMAS[kind]
    arrays = [pa.array(columns[f.name], type=f.type, from_pandas=True) for f in schema]
    pq.write_table(pa.Table.from_arrays(arrays, schema=schema), folder / f"{kind}.parquet")


def _instruments(rng: np.random.Generator, instruments: int, underlyings: int, spot0: np.ndarray,
                 div0: np.ndarray) -> _Instruments:
    """Three hedges per underlying (while the instrument count allows), options for the rest."""
    hedges = min(3 * underlyings, max(instruments - 1, 0))
    n_opt = instruments - hedges
    h_und, h_kind = np.arange(hedges) // 3, np.array(HEDGE_KINDS, dtype=np.int8)[np.arange(hedges) % 3]
    suffix = np.array(["-SPOT", "-FUT", "-FWD"], dtype=object)[np.arange(hedges) % 3]
    und_names = _names("SYN", underlyings)
    h_days = np.select([h_kind == FUTURE, h_kind == FORWARD], [FUTURE_DAYS, FORWARD_DAYS], 0)
    tau = h_days / 365.0
    carry = np.exp((np.interp(tau, CURVE_TENORS, CURVE_RATES) - div0[h_und]) * tau)
    h_strike = np.where(h_kind == FORWARD, np.round(spot0[h_und] * carry, 2), np.nan)

    o_und = rng.integers(0, underlyings, n_opt)
    is_call = rng.random(n_opt) < 0.5
    strike = np.round(spot0[o_und] * np.exp(rng.normal(0.0, 0.15, n_opt)), 2)
    expiry_days = rng.integers(1, 720, n_opt)
    expiry_days[: max(n_opt // 100, 1)] = 1                  # 1 % of the options expire on the run date
    american = np.zeros(n_opt, dtype=bool)
    # American options hold AMERICAN_SHARE of all positions; options hold 1 - HEDGE_SHARE of them
    american[rng.permutation(n_opt)[: round(n_opt * AMERICAN_SHARE / (1.0 - HEDGE_SHARE))]] = True
    return _Instruments(
        ids=np.concatenate([und_names[h_und] + suffix, _names("SYN-O", n_opt)]),
        und=np.concatenate([h_und, o_und]),
        kind=np.concatenate([h_kind, np.full(n_opt, OPTION, dtype=np.int8)]),
        american=np.concatenate([np.zeros(hedges, dtype=bool), american]),
        is_call=np.concatenate([np.zeros(hedges, dtype=bool), is_call]),
        strike=np.concatenate([h_strike, strike]),
        expiry_days=np.concatenate([h_days, expiry_days]),
        multiplier=np.where(np.concatenate([h_kind, np.full(n_opt, OPTION)]) == UNDERLYING, 1.0, 100.0))


def _position_instruments(rng: np.random.Generator, inst: _Instruments, positions: int) -> np.ndarray:
    """Each position's instrument: HEDGE_SHARE in hedges, AMERICAN_SHARE in American options, the rest European."""
    pools = [np.flatnonzero(~inst.option), np.flatnonzero(inst.option & inst.american),
             np.flatnonzero(inst.option & ~inst.american)]
    shares = np.array([HEDGE_SHARE, AMERICAN_SHARE, 1.0 - HEDGE_SHARE - AMERICAN_SHARE])
    shares = np.where([p.size > 0 for p in pools], shares, 0.0)
    pool = rng.choice(3, size=positions, p=shares / shares.sum())
    out = np.empty(positions, dtype=np.intp)
    for k, members in enumerate(pools):  # three pools, not rows
        mine = pool == k
        out[mine] = members[rng.integers(0, members.size, int(mine.sum()))] if members.size else 0
    return out


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

    inst = _instruments(rng, instruments, underlyings, spot0, div0)
    option, i_und = inst.option, inst.und
    expiry = np.where(inst.kind == UNDERLYING, np.datetime64("NaT"),
                      np.datetime64(PRIOR, "D") + inst.expiry_days.astype("timedelta64[D]"))
    skew = np.where(option, rng.uniform(-0.15, 0.0, len(inst.ids)) * np.log(inst.strike / spot0[i_und]), 0.0)
    cp = np.where(inst.is_call, 1.0, -1.0)

    p_inst = _position_instruments(rng, inst, positions)
    trade_ids = _names("SYN-T", positions)
    p_book = _names("Book ", books)[rng.integers(0, books, positions)]
    qty = rng.integers(1, 100, positions) * np.where(rng.random(positions) < 0.5, -1.0, 1.0)
    qty = np.where(inst.kind[p_inst] == UNDERLYING, qty * 100.0, qty)  # shares, where the others have 100 a contract
    fate = rng.random(positions)
    in_prior = fate >= 0.02                                  # 2 % new on the run date
    in_run = (fate < 0.02) | (fate >= 0.04)                  # 2 % closed
    in_run &= ~(option[p_inst] & (inst.expiry_days[p_inst] == 1))  # expiring positions are gone on the run date
    trade_price = np.where(rng.random(positions) < 0.9, 1.0, np.nan)  # scaled to the mark below
    trade_price = np.where(inst.kind[p_inst] == FORWARD, np.nan, trade_price)  # a forward may be worth less than 0
    basis = 1.0 + rng.normal(0.0, BASIS_SD, (2, len(inst.ids)))

    curves = {"currency": np.repeat(np.array(CURRENCIES, dtype=object), 4),
              "tenor_years": np.tile(CURVE_TENORS, len(CURRENCIES))}
    for d, (as_of, spot, div, atm, shift) in enumerate(((PRIOR, spot0, div0, atm0, 0.0),
                                                        (RUN, spot1, div1, atm1, 0.0005))):
        folder = root / f"as_of={as_of.isoformat()}"
        folder.mkdir(parents=True, exist_ok=True)
        tau = np.where(inst.kind == UNDERLYING, 0.0, (expiry - np.datetime64(as_of, "D")).astype(float) / 365.0)
        live = tau >= 0
        vol = np.where(option, np.clip(atm[i_und] + skew, 0.05, None), 0.0)
        rate = np.interp(tau, CURVE_TENORS, CURVE_RATES + shift)
        price = np.full(len(inst.ids), np.nan)
        state = MarketState(spot[i_und][live], vol[live], tau[live], rate[live], div[i_und][live])
        price[live] = value(inst.strike[live], cp[live], state, inst.american[live], kind=inst.kind[live])
        future = inst.kind == FUTURE
        price[future] = price[future] * basis[d, future]
        time_value = price - np.maximum(cp * (spot[i_und] * np.exp(-div[i_und] * tau) - inst.strike
                                              * np.exp(-rate * tau)), 0.0)
        # 3 % of the European marks carry no vol (solved by the job), only where there is time value to solve from
        marked_vol = np.where((rng.random(len(inst.ids)) < 0.97) | inst.american
                              | ~(time_value > 1e-6 * spot[i_und]), vol, np.nan)
        keep = in_prior if as_of == PRIOR else in_run
        new = keep & ~in_prior
        mark = price[p_inst]
        _write(folder, "positions", {
            "trade_id": trade_ids[keep], "book": p_book[keep], "instrument_id": inst.ids[p_inst][keep],
            "quantity": qty[keep], "trade_date": np.full(int(keep.sum()), np.datetime64(as_of, "D")),
            "trade_price": np.where(new, mark * trade_price * 1.01, np.nan)[keep]})
        listed = live & option
        _write(folder, "instruments", {
            "instrument_id": inst.ids[live], "underlying": und[i_und][live],
            "option_type": np.where(option, np.where(inst.is_call, "call", "put"), None).astype(object)[live],
            "exercise": np.where(option, np.where(inst.american, "american", "european"), None).astype(object)[live],
            "strike": inst.strike[live], "expiry": expiry[live], "multiplier": inst.multiplier[live],
            "currency": und_ccy[i_und][live],
            "kind": KIND_TABLE[inst.kind[live]]}, CONTRACT_SCHEMAS_V2["instruments"])
        _write(folder, "option_marks", {"instrument_id": inst.ids[listed], "price": price[listed],
                                        "implied_vol": np.where(tau[listed] > 0, marked_vol[listed], np.nan)})
        _write(folder, "future_marks", {"instrument_id": inst.ids[future & live], "price": price[future & live]})
        _write(folder, "underlying_marks", {"underlying": und, "spot": spot, "dividend_yield": div})
        _write(folder, "rate_curves", {**curves, "zero_rate": np.tile(CURVE_RATES, len(CURRENCIES)) + shift})
        _write(folder, "fx_rates", {"currency": np.array(list(FX), dtype=object),
                                    "rate": np.array(list(FX.values()))})
    return SyntheticNight(root, PRIOR, RUN, positions, books, instruments, underlyings)

