"""A two-night desk with a dividend going ex and a 2-for-1 split, written only from the data contract.

Night PRIOR -> RUN: underlying KEL goes ex a 2.00 dividend on RUN (spot 100.00 -> 98.00, a second
dividend of 1.50 still ahead), underlying SPL splits 2-for-1 with ex_date RUN (its listed options'
strikes halve and multipliers double; spot 80 -> 41, i.e. 82 in old units), underlying MOR has no
dividend rows (continuous yield only). Marks come from QuantLib's analytic European engine on the
escrowed spot, the dividends' present value computed here from QuantLib's discount curve, never
from the package.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import QuantLib as ql

from tests.contract_files import write_folder
from tests.mini_desk import Inst

PRIOR = dt.date(2026, 3, 10)   # a Tuesday
RUN = dt.date(2026, 3, 11)     # KEL's ex-date and SPL's split date
RATE = {PRIOR: 0.040, RUN: 0.040}
SPOT = {PRIOR: {"KEL": 100.0, "SPL": 80.0, "MOR": 50.0}, RUN: {"KEL": 98.0, "SPL": 41.0, "MOR": 50.5}}
YIELD = {"KEL": 0.0, "SPL": 0.0, "MOR": 0.02}
VOL = {"KEL": 0.25, "SPL": 0.30, "MOR": 0.20}
DIVIDENDS = {PRIOR: [("KEL", dt.date(2026, 3, 11), 2.00), ("KEL", dt.date(2026, 6, 10), 1.50)],
             RUN: [("KEL", dt.date(2026, 3, 11), 2.00), ("KEL", dt.date(2026, 6, 10), 1.50)]}
SPLIT_RATIO = 2.0
ACTIONS = [("SPL", RUN, SPLIT_RATIO)]


KEL = (Inst("KEL-C100-S26", "KEL", "call", 100.0, dt.date(2026, 9, 18), 100.0, "USD"),
       Inst("KEL-P100-S26", "KEL", "put", 100.0, dt.date(2026, 9, 18), 100.0, "USD"),
       Inst("KEL-C90-A26", "KEL", "call", 90.0, dt.date(2026, 4, 17), 100.0, "USD"))
MOR = (Inst("MOR-C50-S26", "MOR", "call", 50.0, dt.date(2026, 9, 18), 100.0, "USD"),)
SPL_OLD = (Inst("SPL-C80-D26", "SPL", "call", 80.0, dt.date(2026, 12, 18), 100.0, "USD"),
           Inst("SPL-P70-D26", "SPL", "put", 70.0, dt.date(2026, 12, 18), 100.0, "USD"))
SPL_NEW = tuple(dataclasses.replace(i, strike=i.strike / SPLIT_RATIO, multiplier=i.multiplier * SPLIT_RATIO)
                for i in SPL_OLD)
INSTRUMENTS = {PRIOR: KEL + MOR + SPL_OLD, RUN: KEL + MOR + SPL_NEW}
POSITIONS = [("D1", "KEL-C100-S26", 10.0), ("D2", "KEL-P100-S26", -8.0), ("D3", "KEL-C90-A26", 5.0),
             ("D4", "MOR-C50-S26", 3.0), ("S1", "SPL-C80-D26", 6.0), ("S2", "SPL-P70-D26", -4.0)]
BOOK = "Single names"


def _date(day: dt.date) -> ql.Date:
    return ql.Date(day.day, day.month, day.year)


def dividends_ahead(as_of: dt.date, inst: Inst) -> list[tuple[dt.date, float]]:
    """The contract's window: as_of < ex_date <= expiry."""
    return [(d, a) for u, d, a in DIVIDENDS[as_of] if u == inst.underlying and as_of < d <= inst.expiry]


def discount_curve(as_of: dt.date) -> ql.YieldTermStructureHandle:
    """QuantLib's flat continuous ACT/365F curve of the date (evaluation date set to ``as_of``)."""
    ql.Settings.instance().evaluationDate = _date(as_of)
    return ql.YieldTermStructureHandle(ql.FlatForward(_date(as_of), RATE[as_of], ql.Actual365Fixed(),
                                                      ql.Continuous))


