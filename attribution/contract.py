"""Row rules of the data contract, one file at a time: clean tables plus exception rows.

Every rule here is a vectorised mask over a whole file. A row that breaks a rule is left out of
the clean table and becomes a ``rejected`` row of the exception ledger naming the file, the
row's key and the rule. Rules that need two files (a position whose instrument has no mark,
a price outside its no-arbitrage bounds) live in :mod:`attribution.market` and
:mod:`attribution.lifecycle`.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from attribution.config import CheckSettings
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.keys import KeyCodes, blank_text
from attribution.loading import RawNight


@dataclass(frozen=True, slots=True)
class CleanNight:
    """One date's rows that passed the row rules, keyed for look-ups."""

    raw: RawNight
    positions: pd.DataFrame        # RangeIndex; columns of positions.parquet
    instruments: pd.DataFrame      # indexed by instrument_id
    marks: pd.DataFrame            # indexed by instrument_id
    underlyings: pd.DataFrame      # indexed by underlying
    curves: pd.DataFrame           # currency, tenor_years, zero_rate
    fx: pd.Series                  # rate per currency (reporting currency per unit)
    rejected_trades: pd.DataFrame  # trade_id, book, rule of positions rejected by a row rule
    desks: pd.Series               # desk per book (books.parquet); empty without the file
    dividends: pd.DataFrame        # underlying, ex_date (datetime64[D]), amount; empty without the file
    broken_schedules: frozenset[str]  # underlyings with a rejected row in dividends.parquet
    corporate_actions: pd.DataFrame   # underlying, ex_date (datetime64[D]), ratio; empty without the file
    future_marks: pd.DataFrame     # settlement price of futures, indexed by instrument_id (empty without the file)
    activity: pd.DataFrame | None  # trade_activity rows (None without the file: the two-snapshot fallback)
    cash_flows: pd.DataFrame       # cash_flows rows (empty without the file)
    official: pd.Series            # official P&L per book (empty without the file)
    # the clean positions' text columns as codes from reading (attribution.keys), row for row (empty without them)
    position_keys: dict[str, KeyCodes] = dataclasses.field(default_factory=dict)


Detail = str | Callable[[np.ndarray], object]


CURRENCY_CODE = re.compile(r"[A-Z]{3}")  # the form of an ISO 4217 code
NULL_KEY = "(null) row "  # the ledger key of a row without its key: this prefix and the row's number in its file


def _key(frame: pd.DataFrame, column: str, mask: np.ndarray) -> np.ndarray:
    """The ledger keys of the masked rows: the key, or ``(null) row N`` where it is null."""
    keys = frame[column].to_numpy(dtype=object)[mask]
    null = pd.isna(keys)
    if null.any():
        keys = keys.copy()
        keys[null] = NULL_KEY + frame.index[mask][null].astype(str).to_numpy(dtype=object)
    return keys


_blank_text = blank_text  # the per-value blank rule (see :func:`attribution.keys.blank_text`)


def _blank(values: pd.Series) -> np.ndarray:
    """Null, or a string of only white space (an empty key is no key)."""
    missing = values.isna().to_numpy().copy()
    if values.dtype == object and len(values):
        missing[~missing] = _blank_text(values.to_numpy(dtype=object)[~missing])
    return missing


