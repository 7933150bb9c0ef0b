"""The demo desk's definition, calendar and simulated market (invented data, for the demo only).

* :func:`load_desk` reads the desk's TOML definition (``attribution/demo_desk.toml`` by default)
  into frozen dataclasses and checks it, naming the file and the entry of every error;
* :func:`desk_holidays` / :func:`business_days` give the desk's calendar (weekends and the
  holidays of the definition);
* :func:`simulate_market` draws the market on the given business dates, vectorised over the
  underlyings with one step per business date: spot with jumps, an at-the-money vol that moves
  against spot and mean-reverts, zero curves per currency (short and long end), dividend yields
  with occasional announcements, and FX rates into the reporting currency;
* :func:`smile_vol` and :func:`zero_rate` turn that state into the implied vol and the rate of an
  option (the rate interpolated exactly as the data contract says: linear in zero rate, flat
  beyond the ends);
* :func:`list_instruments` lists the next monthly and the quarterly expiries with strikes on a
  grid of standard deviations around spot, and later only what the listed range does not cover.
"""

from __future__ import annotations

import datetime as dt
import tomllib
from dataclasses import dataclass, field, fields
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
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
    null_vol_share: float
    listing_every_days: int
    monthly_expiries: int
    quarterly_horizon_days: int
    strike_grid_sd: tuple[float, ...]


@dataclass(frozen=True, slots=True)
class FaultSpec:
    """Sizes of the planted mark faults."""

    noisy_night_share: float
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
    faults: FaultSpec

    def param(self, name: str) -> FloatArray:
        """One float parameter of every underlying, in definition order."""
        return np.array([getattr(u, name) for u in self.underlyings], dtype=float)


class DeskDefinitionError(ValueError):
    """The desk definition file breaks a rule; the message names the file and the entry."""


def default_definition() -> Path:
    """The packaged definition of the demo desk (``attribution/demo_desk.toml``)."""
    return Path(str(resources.files("attribution") / "demo_desk.toml"))


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


_NESTED = ("source", "currencies", "underlyings", "books", "trading", "faults")


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


# ---- market ----------------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class MarketPaths:
    """The simulated market, one row per business date (columns: underlyings or currencies in definition order)."""

    dates: NDArray[np.datetime64]   # (n_days,) datetime64[D]
    spot: FloatArray                # (n_days, n_underlyings)
    atm_vol: FloatArray             # (n_days, n_underlyings), decimal
    dividend_yield: FloatArray      # (n_days, n_underlyings), continuous decimal; FX: the base currency's rate
    zero_rates: FloatArray          # (n_days, n_currencies, n_tenors), continuously compounded decimal
    fx_to_reporting: FloatArray     # (n_days, n_currencies), reporting currency per unit
    tenors_years: FloatArray        # (n_tenors,)


def zero_rate(curve_points: FloatArray, tenors_years: FloatArray, tau_years: FloatArray) -> FloatArray:
    """A curve's zero rate at ``tau_years``: linear between points, flat beyond the ends (the contract's rule)."""
    return np.interp(tau_years, tenors_years, curve_points)


def smile_vol(atm_vol: FloatArray, skew: FloatArray, curvature: FloatArray, term_slope: FloatArray,
              log_moneyness: FloatArray, tau_years: FloatArray) -> FloatArray:
    """Implied vol of a strike: at-the-money level with a term slope, plus skew and curvature in ln(K/S)/sqrt(tau)."""
    tau_c = np.maximum(tau_years, 1.0 / 52.0)
    m = np.clip(log_moneyness / np.sqrt(tau_c), -2.5, 2.5)
    vol = atm_vol * (1.0 + term_slope * (np.sqrt(tau_c) - 0.5)) + skew * m + curvature * m * m
    return np.clip(vol, 0.03, 1.5)


def _simulate_curves(desk: DeskSpec, steps: int, rng: np.random.Generator) -> FloatArray:
    short = np.array([c.short_rate for c in desk.currencies])
    long = np.array([c.long_rate for c in desk.currencies])
    sd = np.array([c.rate_vol_bp_per_day for c in desk.currencies]) * 1e-4
    z = rng.standard_normal((steps, len(desk.currencies), 2))
    d_short = sd * z[..., 0]
    d_long = sd * (0.6 * z[..., 0] + 0.8 * z[..., 1])
    zeros = np.zeros((1, len(desk.currencies)))
    short_path = short + np.vstack([zeros, np.cumsum(d_short, axis=0)])
    long_path = long + np.vstack([zeros, np.cumsum(d_long, axis=0)])
    shape = np.exp(-np.array(desk.curve_tenors_years) / 2.0)
    return long_path[..., None] + (short_path - long_path)[..., None] * shape


