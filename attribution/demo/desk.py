"""The demo desk's definition and calendar (invented data, for the demo only).

* :func:`load_desk` reads the desk's TOML definition (``attribution/demo/demo_desk.toml`` by default)
  into frozen dataclasses and checks it, naming the file and the entry of every error;
* :func:`desk_holidays` / :func:`business_days` give the desk's calendar (weekends and the
  holidays of the definition); :func:`monthly_expiries` its listed expiry dates.
"""

from __future__ import annotations

import datetime as dt
import tomllib
from dataclasses import dataclass, fields
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray

KINDS = ("index", "stock", "fx")
STYLES = ("outright", "short_vol", "delta_neutral")
MARKS = ("clean", "planted_faults", "noisy")
DAYS_PER_YEAR = 365.0  # ACT/365F


@dataclass(frozen=True, slots=True)
class CurrencySpec:
    """A currency and its zero curve: ``short_rate`` at tenor 0, ``long_rate`` far out (decimals)."""

    code: str
    short_rate: float
    long_rate: float
    rate_vol_bp_per_day: float


@dataclass(frozen=True, slots=True)
class UnderlyingSpec:
    """An underlying and the parameters of its simulated market (units in demo_desk.toml)."""

    name: str
    description: str
    kind: str
    exercise: str  # "european" or "american": the style of every option listed on it
    currency: str
    spot: float
    atm_vol: float
    dividend_yield: float
    multiplier: float
    skew: float
    smile_curvature: float
    term_slope: float
    vol_of_vol: float
    vol_mean_reversion: float
    spot_vol_corr: float
    market_loading: float
    drift: float
    jumps_per_year: float
    jump_mean: float
    jump_sd: float
    vol_jump_beta: float
    dividend_vol_bp_per_day: float
    dividend_jumps_per_year: float
    dividend_jump_bp: float
    foreign_currency: str  # an FX pair's base currency; "" for other kinds


@dataclass(frozen=True, slots=True)
class BookSpec:
    """A book: what it trades, how (``style``) and how its marks behave (``marks``)."""

    name: str
    desk: str
    description: str
    style: str
    marks: str
    underlyings: tuple[str, ...]
    weight: float
    long_share: float
    lot_min: int
    lot_max: int


@dataclass(frozen=True, slots=True)
class TradingSpec:
    """Daily trading activity and instrument listing (units in demo_desk.toml)."""

    daily_churn: float
    amend_rate: float
    unpriced_share: float
    min_days_to_expiry_new: int
    half_spread_max: float
    spread_win_share: float
    null_vol_share: float
    listing_every_days: int
    monthly_expiries: int
    quarterly_horizon_days: int
    strike_grid_sd: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class MarkSpec:
    """How the desk's close differs from the job's model (units in demo_desk.toml, [marks])."""

    common_noise: float
    idio_noise: float
    weekend_weight: float
    event_weight: float
    events: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class FaultSpec:
    """Sizes of the planted mark faults."""

    noisy_spell_start: float
    noisy_spell_nights: int
    noisy_common_sd: float
    noisy_idio_sd: float
    fat_finger_factor: float


@dataclass(frozen=True, slots=True)
class DeskSpec:
    """The whole desk definition, as read from its TOML file."""

    source: str
    name: str
    reporting_currency: str
    trade_id_prefix: str
    holidays: tuple[str, ...]
    curve_tenors_years: tuple[float, ...]
    fx_foreign_rate_tenor_years: float
    realised_to_implied: float
    min_time_value_share: float
    currencies: tuple[CurrencySpec, ...]
    underlyings: tuple[UnderlyingSpec, ...]
    books: tuple[BookSpec, ...]
    trading: TradingSpec
    marks: MarkSpec
    faults: FaultSpec

    def param(self, name: str) -> FloatArray:
        """One float parameter of every underlying, in definition order."""
        return np.array([getattr(u, name) for u in self.underlyings], dtype=float)


class DeskDefinitionError(ValueError):
    """The desk definition file breaks a rule; the message names the file and the entry."""


def default_definition() -> Path:
    """The packaged definition of the demo desk (``attribution/demo/demo_desk.toml``)."""
    return Path(str(resources.files("attribution.demo") / "demo_desk.toml"))