@dataclass(frozen=True, slots=True)
class _Codes:
    """A text column factorised once: one hash pass serves its null, blank and duplicate rules."""

    codes: np.ndarray    # per row, the index of its value in ``uniques``; -1 where null
    uniques: np.ndarray  # the distinct non-null values
    keyed: KeyCodes | None = None  # the column's codes from reading (blank values tested on its Arrow text)

    @classmethod
    def of(cls, values: pd.Series) -> _Codes:
        codes, uniques = pd.factorize(values.to_numpy(dtype=object), use_na_sentinel=True)
        return cls(codes, np.asarray(uniques, dtype=object))

    @classmethod
    def read(cls, keyed: KeyCodes) -> _Codes:
        """The codes the reader made (:func:`attribution.loading.read_night`): no second hash pass. The distinct
        values' Python strings are made only if a rule asks for them (:meth:`texts`)."""
        return cls(keyed.codes, np.zeros(0, dtype=object) if keyed.uniques is None else keyed.uniques, keyed)

    @property
    def size(self) -> int:
        """How many distinct values."""
        return len(self.uniques) if self.keyed is None else len(self.keyed.values)

    def texts(self) -> np.ndarray:
        """The distinct values as Python strings."""
        return self.uniques if self.keyed is None else self.keyed.texts()

    def blank(self) -> np.ndarray:
        """Per row: null, or a text of only white space."""
        null = self.codes < 0
        if not self.size:
            return null
        per_value = _blank_text(self.uniques) if self.keyed is None else self.keyed.blank_values()
        return null | per_value[np.where(null, 0, self.codes)]

    def per_row(self, per_value: np.ndarray, null: bool) -> np.ndarray:
        """A value per row from one per distinct value (``null`` where the row is null)."""
        return np.where(self.codes < 0, null, per_value[np.maximum(self.codes, 0)]) if len(per_value) else \
            np.full(len(self.codes), null)

    def duplicated(self) -> np.ndarray:
        """Non-null values that appear more than once (every copy)."""
        null = self.codes < 0
        if not self.size:
            return np.zeros(len(self.codes), dtype=bool)
        counts = np.bincount(self.codes[~null], minlength=self.size)
        return ~null & (counts[np.where(null, 0, self.codes)] > 1)


def shown(frame: pd.DataFrame, column: str) -> Callable[[np.ndarray], object]:
    """Detail text ``column = value`` for the masked rows (null and NaN shown as such)."""
    def text(mask: np.ndarray) -> object:
        values = frame[column].to_numpy(dtype=object)[mask]
        return np.array([f"{column} = {'null' if v is None else v}" for v in values], dtype=object)
    return text


class _Rules:
    """Applies masks to one file and records what they reject."""

    def __init__(self, log: ExceptionLog, path: str, frame: pd.DataFrame, key_column: str,
                 keys: dict[str, KeyCodes] | None = None) -> None:
        """``keys``: the codes of the file's text columns from reading, over the rows of ``frame``."""
        self.log, self.path, self.frame, self.key_column = log, path, frame, key_column
        self.ok = np.ones(len(frame), dtype=bool)
        self.reasons = np.full(len(frame), "", dtype=object)
        self._codes: dict[str, _Codes | None] = {}
        self._keys = keys or {}

    def _factorised(self, column: str) -> _Codes | None:
        """The column's codes (from reading, else computed once), or None for a column that is not text."""
        if column not in self._codes:
            keyed = self._keys.get(column)
            if keyed is not None and len(keyed) == len(self.frame):
                self._codes[column] = _Codes.read(keyed)
            else:
                values = self.frame[column]
                self._codes[column] = _Codes.of(values) if values.dtype == object else None
        return self._codes[column]

    def clean_keys(self, column: str) -> KeyCodes | None:
        """The codes from reading of the rows left in the clean table (None without them)."""
        keyed = self._keys.get(column)
        return None if keyed is None or len(keyed) != len(self.ok) else keyed.take(self.ok)

    def blank(self, column: str) -> np.ndarray:
        """Per row: null, or a text of only white space."""
        codes = self._factorised(column)
        return _blank(self.frame[column]) if codes is None else codes.blank()

    def null(self, column: str) -> np.ndarray:
        """Per row: null (None or NaN)."""
        codes = self._factorised(column)
        return self.frame[column].isna().to_numpy() if codes is None else codes.codes < 0

    def isin(self, column: str, values: tuple[str, ...]) -> np.ndarray:
        """Per row: the value is one of ``values`` (a text column: tested once per distinct value)."""
        codes = self._factorised(column)
        if codes is None:
            return self.frame[column].isin(values).to_numpy()
        return codes.per_row(pd.Index(codes.texts(), dtype=object).isin(values), False)

    def currency_code(self, column: str) -> np.ndarray:
        """Per row: three capital letters A-Z (the form of an ISO 4217 code); tested once per distinct value."""
        codes = self._factorised(column)
        if codes is None:
            return self.frame[column].astype(str).str.fullmatch(CURRENCY_CODE.pattern).to_numpy(dtype=bool)
        return codes.per_row(np.array([type(v) is str and CURRENCY_CODE.fullmatch(v) is not None
                                       for v in codes.texts()], dtype=bool), False)

    def reject(self, bad: np.ndarray | pd.Series, rule: str, detail: Detail = "") -> None:
        """Rows where ``bad`` holds (and no earlier rule fired) leave the clean table with a ledger row.

        ``detail`` is one text for every row, or a function of the mask giving one text per
        rejected row (so that detail text is only built for the few rows that need it).
        """
        mask = np.asarray(bad, dtype=bool) & self.ok
        if mask.any():
            keys = _key(self.frame, self.key_column, mask)
            self.log.add(self.path, keys, rule, detail(mask) if callable(detail) else detail,
                         keyless=pd.isna(self.frame[self.key_column].to_numpy(dtype=object)[mask]))
            self.reasons[mask] = rule
            self.ok &= ~mask

    def required(self, *columns: str) -> None:
        for column in columns:
            self.reject(self.blank(column), f"{column} is null", f"{column} is required (null or blank)")

    def unique(self, column: str) -> None:
        codes = self._factorised(column)
        if codes is None:
            dup = (self.frame[column].duplicated(keep=False) & self.frame[column].notna()).to_numpy()
        else:
            dup = codes.duplicated()
        self.reject(dup, f"duplicate {column}", "the key appears more than once; every copy is left out")

    def finite(self, *columns: str) -> None:
        for column in columns:
            values = self.frame[column].to_numpy(dtype=float)
            self.reject(~np.isfinite(values), f"{column} is not a finite number", shown(self.frame, column))

    def positive(self, *columns: str) -> None:
        for column in columns:
            values = self.frame[column].to_numpy(dtype=float)
            self.reject(values <= 0, f"{column} must be > 0", shown(self.frame, column))

    def clean(self) -> pd.DataFrame:
        return self.frame[self.ok]


