"""Residual limits: a state per position and per book (``within``, ``watch``, ``breach``).

A book's limit is its absolute limit, widened to the relative share of |overnight actual P&L|
once |actual| is at least the relative floor: limit = max(residual_abs, residual_rel x |actual|).
The limit never tightens as |actual| grows, so a book cannot go from ``within`` to ``breach``
and back as its P&L grows with the same residual. A book breaches when |residual| exceeds that
limit, and is on ``watch`` from ``watch_fraction`` of it. A position breaches when |residual|
exceeds the per-position limit (``watch`` likewise). Pure numpy.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

WITHIN, WATCH, BREACH = "within", "watch", "breach"
STATE_ORDER = {WITHIN: 0, WATCH: 1, BREACH: 2}


_STATES = np.array([WITHIN, WATCH, BREACH], dtype=object)


def _state(usage: NDArray[np.float64], watch_fraction: ArrayLike) -> NDArray[np.object_]:
    """usage = |residual| / limit (the worst test); > 1 breaches, >= watch_fraction watches. The states as
    text objects picked by code (no fixed-width text array of every row between)."""
    watch = np.asarray(watch_fraction, dtype=float)
    code = np.where(usage > 1.0, 2, np.where(usage >= watch, 1, 0)).astype(np.intp)
    return _STATES[code.ravel()].reshape(code.shape)  # an array whatever the shape (a 0-d one too)


def limit_usage(residual: ArrayLike, actual: ArrayLike, abs_limit: ArrayLike, rel_limit: ArrayLike,
                rel_floor: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Share of the limit used by |residual|, and the limit applied (currency).

    limit = residual_abs, widened to max(residual_abs, residual_rel x |actual|) once |actual| >=
    rel_floor: non-decreasing in |actual|.
    """
    res = np.abs(np.asarray(residual, dtype=float))
    act = np.abs(np.asarray(actual, dtype=float))
    abs_limit = np.asarray(abs_limit, dtype=float)
    rel_applies = act >= np.asarray(rel_floor, dtype=float)
    rel_amount = np.asarray(rel_limit, dtype=float) * act
    applied = np.where(rel_applies, np.maximum(abs_limit, rel_amount), abs_limit)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # a tiny limit's usage is inf: a breach
        usage = np.where(applied > 0, res / applied, np.where(res > 0, np.inf, 0.0))
    return usage, applied


def book_states(residual: ArrayLike, actual: ArrayLike, abs_limit: ArrayLike, rel_limit: ArrayLike,
                rel_floor: ArrayLike, watch_fraction: ArrayLike) -> tuple[NDArray[np.object_], NDArray[np.float64]]:
    """State of each book and the limit applied to it tonight."""
    usage, applied = limit_usage(residual, actual, abs_limit, rel_limit, rel_floor)
    return _state(usage, watch_fraction), applied


def position_states(residual: ArrayLike, position_limit: ArrayLike, watch_fraction: ArrayLike) -> NDArray[np.object_]:
    """State of each position against its per-position limit."""
    res = np.abs(np.asarray(residual, dtype=float))
    limit = np.asarray(position_limit, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        usage = np.where(limit > 0, res / limit, np.where(res > 0, np.inf, 0.0))
    return _state(usage, watch_fraction)


def worst(states: ArrayLike) -> str:
    """The worst state among ``states`` (``within`` when empty)."""
    codes = [STATE_ORDER[s] for s in np.unique(np.asarray(states, dtype=object))]
    return [WITHIN, WATCH, BREACH][max(codes, default=0)]