def _simulate_spot_vol(desk: DeskSpec, dt_years: FloatArray, rng: np.random.Generator) -> tuple[FloatArray, FloatArray]:
    p = desk.param
    steps, n = dt_years.size, len(desk.underlyings)
    loading, corr = p("market_loading"), p("spot_vol_corr")
    z_spot = loading * rng.standard_normal((steps, 1)) + np.sqrt(1 - loading**2) * rng.standard_normal((steps, n))
    z_vol = corr * z_spot + np.sqrt(1 - corr**2) * rng.standard_normal((steps, n))
    n_jumps = rng.poisson(p("jumps_per_year") * dt_years[:, None], size=(steps, n))
    jump = n_jumps * p("jump_mean") + np.sqrt(n_jumps) * p("jump_sd") * rng.standard_normal((steps, n))
    atm0, drift, kappa, vov, beta = p("atm_vol"), p("drift"), p("vol_mean_reversion"), p("vol_of_vol"), \
        p("vol_jump_beta")
    log_spot = np.empty((steps + 1, n))
    log_vol = np.zeros((steps + 1, n))
    log_spot[0] = np.log(p("spot"))
    for i, h in enumerate(dt_years):
        sigma = desk.realised_to_implied * atm0 * np.exp(log_vol[i])
        log_spot[i + 1] = log_spot[i] + (drift - 0.5 * sigma**2) * h + sigma * np.sqrt(h) * z_spot[i] + jump[i]
        shock = vov * np.sqrt(h) * z_vol[i] - beta * jump[i]
        log_vol[i + 1] = np.clip(log_vol[i] * (1.0 - kappa * h) + shock, -1.0, 1.5)
    return np.exp(log_spot), atm0 * np.exp(log_vol)


def _simulate_dividends(desk: DeskSpec, dt_years: FloatArray, zero_rates: FloatArray,
                        rng: np.random.Generator) -> FloatArray:
    p = desk.param
    steps, n = dt_years.size, len(desk.underlyings)
    announcements = rng.poisson(p("dividend_jumps_per_year") * dt_years[:, None], size=(steps, n))
    sign = rng.integers(0, 2, size=(steps, n)) * 2.0 - 1.0
    moves = p("dividend_vol_bp_per_day") * 1e-4 * rng.standard_normal((steps, n))
    moves += announcements * sign * p("dividend_jump_bp") * 1e-4
    q = np.maximum(p("dividend_yield") + np.vstack([np.zeros((1, n)), np.cumsum(moves, axis=0)]), 0.0)
    tenors = np.array(desk.curve_tenors_years)
    weights = np.array([np.interp(desk.fx_foreign_rate_tenor_years, tenors, e) for e in np.eye(tenors.size)])
    codes = [c.code for c in desk.currencies]
    for j, u in enumerate(desk.underlyings):
        if u.kind == "fx":
            q[:, j] = zero_rates[:, codes.index(u.foreign_currency), :] @ weights
    return q


def _fx_to_reporting(desk: DeskSpec, spot: FloatArray) -> FloatArray:
    rep = desk.reporting_currency
    fx = np.ones((spot.shape[0], len(desk.currencies)))
    for c, cur in enumerate(desk.currencies):
        for j, u in enumerate(desk.underlyings):
            if u.kind == "fx" and (u.foreign_currency, u.currency) == (cur.code, rep):
                fx[:, c] = spot[:, j]
            elif u.kind == "fx" and (u.foreign_currency, u.currency) == (rep, cur.code):
                fx[:, c] = 1.0 / spot[:, j]
    return fx


def simulate_market(desk: DeskSpec, dates: NDArray[np.datetime64], rng: np.random.Generator) -> MarketPaths:
    """Draw the desk's market on ``dates`` (business days, increasing); time steps are ACT/365F."""
    dt_years = np.diff(dates).astype(float) / DAYS_PER_YEAR
    zero_rates = _simulate_curves(desk, dt_years.size, rng)
    spot, atm_vol = _simulate_spot_vol(desk, dt_years, rng)
    dividend_yield = _simulate_dividends(desk, dt_years, zero_rates, rng)
    return MarketPaths(dates=dates, spot=spot, atm_vol=atm_vol, dividend_yield=dividend_yield,
                       zero_rates=zero_rates, fx_to_reporting=_fx_to_reporting(desk, spot),
                       tenors_years=np.array(desk.curve_tenors_years))


# ---- listing ---------------------------------------------------------------------------------

@dataclass(slots=True)
class ListedInstruments:
    """Every instrument listed so far (append-only; the row is the instrument's number); mutable."""

    und: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    is_call: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, bool))
    strike: FloatArray = field(default_factory=lambda: np.zeros(0))
    expiry: NDArray[np.datetime64] = field(default_factory=lambda: np.zeros(0, "datetime64[D]"))
    null_vol: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, bool))