def _positions(raw: RawNight, log: ExceptionLog,
               checks: CheckSettings) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, KeyCodes]]:
    file = "positions.parquet"
    frame = raw.tables[file]
    rules = _Rules(log, raw.path(file), frame, "trade_id", raw.keys.get(file))
    rules.required("trade_id", "book", "instrument_id")
    rules.unique("trade_id")
    rules.finite("quantity")
    quantity = frame["quantity"].to_numpy(dtype=float)
    rules.reject(np.abs(quantity) > checks.max_abs_quantity, "quantity is absurdly large",
                 lambda m: shown(frame, "quantity")(m) + f" contracts, above {checks.max_abs_quantity:g}")
    price = frame["trade_price"].to_numpy(dtype=float)
    rules.reject(np.isinf(price) | (price < 0), "trade_price must be a finite number >= 0 when given",
                 shown(frame, "trade_price"))
    keyed = ~rules.ok & frame["trade_id"].notna().to_numpy()
    rejected = frame.loc[keyed, ["trade_id", "book"]].copy()
    rejected["rule"] = rules.reasons[keyed]
    keys = {c: k for c in ("trade_id", "book", "instrument_id") if (k := rules.clean_keys(c)) is not None}
    return rules.clean().reset_index(drop=True), rejected, keys


KINDS = ("option", "underlying", "future", "forward")
# Which kinds need each term (data contract, "Instrument kinds"); the other kinds must leave it null.
TERM_KINDS: dict[str, tuple[str, ...]] = {
    "option_type": ("option",),
    "exercise": ("option",),
    "strike": ("option", "forward"),
    "expiry": ("option", "future", "forward"),
}


