"""American option prices under Black-Scholes-Merton with a continuous yield: pure numpy, vectorised.

Method: the integral-equation method of Andersen, Lake and Offengelden ("High-performance American
option pricing", Journal of Computational Finance, 2016). Every option is reduced to a put by the
put-call symmetry ``C(S, K, r, q) = P(K, S, q, r)`` and normalised by its strike, so the put's
exercise boundary ``b(tau)`` (in units of the strike) depends on ``(T, vol, r, q)`` only, never on
spot. For each distinct boundary state:

1. the boundary is started from the QD+ approximation (a fixed number of Halley steps per node);
2. it is refined by fixed-point iterations of the "FP-B" equation of the paper (one Jacobi-Newton
   step, then plain fixed-point steps), on Chebyshev nodes in ``sqrt(tau)``; the same equation for
   every option (a switch between equations on ``|r - q|`` would make rho jump). The boundary is held
   as ``H = s |s|`` with ``s = ln(b(0+) / b)``, smooth in ``sqrt(tau)`` (the sign kept, so that an
   iterate above ``b(0+)`` makes no kink);
3. the price is the European put plus the early-exercise premium integral over the boundary.

The integrals use Gauss-Legendre quadrature. Every boundary read sits at the same Chebyshev
coordinate for every option (the nodes and quadrature points scale with the option's own expiry),
so each interpolation is one fixed matrix, applied to each option's row alone and summed in a fixed order (an
option's value never depends on what else is priced with it). The iteration counts are fixed
(no tolerance test), so the price is a smooth function of every input and its finite-difference
greeks are clean. In the exercise region (spot at or beyond the boundary) the price is exactly the
intrinsic value; elsewhere it is never below ``max(intrinsic, European)``.

Limits, as the published method and its reference implementation treat them:

* a put with ``r <= 0`` (a call with ``q <= 0``) is never exercised early: the European price;
* a put with ``q < r < 0`` (a call with ``r < q < 0``) has two exercise boundaries, which this
  method does not cover: refused with :data:`TWO_BOUNDARY_RULE`;
* ``tau = 0``: intrinsic value; ``vol = 0``: the best deterministic exercise time.
"""

from __future__ import annotations

import dataclasses
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtr

from attribution.arrays import FloatArray
from attribution.pricing import InvalidPricingInput, _available_cores, invalid_reasons, price_unchecked

TWO_BOUNDARY_RULE = "american exercise with two boundaries (put: q < r < 0; call: r < q < 0) is not supported"
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)
_CHUNK_STATES = 128  # boundary states solved together on one thread: the (states x nodes x points) arrays in cache
# Boundary states solved together when threads share them: each operation then works on (512 x nodes x points)
# values, long enough that numpy and scipy's loops run with Python's lock released while the other thread computes.
# On two cores 13,466 states of a 100,000-position night take 0.19 s instead of 0.27 s in chunks of 128 (whose
# loops are so short that the threads mostly wait for the lock: no faster than one thread); the 1M night's explain
# 7.0 s instead of 7.6-7.9. On one thread (a backfill's worker) chunks of 128 stay the fastest: 18 us a state,
# 20 in chunks of 512 (2026-12-03). A state's boundary is the same bits whatever the chunk.
_CHUNK_STATES_THREADED = 512
_CHUNK_OPTIONS = 1024  # options valued together on their boundaries: (options x points) arrays in cache
_MIN_CHUNKS_PER_THREAD = 4  # below this a thread costs more than it saves


@dataclass(frozen=True, slots=True)
class Scheme:
    """Discretisation of the method: Chebyshev nodes, quadrature points and fixed iteration counts."""

    nodes: int  # Chebyshev intervals in sqrt(tau); nodes + 1 points including tau = 0
    fixed_point_points: int  # Gauss-Legendre points of each fixed-point integral
    newton_steps: int  # Jacobi-Newton steps of the fixed-point equation
    fixed_point_steps: int  # plain fixed-point steps after them
    price_points: int  # Gauss-Legendre points of the early-exercise premium
    halley_steps: int  # Halley steps of the QD+ start at each node


