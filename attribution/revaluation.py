"""Order-independent revaluation: the model P&L split over five factors by symmetric (Shapley) allocation.

For every position the model is revalued at each combination of prior and run-date values of the
five factors spot, vol, time (tau), rates (r) and dividend (q): 2**5 = 32 states. State ``m`` holds
factor ``i`` at its run-date value when bit ``i`` of ``m`` is set, at its prior value otherwise, with
the factor order of :data:`FACTOR_NAMES` (bit 0 = spot ... bit 4 = dividend). State 0 is the prior
state, state 31 the run-date state. With discrete dividends the model prices on the escrowed spot
``S - D`` (:mod:`attribution.dividends`); the present value ``D`` moves with the dividend factor,
beside the yield ``q``, so an ex-date's drop of ``S`` (spot) and of ``D`` (dividend) offset.

The share of factor ``i`` is its Shapley value (Shapley, "A value for n-person games", 1953)::

    share_i = sum over S not containing i of |S|! (n - |S| - 1)! / n! * (V(S + {i}) - V(S))

i.e. its step-by-step revaluation contribution averaged over all n! orders of moving the factors.
The shares do not depend on any chosen order and add up to ``V(all) - V(none)``, the model P&L,
exactly up to rounding. A factor whose value does not move gets exactly zero. Each share is summed
from the marginal differences ``V(S + {i}) - V(S)``, so its rounding is relative to the size of
those differences, not to the premium.

Shares are per unit of underlying (premium units); the caller scales by quantity x multiplier x FX.

The 32 states are priced by a specialised kernel that computes every piece depending on fewer than
all five factors (``log(S/K)``, ``exp(-q tau)``, ``exp(-r tau)``, ``vol sqrt(tau)``, ...) once per
distinct factor combination instead of 32 times, with the same floating-point operations as
:func:`attribution.pricing.price_unchecked`, on cache-sized chunks of positions.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction
from math import factorial

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import ndtr

from attribution.arrays import FloatArray
from attribution.pricing import InvalidPricingInput, invalid_reasons, valid_inputs

FACTOR_NAMES: tuple[str, ...] = ("spot", "vol", "time", "rates", "dividend")
N_FACTORS = len(FACTOR_NAMES)
N_STATES = 2**N_FACTORS
CHUNK_POSITIONS = 8192  # positions priced together: keeps a state's working arrays in the CPU cache


def shapley_weight_matrix(n_factors: int) -> FloatArray:
    """Weights ``W`` of shape ``(2**n, n)`` with ``shares = W.T @ values_by_state`` (state bit ``i`` = factor ``i``).

    ``W[m, i] = |S|! (n-|S|-1)! / n!`` for ``m = S + {i}`` (bit ``i`` set) and ``-|S|! (n-|S|-1)! / n!``
    for ``m = S`` (bit ``i`` clear). Each weight is the nearest double to the exact fraction.
    """
    if n_factors < 1:
        raise ValueError(f"n_factors must be >= 1, got {n_factors}")
    n_fact = factorial(n_factors)
    weights = np.zeros((2**n_factors, n_factors))
    for state in range(2**n_factors):
        for factor in range(n_factors):
            with_factor = bool(state >> factor & 1)
            others = state.bit_count() - with_factor  # |S|: the other factors at run-date values
            weight = float(Fraction(factorial(others) * factorial(n_factors - others - 1), n_fact))
            weights[state, factor] = weight if with_factor else -weight
    return weights


SHAPLEY_WEIGHTS: FloatArray = shapley_weight_matrix(N_FACTORS)


@dataclass(frozen=True, slots=True)
class RevaluationShares:
    """Model P&L per unit of underlying split by factor; the five shares add up to the model P&L."""

    spot: FloatArray
    vol: FloatArray
    time: FloatArray
    rates: FloatArray
    dividend: FloatArray

    @property
    def total(self) -> FloatArray:
        """Sum of the five shares: the model P&L ``model(state1) - model(state0)`` up to rounding."""
        return self.spot + self.vol + self.time + self.rates + self.dividend


def _pair_weights(weights: FloatArray, factor: int) -> FloatArray:
    """Weights of the differences ``V(S + {factor}) - V(S)``, subsets ``S`` in ascending bit order."""
    with_factor = [m for m in range(weights.shape[0]) if m >> factor & 1]
    return weights[with_factor, factor]


_PAIR_WEIGHTS_5: tuple[FloatArray, ...] = tuple(_pair_weights(SHAPLEY_WEIGHTS, i) for i in range(N_FACTORS))


def shapley_allocate(values_by_state: ArrayLike) -> FloatArray:
    """Shapley shares ``(n, ...)`` of ``values_by_state`` ``(2**n, ...)``; state bit ``i`` = factor ``i`` moved.

    Generic in the number of factors and in the trailing (position) shape. The shares add up to
    ``values[-1] - values[0]`` up to rounding; a factor with ``values[S + {i}] == values[S]`` for all
    ``S`` gets exactly 0.
    """
    values = np.asarray(values_by_state, dtype=float)
    n_states = values.shape[0] if values.ndim else 0
    n_factors = n_states.bit_length() - 1
    if n_states < 2 or n_states != 2**n_factors:
        raise ValueError(f"values_by_state needs 2**n states on its first axis (n >= 1), got {n_states}")
    if n_factors == N_FACTORS:
        pair_weights = _PAIR_WEIGHTS_5
    else:
        weights = shapley_weight_matrix(n_factors)
        pair_weights = tuple(_pair_weights(weights, i) for i in range(n_factors))
    rest = values.shape[1:]
    flat = values.reshape(n_states, -1)  # (states, positions): a view
    shares = np.empty((n_factors, flat.shape[1]))
    difference = np.empty(flat.shape[1])
    for factor in range(n_factors):
        bit = 1 << factor
        out = shares[factor]
        # V(S + {factor}) - V(S) for the subsets S without the factor, in ascending order, weighted and added
        # one at a time in that order (each position's share depends on its own values alone)
        for k, state in enumerate(s for s in range(n_states) if not s & bit):
            np.subtract(flat[state | bit], flat[state], out=difference)
            if k == 0:
                np.multiply(difference, pair_weights[factor][0], out=out)
            else:
                np.multiply(difference, pair_weights[factor][k], out=difference)
                np.add(out, difference, out=out)
    return shares.reshape((n_factors, *rest))


def _check_inputs(arrays: dict[str, FloatArray]) -> None:
    """Refuse arrays of the wrong shape, ``cp`` other than +-1, and states the model cannot price."""
    shapes = {name: a.shape for name, a in arrays.items()}
    if any(len(shape) != 1 for shape in shapes.values()) or len(set(shapes.values())) != 1:
        raise ValueError(f"shapley_shares needs 1-d arrays of one length, got shapes {shapes}")
    strike, cp = arrays["strike"], arrays["cp"]
    bad_cp = np.abs(cp) != 1.0
    if bad_cp.any():
        first = int(np.flatnonzero(bad_cp)[0])
        raise InvalidPricingInput(f"cp must be +1 (call) or -1 (put); first bad at index {first}: {cp[first]!r}")
    for label, suffix in (("prior", "0"), ("run-date", "1")):
        s, v, t, r, q = (arrays[f"{name}{suffix}"] for name in ("spot", "vol", "tau", "rate", "div"))
        s = s - arrays[f"pv{suffix}"]  # the escrowed spot the model prices on
        ok = valid_inputs(s, strike, t, v, r, q)
        if not ok.all():
            bad = np.flatnonzero(~ok)
            reason = invalid_reasons(s[bad[0]], strike[bad[0]], t[bad[0]], v[bad[0]], r[bad[0]], q[bad[0]])
            raise InvalidPricingInput(
                f"{bad.size} invalid {label} state(s); first at index {int(bad[0])}: {reason.ravel()[0]}"
            )


def _revalue_states(strike: FloatArray, cp: FloatArray, spot: tuple[FloatArray, FloatArray],
                    vol: tuple[FloatArray, FloatArray], tau: tuple[FloatArray, FloatArray],
                    rate: tuple[FloatArray, FloatArray], div: tuple[FloatArray, FloatArray],
                    pv: tuple[FloatArray, FloatArray], out: FloatArray) -> FloatArray:
    """Fill ``out`` ``(32, m)`` with the price of every state; pairs are (prior, run-date) 1-d arrays.

    ``pv`` is the dividends' present value, moved with the dividend factor: the priced spot of state
    (spot a, dividend e) is ``spot[a] - pv[e]`` (exactly ``spot[a]`` where there are no dividends).

    Same operations as ``price_unchecked`` on each state's arrays, with every partial result shared by
    several states computed once; the call/put sign is folded into the shared pieces (exact for +-1).
    """
    two = (0, 1)
    priced = {(a, e): spot[a] - pv[e] for a in two for e in two}
    cp_log_sk = {ae: cp * np.log(x / strike) for ae, x in priced.items()}
    sqrt_tau = [np.sqrt(tau[c]) for c in two]
    live = {(b, c): (tau[c] > 0) & (vol[b] > 0) for b in two for c in two}
    all_live = {bc: bool(mask.all()) for bc, mask in live.items()}
    vst = {(b, c): vol[b] * sqrt_tau[c] for b in two for c in two}
    vst = {bc: x if all_live[bc] else np.where(live[bc], x, 1.0) for bc, x in vst.items()}  # 1.0: unused filler
    cp_vst = {bc: cp * x for bc, x in vst.items()}
    drift = {(d, e, b): rate[d] - div[e] + 0.5 * vol[b] * vol[b] for d in two for e in two for b in two}
    cp_drift_tau = {(d, e, b, c): cp * (drift[d, e, b] * tau[c]) for (d, e, b) in drift for c in two}
    disc_q = {(e, c): np.exp(-div[e] * tau[c]) for e in two for c in two}
    cp_k_disc_r = {(d, c): cp * (strike * np.exp(-rate[d] * tau[c])) for d in two for c in two}
    cp_s_disc_q = {(a, e, c): cp * (priced[a, e] * disc_q[e, c]) for a in two for (e, c) in disc_q}

    n1 = np.empty_like(strike)
    n2 = np.empty_like(strike)
    for state in range(N_STATES):
        a, b, c, d, e = (state >> i & 1 for i in range(N_FACTORS))
        np.add(cp_log_sk[a, e], cp_drift_tau[d, e, b, c], out=n1)
        np.divide(n1, vst[b, c], out=n1)  # cp * d1
        np.subtract(n1, cp_vst[b, c], out=n2)  # cp * d2
        ndtr(n1, out=n1)
        ndtr(n2, out=n2)
        np.multiply(cp_s_disc_q[a, e, c], n1, out=n1)
        np.multiply(cp_k_disc_r[d, c], n2, out=n2)
        np.subtract(n1, n2, out=out[state])
        if not all_live[b, c]:  # tau = 0: intrinsic; vol = 0: discounted forward intrinsic
            intrinsic = np.maximum(cp_s_disc_q[a, e, c] - cp_k_disc_r[d, c], 0.0)
            np.copyto(out[state], intrinsic, where=~live[b, c])
    return out


def shapley_shares(
    strike: ArrayLike, cp: ArrayLike,
    spot0: ArrayLike, vol0: ArrayLike, tau0: ArrayLike, rate0: ArrayLike, div0: ArrayLike,
    spot1: ArrayLike, vol1: ArrayLike, tau1: ArrayLike, rate1: ArrayLike, div1: ArrayLike,
    pv0: ArrayLike = 0.0, pv1: ArrayLike = 0.0,
) -> RevaluationShares:
    """Shapley split of ``model(state1) - model(state0)`` per unit of underlying, one element per position.

    All arguments are 1-d float arrays of one length: ``strike``; ``cp`` +1 call / -1 put; the prior
    (``...0``) and run-date (``...1``) spot, vol (decimal), tau (years), rate and dividend yield
    (continuous decimals); ``pv0``/``pv1`` the discrete dividends' present value (0: none), which
    moves with the dividend factor. ``tau1`` may be 0 (expiry on the run date: intrinsic value). Raises
    :class:`attribution.pricing.InvalidPricingInput` naming the first bad index and rule.
    """
    arrays = {name: np.ascontiguousarray(value, dtype=float) for name, value in (
        ("strike", strike), ("cp", cp), ("spot0", spot0), ("vol0", vol0), ("tau0", tau0), ("rate0", rate0),
        ("div0", div0), ("spot1", spot1), ("vol1", vol1), ("tau1", tau1), ("rate1", rate1), ("div1", div1))}
    for name, value in (("pv0", pv0), ("pv1", pv1)):
        arrays[name] = np.ascontiguousarray(np.broadcast_to(np.asarray(value, dtype=float), arrays["strike"].shape))
    _check_inputs(arrays)
    n_positions = arrays["strike"].size
    shares = np.empty((N_FACTORS, n_positions))
    values = np.empty((N_STATES, min(CHUNK_POSITIONS, n_positions)))
    for lo in range(0, n_positions, CHUNK_POSITIONS):
        hi = min(lo + CHUNK_POSITIONS, n_positions)
        part = {name: a[lo:hi] for name, a in arrays.items()}
        pairs = {name: (part[f"{name}0"], part[f"{name}1"]) for name in ("spot", "vol", "tau", "rate", "div", "pv")}
        states = _revalue_states(part["strike"], part["cp"], out=values[:, : hi - lo], **pairs)
        shares[:, lo:hi] = shapley_allocate(states)
    return RevaluationShares(*shares)