def _instruments(raw: RawNight, log: ExceptionLog) -> pd.DataFrame:
    file = "instruments.parquet"
    frame = raw.tables[file]
    rules = _Rules(log, raw.path(file), frame, "instrument_id", raw.keys.get(file))
    kind = frame["kind"].where(frame["kind"].notna(), "option")  # null or absent: an option (version 1)
    # each row's kind as its place in KINDS (-1: not a kind), so every rule below is an integer mask
    kind_code = pd.Index(KINDS, dtype=object).get_indexer(pd.Index(kind.to_numpy(dtype=object), dtype=object))

    def of_kinds(kinds: tuple[str, ...]) -> np.ndarray:
        return np.isin(kind_code, [KINDS.index(k) for k in kinds])

    for column in ("instrument_id", "underlying", "option_type", "exercise", "expiry", "currency"):
        applies = of_kinds(TERM_KINDS.get(column, KINDS))
        rules.reject(applies & rules.blank(column), f"{column} is null", f"{column} is required (null or blank)")
    rules.unique("instrument_id")
    rules.reject(kind_code < 0, "kind must be option, underlying, future or forward", shown(frame, "kind"))
    for column, kinds in TERM_KINDS.items():
        given = ~rules.null(column)
        for name in (k for k in KINDS if k not in kinds):
            rules.reject(given & (kind_code == KINDS.index(name)), f"{column} must be null for kind {name}",
                         lambda m, column=column, name=name: shown(frame, column)(m) + f"; kind {name} has no {column}")
    option = kind_code == KINDS.index("option")
    rules.reject(option & ~rules.isin("option_type", ("call", "put")), "option_type must be call or put",
                 shown(frame, "option_type"))
    rules.reject(option & ~rules.isin("exercise", ("european", "american")),
                 "exercise must be european or american", shown(frame, "exercise"))
    struck = of_kinds(TERM_KINDS["strike"])
    strike = frame["strike"].to_numpy(dtype=float)
    rules.reject(struck & ~np.isfinite(strike), "strike is not a finite number", shown(frame, "strike"))
    rules.finite("multiplier")
    rules.reject(struck & (strike <= 0), "strike must be > 0", shown(frame, "strike"))
    rules.positive("multiplier")
    rules.reject(~rules.currency_code("currency"), "currency must be an ISO 4217 code", shown(frame, "currency"))
    return rules.clean().assign(kind=kind[rules.ok]).set_index("instrument_id")


def _future_marks(raw: RawNight, log: ExceptionLog) -> pd.DataFrame:
    file = "future_marks.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return pd.DataFrame({"price": pd.Series(dtype=float)}, index=pd.Index([], name="instrument_id", dtype=object))
    rules = _Rules(log, raw.path(file), frame, "instrument_id", raw.keys.get(file))
    rules.required("instrument_id")
    rules.unique("instrument_id")
    rules.finite("price")
    rules.positive("price")
    return rules.clean().set_index("instrument_id")


ACTIVITY_KINDS = ("new", "increase", "decrease", "close", "exercise", "assignment", "correction", "cancel")
UNPRICED_ACTIVITY = ("correction", "cancel")  # booking fixes: restate the quantity, make no P&L
CASH_KINDS = ("fee", "commission", "dividend", "financing", "settlement", "other")


def activity_rows(raw: RawNight, log: ExceptionLog) -> pd.DataFrame | None:
    file = "trade_activity.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return None
    rules = _Rules(log, raw.path(file), frame, "activity_id", raw.keys.get(file))
    rules.required("activity_id", "trade_id", "kind")
    rules.unique("activity_id")
    rules.reject(~rules.isin("kind", ACTIVITY_KINDS), "activity kind unknown",
                 lambda m: shown(frame, "kind")(m) + "; one of " + ", ".join(ACTIVITY_KINDS))
    rules.finite("quantity")
    price = frame["price"].to_numpy(dtype=float)
    rules.reject(np.isinf(price), "price is not a finite number", shown(frame, "price"))
    rules.reject(rules.isin("kind", UNPRICED_ACTIVITY) & ~np.isnan(price),
                 "price must be null for a correction or cancel", shown(frame, "price"))
    return rules.clean().reset_index(drop=True)


def _cash_flows(raw: RawNight, log: ExceptionLog) -> pd.DataFrame:
    file = "cash_flows.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return pd.DataFrame({c: pd.Series(dtype=object if c != "amount" else float)
                             for c in ("flow_id", "book", "trade_id", "currency", "amount", "kind")})
    rules = _Rules(log, raw.path(file), frame, "flow_id", raw.keys.get(file))
    rules.required("flow_id", "book", "currency", "kind")
    rules.unique("flow_id")
    rules.finite("amount")
    rules.reject(~rules.isin("kind", CASH_KINDS), "cash flow kind unknown",
                 lambda m: shown(frame, "kind")(m) + "; one of " + ", ".join(CASH_KINDS))
    rules.reject(~rules.currency_code("currency"), "currency must be an ISO 4217 code", shown(frame, "currency"))
    return rules.clean().reset_index(drop=True)


def _official_pnl(raw: RawNight, log: ExceptionLog) -> pd.Series:
    file = "official_pnl.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return pd.Series(dtype=float)
    rules = _Rules(log, raw.path(file), frame, "book", raw.keys.get(file))
    rules.required("book")
    rules.unique("book")
    rules.finite("pnl")
    return rules.clean().set_index("book")["pnl"].astype(float)


