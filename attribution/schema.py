"""Column lists of the archive tables: the one place their names, order and SQL types live.

``position_pnl`` carries every column the data contract fixes, plus the lifecycle lines,
the revaluation shares, the exposures at the prior state and the limit state. Amounts are in
the job's reporting currency. See README.md, "The archive", for the meaning of each column.
"""

from __future__ import annotations

from attribution.explain import TAYLOR_TERMS
from attribution.revaluation import FACTOR_NAMES as REVAL_FACTORS

LIFECYCLE_LINES: tuple[str, ...] = ("new_trade", "expiry", "amendment")

PNL_COLUMNS: tuple[str, ...] = (
    "pnl_actual",
    *(f"pnl_{t}" for t in TAYLOR_TERMS),
    "pnl_explained", "pnl_residual", "pnl_model", "pnl_higher_order", "pnl_mark_gap",
    *(f"pnl_{line}" for line in LIFECYCLE_LINES),
    "pnl_total",
)
REVAL_COLUMNS: tuple[str, ...] = tuple(f"reval_{f}" for f in REVAL_FACTORS)
UNASSIGNED_DESK = "(unassigned)"  # book_pnl.desk of a book that books.parquet does not list

# Amount columns of the data contract's version 2. They stand after every version-1 column of
# ``position_pnl`` and ``book_pnl``, so an archive written before them gains them at the end
# (``ALTER TABLE ... ADD COLUMN``, see :func:`attribution.archive.connect`) and keeps its rows.
VOL_PARTS: tuple[str, ...] = ("level", "skew", "curvature", "own")
V2_AMOUNT_COLUMNS: tuple[str, ...] = (
    "pnl_fx_translation",        # quantity0 x multiplier x price0 x (fx1 - fx0): the prior value at the new FX rate
    "pnl_cash",                  # cash flows and dividend income (per trade, or a `cash` row per book)
    *(f"pnl_vol_{part}" for part in VOL_PARTS),  # add up to pnl_vega + pnl_volga
    "pnl_smile_delta",           # the spot-implied vol move's P&L under sticky moneyness; 0 under sticky strike
    "pnl_theta_decay",           # theta's variance-clock part (README, "Weighted vol time")
    "pnl_theta_carry",           # theta at fixed total variance; decay + carry = pnl_theta
)
EXPOSURE_COLUMNS: tuple[str, ...] = (
    "delta_units",               # N * delta: underlying units (per underlying only meaningful)
    "delta_cash",                # N * delta * spot: reporting currency
    "gamma_cash_1pct",           # change of delta_cash for a 1 % spot move: N * gamma * spot^2 / 100
    "vega_per_vol_point",        # N * vega / 100
    "theta_per_calendar_day",    # N * theta_per_year / 365
    "theta_per_business_day",    # N * theta_per_year * one business day from the prior date under the run's basis
    "theta_next_business_day",   # run-date state: N1 * theta1 * year fraction to the next business day
)

POSITION_PNL: tuple[tuple[str, str], ...] = (
    ("as_of", "DATE"), ("prior_as_of", "DATE"), ("book", "VARCHAR"), ("trade_id", "VARCHAR"),
    ("instrument_id", "VARCHAR"), ("underlying", "VARCHAR"), ("currency", "VARCHAR"),
    ("status", "VARCHAR"), ("flags", "VARCHAR"),
    ("option_type", "VARCHAR"), ("strike", "DOUBLE"), ("expiry", "DATE"),
    ("quantity", "DOUBLE"), ("quantity_run_date", "DOUBLE"), ("multiplier", "DOUBLE"), ("fx_rate", "DOUBLE"),
    ("spot_prior", "DOUBLE"), ("spot_run", "DOUBLE"), ("vol_prior", "DOUBLE"), ("vol_run", "DOUBLE"),
    ("tau_prior_years", "DOUBLE"), ("tau_run_years", "DOUBLE"), ("rate_prior", "DOUBLE"), ("rate_run", "DOUBLE"),
    ("div_yield_prior", "DOUBLE"), ("div_yield_run", "DOUBLE"), ("price_prior", "DOUBLE"), ("price_run", "DOUBLE"),
    *((c, "DOUBLE") for c in PNL_COLUMNS),
    *((c, "DOUBLE") for c in REVAL_COLUMNS),
    *((c, "DOUBLE") for c in EXPOSURE_COLUMNS),
    ("limit_state", "VARCHAR"),
    # version 2
    ("kind", "VARCHAR"), ("exercise", "VARCHAR"), ("strategy", "VARCHAR"),
    *((c, "DOUBLE") for c in V2_AMOUNT_COLUMNS),
    # present value of the discrete dividends to expiry on each date (the model prices on spot less it)
    ("div_pv_prior", "DOUBLE"), ("div_pv_run", "DOUBLE"),
)