STANDARD = Scheme(nodes=7, fixed_point_points=12, newton_steps=1, fixed_point_steps=4, price_points=48,
                  halley_steps=6)
PRECISE = Scheme(nodes=16, fixed_point_points=32, newton_steps=1, fixed_point_steps=9, price_points=64,
                 halley_steps=8)
FAST = Scheme(nodes=5, fixed_point_points=6, newton_steps=1, fixed_point_steps=2, price_points=24, halley_steps=4)


def _signed_sqrt(h: FloatArray) -> FloatArray:
    """ln(b_max / b) from the stored H = ln(b_max / b) |ln(b_max / b)| (a boundary above b_max stays smooth)."""
    return np.sign(h) * np.sqrt(np.abs(h))


def in_chunks(n: int, size: int, block: Callable[[slice], None], threads: int | None,
              threaded_size: int | None = None) -> None:
    """Call ``block`` on consecutive slices of ``range(n)``; many slices are spread over threads.

    Slices are ``size`` long, or ``threaded_size`` when they are spread over threads (enough of them for
    :data:`_MIN_CHUNKS_PER_THREAD` a thread). numpy and scipy release the GIL inside their loops; every slice is
    computed by the same operations whatever the threads, so results do not depend on them. ``threads=None``:
    every available core.
    """
    if threads is not None and threads < 1:
        raise ValueError(f"threads must be >= 1 or None (all available cores), got {threads}")
    shared = threaded_size or size
    workers = min(threads or _available_cores(), -(-n // shared) // _MIN_CHUNKS_PER_THREAD)
    step = shared if workers > 1 else size
    chunks = [slice(lo, min(lo + step, n)) for lo in range(0, n, step)]
    if workers <= 1:
        for chunk in chunks:
            block(chunk)
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        list(pool.map(block, chunks))


def _interpolate(values: FloatArray, matrix: FloatArray) -> FloatArray:
    """``values @ matrix.T``, each row's sums added term by term in node order: a row's result depends on that
    row alone.

    A BLAS matrix product blocks and vectorises its sums differently with the number of rows, so an option's
    last bits would depend on what else is priced in the same batch (and a night split by book would archive
    other bits than the whole night). ``einsum`` (never BLAS without ``optimize``) multiplies and adds in
    node order for every row; ``tests/test_american.py`` checks the independence bit for bit.
    """
    out: FloatArray = np.einsum("mk,kp->mp", values, np.ascontiguousarray(matrix.T))
    return out


def _col(a: FloatArray) -> FloatArray:
    """A 1-d array as a column, to broadcast against (option, point) arrays."""
    return a[:, None]


@dataclass(frozen=True, slots=True)
class _Grid:
    """Everything about a scheme that does not depend on the option: nodes, weights, interpolation matrices."""

    node_c: FloatArray  # tau_i / T at the nodes 1..n
    fp_y: FloatArray  # Gauss-Legendre abscissae of the fixed-point integrals
    fp_w: FloatArray
    fp_interp: FloatArray  # (n * L, n + 1): H at the nodes -> H at tau_i - m_ij
    px_y: FloatArray
    px_w: FloatArray
    px_interp: FloatArray  # (P, n + 1): H at the nodes -> H at T - t_k


def _chebyshev_matrix(nodes: FloatArray, points: FloatArray) -> FloatArray:
    """Barycentric interpolation matrix of Chebyshev-Lobatto ``nodes`` evaluated at ``points`` in [-1, 1]."""
    w = (-1.0) ** np.arange(nodes.size)
    w[0] *= 0.5
    w[-1] *= 0.5
    diff = points[:, None] - nodes[None, :]
    exact = np.isclose(diff, 0.0, rtol=0.0, atol=1e-15)
    with np.errstate(divide="ignore"):
        terms = np.where(exact, 0.0, w / np.where(exact, 1.0, diff))
    matrix = terms / terms.sum(axis=1, keepdims=True)
    hit_rows, hit_cols = np.nonzero(exact)
    matrix[hit_rows] = 0.0
    matrix[hit_rows, hit_cols] = 1.0
    out: FloatArray = matrix
    return out


@lru_cache(maxsize=8)
def _grid(scheme: Scheme) -> _Grid:
    n = scheme.nodes
    z = -np.cos(np.pi * np.arange(n + 1) / n)  # z = 2 sqrt(tau / T) - 1; z_0 = -1 is tau = 0
    node_c = ((1.0 + z[1:]) / 2.0) ** 2
    fp_y, fp_w = np.polynomial.legendre.leggauss(scheme.fixed_point_points)
    # B(u_ij) with u_ij = tau_i (1 + y_j) / 2 sits at z = (1 + z_i) sqrt((1 + y_j) / 2) - 1
    fp_z = (1.0 + z[1:, None]) * np.sqrt(0.5 * (1.0 + fp_y[None, :])) - 1.0
    px_y, px_w = np.polynomial.legendre.leggauss(scheme.price_points)
    px_z = 2.0 * np.sqrt(1.0 - 0.25 * (1.0 + px_y) ** 2) - 1.0  # B(T - t_k), t_k = T (1 + y_k)^2 / 4
    return _Grid(node_c, fp_y, fp_w, _chebyshev_matrix(z, fp_z.reshape(-1)), px_y, px_w,
                 _chebyshev_matrix(z, px_z))


def put_boundary_at_zero(r: FloatArray, q: FloatArray) -> FloatArray:
    """b(0+) / K of the put: min(1, r / q) for q > r, else 1 (r > 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(q > r, r / np.where(q > r, q, 1.0), 1.0)


def _qd_plus(tau: FloatArray, vol: FloatArray, r: FloatArray, q: FloatArray, b_max: FloatArray,
             steps: int) -> FloatArray:
    """QD+ exercise boundary of a unit-strike put at ``tau`` (fixed number of Halley steps from b(0+)).

    ``vol``, ``r``, ``q`` and ``b_max`` broadcast against ``tau`` (a column per state). They are spread to
    its shape first and the terms that do not change between steps are computed once: every element gets
    the same operations, in the same order, as the formulas written out in full (so the same bits), with
    far fewer passes over small arrays.
    """
    vol, r, q, b_max = (np.ascontiguousarray(np.broadcast_to(a, tau.shape)) for a in (vol, r, q, b_max))
    sigma2 = vol * vol
    v = vol * np.sqrt(tau)
    dr, dq = np.exp(-r * tau), np.exp(-q * tau)
    omega = 2.0 * (r - q) / sigma2
    root = np.sqrt((omega - 1.0) ** 2 + 8.0 * r / (sigma2 * (1.0 - dr)))
    lam = 0.5 * (-(omega - 1.0) - root)
    lam_prime = 2.0 * r / (sigma2 * (1.0 - dr) ** 2 * root)
    alpha = 2.0 * dr * r / (sigma2 * (2.0 * lam + omega - 1.0))
    beta = alpha * (1.0 / (1.0 - dr) + lam_prime / (2.0 * lam + omega - 1.0)) - lam
    x_min = 1e-4 * b_max
    x = b_max.copy()
    # step invariants, each the very sub-expression of the formulas below
    half_v, two_v, two_tau = 0.5 * v, 2.0 * v, 2.0 * tau
    r_dr = r * dr
    alpha_r_dr = alpha / r_dr
    r_q = r - q
    r_q_v = r_q / v
    dq_v = dq / v
    neg_dq = -dq
    for _ in range(steps):
        x_dq = x * dq
        dp = np.log(x_dq / dr) / v + half_v  # ln(x dq / dr) / v + v / 2
        dm = dp - v
        cdf_dp, cdf_dm = ndtr(-dp), ndtr(-dm)
        pdf_dp = _INV_SQRT_2PI * np.exp(-0.5 * dp * dp)
        npv = dr * cdf_dm - x_dq * cdf_dp
        theta = r_dr * cdf_dm - q * x * dq * cdf_dp - sigma2 * x / two_v * dq * pdf_dp
        charm = neg_dq * (pdf_dp * (r_q_v - dm / two_tau) + q * cdf_dp)
        one_less = 1.0 - dq * cdf_dp
        f = one_less * x - beta * (1.0 - x - npv) + alpha * theta / r_dr
        f1 = one_less + dq_v * pdf_dp + beta * one_less + alpha_r_dr * charm
        x_v = x * v
        gamma = pdf_dp * dq / x_v
        colour = gamma * (q + r_q * dp / v + (1.0 - dp * dm) / two_tau)
        f2 = dq * (pdf_dp / x_v - pdf_dp * dp / (x_v * v)) + beta * gamma + alpha_r_dr * colour
        step = f / f1 / (1.0 - 0.5 * f * f2 / (f1 * f1))
        x = np.maximum(x_min, x - np.where(np.isfinite(step), step, 0.0))
    return x


def _solve_chunk(T: FloatArray, vol: FloatArray, r: FloatArray, q: FloatArray, b_max: FloatArray,
                 scheme: Scheme, g: _Grid) -> FloatArray:
    """H = s |s|, s = ln(b(0+) / b), at the n + 1 nodes for a chunk of unit-strike puts (states in rows)."""
    m = T.size
    col = _col
    tau = col(T) * g.node_c[None, :]  # (m, n)
    b = _qd_plus(tau, col(vol), col(r), col(q), col(b_max), scheme.halley_steps)
    s_node = np.zeros((m, g.node_c.size + 1))
    s_node[:, 1:] = np.log(col(b_max) / b)
    # per-state pieces of the fixed-point integrals (u = tau_i (1 + y_j) / 2), shape (m, n, L)
    y, w = g.fp_y[None, None, :], g.fp_w[None, None, :]
    tau3 = tau[:, :, None]
    r3, q3, vol3 = r[:, None, None], q[:, None, None], vol[:, None, None]
    half = 0.5 * tau3
    rest = tau3 - half * (1.0 + y)  # tau_i - u_j
    s_m = vol3 * np.sqrt(rest)
    inv_s_m = 1.0 / s_m
    shift = (r3 - q3) * rest * inv_s_m + 0.5 * s_m
    a_n = half * w * r3 * np.exp(r3 * half * (1.0 + y))
    a_d = half * w * q3 * np.exp(q3 * half * (1.0 + y))
    v_tau = vol[:, None] * np.sqrt(tau)
    drift = (r - q)[:, None] * tau / v_tau + 0.5 * v_tau
    growth = np.exp(-(r - q)[:, None] * tau)
    log_b_max = np.log(b_max)[:, None]
    n, L = g.node_c.size, g.fp_y.size
    with np.errstate(all="ignore"):  # a non-finite iterate keeps its previous value below
        for step in range(scheme.newton_steps + scheme.fixed_point_steps):
            s_read = _signed_sqrt(_interpolate(s_node * np.abs(s_node), g.fp_interp)).reshape(m, n, L)
            log_z = s_read - s_node[:, 1:, None]  # ln(b_i / B(u_j))
            dp = log_z * inv_s_m + shift
            num_int = (a_n * ndtr(dp - s_m)).sum(axis=2)
            den_int = (a_d * ndtr(dp)).sum(axis=2)
            log_b = log_b_max - s_node[:, 1:]
            bi = np.exp(log_b)
            dp0 = log_b / v_tau + drift
            dm0 = dp0 - v_tau
            num = ndtr(dm0) + num_int
            den = ndtr(dp0) + den_int
            f = growth * num / den
            if step < scheme.newton_steps:
                num_d = _INV_SQRT_2PI * np.exp(-0.5 * dm0 * dm0) / (bi * v_tau)
                den_d = _INV_SQRT_2PI * np.exp(-0.5 * dp0 * dp0) / (bi * v_tau)
                f_d = growth * (num_d / den - den_d * num / (den * den))
                f = bi - (f - bi) / (f_d - 1.0)
            f = np.where(np.isfinite(f) & (f > 0.0), f, bi)
            s_node[:, 1:] = np.log(col(b_max) / f)
    return s_node * np.abs(s_node)


@dataclass(frozen=True, slots=True)
class PutBoundaries:
    """Exercise boundaries of unit-strike puts, one row per distinct state (T, vol, r, q)."""

    T: FloatArray
    vol: FloatArray
    r: FloatArray
    q: FloatArray
    b_max: FloatArray  # b(0+)
    h: FloatArray  # (states, nodes + 1): s |s|, s = ln(b_max / b), at the Chebyshev nodes
    scheme: Scheme


class BoundaryMemo:
    """Boundaries already solved in this process, by their exact state (T, vol, r, q) and scheme.

    A night solves the same state several times: the run-date state of an option for its model price, its
    greeks, its run-date value and the corner of its revaluation where every factor has moved; the prior
    state again in the revaluation, after the night before solved it for its own greeks. A boundary depends on
    its state alone (never on what else is solved with it), so a remembered one is the very array a new
    solve gives. At most ``capacity`` states are kept (about 380 bytes each: 12 MB by default, a demo night
    solves about 3,000); the least recently used go first.
    """

    def __init__(self, capacity: int = 32_768) -> None:
        self.capacity = capacity
        self._rows: dict[bytes, FloatArray] = {}  # the scheme's key then the state's 32 bytes
        self._lock = threading.Lock()  # threads of one process share it (the solves themselves run outside)

    def clear(self) -> None:
        with self._lock:
            self._rows.clear()

    def __len__(self) -> int:
        return len(self._rows)

    def solve(self, T: FloatArray, vol: FloatArray, r: FloatArray, q: FloatArray, scheme: Scheme,
              solve: Callable[[NDArray[np.intp]], FloatArray]) -> FloatArray:
        """H of every state: remembered rows, and ``solve(rows)`` for the others (then remembered)."""
        blob = np.stack([T, vol, r, q], axis=1).tobytes()  # 32 bytes a state: its four floats, exactly
        prefix = np.array(dataclasses.astuple(scheme), dtype=np.int64).tobytes()  # the scheme's six counts
        keys = [prefix + blob[i:i + 32] for i in range(0, len(blob), 32)]
        with self._lock:
            found = [self._rows.pop(key, None) for key in keys]
            for key, row in zip(keys, found, strict=True):  # a state used again becomes the newest
                if row is not None:
                    self._rows[key] = row
        missing = np.fromiter((row is None for row in found), dtype=bool, count=len(found))
        h = np.empty((T.size, scheme.nodes + 1))
        if (~missing).any():
            h[~missing] = np.stack([row for row in found if row is not None])
        rows = np.flatnonzero(missing)
        if rows.size:
            solved = solve(rows)
            h[rows] = solved
            with self._lock:
                for j in rows.tolist():
                    self._rows[keys[j]] = h[j].copy()  # its own copy: a dropped row frees its memory
                while len(self._rows) > self.capacity:  # insertion order: the least recently used first
                    del self._rows[next(iter(self._rows))]
        return h


BOUNDARY_MEMO = BoundaryMemo()


def solve_put_boundaries(T: FloatArray, vol: FloatArray, r: FloatArray, q: FloatArray,
                         scheme: Scheme = STANDARD, *, threads: int | None = None,
                         memo: BoundaryMemo | None = BOUNDARY_MEMO) -> PutBoundaries:
    """Boundaries of unit-strike puts (requires T > 0, vol > 0, r > 0). No checks: callers validate.

    States solved before in this process come from ``memo`` (the same bits); ``memo=None`` solves every one.
    """
    g = _grid(scheme)
    b_max = put_boundary_at_zero(r, q)

    def solved(rows: NDArray[np.intp]) -> FloatArray:
        h = np.empty((rows.size, scheme.nodes + 1))
        t, v, rr, qq, bm = T[rows], vol[rows], r[rows], q[rows], b_max[rows]

        def block(c: slice) -> None:
            h[c] = _solve_chunk(t[c], v[c], rr[c], qq[c], bm[c], scheme, g)

        in_chunks(rows.size, _CHUNK_STATES, block, threads, _CHUNK_STATES_THREADED)
        return h

    h = solved(np.arange(T.size)) if memo is None else memo.solve(T, vol, r, q, scheme, solved)
    return PutBoundaries(T, vol, r, q, b_max, h, scheme)


@dataclass(frozen=True, slots=True)
class PutValues:
    """Unit-strike put value and its spot derivatives (boundary held) at normalised spots x = S / K."""

    price: FloatArray
    delta: FloatArray  # dp / dx
    gamma: FloatArray  # d2p / dx2
    exercised: NDArray[np.bool_]  # x at or below the boundary: the value is intrinsic


def put_values(bounds: PutBoundaries, state: NDArray[np.intp], x: FloatArray, *,
               derivatives: bool = True, threads: int | None = None) -> PutValues:
    """Value of unit-strike puts at spots ``x`` on the boundaries ``bounds`` (row ``state`` of each)."""
    out = PutValues(np.empty(x.size), np.zeros(x.size), np.zeros(x.size), np.empty(x.size, dtype=bool))

    def block(c: slice) -> None:
        part = _put_values_chunk(bounds, state[c], x[c], derivatives)
        for name in PutValues.__slots__:
            getattr(out, name)[c] = getattr(part, name)

    in_chunks(x.size, _CHUNK_OPTIONS, block, threads)
    return out


def _put_values_chunk(bounds: PutBoundaries, state: NDArray[np.intp], x: FloatArray,
                      derivatives: bool) -> PutValues:
    """:func:`put_values` of one chunk of options."""
    g = _grid(bounds.scheme)
    T, vol, r, q = (a[state] for a in (bounds.T, bounds.vol, bounds.r, bounds.q))
    h = bounds.h[state]
    b_T = bounds.b_max[state] * np.exp(-_signed_sqrt(h[:, -1]))
    col = _col
    sqrt_t_total = np.sqrt(T)
    v_T = vol * sqrt_t_total
    disc_r, disc_q = np.exp(-r * T), np.exp(-q * T)
    d1 = (np.log(x) + (r - q) * T) / v_T + 0.5 * v_T
    d2 = d1 - v_T
    euro = disc_r * ndtr(-d2) - x * disc_q * ndtr(-d1)
    # early-exercise premium: integral over t in [0, T] with t = z^2, z = sqrt(T) (1 + y) / 2
    zk = col(sqrt_t_total) * (0.5 * (1.0 + g.px_y))[None, :]
    t = zk * zk
    s_t = col(vol) * zk
    log_b = col(np.log(bounds.b_max[state])) - _signed_sqrt(_interpolate(h, g.px_interp))
    dp = (col(np.log(x)) - log_b + col(r - q) * t) / s_t + 0.5 * s_t
    dm = dp - s_t
    weight = col(sqrt_t_total) * g.px_w[None, :] * zk  # (sqrt(T) / 2) w_k * 2 z_k
    er, eq = col(r) * np.exp(-col(r) * t), col(q) * np.exp(-col(q) * t)
    cdf_p = ndtr(-dp)
    premium = (weight * (er * ndtr(-dm) - col(x) * eq * cdf_p)).sum(axis=1)
    exercised = x <= b_T
    intrinsic = np.maximum(1.0 - x, 0.0)
    price = np.where(exercised, intrinsic, np.maximum(np.maximum(euro + premium, euro), intrinsic))
    if not derivatives:
        return PutValues(price, np.zeros_like(x), np.zeros_like(x), exercised)
    pdf_1 = _INV_SQRT_2PI * np.exp(-0.5 * d1 * d1)
    euro_delta = -disc_q * ndtr(-d1)
    euro_gamma = disc_q * pdf_1 / (x * v_T)
    pdf_p, pdf_m = _INV_SQRT_2PI * np.exp(-0.5 * dp * dp), _INV_SQRT_2PI * np.exp(-0.5 * dm * dm)
    xc = col(x)
    d_prem = (weight * (-er * pdf_m / (xc * s_t) - eq * (cdf_p - pdf_p / s_t))).sum(axis=1)
    g_prem = (weight * (er * pdf_m / (xc * xc * s_t) * (1.0 + dm / s_t)
                        + eq * pdf_p / (xc * s_t) * (1.0 - dp / s_t))).sum(axis=1)
    delta = np.where(exercised, -1.0, euro_delta + d_prem)
    gamma = np.where(exercised, 0.0, euro_gamma + g_prem)
    return PutValues(price, delta, gamma, exercised)


def american_invalid_reasons(spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike,
                             rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike) -> NDArray[np.object_]:
    """For each option the first rule its inputs break (the BSM rules, then :data:`TWO_BOUNDARY_RULE`)."""
    reasons = invalid_reasons(spot, strike, tau_years, vol, rate, div_yield)
    r, q, c = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (rate, div_yield, is_call)))
    rr, qq = np.where(c != 0, q, r), np.where(c != 0, r, q)  # the put of the symmetry
    two = (qq < rr) & (rr < 0)
    reasons = np.broadcast_to(reasons, two.shape).copy()
    reasons[(reasons == "") & two] = TWO_BOUNDARY_RULE
    return reasons


@dataclass(frozen=True, slots=True)
class PutFrame:
    """Options mapped to unit-strike puts by the symmetry: V = scale * p(x; rr, qq)."""

    scale: FloatArray  # K for a put, S for a call
    x: FloatArray  # S / K for a put, K / S for a call
    rr: FloatArray
    qq: FloatArray
    cp: FloatArray


def put_frame(s: FloatArray, k: FloatArray, r: FloatArray, q: FloatArray, cp: FloatArray) -> PutFrame:
    """The put of the put-call symmetry for each option."""
    call = cp > 0
    return PutFrame(np.where(call, s, k), np.where(call, k / s, s / k), np.where(call, q, r),
                    np.where(call, r, q), cp)


def regimes(t: FloatArray, v: FloatArray, rr: FloatArray) -> tuple[NDArray[np.bool_], ...]:
    """Masks (limit, european, early) partitioning valid options: tau = 0 or vol = 0; never exercised; ALO."""
    limit = (t <= 0) | (v <= 0)
    european = ~limit & (rr <= 0)
    return limit, european, ~limit & ~european


def deterministic_put(x: FloatArray, T: FloatArray, rr: FloatArray, qq: FloatArray) -> FloatArray:
    """Unit-strike put at vol = 0: exercised at the best time in [0, T] (tau = 0: intrinsic)."""
    def value(t: FloatArray) -> FloatArray:
        return np.maximum(np.exp(-rr * t) - x * np.exp(-qq * t), 0.0)

    with np.errstate(divide="ignore", invalid="ignore"):
        t_star = np.log(rr / (qq * x)) / (rr - qq)
    inside = np.isfinite(t_star) & (t_star > 0) & (t_star < T)
    best = np.maximum(value(np.zeros_like(x)), value(T))
    return np.where(inside, np.maximum(best, value(np.where(inside, t_star, 0.0))), best)


def distinct_states(*keys: FloatArray) -> tuple[tuple[FloatArray, ...], NDArray[np.intp]]:
    """The distinct rows of the stacked ``keys`` and, per option, the index of its row."""
    stacked = np.stack(keys, axis=1)
    uniq, inverse = np.unique(stacked, axis=0, return_inverse=True)
    return tuple(uniq[:, i].copy() for i in range(len(keys))), inverse.reshape(-1)


def _validated(*inputs: ArrayLike) -> tuple[tuple[int, ...], tuple[FloatArray, ...]]:
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in inputs))
    shape = np.atleast_1d(arrays[0]).shape
    flat = tuple(a.reshape(-1) for a in arrays)
    reasons = american_invalid_reasons(*flat)
    bad = reasons != ""
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InvalidPricingInput(
            f"{int(bad.sum())} invalid pricing input(s); first at index {first}: {reasons[first]}")
    return shape, flat


def american_price(spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike, rate: ArrayLike,
                   div_yield: ArrayLike, is_call: ArrayLike, *, scheme: Scheme = STANDARD,
                   threads: int | None = None) -> FloatArray:
    """American price per unit of underlying; one boundary per distinct (expiry, vol, rates) state.

    Options that differ only in spot or strike (a spot-only revaluation, a strip of strikes) share one
    boundary solve. Raises :class:`InvalidPricingInput` naming the first rule broken.
    """
    shape, (s, k, t, v, r, q, c) = _validated(spot, strike, tau_years, vol, rate, div_yield, is_call)
    cp = np.where(c != 0, 1.0, -1.0)
    return american_price_unchecked(s, k, t, v, r, q, cp, scheme=scheme, threads=threads).reshape(shape)


def american_price_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
                             q: FloatArray, cp: FloatArray, *, scheme: Scheme = STANDARD,
                             threads: int | None = None) -> FloatArray:
    """Price of validated flat float arrays (no two-boundary case); ``cp`` is +1 call / -1 put."""
    return american_price_and_exercised_unchecked(s, k, t, v, r, q, cp, scheme=scheme, threads=threads)[0]


def american_price_and_exercised_unchecked(
    s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray, q: FloatArray, cp: FloatArray, *,
    scheme: Scheme = STANDARD, threads: int | None = None, memo: BoundaryMemo | None = BOUNDARY_MEMO,
) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Price and, per option, whether spot sits in the exercise region (time and vol left, exercised early).

    ``memo=None``: every boundary solved, none remembered (for callers whose states never come back)."""
    frame = put_frame(s, k, r, q, cp)
    limit, european, early = regimes(t, v, frame.rr)
    out = np.empty(s.size)
    exercised = np.zeros(s.size, dtype=bool)
    if european.any():
        i = np.flatnonzero(european)
        out[i] = price_unchecked(s[i], k[i], t[i], v[i], r[i], q[i], cp[i])
    if limit.any():
        i = np.flatnonzero(limit)
        intrinsic = np.maximum(cp[i] * (s[i] - k[i]), 0.0)  # at expiry, exactly
        out[i] = np.where(t[i] > 0, frame.scale[i] * deterministic_put(frame.x[i], t[i], frame.rr[i], frame.qq[i]),
                          intrinsic)
    if early.any():
        i = np.flatnonzero(early)
        (T, vol, rr, qq), state = distinct_states(t[i], v[i], frame.rr[i], frame.qq[i])
        bounds = solve_put_boundaries(T, vol, rr, qq, scheme, threads=threads, memo=memo)
        values = put_values(bounds, state, frame.x[i], derivatives=False, threads=threads)
        out[i] = in_option_units(values, frame.scale[i], s[i], k[i], t[i], v[i], r[i], q[i], cp[i])
        exercised[i] = values.exercised
    return out, exercised


def in_option_units(values: PutValues, scale: FloatArray, s: FloatArray, k: FloatArray, t: FloatArray,
                    v: FloatArray, r: FloatArray, q: FloatArray, cp: FloatArray) -> FloatArray:
    """Option price from its put of the symmetry: intrinsic exactly when exercised, else >= the European price."""
    european = price_unchecked(s, k, t, v, r, q, cp)
    return np.where(values.exercised, np.maximum(cp * (s - k), 0.0), np.maximum(scale * values.price, european))


def exercise_boundary(tau_years: ArrayLike, vol: ArrayLike, rate: ArrayLike, div_yield: ArrayLike,
                      strike: ArrayLike, is_call: ArrayLike, *, scheme: Scheme = STANDARD) -> FloatArray:
    """Spot at which immediate exercise becomes optimal today (put: below it; call: above it).

    ``inf`` for a call and ``0`` for a put that is never exercised early (the European cases).
    """
    t, v, r, q, k, c = (a.reshape(-1) for a in np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (tau_years, vol, rate, div_yield, strike, is_call))))
    call = c != 0
    rr, qq = np.where(call, q, r), np.where(call, r, q)
    limit, european, early = regimes(t, v, rr)
    b = np.zeros(t.size)  # boundary of the unit-strike put, in units of its strike
    if early.any():
        i = np.flatnonzero(early)
        (T, vol, r_u, q_u), state = distinct_states(t[i], v[i], rr[i], qq[i])
        bounds = solve_put_boundaries(T, vol, r_u, q_u, scheme)
        b[i] = bounds.b_max[state] * np.exp(-_signed_sqrt(bounds.h[state, -1]))
    b[limit & (rr > 0)] = np.where(t[limit & (rr > 0)] > 0, put_boundary_at_zero(rr[limit & (rr > 0)],
                                                                                 qq[limit & (rr > 0)]), 1.0)
    with np.errstate(divide="ignore"):
        return np.where(call, np.where(b > 0, k / np.where(b > 0, b, 1.0), np.inf), k * b)