def _marks(raw: RawNight, log: ExceptionLog, checks: CheckSettings) -> pd.DataFrame:
    file = "option_marks.parquet"
    frame = raw.tables[file]
    rules = _Rules(log, raw.path(file), frame, "instrument_id", raw.keys.get(file))
    rules.required("instrument_id")
    rules.unique("instrument_id")
    rules.finite("price")
    price = frame["price"].to_numpy(dtype=float)
    rules.reject(price < 0, "price must be >= 0", shown(frame, "price"))
    vol = frame["implied_vol"].to_numpy(dtype=float)
    given = ~np.isnan(vol)
    vol_text = shown(frame, "implied_vol")
    rules.reject(given & ~np.isfinite(vol), "implied_vol is not a finite number", vol_text)
    rules.reject(given & (vol <= 0), "implied_vol must be > 0", vol_text)
    rules.reject(given & (vol > checks.max_vol), "implied_vol is absurd",
                 lambda m: vol_text(m) + f" is above {checks.max_vol:g}; vols are decimals (0.25 for 25 %)")
    return rules.clean().set_index("instrument_id")


def _underlyings(raw: RawNight, log: ExceptionLog, checks: CheckSettings) -> pd.DataFrame:
    file = "underlying_marks.parquet"
    frame = raw.tables[file]
    rules = _Rules(log, raw.path(file), frame, "underlying", raw.keys.get(file))
    rules.required("underlying")
    rules.unique("underlying")
    rules.finite("spot", "dividend_yield")
    rules.positive("spot")
    rules.reject(frame["spot"].to_numpy(dtype=float) < np.finfo(float).tiny, "spot is too small to price",
                 lambda m: shown(frame, "spot")(m) + " is below the smallest normal float64 (a denormal number)")
    rules.reject(np.abs(frame["dividend_yield"].to_numpy(dtype=float)) > checks.max_abs_rate,
                 "dividend_yield is absurd", lambda m: shown(frame, "dividend_yield")(m)
                 + f" is beyond +-{checks.max_abs_rate:g}; yields are decimals (0.02 for 2 %)")
    return rules.clean().set_index("underlying")


def _curves(raw: RawNight, log: ExceptionLog, checks: CheckSettings) -> pd.DataFrame:
    file = "rate_curves.parquet"
    source = raw.tables[file]
    currency = source["currency"].to_numpy(dtype=object)
    tenor_years = source["tenor_years"].to_numpy(dtype=float)
    # -0.0 + 0.0 is 0.0: tenors 0.0 and -0.0 are one point, so the duplicate rule sees them.
    point = np.full(len(source), None, dtype=object)  # null when the currency or the tenor is
    named = ~pd.isna(currency) & ~np.isnan(tenor_years)
    point[named] = [f"{c} @ {t + 0.0}y" for c, t in zip(currency[named], tenor_years[named], strict=True)]
    frame = source.assign(point=pd.Series(point, index=source.index, dtype=object))
    rules = _Rules(log, raw.path(file), frame, "point", raw.keys.get(file))
    rules.required("currency")
    rules.finite("tenor_years", "zero_rate")
    rules.reject(tenor_years < 0, "tenor_years must be >= 0", shown(frame, "tenor_years"))
    rules.reject(np.abs(frame["zero_rate"].to_numpy(dtype=float)) > checks.max_abs_rate, "zero_rate is absurd",
                 lambda m: shown(frame, "zero_rate")(m)
                 + f" is beyond +-{checks.max_abs_rate:g}; rates are decimals (0.04 for 4 %)")
    rules.unique("point")
    # A curve missing one of its points would be interpolated across the gap: the whole curve is left out.
    broken = pd.Index(currency, dtype=object).isin(pd.Index(currency[~rules.ok], dtype=object).dropna())
    rules.reject(broken, "curve has a rejected point",
                 lambda m: "another point of the " + currency[m].astype(str)
                 + " curve breaks a rule, so the whole curve is left out")
    # ordered by currency then tenor: the clean points are distinct (currency, tenor) pairs, so this is a full order
    rows = np.flatnonzero(rules.ok)
    order = np.lexsort((tenor_years[rows], pd.factorize(currency[rows], sort=True)[0]))
    return source.iloc[rows[order]].reset_index(drop=True)