BOOK_PNL: tuple[tuple[str, str], ...] = (
    ("as_of", "DATE"), ("prior_as_of", "DATE"), ("book", "VARCHAR"),
    ("positions", "BIGINT"), ("carried", "BIGINT"), ("new", "BIGINT"), ("new_unpriced", "BIGINT"),
    ("closed", "BIGINT"), ("expired", "BIGINT"), ("settled", "BIGINT"), ("rejected", "BIGINT"),
    ("warnings", "BIGINT"),
    *((c, "DOUBLE") for c in PNL_COLUMNS),
    *((c, "DOUBLE") for c in REVAL_COLUMNS),
    *((c, "DOUBLE") for c in EXPOSURE_COLUMNS),
    ("residual_limit", "DOUBLE"),        # the limit applied tonight: max(abs limit, relative share * |actual|)
    ("position_breaches", "BIGINT"),
    ("limit_state", "VARCHAR"),
    # version 2
    ("desk", "VARCHAR"),
    *((c, "DOUBLE") for c in V2_AMOUNT_COLUMNS),
    ("official_pnl", "DOUBLE"),          # the desk's reported P&L (official_pnl.parquet), NULL without a row
    ("official_break", "DOUBLE"),        # official_pnl - pnl_total, NULL without a row
    ("exercised", "BIGINT"),             # positions exercised or assigned whole tonight
    # the size of what was left out: rejected positions held on the prior date, at the prior state
    ("rejected_prior_value", "DOUBLE"),         # quantity0 x multiplier x prior mark x prior FX
    ("rejected_vega_per_vol_point", "DOUBLE"),  # their vega at the prior state, per vol point
    ("rejected_unvalued", "BIGINT"),            # rejected positions the prior date cannot value (new, no usable mark)
)

INPUT_EXCEPTIONS: tuple[tuple[str, str], ...] = (
    ("as_of", "DATE"), ("file", "VARCHAR"), ("key", "VARCHAR"), ("rule", "VARCHAR"),
    ("detail", "VARCHAR"), ("severity", "VARCHAR"),
    ("book", "VARCHAR"),   # the book of the position a row is about; NULL for rows of other files
)

# The dividends in force on the run date per underlying and currency (present value on that currency's curve),
# and those that went ex during the night (went_ex, pv NULL). See attribution.dividends.schedule_frame.
DIVIDEND_SCHEDULE: tuple[tuple[str, str], ...] = (
    ("as_of", "DATE"), ("underlying", "VARCHAR"), ("currency", "VARCHAR"), ("ex_date", "DATE"),
    ("amount", "DOUBLE"), ("pv", "DOUBLE"), ("went_ex", "BOOLEAN"),
)

BOOK_QUALITY: tuple[tuple[str, str], ...] = (
    ("as_of", "DATE"), ("book", "VARCHAR"), ("nights", "BIGINT"), ("provisional", "BOOLEAN"),
    ("spearman", "DOUBLE"), ("ks", "DOUBLE"), ("zone", "VARCHAR"),
    ("mean_ratio", "DOUBLE"), ("variance_ratio", "DOUBLE"),
    ("spearman_60", "DOUBLE"), ("ks_60", "DOUBLE"), ("zone_60", "VARCHAR"), ("early_warning", "VARCHAR"),
)

RUNS: tuple[tuple[str, str], ...] = (
    ("run_id", "VARCHAR"), ("as_of", "DATE"), ("prior_as_of", "DATE"),
    ("started_at", "TIMESTAMP"), ("finished_at", "TIMESTAMP"), ("status", "VARCHAR"),
    ("tool_version", "VARCHAR"), ("input_hashes", "VARCHAR"), ("job_settings", "VARCHAR"),
    ("positions_in", "BIGINT"), ("positions_archived", "BIGINT"), ("positions_rejected", "BIGINT"),
    ("warnings", "BIGINT"), ("book_breaches", "BIGINT"), ("position_breaches", "BIGINT"),
    ("exit_code", "INTEGER"), ("seconds", "DOUBLE"),
)

TABLES: dict[str, tuple[tuple[str, str], ...]] = {
    "position_pnl": POSITION_PNL,
    "book_pnl": BOOK_PNL,
    "input_exceptions": INPUT_EXCEPTIONS,
    "book_quality": BOOK_QUALITY,
    "runs": RUNS,
    "dividend_schedule": DIVIDEND_SCHEDULE,
}
