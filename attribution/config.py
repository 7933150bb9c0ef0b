"""The job's configuration: one frozen object, read from a TOML job file and overridden by flags.

Nothing in the package reads a global setting; the engine passes this object down.
Relative paths in a job file are resolved against the folder of that file.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

TIME_BASES = ("ACT/365F", "BUS/252")
ENGINES = ("local", "dask")
AMERICAN_PRECISIONS = ("standard", "precise", "fast")
SMILE_DYNAMICS = ("sticky strike", "sticky moneyness")


class ConfigError(ValueError):
    """A job file or option that breaks a rule; the message names the file and the key."""


@dataclass(frozen=True, slots=True)
class LimitSettings:
    """Residual limits of one book, amounts in the reporting currency.

    A book breaches when |residual| > its limit: ``residual_abs``, widened to
    max(``residual_abs``, ``residual_rel`` x |actual|) once |actual| >= ``relative_floor`` (a limit
    that never tightens as |actual| grows). It is on watch from ``watch_fraction`` of its limit.
    A position breaches when |residual| > ``position_abs``.
    """

    residual_abs: float = 25_000.0
    residual_rel: float = 0.10
    relative_floor: float = 100_000.0
    position_abs: float = 10_000.0
    watch_fraction: float = 0.8
    official_break: float = 100.0  # |official P&L - pnl_total| above this is a finding (official_pnl.parquet)


@dataclass(frozen=True, slots=True)
class CheckSettings:
    """Thresholds of the input checks (decimals)."""

    max_vol: float = 5.0               # a vol above 500 % is taken as a unit error (e.g. 25 for 0.25)
    stale_spot_move: float = 0.002     # a mark unchanged while its underlying moved more than this share
    iv_price_tolerance: float = 0.005  # |model(marked vol) - price| / max(price, 0.01 * spot) above this warns
    max_abs_quantity: float = 1e9      # contracts; above this a quantity is taken as a booking error
    max_abs_rate: float = 1.0          # a zero rate or dividend yield beyond +-100 % is a unit error (4 for 0.04)
    mark_roll_days: int = 3            # business days a missing option mark may be rolled forward from the last one


@dataclass(frozen=True, slots=True)
class SmileSettings:
    """Smile dynamics of the explain and the smile check on marks (README, "Volatility parts").

    ``dynamics``: ``sticky strike`` (a strike keeps its vol when spot moves: the whole vol move is in
    the vol terms) or ``sticky moneyness`` (the vol move the spot move implies along the prior smile
    is the ``pnl_smile_delta`` line). ``off_smile_vol``: a run-date mark further than this (decimal
    vol, 0.02 = 2 vol points) from its fitted smile is warned ``off smile``.
    """

    dynamics: str = "sticky strike"
    off_smile_vol: float = 0.02


@dataclass(frozen=True, slots=True)
class VolTimeSettings:
    """Day weights of the variance clock (README, "Weighted vol time"); every weight 1 is the basis clock.

    ``weekdays``: Monday to Sunday; ``holiday``: the days of ``[time] holidays``; ``events``: (date, weight)
    pairs, sorted, an event's weight ruling over the others of its day.
    """

    weekdays: tuple[float, ...] = (1.0,) * 7
    holiday: float = 1.0
    events: tuple[tuple[dt.date, float], ...] = ()

    def is_default(self) -> bool:
        """True when every weight is 1: the variance clock is the time basis itself."""
        return all(w == 1.0 for w in (*self.weekdays, self.holiday, *(x for _, x in self.events)))


DEFAULT_EXPIRY_BUCKETS: tuple[str, ...] = ("1W", "1M", "3M", "6M", "1Y", "2Y", "5Y")
_TENOR_YEARS = {"D": 1 / 365, "W": 7 / 365, "M": 1 / 12, "Y": 1.0}


def tenor_years(tenor: str) -> float:
    """A tenor such as ``1W``, ``3M`` or ``2Y`` in years (a day is 1/365, a week 7/365, a month 1/12)."""
    match = re.fullmatch(r"([1-9][0-9]{0,2})([DWMY])", tenor)
    if match is None:
        raise ConfigError(f"expiry bucket {tenor!r} is not a tenor such as 1W, 3M or 2Y")
    return int(match.group(1)) * _TENOR_YEARS[match.group(2)]


def _expiry_buckets(values: Any, where: str) -> tuple[str, ...]:
    """The upper ends of the expiry buckets of the book page, increasing; beyond the last is one more bucket."""
    if not isinstance(values, list) or not values or not all(isinstance(v, str) for v in values):
        raise ConfigError(f"{where}: expiry_buckets must be a list of tenors such as [\"1W\", \"1M\", \"1Y\"]")
    try:
        years = [tenor_years(v) for v in values]
    except ConfigError as exc:
        raise ConfigError(f"{where}: {exc}") from exc
    if any(b <= a for a, b in zip(years, years[1:], strict=False)):
        raise ConfigError(f"{where}: expiry_buckets must increase, got {values}")
    return tuple(values)


@dataclass(frozen=True, slots=True)
class JobConfig:
    """Everything one run needs to know besides the dates."""

    data_root: Path = Path("data")
    archive_path: Path = Path("archive.duckdb")
    reports_dir: Path = Path("reports")
    reporting_currency: str = "USD"
    time_basis: str = "ACT/365F"
    holidays: tuple[dt.date, ...] = ()
    limits: LimitSettings = field(default_factory=LimitSettings)
    book_limits: tuple[tuple[str, LimitSettings], ...] = ()
    checks: CheckSettings = field(default_factory=CheckSettings)
    engine: str = "local"
    scheduler: str | None = None
    revaluation: bool = True
    american_precision: str = "standard"
    write_reports: bool = True
    backfill_processes: int = 0  # worker processes computing a backfill's nights (0: one per available core)
    history_nights: int = 60
    smile: SmileSettings = field(default_factory=SmileSettings)
    vol_time: VolTimeSettings = field(default_factory=VolTimeSettings)
    expiry_buckets: tuple[str, ...] = DEFAULT_EXPIRY_BUCKETS  # upper ends of the book page's expiry buckets

    def limits_for(self, book: str) -> LimitSettings:
        """The limits of ``book``: its override when the job file has one, else the default."""
        return dict(self.book_limits).get(book, self.limits)

    def as_record(self) -> dict[str, Any]:
        """A JSON-friendly view, stored with each run."""
        def plain(v: Any) -> Any:
            if isinstance(v, Path | dt.date):
                return str(v)
            if isinstance(v, tuple):
                return [plain(x) for x in v]
            if dataclasses.is_dataclass(v):
                return {f.name: plain(getattr(v, f.name)) for f in dataclasses.fields(v)}
            return v
        return plain(self)


SECTIONS = ("job", "time", "limits", "checks", "smile", "vol_time", "report")
JOB_KEYS: dict[str, type] = {  # [job] key -> the TOML type it must have
    "data_root": str, "archive": str, "reports": str, "reporting_currency": str, "engine": str,
    "scheduler": str, "revaluation": bool, "write_reports": bool, "history_nights": int, "american_precision": str,
    "backfill_processes": int,
}
TIME_KEYS: dict[str, type] = {"basis": str, "holidays": list}
_TYPE_WORDS = {str: "a string", bool: "true or false", int: "a whole number", float: "a number",
               list: "a list"}


def _section(raw: dict[str, Any], name: str, source: str) -> dict[str, Any]:
    value = raw.get(name, {})
    if not isinstance(value, dict):
        raise ConfigError(f"{source}: [{name}] must be a table")
    return value


def _typed(values: dict[str, Any], types: dict[str, type], where: str) -> dict[str, Any]:
    """Refuse unknown keys and values of the wrong TOML type (a bool is not a number)."""
    unknown = sorted(set(values) - set(types))
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}; allowed: {', '.join(sorted(types))}")
    for key, value in values.items():
        wanted = types[key]
        ok = isinstance(value, wanted) and not (wanted is not bool and isinstance(value, bool))
        if wanted is float:
            ok = isinstance(value, int | float) and not isinstance(value, bool)
        if not ok:
            raise ConfigError(f"{where}: {key} must be {_TYPE_WORDS[wanted]}, got {value!r}")
    return values


def _settings(cls: type, values: dict[str, Any], where: str) -> Any:
    """A settings dataclass from a table: every key known, a finite number >= 0 of the field's type."""
    types = {f.name: int if f.type in ("int", int) else float for f in dataclasses.fields(cls)}
    _typed(values, types, where)
    for key, value in values.items():
        if not math.isfinite(value) or value < 0:
            raise ConfigError(f"{where}: {key} must be a finite number >= 0, got {value!r}")
    return cls(**{k: types[k](v) for k, v in values.items()})