def _fx(raw: RawNight, log: ExceptionLog, reporting_currency: str) -> pd.Series:
    file = "fx_rates.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return pd.Series({reporting_currency: 1.0}, dtype=float)
    rules = _Rules(log, raw.path(file), frame, "currency", raw.keys.get(file))
    rules.required("currency")
    rules.unique("currency")
    rules.finite("rate")
    rules.positive("rate")
    rules.reject((frame["currency"] == reporting_currency).to_numpy() & (frame["rate"].to_numpy(dtype=float) != 1.0),
                 "the reporting currency's rate must be 1",
                 lambda m: shown(frame, "rate")(m) + f" for the reporting currency {reporting_currency}")
    rates = rules.clean().set_index("currency")["rate"].astype(float)
    if reporting_currency not in rates.index:
        rates[reporting_currency] = 1.0
    return rates


def _desks(raw: RawNight, log: ExceptionLog) -> pd.Series:
    """books.parquet: one desk per book. A rejected row leaves its book on the ``(unassigned)`` desk."""
    file = "books.parquet"
    frame = raw.tables.get(file)
    if frame is None:
        return pd.Series(dtype=object)
    rules = _Rules(log, raw.path(file), frame, "book", raw.keys.get(file))
    rules.required("book", "desk")
    rules.unique("book")
    return rules.clean().set_index("book")["desk"].astype(object)


FOUR_DIGIT_YEARS = (np.datetime64("0001-01-01", "D"), np.datetime64("9999-12-31", "D"))


def _dated_key(frame: pd.DataFrame) -> pd.Series:
    """``UNDERLYING @ YYYY-MM-DD``: the ledger key of a dividend or corporate-action row (null without an
    underlying, ``(null)`` for a null ex_date)."""
    day = frame["ex_date"].to_numpy(dtype="datetime64[D]")
    known = ~np.isnat(day)
    if not ((day[known] >= FOUR_DIGIT_YEARS[0]) & (day[known] <= FOUR_DIGIT_YEARS[1])).all():  # pandas' formatting
        text = frame["ex_date"].astype("datetime64[s]").dt.strftime("%Y-%m-%d").fillna("(null)")
        return frame["underlying"].astype(str) + " @ " + text
    day_text = np.where(known, np.datetime_as_string(day, unit="D").astype(object), "(null)")
    underlying = frame["underlying"].to_numpy(dtype=object)
    named = ~pd.isna(underlying)
    key = np.full(len(frame), None, dtype=object)
    key[named] = [f"{u} @ {d}" for u, d in zip(underlying[named], day_text[named], strict=True)]
    return pd.Series(key, index=frame.index, dtype=object)


def _dividends(raw: RawNight, log: ExceptionLog) -> tuple[pd.DataFrame, frozenset[str]]:
    """Clean dividend rows and the underlyings whose schedule has a rejected row.

    A schedule missing one of its dividends would misprice every option on the underlying, so an
    underlying with any rejected row is unusable that date (see :mod:`attribution.market`).
    """
    checked = _dated_rules(raw, log, "dividends.parquet", "amount")
    if checked is None:
        return _empty_dated("amount"), frozenset()
    frame, rules = checked
    listed = frame["underlying"].isin(raw.tables["underlying_marks.parquet"]["underlying"]).to_numpy()
    rules.reject(~listed, "unknown underlying", lambda m: "no row in underlying_marks for "
                 + frame["underlying"].to_numpy(dtype=object)[m].astype(str))
    broken = frame.loc[~rules.ok & listed & frame["underlying"].notna().to_numpy(), "underlying"]
    clean = rules.clean()[["underlying", "ex_date", "amount"]]
    return _typed_dates(clean), frozenset(broken.astype(str))


def _corporate_actions(raw: RawNight, log: ExceptionLog) -> pd.DataFrame:
    """Clean share adjustments (splits): one per underlying and ex_date, ratio > 0."""
    checked = _dated_rules(raw, log, "corporate_actions.parquet", "ratio")
    if checked is None:
        return _empty_dated("ratio")
    return _typed_dates(checked[1].clean()[["underlying", "ex_date", "ratio"]])


