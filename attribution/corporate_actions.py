"""Share adjustments (splits) crossing a night: the prior date restated in the run date's units.

On the night with ``prior_as_of < ex_date <= as_of`` of a ``corporate_actions.parquet`` row, every
price per unit of the underlying on the prior date is divided by ``ratio`` (new units per old unit)
and every multiplier multiplied by it, before the markets are built and the trades matched::

    S0 / ratio      strike / ratio      multiplier x ratio      option mark / ratio
    dividend amount / ratio             trade_price / ratio     quantity unchanged

so a position whose instrument the exchange adjusted keeps its trade and instrument id, matches the
run date's terms and is ``carried``; its value ``quantity x multiplier x price`` is unchanged by the
restatement, so the split itself makes no P&L. Each action applied gets an ``info`` row in the
exception ledger, and the positions on its underlying the ``restated`` flag (:mod:`attribution.night`).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from attribution.contract import CleanNight
from attribution.exceptions_log import INFO, ExceptionLog

RESTATED_RULE = "split restated the prior state"


def _in_night(prior: CleanNight, run: CleanNight, night: CleanNight) -> np.ndarray:
    """Per clean action of ``night`` (either date): ``prior_as_of < ex_date <= as_of``."""
    day = night.corporate_actions["ex_date"].to_numpy(dtype="datetime64[D]")
    return (day > np.datetime64(prior.raw.as_of, "D")) & (day <= np.datetime64(run.raw.as_of, "D"))


def actions_tonight(prior: CleanNight, run: CleanNight) -> pd.DataFrame:
    """Clean actions of either date with ``prior_as_of < ex_date <= as_of`` (one per underlying and ex_date)."""
    parts = []
    for night in (run, prior):  # the run date's row wins where both list the same action
        frame = night.corporate_actions
        parts.append(frame[_in_night(prior, run, night)].assign(file=night.raw.path("corporate_actions.parquet")))
    both = pd.concat(parts, ignore_index=True)
    return both.drop_duplicates(["underlying", "ex_date"], keep="first").reset_index(drop=True)


def restate_prior(prior: CleanNight, run: CleanNight, log: ExceptionLog) -> tuple[CleanNight, pd.Series]:
    """The prior date's clean tables in the run date's units, and the ratio applied per underlying.

    Two actions of one underlying in one night (a long weekend) compound. Without actions the
    prior date is returned as it is.
    """
    if not any(_in_night(prior, run, night).any() for night in (run, prior)):  # most nights: nothing to restate
        return prior, pd.Series(dtype=float)
    tonight = actions_tonight(prior, run)
    ratio = tonight.groupby("underlying", sort=True)["ratio"].prod()

    instruments = prior.instruments.copy()
    inst_ratio = instruments["underlying"].map(ratio)
    hit = inst_ratio.notna().to_numpy()
    instruments.loc[hit, "strike"] = instruments.loc[hit, "strike"] / inst_ratio[hit]
    instruments.loc[hit, "multiplier"] = instruments.loc[hit, "multiplier"] * inst_ratio[hit]
    by_instrument = inst_ratio[hit]

    marks = prior.marks.copy()
    mark_ratio = by_instrument.reindex(marks.index)
    on = mark_ratio.notna().to_numpy()
    marks.loc[on, "price"] = marks.loc[on, "price"] / mark_ratio[on]

    underlyings = prior.underlyings.copy()
    spot_ratio = ratio.reindex(underlyings.index)
    on = spot_ratio.notna().to_numpy()
    underlyings.loc[on, "spot"] = underlyings.loc[on, "spot"] / spot_ratio[on]

    dividends = prior.dividends.copy()
    div_ratio = dividends["underlying"].map(ratio)
    on = div_ratio.notna().to_numpy()
    dividends.loc[on, "amount"] = dividends.loc[on, "amount"] / div_ratio[on]

    positions = prior.positions.copy()
    trade_ratio = positions["instrument_id"].map(by_instrument)
    on = trade_ratio.notna().to_numpy()
    positions.loc[on, "trade_price"] = positions.loc[on, "trade_price"] / trade_ratio[on]

    counts = instruments.loc[hit, "underlying"].value_counts().reindex(tonight["underlying"], fill_value=0)
    for file, rows in tonight.assign(n=counts.to_numpy()).groupby("file", sort=False):  # one or two files
        keys = rows["underlying"].astype(str) + " @ " + rows["ex_date"].dt.strftime("%Y-%m-%d")
        detail = [f"ratio {r:g}: the {prior.raw.as_of} spot, strikes, option marks and dividends divided by "
                  f"{r:g} and multipliers multiplied by it ({n} instruments), quantities unchanged"
                  for r, n in zip(rows["ratio"], rows["n"], strict=True)]
        log.add(str(file), keys.to_numpy(), RESTATED_RULE, detail, INFO)

    restated = dataclasses.replace(prior, instruments=instruments, marks=marks, underlyings=underlyings,
                                   dividends=dividends, positions=positions)
    return restated, ratio