def _smile_settings(values: dict[str, Any], where: str) -> SmileSettings:
    known = {f.name for f in dataclasses.fields(SmileSettings)}
    unknown = sorted(set(values) - known)
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}; allowed: {', '.join(sorted(known))}")
    default = SmileSettings()
    dynamics = values.get("dynamics", default.dynamics)
    if dynamics not in SMILE_DYNAMICS:
        raise ConfigError(f"{where}: dynamics must be one of {', '.join(map(repr, SMILE_DYNAMICS))}, got {dynamics!r}")
    distance = values.get("off_smile_vol", default.off_smile_vol)
    if not isinstance(distance, int | float) or isinstance(distance, bool) or not 0 < distance < 5:
        raise ConfigError(f"{where}: off_smile_vol must be a decimal vol in (0, 5) such as 0.02, got {distance!r}")
    return SmileSettings(str(dynamics), float(distance))


def _weight(value: Any, where: str) -> float:
    if not isinstance(value, int | float) or isinstance(value, bool) or not 0 <= value <= 100:
        raise ConfigError(f"{where} must be a number in [0, 100], got {value!r}")
    return float(value)


def _vol_time_settings(values: dict[str, Any], where: str) -> VolTimeSettings:
    known = {f.name for f in dataclasses.fields(VolTimeSettings)}
    unknown = sorted(set(values) - known)
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}; allowed: {', '.join(sorted(known))}")
    weekdays = values.get("weekdays", [1.0] * 7)
    if not isinstance(weekdays, list) or len(weekdays) != 7:
        raise ConfigError(f"{where}: weekdays must be a list of 7 weights, Monday to Sunday")
    days = tuple(_weight(w, f"{where}: weekdays[{i}]") for i, w in enumerate(weekdays))
    if min(days[:5]) <= 0:
        raise ConfigError(f"{where}: weekdays Monday to Friday must weigh more than 0 (a week must carry variance)")
    events = values.get("events", {})
    if not isinstance(events, dict):
        raise ConfigError(f"{where}: events must be a table of date = weight, such as 2026-12-16 = 2.5")
    parsed = []
    for key, w in events.items():
        try:
            day = dt.date.fromisoformat(str(key))
        except ValueError as exc:
            raise ConfigError(f"{where}: events key {key!r} is not a date YYYY-MM-DD") from exc
        parsed.append((day, _weight(w, f"{where}: events.{key}")))
    holiday = _weight(values.get("holiday", 1.0), f"{where}: holiday")
    return VolTimeSettings(days, holiday, tuple(sorted(parsed)))