def _dated_rules(raw: RawNight, log: ExceptionLog, file: str, value: str) -> tuple[pd.DataFrame, _Rules] | None:
    """The rules shared by the files keyed by underlying and ex_date: both required, the key unique, ``value``
    a finite number > 0. None when the (optional) file is absent."""
    frame = raw.tables.get(file)
    if frame is None:
        return None
    frame = frame.assign(key=_dated_key(frame))
    rules = _Rules(log, raw.path(file), frame, "key", raw.keys.get(file))
    rules.required("underlying", "ex_date")
    rules.finite(value)
    rules.positive(value)
    rules.unique("key")
    return frame, rules


def _empty_dated(value: str) -> pd.DataFrame:
    return pd.DataFrame({"underlying": pd.Series(dtype=object), "ex_date": pd.Series(dtype="datetime64[s]"),
                         value: pd.Series(dtype=float)})


def _typed_dates(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.reset_index(drop=True)
    out["ex_date"] = out["ex_date"].astype("datetime64[s]")
    return out


def clean_night(raw: RawNight, log: ExceptionLog, checks: CheckSettings, reporting_currency: str,
                run_date: bool = True) -> CleanNight:
    """Apply every single-file row rule of the contract to one date's files.

    The files of the run date's events (trade_activity, cash_flows, official_pnl) are checked only
    when ``run_date``: the prior date's were its own night's.
    """
    held = clean_holdings(raw, log, checks, reporting_currency)
    return with_events(held, log) if run_date else held


def clean_holdings(raw: RawNight, log: ExceptionLog, checks: CheckSettings, reporting_currency: str) -> CleanNight:
    """The row rules of the files that describe the date's holdings and market (every file but the
    run date's events, which are left empty): the same whether the date is a night's prior or run date,
    so a backfill checks them once per date (:mod:`attribution.date_cache`)."""
    positions, rejected, position_keys = _positions(raw, log, checks)
    dividends, broken_schedules = _dividends(raw, log)
    instruments = _instruments(raw, log)
    marks = _marks(raw, log, checks)
    underlyings = _underlyings(raw, log, checks)
    curves = _curves(raw, log, checks)
    fx = _fx(raw, log, reporting_currency)
    desks = _desks(raw, log)
    corporate = _corporate_actions(raw, log)
    future_marks = _future_marks(raw, log)
    none = RawNight(raw.as_of, raw.folder, {}, {})
    return CleanNight(raw=raw, positions=positions, instruments=instruments, marks=marks, underlyings=underlyings,
                      curves=curves, fx=fx, rejected_trades=rejected, desks=desks, dividends=dividends,
                      broken_schedules=broken_schedules, corporate_actions=corporate, future_marks=future_marks,
                      activity=activity_rows(none, log), cash_flows=_cash_flows(none, log),
                      official=_official_pnl(none, log), position_keys=position_keys)


def with_events(held: CleanNight, log: ExceptionLog) -> CleanNight:
    """``held`` with the run date's event files checked (trade_activity, cash_flows, official_pnl)."""
    raw = held.raw
    return dataclasses.replace(held, activity=activity_rows(raw, log), cash_flows=_cash_flows(raw, log),
                               official=_official_pnl(raw, log))


EARLIEST_TRADE_DATE = np.datetime64("1900-01-01", "D")  # before this a trade_date is a placeholder, not a booking


def trade_date_warnings(night: CleanNight, log: ExceptionLog) -> None:
    """Warn (the position is still explained) on run-date positions whose trade_date is null, after the
    run date, or before 1900 (a placeholder such as year 1): the booked-late flag and the new-trade line
    read it."""
    positions = night.positions
    trade_date = positions["trade_date"].to_numpy(dtype="datetime64[D]")
    run_day = np.datetime64(night.raw.as_of, "D")
    ids = positions["trade_id"].to_numpy(dtype=object)
    file = night.raw.path("positions.parquet")
    def text(mask: np.ndarray) -> np.ndarray:
        return np.datetime_as_string(trade_date[mask], unit="D").astype(object)

    missing = np.isnat(trade_date)
    log.add(file, ids[missing], "trade_date is null", "trade_date is missing; the booking date cannot be checked",
            WARNING)
    late = ~missing & (trade_date > run_day)
    log.add(file, ids[late], "trade_date after the run date", "trade_date = " + text(late)
            + f" is after the run date {night.raw.as_of}", WARNING)
    old = ~missing & (trade_date < EARLIEST_TRADE_DATE)
    log.add(file, ids[old], "trade_date is implausible", "trade_date = " + text(old) + " is before 1900-01-01",
            WARNING)
