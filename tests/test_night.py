"""attribution.night: the overnight explain in blocks of whole instrument pairs gives the figures of one pass."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import attribution.engine as engine_module
import attribution.night as night_module
from attribution.config import JobConfig
from attribution.engine import prepare_night
from attribution.night import pair_blocks
from attribution.synthetic import write_synthetic_night


def test_pair_blocks_keep_every_pair_whole_and_every_row_once() -> None:
    rng = np.random.default_rng(3)
    rows = np.sort(rng.choice(10_000, size=3_000, replace=False)).astype(np.intp)
    pair = rng.integers(0, 400, size=rows.size).astype(np.intp)
    pair[:50] = 7  # one pair larger than a block
    blocks = list(pair_blocks(rows, pair, 40))
    seen = np.concatenate([b for b, _ in blocks])
    assert np.array_equal(np.sort(seen), rows)  # every row once
    owner = {}
    for number, (block, codes) in enumerate(blocks):
        assert np.all(np.diff(block) > 0)  # ascending within a block
        assert np.array_equal(codes, pair[np.searchsorted(rows, block)])  # each row's own pair code
        for code in np.unique(codes):
            assert owner.setdefault(int(code), number) == number  # a pair in one block only
        assert block.size <= 40 or np.unique(codes).size == 1  # only a pair alone may exceed the size
    assert max(b.size for b, _ in blocks) == int((pair == 7).sum())  # the large pair, whole and alone


def test_pair_blocks_of_few_rows_is_one_block_and_of_none_is_none() -> None:
    rows, pair = np.arange(5, dtype=np.intp), np.array([3, 1, 3, 2, 1], dtype=np.intp)
    (block, codes), = pair_blocks(rows, pair, 5)
    assert block is rows and codes is pair
    assert list(pair_blocks(rows[:0], pair[:0], 5)) == []


@pytest.mark.parametrize("revaluation", [True, False])
def test_a_night_explained_in_blocks_is_the_night_explained_at_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                   revaluation: bool) -> None:
    """Bit for bit: every column of every row, with American options (30 %) and hedges among the positions."""
    synthetic = write_synthetic_night(tmp_path / "data", positions=4_000, books=6, instruments=300, underlyings=12)
    config = dataclasses.replace(JobConfig(data_root=synthetic.data_root, write_reports=False),
                                 revaluation=revaluation)
    whole = prepare_night(config, synthetic.run).positions
    monkeypatch.setattr(night_module, "OVERNIGHT_BLOCK_ROWS", 256)
    blocked = prepare_night(config, synthetic.run).positions
    assert len(whole) > 3_000
    pd.testing.assert_frame_equal(blocked, whole, check_exact=True)


def test_the_explains_placeholder_limit_state_is_one_string_object(tmp_path: Path,
                                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    """The rows leave the explain with limit state ``within`` held as one Python string for every row (the controls
    replace it), not one string per row."""
    synthetic = write_synthetic_night(tmp_path / "data", positions=2_000, books=4, instruments=150, underlyings=6)
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    seen: list[np.ndarray] = []
    frame = night_module.position_frame

    def watched(values: dict[str, object], n: int) -> pd.DataFrame:
        seen.append(values["limit_state"])  # type: ignore[arg-type]
        return frame(values, n)

    monkeypatch.setattr(engine_module, "position_frame", watched)  # the engine makes the rows' frame
    prepare_night(config, synthetic.run)
    [states] = seen
    assert states.size > 1_500 and set(states) == {"within"}
    assert len({id(state) for state in states}) == 1