def _convert(value: Any, annotation: str, where: str) -> Any:
    scalar = {"str": str, "float": (int, float), "int": int}
    if annotation in scalar:
        if isinstance(value, bool) or not isinstance(value, scalar[annotation]):
            raise DeskDefinitionError(f"{where}: expected {annotation}, got {value!r}")
        return float(value) if annotation == "float" else value
    inner = annotation.removeprefix("tuple[").removesuffix(", ...]")
    if not isinstance(value, list):
        raise DeskDefinitionError(f"{where}: expected a list, got {value!r}")
    return tuple(_convert(v, inner, where) for v in value)


def _make(cls: type, data: dict[str, Any], where: str) -> Any:
    names = [f.name for f in fields(cls)]
    unknown = sorted(set(data) - set(names))
    missing = [n for n in names if n not in data]
    if unknown or missing:
        raise DeskDefinitionError(f"{where}: unknown key(s) {unknown}, missing key(s) {missing}")
    return cls(**{f.name: _convert(data[f.name], str(f.type), f"{where}, key {f.name!r}") for f in fields(cls)})


def _underlying(entry: dict[str, Any], defaults: dict[str, Any], where: str) -> UnderlyingSpec:
    kind = entry.get("kind")
    if kind not in KINDS:
        raise DeskDefinitionError(f"{where}: kind must be one of {KINDS}, got {kind!r}")
    data = {**defaults.get(kind, {}), **entry, "foreign_currency": ""}
    if kind == "fx":
        base, _, quote = str(entry.get("name", "")).partition("/")
        data.update(currency=quote, foreign_currency=base, dividend_yield=0.0)
    return _make(UnderlyingSpec, data, where)


def _check(desk: DeskSpec) -> None:
    src = desk.source
    codes = [c.code for c in desk.currencies]
    names = [u.name for u in desk.underlyings]
    rules: list[tuple[bool, str]] = [
        (len(set(codes)) == len(codes), "currency codes must be unique"),
        (len(set(names)) == len(names), "underlying names must be unique"),
        (len({b.name for b in desk.books}) == len(desk.books) > 0, "book names must be unique and at least one"),
        (desk.reporting_currency in codes, f"reporting currency {desk.reporting_currency} has no [[currency]]"),
        (list(desk.curve_tenors_years) == sorted(set(desk.curve_tenors_years)), "curve tenors must increase"),
    ]
    for u in desk.underlyings:
        rules.append((u.currency in codes and u.foreign_currency in (*codes, ""),
                      f"underlying {u.name}: currency {u.currency or '?'}{'/' + u.foreign_currency} not defined"))
        rules.append((u.exercise in ("european", "american"),
                      f"underlying {u.name}: exercise must be european or american, got {u.exercise!r}"))
        rules.append((u.spot > 0 and u.atm_vol > 0 and u.multiplier > 0,
                      f"underlying {u.name}: spot, atm_vol and multiplier must be > 0"))
    pairs = {(u.foreign_currency, u.currency) for u in desk.underlyings if u.kind == "fx"}
    rep = desk.reporting_currency
    for code in codes:
        rules.append((code == rep or (code, rep) in pairs or (rep, code) in pairs,
                      f"currency {code} needs an FX pair against {rep} to set its fx rate"))
    owners: dict[str, list[str]] = {}
    for b in desk.books:
        for name in b.underlyings:
            owners.setdefault(name, []).append(b.name)
        rules += [
            (b.style in STYLES and b.marks in MARKS, f"book {b.name}: style must be in {STYLES}, marks in {MARKS}"),
            (set(b.underlyings) <= set(names) and b.underlyings, f"book {b.name}: unknown or no underlyings"),
            (b.weight > 0 and 0 <= b.long_share <= 1 and 1 <= b.lot_min <= b.lot_max,
             f"book {b.name}: needs weight > 0, 0 <= long_share <= 1 and 1 <= lot_min <= lot_max"),
        ]
    for b in desk.books:
        shared = [n for n in b.underlyings if len(owners[n]) > 1]
        rules.append((b.marks == "clean" or not shared,
                      f"book {b.name}: a book with {b.marks} marks must trade its underlyings alone, not {shared}"))
    for holiday in desk.holidays:
        try:
            dt.date.fromisoformat(f"2024-{holiday}")
        except ValueError:
            rules.append((False, f"holiday {holiday!r} is not MM-DD"))
    broken = [text for ok, text in rules if not ok]
    if broken:
        raise DeskDefinitionError(f"{src}: " + "; ".join(broken))


