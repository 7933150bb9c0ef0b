"""The mini desk with its delta hedges, written only from the data contract (version 2).

Adds to tests/mini_desk.py, on both dates: the ZEN shares (kind ``underlying``), a ZEN index future
(kind ``future``, settlement prices in future_marks.parquet) and a QRX forward in EUR (kind
``forward``), held in the books of the options they hedge. Expected figures are computed in the
tests by plain arithmetic from these numbers.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from tests.contract_files import read_rows, write_folder
from tests.mini_desk import PRIOR, RUN, write_mini_desk

SHARE = {"instrument_id": "ZEN-SHR", "underlying": "ZEN", "kind": "underlying", "option_type": None,
         "exercise": None, "strike": None, "expiry": None, "multiplier": 1.0, "currency": "USD"}
FUTURE = {"instrument_id": "ZEN-FUT-M27", "underlying": "ZEN", "kind": "future", "option_type": None,
          "exercise": None, "strike": None, "expiry": dt.date(2027, 3, 19), "multiplier": 50.0, "currency": "USD"}
FORWARD = {"instrument_id": "QRX-FWD-J27", "underlying": "QRX", "kind": "forward", "option_type": None,
           "exercise": None, "strike": 50.5, "expiry": dt.date(2027, 6, 18), "multiplier": 1000.0,
           "currency": "EUR"}
HEDGE_INSTRUMENTS = (SHARE, FUTURE, FORWARD)
FUTURE_PRICE = {PRIOR: 101.2, RUN: 104.1}  # settlement prices: the basis to S e^((r-q)tau) moves overnight
HEDGES = (("H1", "Index vol", "ZEN-SHR", -500.0), ("H2", "Index vol", "ZEN-FUT-M27", -3.0),
          ("H3", "Euro single names", "QRX-FWD-J27", -10.0))


def write_hedged_desk(root: Path) -> Path:
    """The mini desk under ``root`` plus the hedges on both dates (kinds given on every instrument row)."""
    write_mini_desk(root)
    for day in (PRIOR, RUN):
        instruments = [{**row, "kind": "option"} for row in read_rows(root, day, "instruments")]
        positions = read_rows(root, day, "positions")
        positions += [{"trade_id": t, "book": b, "instrument_id": i, "quantity": q, "trade_date": PRIOR,
                       "trade_price": None} for t, b, i, q in HEDGES]
        write_folder(root, day, {
            "instruments": instruments + [dict(h) for h in HEDGE_INSTRUMENTS],
            "positions": positions,
            "future_marks": [{"instrument_id": FUTURE["instrument_id"], "price": FUTURE_PRICE[day]}],
        })
    return root


# The run date's events of the whole book (trade_activity, cash_flows, official_pnl), on top of the
# hedged desk: the mini desk's own changes at execution prices, a hedge rebalance with its fee, a book
# financing charge, a fee in EUR, and the desk's official P&L of one book plus a book without positions.
ACTIVITY = (
    ("A1", "T6", "increase", 2.0, 14.0),       # 4 -> 6 lots, bought at 14.00
    ("A2", "T7", "new", 2.0, 1.5),             # new trade at 1.50 (as its trade_price)
    ("A3", "T8", "new", 1.0, 10.0),            # new trade without a trade_price, priced by its activity
    ("A4", "T5", "close", -7.0, 0.03),         # 7 lots sold at 0.03
    ("A5", "H1", "decrease", -20.0, 102.9),    # 20 more shares sold short at 102.90
)
H1_RUN_QUANTITY = -520.0
CASH_FLOWS = (
    ("C1", "Index vol", "H1", "USD", -1.5, "commission"),
    ("C2", "Index vol", None, "USD", -250.0, "financing"),
    ("C3", "Euro single names", "T3", "EUR", -10.0, "fee"),
)
OFFICIAL = (("Index vol", 1_000_000.0), ("Ghost book", 5.0))


def write_whole_book(root: Path) -> Path:
    """The hedged desk with the run date's trade activity, cash flows and official P&L."""
    write_hedged_desk(root)
    positions = [dict(r, quantity=H1_RUN_QUANTITY) if r["trade_id"] == "H1" else r
                 for r in read_rows(root, RUN, "positions")]
    write_folder(root, RUN, {
        "positions": positions,
        "trade_activity": [{"activity_id": a, "trade_id": t, "kind": k, "quantity": q, "price": p}
                           for a, t, k, q, p in ACTIVITY],
        "cash_flows": [{"flow_id": f, "book": b, "trade_id": t, "currency": c, "amount": x, "kind": k}
                       for f, b, t, c, x, k in CASH_FLOWS],
        "official_pnl": [{"book": b, "pnl": p} for b, p in OFFICIAL],
    })
    return root
