"""Tests of attribution/quality.py: the attribution-quality test statistics.

References: scipy.stats.spearmanr and scipy.stats.ks_2samp (reference library) for the
statistics; Basel Framework MAR32.42 for the zone thresholds (Spearman 0.80 / 0.70, KS 0.09 /
0.12; paragraph number from memory, the same thresholds as EU Delegated Regulation 2022/2059
Art. 9); BCBS 352 (2016) for the mean and variance ratios of the unexplained P&L.
"""

from __future__ import annotations

import datetime as dt
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from attribution.quality import (
    QualityResult,
    ks_rows,
    quality_test,
    spearman_rows,
    zone_of,
)
from attribution.quality_table import SeriesArrays, nightly_series, quality_columns, quality_frame
from attribution.schema import BOOK_QUALITY

RTOL = 1e-12
ATOL = 1e-15
SEVERITY = {"green": 0, "amber": 1, "red": 2}


def _tied_pairs(rng: np.random.Generator, rows: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Correlated integer-valued series, so ties occur within and across the two samples."""
    x = np.round(rng.normal(0.0, 3.0, size=(rows, n)))
    y = np.round(0.6 * x + rng.normal(0.0, 2.0, size=(rows, n)))
    return x, y


def _clean_book(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """HPL in currency units, and RTPL = HPL + small noise (a model that explains the book well)."""
    hpl = rng.normal(0.0, 1e5, n)
    return hpl, hpl + rng.normal(0.0, 5e3, n)


def _scipy_spearman(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.array([stats.spearmanr(a, b).statistic for a, b in zip(x, y, strict=True)])


def _ref_ks(a: np.ndarray, b: np.ndarray) -> float:
    """scipy.stats.ks_2samp statistic; warnings about its p-value (not used here) are silenced."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return float(stats.ks_2samp(a, b).statistic)


def _scipy_ks(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.array([_ref_ks(a, b) for a, b in zip(x, y, strict=True)])


@pytest.mark.parametrize("n", [3, 7, 30, 60, 250])
def test_spearman_rows_matches_scipy_with_ties(n: int) -> None:
    """Row-wise Spearman equals scipy.stats.spearmanr (average ranks for ties), rtol 1e-12."""
    x, y = _tied_pairs(np.random.default_rng(n), 80, n)
    keep = (x.std(axis=1) > 0) & (y.std(axis=1) > 0)
    x, y = x[keep], y[keep]
    np.testing.assert_allclose(spearman_rows(x, y), _scipy_spearman(x, y), rtol=RTOL, atol=ATOL)


def test_spearman_rows_matches_scipy_continuous() -> None:
    """Row-wise Spearman equals scipy.stats.spearmanr on distinct values, rtol 1e-12."""
    rng = np.random.default_rng(11)
    x = rng.normal(size=(200, 120))
    y = 0.7 * x + rng.normal(size=x.shape)
    np.testing.assert_allclose(spearman_rows(x, y), _scipy_spearman(x, y), rtol=RTOL, atol=ATOL)


@pytest.mark.parametrize("n", [1, 3, 7, 30, 60, 250])
def test_ks_rows_matches_scipy_with_ties(n: int) -> None:
    """Row-wise KS statistic equals scipy.stats.ks_2samp(...).statistic with ties across samples, rtol 1e-12."""
    x, y = _tied_pairs(np.random.default_rng(100 + n), 80, n)
    np.testing.assert_allclose(ks_rows(x, y), _scipy_ks(x, y), rtol=RTOL, atol=ATOL)


def test_ks_rows_unequal_sample_sizes_matches_scipy() -> None:
    """KS with n != m values per row equals scipy.stats.ks_2samp, rtol 1e-12."""
    rng = np.random.default_rng(5)
    x = np.round(rng.normal(0.0, 2.0, size=(60, 37)))
    y = np.round(rng.normal(0.5, 2.0, size=(60, 23)))
    np.testing.assert_allclose(ks_rows(x, y), _scipy_ks(x, y), rtol=RTOL, atol=ATOL)


def test_row_statistics_nan_for_constant_or_missing_rows() -> None:
    """A constant row gives NaN Spearman (as scipy) and a row holding NaN gives NaN for both statistics."""
    x = np.array([[1.0, 1.0, 1.0, 1.0], [1.0, 2.0, np.nan, 4.0], [1.0, 2.0, 3.0, 4.0]])
    y = np.array([[1.0, 2.0, 3.0, 4.0], [1.0, 2.0, 3.0, 4.0], [4.0, 3.0, 2.0, 1.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = stats.spearmanr(x[0], y[0]).statistic
    rho = spearman_rows(x, y)
    assert np.isnan(ref) and np.isnan(rho[0]) and np.isnan(rho[1])
    np.testing.assert_allclose(rho[2], -1.0, rtol=0, atol=ATOL)
    d = ks_rows(x, y)
    assert np.isnan(d[1])
    np.testing.assert_allclose(d[[0, 2]], [0.75, 0.0], rtol=0, atol=ATOL)


@pytest.mark.parametrize(
    ("spearman", "ks", "expected"),
    [
        (0.80, 0.05, "amber"),                          # MAR32.42: green needs spearman > 0.80
        (np.nextafter(0.80, 1.0), 0.05, "green"),
        (0.95, 0.09, "amber"),                          # green needs ks < 0.09
        (0.95, np.nextafter(0.09, 0.0), "green"),
        (0.70, 0.05, "amber"),                          # red needs spearman < 0.70
        (np.nextafter(0.70, 0.0), 0.05, "red"),
        (0.95, 0.12, "amber"),                          # red needs ks > 0.12
        (0.95, np.nextafter(0.12, 1.0), "red"),
        (0.75, 0.10, "amber"),
        (0.85, 0.10, "amber"),
        (0.75, 0.05, "amber"),
        (0.60, 0.05, "red"),
        (0.95, 0.20, "red"),
        (np.nan, 0.05, "red"),                          # cannot be passed (module doc)
    ],
)
def test_zone_thresholds_mar32(spearman: float, ks: float, expected: str) -> None:
    """Zones around the MAR32.42 thresholds (Spearman 0.80/0.70, KS 0.09/0.12): a value on a threshold is amber."""
    assert zone_of(np.array([spearman]), np.array([ks]))[0] == expected


def test_clean_book_green_and_bad_marks_not_green() -> None:
    """RTPL = HPL + small noise is green; one-sided HPL spikes on 15 % of nights are amber or red."""
    rng = np.random.default_rng(2024)
    hpl, rtpl = _clean_book(rng, 250)
    bad = hpl.copy()
    spiked = rng.choice(250, size=38, replace=False)
    bad[spiked] -= rng.uniform(3e5, 6e5, size=spiked.size)   # losses from bad marks, absent from RTPL
    res = quality_test(np.vstack([hpl, bad]), np.vstack([rtpl, rtpl]))
    assert isinstance(res, QualityResult)
    assert res.zone[0] == "green" and res.zone[1] in ("amber", "red")
    assert not res.provisional.any() and list(res.nights) == [250, 250]
    # BCBS 352 diagnostics: the clean book's unexplained P&L is small, the bad book fails the 20 % variance ratio.
    assert abs(res.mean_ratio[0]) < 0.10 and res.variance_ratio[0] < 0.20
    assert res.variance_ratio[1] > 0.20


def test_ratios_use_sample_moments() -> None:
    """mean_ratio = mean(U)/sd(HPL) and variance_ratio = var(U)/var(HPL), ddof=1 (BCBS 352), rtol 1e-12."""
    rng = np.random.default_rng(3)
    hpl, rtpl = _clean_book(rng, 250)
    rtpl = rtpl + 2e4
    res = quality_test(hpl[None], rtpl[None])
    u = hpl - rtpl
    np.testing.assert_allclose(res.mean_ratio[0], u.mean() / hpl.std(ddof=1), rtol=RTOL, atol=0)
    np.testing.assert_allclose(res.variance_ratio[0], u.var(ddof=1) / hpl.var(ddof=1), rtol=RTOL, atol=0)


def test_provisional_below_window_computed_on_existing_nights() -> None:
    """A book with 100 nights (left-padded) is provisional and its metrics equal scipy over those 100 nights."""
    rng = np.random.default_rng(8)
    full_h, full_r = _clean_book(rng, 250)
    short_h, short_r = _clean_book(rng, 100)
    hpl = np.vstack([full_h, np.concatenate([np.full(150, np.nan), short_h])])
    rtpl = np.vstack([full_r, np.concatenate([np.full(150, np.nan), short_r])])
    res = quality_test(hpl, rtpl)
    assert list(res.nights) == [250, 100]
    assert list(res.provisional) == [False, True]
    np.testing.assert_allclose(res.spearman[1], stats.spearmanr(short_h, short_r).statistic, rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(res.ks[1], _ref_ks(short_h, short_r), rtol=RTOL, atol=ATOL)


def test_fewer_than_two_nights_metrics_nan() -> None:
    """With 0 or 1 night every metric is NaN, the result provisional and the zone amber (module doc)."""
    hpl = np.array([[np.nan, np.nan, 5.0], [np.nan, np.nan, np.nan]])
    res = quality_test(hpl, hpl.copy(), window=3, recent=2)
    assert list(res.nights) == [1, 0] and res.provisional.all()
    for values in (res.spearman, res.ks, res.mean_ratio, res.variance_ratio, res.spearman_60, res.ks_60):
        assert np.isnan(values).all()
    assert list(res.zone) == ["amber", "amber"] and list(res.early_warning) == ["", ""]


def test_constant_series_red_only_from_30_nights() -> None:
    """NaN Spearman (constant HPL) is red with >= 30 nights and amber below (module doc)."""
    rng = np.random.default_rng(4)
    hpl = np.vstack([np.full(40, 1.0), np.concatenate([np.full(20, np.nan), np.full(20, 1.0)])])
    rtpl = np.where(np.isnan(hpl), np.nan, rng.normal(1.0, 0.01, size=hpl.shape))
    res = quality_test(hpl, rtpl, window=40, recent=20)
    assert np.isnan(res.spearman).all()
    assert list(res.zone) == ["red", "amber"]


def test_window_uses_only_latest_nights() -> None:
    """Of 300 nights only the latest 250 count: 50 garbage nights before them change nothing."""
    rng = np.random.default_rng(9)
    hpl, rtpl = _clean_book(rng, 250)
    old_h, old_r = rng.normal(0.0, 1e5, 50), rng.normal(3e5, 1e4, 50)
    res = quality_test(np.concatenate([old_h, hpl])[None], np.concatenate([old_r, rtpl])[None])
    ref = quality_test(hpl[None], rtpl[None])
    assert res.nights[0] == 250 and not res.provisional[0] and res.zone[0] == "green"
    for name in ("spearman", "ks", "mean_ratio", "variance_ratio", "spearman_60", "ks_60"):
        np.testing.assert_allclose(getattr(res, name), getattr(ref, name), rtol=RTOL, atol=0)


def test_recent_statistics_over_latest_60_nights() -> None:
    """spearman_60 and ks_60 equal scipy over the last 60 nights, rtol 1e-12."""
    rng = np.random.default_rng(12)
    hpl, rtpl = _clean_book(rng, 250)
    res = quality_test(hpl[None], rtpl[None])
    np.testing.assert_allclose(res.spearman_60[0], stats.spearmanr(hpl[-60:], rtpl[-60:]).statistic,
                               rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(res.ks_60[0], _ref_ks(hpl[-60:], rtpl[-60:]), rtol=RTOL, atol=ATOL)


def test_early_warning_when_recent_nights_degrade() -> None:
    """Latest 60 nights degraded: zone_60 is worse than the zone and a warning says so; a clean book has none."""
    rng = np.random.default_rng(21)
    hpl, rtpl = _clean_book(rng, 250)
    degraded = rtpl.copy()
    degraded[-60:] = hpl[-60:] + rng.normal(0.0, 1.5e5, 60)
    res = quality_test(np.vstack([hpl, hpl]), np.vstack([rtpl, degraded]))
    assert res.early_warning[0] == "" and res.zone_60[0] == res.zone[0] == "green"
    assert SEVERITY[res.zone_60[1]] > SEVERITY[res.zone[1]]
    assert res.early_warning[1].startswith("latest 60 nights in the red zone")
    assert f"250-night test is {res.zone[1]}" in res.early_warning[1]


@pytest.mark.parametrize(
    ("hpl", "rtpl", "message"),
    [
        ([[np.nan, 1.0, 2.0]], [[0.0, 1.0, 2.0]], "same nights"),
        ([[1.0, np.nan, 2.0]], [[1.0, np.nan, 2.0]], "padding only on the left"),
        ([[1.0, np.inf, 2.0]], [[1.0, 1.0, 2.0]], "finite"),
        ([1.0, 2.0], [1.0, 2.0], "2-D"),
    ],
)
def test_quality_test_rejects_bad_input(hpl: list, rtpl: list, message: str) -> None:
    """A differing NaN pattern, a gap, an infinite value or a 1-D input raises a ValueError naming the rule."""
    with pytest.raises(ValueError, match=message):
        quality_test(np.array(hpl), np.array(rtpl), window=3, recent=2)


def _series(rng: np.random.Generator) -> pd.DataFrame:
    """Three invented books: 'OPT-A' with 260 nights, 'OPT-B' with 40, 'OPT-C' only after the test date."""
    days = pd.bdate_range("2023-01-02", periods=260)
    frames = []
    for book, dates in (("OPT-A", days), ("OPT-B", days[-40:]), ("OPT-C", days[-5:])):
        hpl, rtpl = _clean_book(rng, len(dates))
        frames.append(pd.DataFrame({"as_of": dates.date, "book": book, "hpl": hpl, "rtpl": rtpl}))
    return pd.concat(frames, ignore_index=True)


def test_quality_frame_columns_dates_and_window() -> None:
    """quality_frame has the BOOK_QUALITY columns in order, one row per book with nights up to the date, latest 250."""
    rng = np.random.default_rng(31)
    series = _series(rng).sample(frac=1.0, random_state=1)   # row order must not matter
    days = pd.bdate_range("2023-01-02", periods=260)
    as_of = days[-6].date()                                  # before OPT-C exists; OPT-A has 255 nights
    out = quality_frame(series, as_of)
    assert list(out.columns) == [name for name, _ in BOOK_QUALITY]
    assert list(out["book"]) == ["OPT-A", "OPT-B"]
    assert (out["as_of"] == as_of).all()
    assert list(out["nights"]) == [250, 35] and list(out["provisional"]) == [False, True]
    a = series[(series["book"] == "OPT-A") & (series["as_of"] <= as_of)].sort_values("as_of").tail(250)
    np.testing.assert_allclose(out["spearman"].iloc[0], stats.spearmanr(a["hpl"], a["rtpl"]).statistic,
                               rtol=RTOL, atol=ATOL)
    np.testing.assert_allclose(out["ks"].iloc[0], _ref_ks(a["hpl"], a["rtpl"]), rtol=RTOL, atol=ATOL)
    assert set(out["zone"]) <= {"green", "amber", "red"}


def test_quality_frame_no_books_gives_empty_table() -> None:
    """A date before every archived night gives an empty table that still has the BOOK_QUALITY columns."""
    out = quality_frame(_series(np.random.default_rng(2)), dt.date(2000, 1, 3))
    assert out.empty and list(out.columns) == [name for name, _ in BOOK_QUALITY]


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda s: s.drop(columns="rtpl"), "missing column"),
        (lambda s: pd.concat([s, s.iloc[[0]]]), "one row per book and night"),
        (lambda s: s.assign(hpl=s["hpl"].where(s.index != 3, np.nan)), "finite"),
    ],
)
def test_quality_frame_rejects_bad_series(change, message: str) -> None:
    """A missing column, a duplicated night or a NaN amount raises a ValueError naming book, date and rule."""
    series = change(_series(np.random.default_rng(3)))
    with pytest.raises(ValueError, match=message):
        quality_frame(series, dt.date(2024, 12, 31))


def _as_arrays(series: pd.DataFrame) -> SeriesArrays:
    return SeriesArrays(pd.to_datetime(series["as_of"]).to_numpy(), series["book"].to_numpy(dtype=object),
                        series["hpl"].to_numpy(float), series["rtpl"].to_numpy(float))


def test_quality_columns_of_arrays_are_those_of_the_frame() -> None:
    """The series handed over as arrays (the archive session's history) gives the frame's columns to the bit."""
    series = _series(np.random.default_rng(31)).sample(frac=1.0, random_state=2)
    as_of = pd.bdate_range("2023-01-02", periods=260)[-3].date()
    framed, direct = quality_frame(series, as_of), quality_columns(_as_arrays(series), as_of)
    pd.testing.assert_frame_equal(pd.DataFrame(direct), framed, check_exact=True)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda s: pd.concat([s, s.iloc[[5]]]), "one row per book and night"),
        (lambda s: s.assign(hpl=s["hpl"].where(s.index != 3, np.nan)), "finite"),
        (lambda s: s.assign(book=s["book"].where(s.index != 7, None)), "required"),
    ],
)
def test_quality_columns_of_arrays_reject_what_the_frame_rejects(change, message: str) -> None:
    """A duplicated night, a NaN amount or a missing book: the same error, naming the same row, as the frame's."""
    series = change(_series(np.random.default_rng(3)))
    with pytest.raises(ValueError, match=message) as framed:
        quality_frame(series, dt.date(2024, 12, 31))
    with pytest.raises(ValueError) as direct:
        quality_columns(_as_arrays(series), dt.date(2024, 12, 31))
    assert str(direct.value) == str(framed.value)


def test_nightly_series_sums_positions_held_overnight() -> None:
    """HPL and RTPL sum pnl_actual and pnl_explained over carried and closed rows only (hand-computed)."""
    rows = pd.DataFrame({
        "as_of": [dt.date(2024, 3, 4)] * 4 + [dt.date(2024, 3, 5)] * 2,
        "book": ["OPT-A", "OPT-A", "OPT-A", "OPT-B", "OPT-A", "OPT-B"],
        "trade_id": ["t1", "t2", "t3", "t4", "t1", "t5"],
        "status": ["carried", "closed", "new", "expired", "carried", "new"],
        "pnl_actual": [10.0, -4.0, 100.0, 7.0, 3.0, 50.0],
        "pnl_explained": [9.0, -3.5, np.nan, 6.0, 2.5, np.nan],
    })
    out = nightly_series(rows)
    assert list(out.columns) == ["as_of", "book", "hpl", "rtpl"]
    assert list(out["book"]) == ["OPT-A", "OPT-A"]
    np.testing.assert_allclose(out["hpl"], [6.0, 3.0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(out["rtpl"], [5.5, 2.5], rtol=0, atol=1e-12)
    broken = rows.assign(pnl_explained=rows["pnl_explained"].where(rows["trade_id"] != "t2", np.nan))
    with pytest.raises(ValueError, match="'t2'"):
        nightly_series(broken)
