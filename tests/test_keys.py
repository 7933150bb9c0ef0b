"""Text keys as integer codes (attribution.keys): the codes, the blank rule and the trade matching give
what the same work on the Python strings gives.

References: pandas.factorize (pandas, a reference library) for the codes; the row rule's own per-value
test (``str.strip`` after dropping trailing NULs, README.md, "Input files": a null or blank key is no
key) for the blank values; attribution.lifecycle.match_keys (the matching on Python strings) for the
matching;
the text comparison of instrument ids for a trade that changed instrument; the run file's own values for its ids
as the prior date's strings.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import given, settings
from hypothesis import strategies as st

from attribution.config import CheckSettings
from attribution.contract import clean_night
from attribution.exceptions_log import ExceptionLog
from attribution.keys import KeyCodes, NightTrades, blank_text, encode, match
from attribution.lifecycle import _other_instrument, match_keys
from attribution.loading import folder_for, read_night
from tests.mini_desk import RUN, write_mini_desk

# white space of every kind Python strips, NUL, a zero-width space (not white space), letters, a non-ASCII letter
ALPHABET = " \t\n\r\x0b\x0c\x1c\x1f\x85\xa0\u2028\u3000\u200b\x00aZ9-é"
TEXTS = st.lists(st.one_of(st.none(), st.text(alphabet=st.sampled_from(ALPHABET), max_size=4)), max_size=40)


def _check_codes(keyed: KeyCodes, values: list[str | None]) -> None:
    """Codes as pandas.factorize gives them (up to the numbering), the values as read, one string per value."""
    expected, _ = pd.factorize(pd.Series(values, dtype=object), use_na_sentinel=True)
    assert keyed.per_row().tolist() == values
    assert ((keyed.codes < 0) == (expected < 0)).all()
    assert len(set(keyed.uniques.tolist())) == len(keyed.uniques)  # each distinct value once
    pairs = {(int(a), int(b)) for a, b in zip(keyed.codes, expected, strict=True)}
    assert len(pairs) == len({b for _, b in pairs}) == len({a for a, _ in pairs})  # one-to-one


@given(TEXTS, st.integers(1, 4))
def test_codes_of_a_plain_column_in_chunks(values: list[str | None], chunks: int) -> None:
    parts = np.array_split(np.array(values, dtype=object), chunks)
    _check_codes(encode(pa.chunked_array([pa.array(p.tolist(), pa.string()) for p in parts], pa.string())), values)


@given(TEXTS, st.integers(1, 4))
def test_codes_of_a_dictionary_column_whose_chunks_repeat_values(values: list[str | None], chunks: int) -> None:
    """Each chunk has a dictionary of its own, listing a value twice and an unused value: still one code per
    distinct text (a file's dictionary need not be unique)."""
    parts = np.array_split(np.array(values, dtype=object), chunks)
    arrays = []
    for part in parts:
        words = sorted({v for v in part.tolist() if v is not None})
        dictionary = words + words + ["unused"]  # every value twice
        index = {w: i + len(words) * (i % 2) for i, w in enumerate(words)}  # half the rows use the second copy
        indices = pa.array([None if v is None else index[v] for v in part.tolist()], pa.int32())
        arrays.append(pa.DictionaryArray.from_arrays(indices, pa.array(dictionary, pa.string())))
    column = pa.chunked_array(arrays, pa.dictionary(pa.int32(), pa.string()))
    _check_codes(encode(column), values)


@given(TEXTS)
def test_blank_values_follow_the_row_rule(values: list[str | None]) -> None:
    """Blank per distinct value, tested on the Arrow text, is the row rule's test of each Python string."""
    keyed = encode(pa.array(values, pa.string()))
    assert keyed.blank_values().tolist() == blank_text(keyed.uniques).tolist()
    bare = keyed.without_texts()  # a column of distinct ids keeps no Python strings: the same answers
    assert bare.uniques is None
    assert bare.blank_values().tolist() == keyed.blank_values().tolist()
    assert bare.per_row().tolist() == values
    assert blank_text(np.array(["", " ", "\x00", " a", "a", "\u3000", "\u200b"], dtype=object)).tolist() == \
        [True, True, True, False, False, True, False]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.text(alphabet="abc", min_size=1, max_size=3), unique=True, max_size=25), st.data())
