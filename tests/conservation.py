"""Conservation checks shared by the input tests (test_catalogue, test_validation_properties).

Every position of both dates is archived once or rejected by its key (a keyless row by its row number),
never both: README.md, "The archive".
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq

from attribution.loading import folder_for
from tests.mini_desk import PRIOR, RUN


def raw_positions(data: Path) -> dict[str, pd.DataFrame]:
    """Both dates' positions files as written (read with pyarrow, not the package), by file path."""
    return {str(folder_for(data, day) / "positions.parquet"):
            pq.read_table(folder_for(data, day) / "positions.parquet", columns=["trade_id"]).to_pandas()
            for day in (PRIOR, RUN)}


def assert_conserved(data: Path, positions: pd.DataFrame, ledger: pd.DataFrame,
                     raw: dict[str, pd.DataFrame] | None = None) -> frozenset[str]:
    """Every position of both dates is archived once or rejected by key, never both; returns the rejected trade_ids."""
    raw = raw or raw_positions(data)
    archived = positions.loc[positions["status"] != "cash", "trade_id"]  # a book's cash row is no position
    assert archived.is_unique, archived[archived.duplicated()].tolist()
    rejected_rows = ledger[ledger["file"].str.endswith("positions.parquet") & (ledger["severity"] == "rejected")]
    ids: set[str] = set()
    for file, frame in raw.items():
        tid = frame["trade_id"]
        ids |= set(tid.dropna())
        in_file = set(rejected_rows.loc[rejected_rows["file"] == file, "key"])
        for row in tid.index[tid.isna()]:
            assert f"(null) row {row}" in in_file, (file, row)
    rejected = set(rejected_rows["key"]) & ids
    missing = ids - set(archived) - rejected
    assert not missing, f"positions neither archived nor rejected: {sorted(missing)}"
    assert not (set(archived) & rejected), f"archived and rejected: {sorted(set(archived) & rejected)}"
    assert set(archived) <= ids
    return frozenset(rejected)