def load_job(path: Path) -> JobConfig:
    """Read a TOML job file (see jobs/nightly.toml for every key, documented).

    Every key is checked: unknown sections and keys, values of the wrong type, NaN and infinity
    are refused with a :class:`ConfigError` naming the file and the key.
    """
    source = str(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ConfigError(f"{source}: job file not found") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{source}: job file cannot be read ({exc})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML: {exc}") from exc
    unknown = sorted(set(raw) - set(SECTIONS))
    if unknown:
        raise ConfigError(f"{source}: unknown section(s) or top-level key(s) {', '.join(unknown)}; "
                          f"allowed: {', '.join(f'[{s}]' for s in SECTIONS)}")
    base = path.resolve().parent
    job = _typed(_section(raw, "job", source), JOB_KEYS, f"{source} [job]")
    time = _typed(_section(raw, "time", source), TIME_KEYS, f"{source} [time]")
    limits_raw = dict(_section(raw, "limits", source))
    books_raw = limits_raw.pop("books", {})
    if not isinstance(books_raw, dict) or not all(isinstance(v, dict) for v in books_raw.values()):
        raise ConfigError(f"{source} [limits.books]: each book must be a table such as [limits.books.\"my-book\"]")
    checks = _section(raw, "checks", source)
    smile = _smile_settings(_section(raw, "smile", source), f"{source} [smile]")
    vol_time = _vol_time_settings(_section(raw, "vol_time", source), f"{source} [vol_time]")
    defaults = JobConfig()
    report = _section(raw, "report", source)
    unknown = sorted(set(report) - {"expiry_buckets"})
    if unknown:
        raise ConfigError(f"{source} [report]: unknown key(s) {', '.join(unknown)}; allowed: expiry_buckets")
    buckets = _expiry_buckets(report.get("expiry_buckets", list(DEFAULT_EXPIRY_BUCKETS)), f"{source} [report]")

    def resolve(key: str, default: Path) -> Path:
        value = job.get(key)
        return default if value is None else (base / value).resolve()

    default_limits = _settings(LimitSettings, limits_raw, f"{source} [limits]")
    book_limits = tuple(
        (str(book), _settings(LimitSettings, {**{f.name: getattr(default_limits, f.name)
                                                for f in dataclasses.fields(LimitSettings)}, **values},
                              f"{source} [limits.books.{book!r}]"))
        for book, values in sorted(books_raw.items())
    )
    holidays = time.get("holidays", [])
    if not all(isinstance(h, dt.date) and not isinstance(h, dt.datetime) for h in holidays):
        raise ConfigError(f"{source} [time] holidays: every entry must be a TOML date such as 2026-12-25")
    history_nights = job.get("history_nights", defaults.history_nights)
    if history_nights < 1:
        raise ConfigError(f"{source} [job]: history_nights must be a whole number >= 1, got {history_nights!r}")
    config = JobConfig(
        data_root=resolve("data_root", defaults.data_root),
        archive_path=resolve("archive", defaults.archive_path),
        reports_dir=resolve("reports", defaults.reports_dir),
        reporting_currency=job.get("reporting_currency", defaults.reporting_currency),
        time_basis=time.get("basis", defaults.time_basis),
        holidays=tuple(sorted(holidays)),
        limits=default_limits,
        book_limits=book_limits,
        checks=_settings(CheckSettings, checks, f"{source} [checks]"),
        engine=job.get("engine", defaults.engine),
        scheduler=job.get("scheduler", defaults.scheduler),
        revaluation=job.get("revaluation", defaults.revaluation),
        american_precision=job.get("american_precision", defaults.american_precision),
        write_reports=job.get("write_reports", defaults.write_reports),
        backfill_processes=job.get("backfill_processes", defaults.backfill_processes),
        history_nights=history_nights,
        smile=smile,
        vol_time=vol_time,
        expiry_buckets=buckets,
    )
    return validate(config, source)


def validate(config: JobConfig, source: str = "options") -> JobConfig:
    """Refuse settings the job cannot honour, naming the key."""
    if config.time_basis not in TIME_BASES:
        raise ConfigError(f"{source}: time basis {config.time_basis!r} is not one of {', '.join(TIME_BASES)}")
    if config.american_precision not in AMERICAN_PRECISIONS:
        raise ConfigError(f"{source}: american_precision {config.american_precision!r} is not one of "
                          f"{', '.join(AMERICAN_PRECISIONS)}")
    if config.backfill_processes < 0:
        raise ConfigError(f"{source}: backfill_processes must be 0 (one per available core) or more, "
                          f"got {config.backfill_processes}")
    if config.engine not in ENGINES:
        raise ConfigError(f"{source}: engine {config.engine!r} is not one of {', '.join(ENGINES)}")
    if len(config.reporting_currency) != 3 or not config.reporting_currency.isalpha():
        raise ConfigError(f"{source}: reporting_currency must be an ISO 4217 code such as USD")
    return config
