"""Splits crossing a night: the prior date restated in new units, trades carried, no P&L from the split itself."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from attribution.config import JobConfig
from attribution.corporate_actions import RESTATED_RULE
from attribution.engine import PreparedNight, prepare_night
from tests.contract_files import put_rows
from tests.dividend_desk import POSITIONS, PRIOR, RUN, SPL_NEW, SPL_OLD, SPLIT_RATIO, SPOT, mark, write_dividend_desk

QTY = {i: q for _, i, q in POSITIONS}


def _night(root: Path) -> PreparedNight:
    return prepare_night(dataclasses.replace(JobConfig(), data_root=root), RUN)


@pytest.fixture(scope="module")
def split_night(tmp_path_factory: pytest.TempPathFactory) -> PreparedNight:
    return _night(write_dividend_desk(tmp_path_factory.mktemp("split") / "data"))


def test_split_positions_are_carried_and_flagged(split_night) -> None:
    """Adjusted options keep their trade: carried, flagged ``restated``, run-date terms archived."""
    rows = split_night.positions.set_index("trade_id")
    for trade, new in (("S1", SPL_NEW[0]), ("S2", SPL_NEW[1])):
        assert rows.loc[trade, "status"] == "carried"
        assert "restated" in rows.loc[trade, "flags"].split(",")
        assert rows.loc[trade, "strike"] == new.strike and rows.loc[trade, "multiplier"] == new.multiplier
        assert rows.loc[trade, "spot_prior"] == pytest.approx(SPOT[PRIOR]["SPL"] / SPLIT_RATIO, rel=1e-15)
    assert not (split_night.exceptions["rule"] == "instrument terms changed between dates").any()


def test_split_night_pnl_is_the_economic_pnl(split_night) -> None:
    """pnl_actual = quantity x (new multiplier x new mark - old multiplier x old mark), marks from QuantLib (rtol 1e-9).

    The value of a holding does not change with the units it is counted in (common practice, no source):
    the P&L is the move from 80 to 41 x 2 = 82 in old units, none of it from the split itself.
    """
    rows = split_night.positions.set_index("trade_id")
    for trade, old, new in (("S1", SPL_OLD[0], SPL_NEW[0]), ("S2", SPL_OLD[1], SPL_NEW[1])):
        q = QTY[old.instrument_id]
        economic = q * (new.multiplier * mark(new, RUN) - old.multiplier * mark(old, PRIOR))
        assert rows.loc[trade, "pnl_actual"] == pytest.approx(economic, rel=1e-9)
        # The restated spot move is 41 - 40 = 1 new unit (2 old units): delta explains it, the residual is small.
        assert abs(rows.loc[trade, "pnl_residual"]) < 0.02 * abs(rows.loc[trade, "pnl_actual"])
        assert rows.loc[trade, "pnl_delta"] == pytest.approx(rows.loc[trade, "delta_units"] * 1.0, rel=1e-9)


def test_split_is_recorded_as_an_info_row(split_night) -> None:
    """The ledger has one ``info`` row for the split, keyed by underlying and ex_date, naming the ratio."""
    info = split_night.exceptions[split_night.exceptions["rule"] == RESTATED_RULE]
    assert info["key"].tolist() == [f"SPL @ {RUN.isoformat()}"]
    assert info["severity"].tolist() == ["info"]
    assert info["file"].iloc[0].endswith(f"as_of={RUN.isoformat()}/corporate_actions.parquet")
    assert "ratio 2" in info["detail"].iloc[0] and "2 instruments" in info["detail"].iloc[0]
    assert split_night.rejected_positions == 0


def test_without_the_action_the_adjusted_options_are_rejected(tmp_path: Path) -> None:
    """No corporate_actions row: the changed strikes and multipliers reject the trades (version-1 behaviour)."""
    night = _night(write_dividend_desk(tmp_path / "data", actions=False))
    rejected = night.exceptions[night.exceptions["rule"] == "instrument terms changed between dates"]
    assert {"S1", "S2"} <= set(rejected["key"])
    assert not night.positions["underlying"].eq("SPL").any()


def test_bad_action_row_is_rejected(tmp_path: Path) -> None:
    """A ratio <= 0 is a rejected row naming the rule; without a usable action the trades are not restated."""
    root = write_dividend_desk(tmp_path / "data")
    put_rows(root, RUN, "corporate_actions", [{"underlying": "SPL", "ex_date": RUN, "ratio": 0.0}])
    put_rows(root, PRIOR, "corporate_actions", [])
    night = _night(root)
    bad = night.exceptions[night.exceptions["rule"] == "ratio must be > 0"]
    assert bad["key"].tolist() == [f"SPL @ {RUN.isoformat()}"] and bad["severity"].tolist() == ["rejected"]
    assert not night.positions["underlying"].eq("SPL").any()


def test_an_action_outside_the_night_changes_nothing(tmp_path: Path) -> None:
    """An action dated after the run date is not applied: the prior state is not restated."""
    root = write_dividend_desk(tmp_path / "data")
    later = RUN.replace(day=20)
    for day in (PRIOR, RUN):
        put_rows(root, day, "corporate_actions", [{"underlying": "SPL", "ex_date": later, "ratio": 2.0}])
    night = _night(root)
    assert not (night.exceptions["rule"] == RESTATED_RULE).any()
    assert np.all(night.positions["flags"].str.contains("restated") == False)  # noqa: E712