def series_key(und: IntArray, expiry: NDArray[np.datetime64]) -> IntArray:
    """(expiry, underlying) as one integer: the key of a series of listed strikes."""
    return expiry.astype(np.int64) * 4096 + und


def nearest_strike(series: IntArray, log_strike: FloatArray, q_series: IntArray, q_log_strike: FloatArray) -> IntArray:
    """Index of the nearest strike of the same series for every query, -1 where the series is empty."""
    best = np.full(q_series.shape, -1, dtype=np.int64)
    if series.size == 0:
        return best
    order = np.lexsort((log_strike, series))
    k_sorted = log_strike[order]
    uniq, rank = np.unique(series[order], return_inverse=True)
    q_rank = np.minimum(np.searchsorted(uniq, q_series), uniq.size - 1)
    present = uniq[q_rank] == q_series
    pos = np.searchsorted(rank * 100.0 + k_sorted, q_rank * 100.0 + q_log_strike)  # |ln K| < 50: series apart
    gap = np.full(q_series.shape, np.inf)
    for cand in (pos - 1, pos):
        c = np.clip(cand, 0, order.size - 1)
        ok = present & (cand >= 0) & (cand < order.size) & (rank[c] == q_rank)
        dist = np.where(ok, np.abs(k_sorted[c] - q_log_strike), np.inf)
        better = dist < gap
        best, gap = np.where(better, order[c], best), np.where(better, dist, gap)
    return best


def strike_step(spot: FloatArray) -> FloatArray:
    """A round strike spacing near 1 % of spot: 1, 2 or 5 times a power of ten."""
    base = 0.01 * spot
    mag = 10.0 ** np.floor(np.log10(base))
    return mag * np.where(base / mag < 2, 1.0, np.where(base / mag < 5, 2.0, 5.0))


def list_instruments(desk: DeskSpec, market: MarketPaths, d: int, store: ListedInstruments,
                     expiries: NDArray[np.datetime64], clean: NDArray[np.bool_], rng: np.random.Generator) -> None:
    """List on date ``d`` the expiries in the window and the grid strikes the listed ones do not cover.

    ``expiries``: the monthly expiry dates; ``clean``: per underlying, whether only clean books trade it
    (only their instruments may be marked without an implied vol).
    """
    day, tr = market.dates[d], desk.trading
    ahead = expiries[expiries > day]
    quarterly = ahead[(ahead <= day + tr.quarterly_horizon_days) & (ahead.astype("datetime64[M]").astype(int) % 3 == 2)]
    window = np.union1d(ahead[: tr.monthly_expiries], quarterly)
    grid = np.array(tr.strike_grid_sd)
    tau = (window - day).astype(float) / DAYS_PER_YEAR
    sd = market.atm_vol[d][:, None] * np.sqrt(np.maximum(tau, 1.0 / 12.0))[None, :]
    step = strike_step(market.spot[d])[:, None, None]
    strike = np.round(np.round(market.spot[d][:, None, None] * np.exp(grid * sd[:, :, None]) / step) * step, 8)
    und, exp_idx, _ = np.indices(strike.shape).reshape(3, -1)
    strike, sd_c, expiry = strike.ravel(), sd[und, exp_idx], window[exp_idx]
    series = series_key(und, expiry)
    _, first = np.unique(np.stack([series, np.round(strike * 1e6).astype(np.int64)]), axis=1, return_index=True)
    keep = np.sort(first)
    keep = keep[strike[keep] > 0]
    calls = np.flatnonzero(store.is_call & (store.expiry >= day))
    near = nearest_strike(series_key(store.und[calls], store.expiry[calls]), np.log(store.strike[calls]),
                    series[keep], np.log(strike[keep]))
    listed = np.log(np.append(store.strike[calls], 1.0))[near]  # near = -1 (nothing listed) reads the dummy
    gap = np.where(near >= 0, np.abs(np.log(strike[keep]) - listed), np.inf)
    new = keep[gap > 0.75 * np.min(np.diff(np.unique(grid))) * sd_c[keep]]
    n = new.size
    store.und = np.concatenate([store.und, und[new], und[new]])
    store.is_call = np.concatenate([store.is_call, np.ones(n, bool), np.zeros(n, bool)])
    store.strike = np.concatenate([store.strike, strike[new], strike[new]])
    store.expiry = np.concatenate([store.expiry, expiry[new], expiry[new]])
    store.null_vol = np.concatenate([store.null_vol,
                                     (rng.random(2 * n) < tr.null_vol_share) & np.tile(clean[und[new]], 2)])
