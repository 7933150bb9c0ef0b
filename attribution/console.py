"""What a run shows on the terminal: one progress line on stderr, and the closing summary of a night."""

from __future__ import annotations

import logging
import sys
from typing import TYPE_CHECKING

from attribution.config import JobConfig

if TYPE_CHECKING:
    from attribution.engine import NightOutcome


class ProgressLine:
    """One progress line on a terminal's stderr; silent when stderr is not a terminal."""

    def __init__(self, total: int) -> None:
        self.total, self.done = total, 0
        self.live = sys.stderr.isatty()

    def show(self, text: str) -> None:
        if self.live:
            width = 30
            filled = int(width * self.done / max(self.total, 1))
            sys.stderr.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} {text:<40}")
            sys.stderr.flush()

    def step(self, text: str) -> None:
        self.done += 1
        self.show(text)

    def close(self) -> None:
        if self.live:
            sys.stderr.write("\n")


def printable(text: str) -> str:
    """Data-supplied text made safe for a terminal: control characters shown as escapes."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


def _money(x: float) -> str:
    return f"{x:,.0f}"


def summary(outcome: NightOutcome, config: JobConfig) -> str:
    """The closing summary of one night."""
    ccy = config.reporting_currency
    share = (f"{outcome.explained / outcome.overnight_actual:.1%}" if outcome.overnight_actual else "n/a")
    zones = ", ".join(f"{k} {v}" for k, v in sorted(outcome.zones.items())) or "not computed"
    lines = [
        f"Night {outcome.as_of} (prior {outcome.prior_as_of}, basis {config.time_basis})",
        f"  positions   {outcome.positions_in:,} in = {outcome.archived:,} archived + {outcome.rejected:,} rejected",
        f"  books       {outcome.books:,}; residual limit breaches: {outcome.book_breaches} book(s), "
        f"{outcome.position_breaches} position(s)",
        f"  P&L {ccy}     total {_money(outcome.total_pnl)}; held overnight {_money(outcome.overnight_actual)}, "
        f"explained {_money(outcome.explained)} ({share}), residual {_money(outcome.residual)}",
        f"  exceptions  {outcome.rejected:,} position(s) rejected, {outcome.warnings:,} warning(s); "
        f"new trades without a price: {outcome.unpriced_new}",
        f"  quality     {zones}",
        f"  seconds     {outcome.seconds:.2f}",
    ]
    if outcome.missing_days:
        lines.insert(1, f"  WARNING     the prior date {outcome.prior_as_of} is not the previous business day: "
                        f"no folder for {', '.join(outcome.missing_days)}; this night spans them (use --prior "
                        "to make it deliberate)")
    if outcome.index_path:
        lines.append(f"  report      {outcome.index_path}")
    return "\n".join(lines)


LOG_FORMAT = "%(asctime)s %(levelname)s %(message)s"


def warning_to_log(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                   file: object = None, line: str | None = None) -> None:
    """``warnings.showwarning`` of the command: a library warning (numpy overflow, ...) names source lines, which
    tell a user nothing (the rows it concerns are rejected by rule in the ledger), so it goes to the debug log."""
    logging.getLogger("attribution").debug("%s: %s (%s:%s)", category.__name__, message, filename, lineno)