def dividend_pv(as_of: dt.date, inst: Inst) -> float:
    """Present value of the dividends in the instrument's window, discounted on QuantLib's curve."""
    curve = discount_curve(as_of)
    return sum(a * curve.discount(_date(d)) for d, a in dividends_ahead(as_of, inst))


def process(as_of: dt.date, spot: float, underlying: str, vol: float | None = None) -> ql.BlackScholesMertonProcess:
    """Black-Scholes-Merton process of the date: flat rate, the underlying's yield and vol."""
    curve = discount_curve(as_of)
    dc = ql.Actual365Fixed()
    divs = ql.YieldTermStructureHandle(ql.FlatForward(_date(as_of), YIELD[underlying], dc, ql.Continuous))
    vols = ql.BlackVolTermStructureHandle(ql.BlackConstantVol(_date(as_of), ql.NullCalendar(),
                                                              VOL[underlying] if vol is None else vol, dc))
    return ql.BlackScholesMertonProcess(ql.QuoteHandle(ql.SimpleQuote(spot)), divs, curve, vols)


def ql_escrowed(inst: Inst, as_of: dt.date, spot: float | None = None, vol: float | None = None) -> ql.VanillaOption:
    """QuantLib's analytic European engine on the escrowed spot S - PV(dividends), PV computed here."""
    s = SPOT[as_of][inst.underlying] if spot is None else spot
    escrowed = s - dividend_pv(as_of, inst)
    option = _option(inst)
    option.setPricingEngine(ql.AnalyticEuropeanEngine(process(as_of, escrowed, inst.underlying, vol)))
    return option


def ql_dividend_engine(inst: Inst, as_of: dt.date) -> ql.VanillaOption:
    """QuantLib's own escrowed-dividend engine (AnalyticDividendEuropeanEngine) with the date's schedule ahead."""
    option = _option(inst)
    ahead = dividends_ahead(as_of, inst)
    schedule = ql.DividendVector([_date(d) for d, _ in ahead], [a for _, a in ahead])
    proc = process(as_of, SPOT[as_of][inst.underlying], inst.underlying)
    option.setPricingEngine(ql.AnalyticDividendEuropeanEngine(proc, schedule))
    return option


def _option(inst: Inst) -> ql.VanillaOption:
    kind = ql.Option.Call if inst.option_type == "call" else ql.Option.Put
    return ql.VanillaOption(ql.PlainVanillaPayoff(kind, inst.strike), ql.EuropeanExercise(_date(inst.expiry)))


def mark(inst: Inst, as_of: dt.date) -> float:
    """The date's mark: QuantLib on the escrowed spot."""
    return ql_escrowed(inst, as_of).NPV()


def write_dividend_desk(root: Path, *, desk_vols: bool = True, dividends: bool = True,
                        actions: bool = True) -> Path:
    """Write both nights under ``root``; ``desk_vols`` False leaves implied_vol null (the job solves it)."""
    for as_of in (PRIOR, RUN):
        files: dict[str, object] = {
            "positions": [{"trade_id": t, "book": BOOK, "instrument_id": i, "quantity": q, "trade_date": PRIOR,
                           "trade_price": None} for t, i, q in POSITIONS],
            "instruments": [{"instrument_id": i.instrument_id, "underlying": i.underlying,
                             "option_type": i.option_type, "exercise": "european", "strike": i.strike,
                             "expiry": i.expiry, "multiplier": i.multiplier, "currency": i.currency}
                            for i in INSTRUMENTS[as_of]],
            "option_marks": [{"instrument_id": i.instrument_id, "price": mark(i, as_of),
                              "implied_vol": VOL[i.underlying] if desk_vols else None} for i in INSTRUMENTS[as_of]],
            "underlying_marks": [{"underlying": u, "spot": s, "dividend_yield": YIELD[u]}
                                 for u, s in SPOT[as_of].items()],
            "rate_curves": [{"currency": "USD", "tenor_years": 1.0, "zero_rate": RATE[as_of]}],
        }
        if dividends:
            files["dividends"] = [{"underlying": u, "ex_date": d, "amount": a} for u, d, a in DIVIDENDS[as_of]]
        if actions:
            files["corporate_actions"] = [{"underlying": u, "ex_date": d, "ratio": r} for u, d, r in ACTIONS]
        write_folder(root, as_of, files)  # type: ignore[arg-type]
    return root
