"""A two-night test desk written only from the data contract, with marks priced by QuantLib.

The marks come from QuantLib's analytic European engine (flat curves, ACT/365F), not from the
package, so the archived explain can be checked against an outside reference.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import QuantLib as ql

from tests.contract_files import write_folder

PRIOR = dt.date(2026, 11, 27)   # a Friday
RUN = dt.date(2026, 11, 30)     # the Monday after: three calendar days, one business day


@dataclass(frozen=True)
class Inst:
    instrument_id: str
    underlying: str
    option_type: str
    strike: float
    expiry: dt.date
    multiplier: float
    currency: str


INSTRUMENTS = (
    Inst("ZEN-C100-J27", "ZEN", "call", 100.0, dt.date(2027, 6, 18), 100.0, "USD"),
    Inst("ZEN-P120-M27", "ZEN", "put", 120.0, dt.date(2027, 3, 19), 100.0, "USD"),
    Inst("QRX-C50-F27", "QRX", "call", 50.0, dt.date(2027, 1, 15), 10.0, "EUR"),
    Inst("ZEN-C95-EXP", "ZEN", "call", 95.0, RUN, 100.0, "USD"),
    Inst("ZEN-P90-D26", "ZEN", "put", 90.0, dt.date(2026, 12, 18), 100.0, "USD"),
)
SPOT = {PRIOR: {"ZEN": 100.0, "QRX": 50.0}, RUN: {"ZEN": 103.0, "QRX": 49.0}}
DIV = {PRIOR: {"ZEN": 0.010, "QRX": 0.000}, RUN: {"ZEN": 0.012, "QRX": 0.000}}
RATE = {PRIOR: {"USD": 0.040, "EUR": 0.020}, RUN: {"USD": 0.041, "EUR": 0.021}}
VOL = {PRIOR: {"ZEN": 0.25, "QRX": 0.30}, RUN: {"ZEN": 0.27, "QRX": 0.29}}
FX = {PRIOR: {"USD": 1.0, "EUR": 1.08}, RUN: {"USD": 1.0, "EUR": 1.10}}

POSITIONS = {
    PRIOR: [("T1", "Index vol", "ZEN-C100-J27", 10.0, None), ("T2", "Index vol", "ZEN-P120-M27", -5.0, None),
            ("T3", "Euro single names", "QRX-C50-F27", 20.0, None), ("T4", "Index vol", "ZEN-C95-EXP", 3.0, None),
            ("T5", "Index vol", "ZEN-P90-D26", 7.0, None), ("T6", "Index vol", "ZEN-C100-J27", 4.0, None)],
    RUN: [("T1", "Index vol", "ZEN-C100-J27", 10.0, None), ("T2", "Index vol", "ZEN-P120-M27", -5.0, None),
          ("T3", "Euro single names", "QRX-C50-F27", 20.0, None), ("T6", "Index vol", "ZEN-C100-J27", 6.0, 14.0),
          ("T7", "Index vol", "ZEN-P90-D26", 2.0, 1.5), ("T8", "Index vol", "ZEN-C100-J27", 1.0, None)],
}


def ql_option(inst: Inst, as_of: dt.date, vol: float | None = None) -> ql.VanillaOption:
    """QuantLib's analytic European option for ``inst`` on ``as_of`` (flat curves, ACT/365F).

    ``vol`` overrides the date's vol (for finite differences in vol).
    """
    today = ql.Date(as_of.day, as_of.month, as_of.year)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    vol = VOL[as_of][inst.underlying] if vol is None else vol
    spot = ql.QuoteHandle(ql.SimpleQuote(SPOT[as_of][inst.underlying]))
    rates = ql.YieldTermStructureHandle(ql.FlatForward(today, RATE[as_of][inst.currency], dc, ql.Continuous))
    divs = ql.YieldTermStructureHandle(ql.FlatForward(today, DIV[as_of][inst.underlying], dc, ql.Continuous))
    vols = ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), vol, dc))
    process = ql.BlackScholesMertonProcess(spot, divs, rates, vols)
    kind = ql.Option.Call if inst.option_type == "call" else ql.Option.Put
    expiry = ql.Date(inst.expiry.day, inst.expiry.month, inst.expiry.year)
    option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, inst.strike), ql.EuropeanExercise(expiry))
    option.setPricingEngine(ql.AnalyticEuropeanEngine(process))
    return option


def mark(inst: Inst, as_of: dt.date) -> float:
    """QuantLib's price, or the intrinsic value on the expiry date itself."""
    if inst.expiry == as_of:
        s = SPOT[as_of][inst.underlying]
        return max(s - inst.strike, 0.0) if inst.option_type == "call" else max(inst.strike - s, 0.0)
    return ql_option(inst, as_of).NPV()


def write_mini_desk(root: Path, *, omit_vol_for: tuple[str, ...] = ()) -> Path:
    """Write both nights under ``root``; marks of ``omit_vol_for`` instruments carry no implied vol."""
    for as_of in (PRIOR, RUN):
        live = [i for i in INSTRUMENTS if i.expiry >= as_of]
        write_folder(root, as_of, {
            "positions": [{"trade_id": t, "book": b, "instrument_id": i, "quantity": q,
                           "trade_date": PRIOR if as_of == PRIOR else (RUN if t in ("T7", "T8") else PRIOR),
                           "trade_price": p} for t, b, i, q, p in POSITIONS[as_of]],
            "instruments": [{"instrument_id": i.instrument_id, "underlying": i.underlying,
                             "option_type": i.option_type, "exercise": "european", "strike": i.strike,
                             "expiry": i.expiry, "multiplier": i.multiplier, "currency": i.currency}
                            for i in INSTRUMENTS],
            "option_marks": [{"instrument_id": i.instrument_id, "price": mark(i, as_of),
                              "implied_vol": None if (i.instrument_id in omit_vol_for or i.expiry == as_of)
                              else VOL[as_of][i.underlying]} for i in live],
            "underlying_marks": [{"underlying": u, "spot": s, "dividend_yield": DIV[as_of][u]}
                                 for u, s in SPOT[as_of].items()],
            "rate_curves": [{"currency": c, "tenor_years": 1.0, "zero_rate": r} for c, r in RATE[as_of].items()],
            "fx_rates": [{"currency": c, "rate": r} for c, r in FX[as_of].items()],
        })
    return root