def test_matching_by_codes_is_matching_by_strings(universe: list[str], data: st.DataObject) -> None:
    """Unique keys on each side, read with other (rejected) rows that share the dictionary: the rows of each
    side on the other are those matching the strings gives."""
    left = data.draw(st.permutations(universe)).copy()[: data.draw(st.integers(0, len(universe)))]
    right = data.draw(st.permutations(universe)).copy()[: data.draw(st.integers(0, len(universe)))]
    extra = data.draw(st.lists(st.sampled_from(universe), max_size=4)) if universe else []
    coded = []
    for side in (left, right):
        keyed = encode(pa.array(side + extra, pa.string()))
        coded.append(keyed.take(np.arange(len(side))))  # the clean rows: the side without the extra rows
    got = match(coded[0], coded[1])
    want = match_keys(np.array(left, dtype=object), np.array(right, dtype=object))
    assert got[0].tolist() == want[0].tolist()
    assert got[1].tolist() == want[1].tolist()


def test_row_rules_on_the_codes_read_equal_the_rules_on_the_strings(tmp_path: Path) -> None:
    """The row rules give the same ledger and clean tables with the reader's codes as without them (the
    rules then hash the Python strings themselves): blank, null, duplicate and non-ASCII keys."""
    root = write_mini_desk(tmp_path / "data")
    path = folder_for(root, RUN) / "positions.parquet"
    rows = pq.read_table(path).to_pylist()
    rows[0]["trade_id"], rows[1]["book"], rows[2]["trade_id"] = " \u3000", None, rows[3]["trade_id"]
    rows[4]["instrument_id"], rows[5]["trade_id"] = "\x00", "é-" + str(rows[5]["trade_id"])
    pq.write_table(pa.Table.from_pylist(rows, schema=pq.read_schema(path)), path, use_dictionary=["book"])
    raw = read_night(root, RUN)
    assert raw.keys["positions.parquet"]["trade_id"].codes.size == len(rows)
    frames = []
    for night in (raw, dataclasses.replace(raw, keys={})):
        log = ExceptionLog(RUN)
        clean = clean_night(night, log, CheckSettings(), "USD")
        frames.append((log.frame(), clean.positions, clean.instruments))
    ledger, positions, instruments = frames[0]
    assert len(ledger) == 5 and ledger.equals(frames[1][0])
    assert positions.equals(frames[1][1]) and instruments.equals(frames[1][2])


@given(st.lists(st.tuples(st.sampled_from("abcde"), st.sampled_from("abcde")), max_size=30),
       st.sets(st.sampled_from("abcde")))
def test_instrument_change_by_market_places_is_the_text_comparison(pairs: list[tuple[str, str]],
                                                                   listed: set[str]) -> None:
    """A trade changed instrument exactly when its two dates' instrument ids differ as text; compared by their
    places in one market of distinct ids (and as text where neither is listed there)."""
    ids = pd.Index(sorted(listed), dtype=object)
    left = np.array([a for a, _ in pairs], dtype=object)
    right = np.array([b for _, b in pairs], dtype=object)
    got = _other_instrument(ids.get_indexer(left), ids.get_indexer(right), left, right)
    assert got.tolist() == (left != right).tolist()


@settings(max_examples=60, deadline=None)
@given(st.lists(st.text(alphabet="abc", min_size=2, max_size=4), unique=True, max_size=25), st.data())
def test_run_ids_share_the_prior_dates_strings(universe: list[str], data: st.DataObject) -> None:
    """The run file's ids as the prior file's string objects where the prior file holds them (new objects for the
    others, never the run file's own): the values are the run file's, null where null."""
    prior = data.draw(st.permutations(universe)).copy()[: data.draw(st.integers(0, len(universe)))]
    run = data.draw(st.permutations(universe)).copy()[: data.draw(st.integers(0, len(universe)))]
    run_rows = run + [None] * data.draw(st.integers(0, 2))
    prior_keys, run_keys = encode(pa.array(prior, pa.string())), encode(pa.array(run_rows, pa.string()))
    prior_ids, run_ids = prior_keys.per_row(), run_keys.per_row()
    trades = NightTrades.of(prior_keys, run_keys)
    assert trades is not None
    keep = np.array(data.draw(st.lists(st.booleans(), min_size=len(run_rows), max_size=len(run_rows))), dtype=bool)
    clean = run_keys.take(keep)  # the clean rows of the run file
    shared = trades.prior_texts(prior_ids, clean)
    assert shared.tolist() == [v for v, k in zip(run_rows, keep, strict=True) if k]
    for got, own in zip(shared, run_ids[keep], strict=True):
        if got in prior:
            assert got is prior_ids[prior.index(got)]
        elif got is not None:
            assert got is not own