_NESTED = ("source", "currencies", "underlyings", "books", "trading", "marks", "faults")


def _header(data: dict[str, Any], src: str) -> dict[str, Any]:
    """The scalar fields of :class:`DeskSpec`, read from the ``[desk]`` table."""
    wanted = [f for f in fields(DeskSpec) if f.name not in _NESTED]
    unknown = sorted(set(data) - {f.name for f in wanted})
    missing = [f.name for f in wanted if f.name not in data]
    if unknown or missing:
        raise DeskDefinitionError(f"{src} [desk]: unknown key(s) {unknown}, missing key(s) {missing}")
    return {f.name: _convert(data[f.name], str(f.type), f"{src} [desk], key {f.name!r}") for f in wanted}


def load_desk(path: Path | None = None) -> DeskSpec:
    """Read and check a desk definition (the packaged demo desk when ``path`` is None)."""
    path = default_definition() if path is None else Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as err:
        raise DeskDefinitionError(f"{path}: cannot read the desk definition: {err}") from err
    src = str(path)
    defaults = data.get("defaults", {})
    spec = DeskSpec(
        source=src,
        currencies=tuple(_make(CurrencySpec, c, f"{src} [[currency]] #{i + 1}")
                         for i, c in enumerate(data.get("currency", []))),
        underlyings=tuple(_underlying(u, defaults, f"{src} [[underlying]] {u.get('name', f'#{i + 1}')}")
                          for i, u in enumerate(data.get("underlying", []))),
        books=tuple(_make(BookSpec, b, f"{src} [[book]] {b.get('name', f'#{i + 1}')}")
                    for i, b in enumerate(data.get("book", []))),
        trading=_make(TradingSpec, data.get("trading", {}), f"{src} [trading]"),
        marks=_make(MarkSpec, data.get("marks", {}), f"{src} [marks]"),
        faults=_make(FaultSpec, data.get("faults", {}), f"{src} [faults]"),
        **_header(data.get("desk", {}), src),
    )
    _check(spec)
    return spec


# ---- calendar --------------------------------------------------------------------------------

def desk_holidays(desk: DeskSpec, first: dt.date, last: dt.date) -> tuple[dt.date, ...]:
    """The desk's holidays from ``first`` to ``last`` inclusive (Saturday ones on Friday, Sunday ones on Monday)."""
    days: set[dt.date] = set()
    for year in range(first.year - 1, last.year + 2):
        for month_day in desk.holidays:
            try:
                day = dt.date.fromisoformat(f"{year}-{month_day}")
            except ValueError:  # 02-29 outside a leap year
                continue
            day += dt.timedelta(days={5: -1, 6: 1}.get(day.weekday(), 0))
            if first <= day <= last:
                days.add(day)
    return tuple(sorted(days))


def _holiday_array(desk: DeskSpec, first: dt.date, last: dt.date) -> NDArray[np.datetime64]:
    return np.array(desk_holidays(desk, first, last), dtype="datetime64[D]")


def business_days(desk: DeskSpec, start: dt.date, count: int) -> NDArray[np.datetime64]:
    """The first ``count`` business days from ``start`` (included when it is one), as datetime64[D]."""
    last = start + dt.timedelta(days=2 * count + 30)
    days = np.arange(np.datetime64(start, "D"), np.datetime64(last, "D") + 1)
    return days[np.is_busday(days, holidays=_holiday_array(desk, start, last))][:count]


def monthly_expiries(desk: DeskSpec, first: dt.date, last: dt.date) -> NDArray[np.datetime64]:
    """Third Friday of every month from ``first``'s month to ``last``'s, on the business day before if a holiday."""
    months = np.arange(np.datetime64(first, "M"), np.datetime64(last, "M") + 1)
    third_friday = np.busday_offset(months.astype("datetime64[D]"), 2, roll="forward", weekmask="Fri")
    margin = dt.timedelta(days=40)
    return np.busday_offset(third_friday, 0, roll="backward", holidays=_holiday_array(desk, first - margin,
                                                                                        last + margin))
