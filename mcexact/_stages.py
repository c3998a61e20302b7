"""Compile a :class:`~mcexact.design.Design` into the coded stage problem the kernels run on.

Recoding (Hirji, Mehta & Patel 1987 list covariate recoding among their speed-ups): when the
events of every stratum are conditioned on, a column may be shifted by any constant within a
stratum and divided by a common factor without changing the conditional distribution, since
``sum_i (z_i - a_h) y_i = T - a_h n_h`` is an affine map of T. Shifting each column to a minimum
of zero within its stratum and dividing by the columns' greatest common divisor makes every
covariate non-negative and small, so partial sums only grow and their ranges (the radices of the
packed keys) are as tight as they can be. The map back to the user's integer scale is recorded.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import gcd

import numpy as np
from scipy.special import gammaln

from mcexact._exceptions import BudgetExceeded, DataError

# Packed keys are int64; staying below 2**62 leaves headroom for the multiply-add of an arc.
KEY_LIMIT = 2**62


@dataclass(frozen=True)
class StageProblem:
    """The coded problem: one stage per binomial group, in processing order.

    Attributes
    ----------
    trials : (K,) int64
    nuisance : (K, p) int64, coded nuisance covariates (non-negative when ``fixed``)
    interest : (K, q) int64, coded interest covariates
    fixed : bool, whether each stratum's events are conditioned on
    c_target : (K,) int64, events of the stage's stratum
    stratum_end : (K,) bool
    rem_trials, later_lo, later_hi, rem_lo, rem_hi, unit_min, unit_max : pruning bounds per stage
    s : (p,) int64, coded observed nuisance statistics
    observed : (q,) int64, coded observed interest statistics
    interest_step, interest_offset : (q,) int64, ``t_user = step * t_coded + offset``
    order : (K,) int64, the design's group index of each stage
    log_binom : list of (m_k + 1,) float64, log binomial coefficients per stage
    """

    trials: np.ndarray
    nuisance: np.ndarray
    interest: np.ndarray
    fixed: bool
    c_target: np.ndarray
    stratum_end: np.ndarray
    rem_trials: np.ndarray
    later_lo: np.ndarray
    later_hi: np.ndarray
    rem_lo: np.ndarray
    rem_hi: np.ndarray
    unit_min: np.ndarray
    unit_max: np.ndarray
    s: np.ndarray
    observed: np.ndarray
    interest_step: np.ndarray
    interest_offset: np.ndarray
    order: np.ndarray
    log_binom: list
    c_radix: int
    u_lo: np.ndarray
    u_stride: np.ndarray
    v_lo: np.ndarray
    v_radix: np.ndarray
    v_stride: np.ndarray

    @property
    def n_stages(self) -> int:
        return int(self.trials.shape[0])

    @property
    def v_size(self) -> int:
        return int(np.prod(self.v_radix, dtype=object))

    def z_step(self, k: int) -> int:
        """Packed increment of the interest sums for one event at stage k."""
        return int(self.interest[k] @ self.v_stride)

    def decode_v(self, packed: np.ndarray) -> np.ndarray:
        """Unpack interest partial sums and map them back to the user's integer scale."""
        packed = np.asarray(packed, dtype=np.int64)
        cols = [(packed // self.v_stride[j]) % self.v_radix[j] + self.v_lo[j]
                for j in range(self.v_radix.shape[0])]
        coded = np.stack(cols, axis=1) if cols else np.zeros((packed.shape[0], 0), np.int64)
        return coded * self.interest_step + self.interest_offset


def _greedy_extremes(values: np.ndarray, trials: np.ndarray, stratum: np.ndarray,
                     events: np.ndarray) -> np.ndarray:
    """Per stratum, the least and greatest sum of its `events` unit values drawn from its groups
    (value, trials): the smallest (largest) values first. Returns (H, 2) int64; one pass over all
    strata at once (groups sorted by stratum, then value)."""
    H = events.shape[0]
    out = np.zeros((H, 2), dtype=np.int64)
    for col, sign in ((0, 1), (1, -1)):
        order = np.lexsort((sign * values, stratum))
        v, m, h = values[order], trials[order], stratum[order]
        cm = np.cumsum(m)
        start_cm = np.zeros(H, dtype=np.int64)
        firsts = np.flatnonzero(np.r_[True, h[1:] != h[:-1]])
        start_cm[h[firsts]] = cm[firsts] - m[firsts]
        before = cm - m - start_cm[h]                      # units of the stratum before this group
        take = np.clip(events[h] - before, 0, m)
        out[:, col] = np.bincount(h, weights=take * v, minlength=H).round().astype(np.int64)
    return out


def _mixed_radix(radices, first: int, what: str) -> list[int]:
    """Strides packing values with these ranges into one int64 key after a leading factor
    `first`; BudgetExceeded if the key space would reach KEY_LIMIT."""
    strides, size = [], int(first)
    for r in (int(x) for x in radices):
        strides.append(size)
        size *= r
    if size >= KEY_LIMIT:
        raise BudgetExceeded(
            f"mcexact: the {what} statistics span too wide a range for exact enumeration "
            f"(about {float(size):.3g} possible partial sums); use a Monte Carlo method or "
            f"coarsen the {what} covariates", what="key_space", reached=min(size, 2**63 - 1),
            limit=KEY_LIMIT)
    return strides


def _column_gcd(col: np.ndarray) -> int:
    g = 0
    for value in np.unique(np.abs(col)):
        g = gcd(g, int(value))
        if g == 1:
            break
    return g


def _stage_order(stratum: np.ndarray, nuisance: np.ndarray, interest: np.ndarray) -> np.ndarray:
    """Processing order: stratum by stratum; within a stratum sorted by covariate value.

    Sorting by covariate value is among the speed-ups of Hirji, Mehta & Patel (1987): groups with
    similar covariates are processed together, so partial sums coincide (and merge) early.
    """
    keys = [interest[:, j] for j in reversed(range(interest.shape[1]))]
    keys += [nuisance[:, j] for j in reversed(range(nuisance.shape[1]))]
    keys.append(stratum)
    return np.lexsort(keys)


def _check_order(order, n_groups: int) -> np.ndarray:
    """The processing order as an int64 array, or DataError if it is not a permutation."""
    try:
        arr = np.asarray(order)
    except (TypeError, ValueError) as exc:
        raise DataError(f"order must be a permutation of the {n_groups} groups") from exc
    if (arr.ndim != 1 or arr.shape[0] != n_groups or not np.issubdtype(arr.dtype, np.integer)
            or not np.array_equal(np.sort(arr), np.arange(n_groups))):
        raise DataError(f"order must be a permutation of 0..{n_groups - 1} (one entry per "
                        "collapsed group of the design)")
    return arr.astype(np.int64)


@dataclass(frozen=True)
class Recoded:
    """A design's groups in processing order, with covariates shifted and divided (see module).

    ``t_user = step * t_coded + offset`` maps coded interest statistics back to the user's scale.
    """

    events: np.ndarray
    trials: np.ndarray
    stratum: np.ndarray
    nuisance: np.ndarray
    interest: np.ndarray
    fixed: bool
    starts: np.ndarray
    ends: np.ndarray
    n_events: np.ndarray
    step: np.ndarray
    offset: np.ndarray
    order: np.ndarray


def recode(design, order: np.ndarray | None = None) -> Recoded:
    """Order a design's groups by stratum (and within strata by `order` or covariate value) and
    recode its covariates; shared by the network engines and the Markov chains."""
    events = np.asarray(design.events, dtype=np.int64)
    trials = np.asarray(design.trials, dtype=np.int64)
    stratum = np.asarray(design.stratum, dtype=np.int64)
    W = np.asarray(design.nuisance, dtype=np.int64).reshape(events.shape[0], -1)
    Z = np.asarray(design.interest, dtype=np.int64).reshape(events.shape[0], -1)
    fixed = bool(design.fix_stratum_totals)

    if order is None:
        order = _stage_order(stratum, W, Z)
    else:
        order = _check_order(order, events.shape[0])
        order = order[np.argsort(stratum[order], kind="stable")]
    events, trials, stratum, W, Z = events[order], trials[order], stratum[order], W[order], Z[order]
    K = events.shape[0]

    # Stratum layout.
    starts = np.flatnonzero(np.r_[True, stratum[1:] != stratum[:-1]])
    ends = np.r_[starts[1:], K]
    n_events = np.add.reduceat(events, starts) if K else np.zeros(0, np.int64)

    # Shift within strata (only valid when each stratum's events are fixed), then divide by gcd.
    W = W.copy()
    Z = Z.copy()
    z_offset = np.zeros(Z.shape[1], dtype=np.int64)
    if fixed:
        for h, (a, b) in enumerate(zip(starts, ends)):
            w_shift = W[a:b].min(axis=0) if W.shape[1] else np.zeros(0, np.int64)
            z_shift = Z[a:b].min(axis=0)
            W[a:b] -= w_shift
            Z[a:b] -= z_shift
            z_offset += z_shift * n_events[h]
    keep = [j for j in range(W.shape[1]) if np.any(W[:, j] != 0)]
    W = W[:, keep]
    w_gcd = np.array([_column_gcd(W[:, j]) for j in range(W.shape[1])], dtype=np.int64)
    if W.shape[1]:
        W //= w_gcd
    z_gcd = np.array([max(_column_gcd(Z[:, j]), 1) for j in range(Z.shape[1])], dtype=np.int64)
    Z //= z_gcd

    return Recoded(events, trials, stratum, np.ascontiguousarray(W), np.ascontiguousarray(Z),
                   fixed, starts, ends, n_events, z_gcd, z_offset, order)


def compile_design(design, order: np.ndarray | None = None) -> StageProblem:
    """Recode a design and lay out its stages (see the module docstring).

    Parameters
    ----------
    design : mcexact.Design
    order : permutation of the design's groups, optional
        Processing order within strata (groups are always grouped by stratum first). Default: the
        covariate-sorted order of :func:`_stage_order`. Exposed so tests can check that the
        distribution does not depend on it.
    """
    rc = recode(design, order)
    events, trials, stratum, W, Z = rc.events, rc.trials, rc.stratum, rc.nuisance, rc.interest
    fixed, starts, ends, n_events = rc.fixed, rc.starts, rc.ends, rc.n_events
    z_gcd, z_offset, order = rc.step, rc.offset, rc.order
    K = events.shape[0]
    s = W.T @ events
    observed = Z.T @ events
    p, q = W.shape[1], Z.shape[1]

    # Per-stratum extremes given the stratum's events (for later strata), and stage-wise bounds.
    stage_stratum = np.repeat(np.arange(starts.shape[0]), ends - starts)
    later_lo = np.zeros((K, p), dtype=np.int64)
    later_hi = np.zeros((K, p), dtype=np.int64)
    rem_lo = np.zeros((K, p), dtype=np.int64)
    rem_hi = np.zeros((K, p), dtype=np.int64)
    unit_min = np.zeros((K, p), dtype=np.int64)
    unit_max = np.zeros((K, p), dtype=np.int64)
    rem_trials = np.zeros(K, dtype=np.int64)
    if fixed:
        ext = np.zeros((len(starts), p, 2), dtype=np.int64)
        for j in range(p):
            ext[:, j, :] = _greedy_extremes(W[:, j], trials, stage_stratum, n_events)
        suffix = np.cumsum(ext[::-1], axis=0)[::-1]          # strata h..H-1
        after = np.concatenate([suffix[1:], np.zeros((1, p, 2), np.int64)])  # strata h+1..H-1
        later_lo[:] = after[stage_stratum, :, 0]
        later_hi[:] = after[stage_stratum, :, 1]
    contrib = W * trials[:, None]
    for a, b in zip(starts, ends):
        if b - a < 2:
            continue
        # Suffix sums and extremes over the stratum's groups after each stage.
        rest = slice(a + 1, b)
        rem_trials[a:b - 1] = np.cumsum(trials[rest][::-1])[::-1]
        if p:
            rem_lo[a:b - 1] = np.cumsum(np.minimum(contrib[rest], 0)[::-1], axis=0)[::-1]
            rem_hi[a:b - 1] = np.cumsum(np.maximum(contrib[rest], 0)[::-1], axis=0)[::-1]
            unit_min[a:b - 1] = np.minimum.accumulate(W[rest][::-1], axis=0)[::-1]
            unit_max[a:b - 1] = np.maximum.accumulate(W[rest][::-1], axis=0)[::-1]
    stratum_end = np.zeros(K, dtype=bool)
    stratum_end[ends - 1] = True
    c_target = n_events[stage_stratum] if K else np.zeros(0, np.int64)

    # Key layout: nuisance key = c + sum_j (u_j - u_lo_j) * u_stride_j.
    if fixed:
        c_radix = int(n_events.max()) + 1 if K else 1
        u_lo = np.zeros(p, dtype=np.int64)
        u_hi = s.copy()                                    # covariates >= 0: partial sums only grow
        v_lo = np.zeros(q, dtype=np.int64)
        v_hi = np.array([_greedy_extremes(Z[:, j], trials, stage_stratum, n_events)[:, 1].sum()
                         for j in range(q)], dtype=np.int64)
    else:
        c_radix = 1
        u_lo = np.minimum(W * trials[:, None], 0).sum(axis=0)
        u_hi = np.maximum(W * trials[:, None], 0).sum(axis=0)
        v_lo = np.minimum(Z * trials[:, None], 0).sum(axis=0)
        v_hi = np.maximum(Z * trials[:, None], 0).sum(axis=0)
    u_stride = _mixed_radix(u_hi - u_lo + 1, c_radix, "nuisance")
    v_radix = [int(x) for x in (v_hi - v_lo + 1)]
    v_stride = _mixed_radix(v_hi - v_lo + 1, 1, "interest")

    log_fact = gammaln(np.arange(int(trials.max(initial=0)) + 2) + 1.0)
    log_binom = []
    for m in trials:
        y = np.arange(m + 1)
        log_binom.append(log_fact[m] - log_fact[y] - log_fact[m - y])

    return StageProblem(
        trials=trials, nuisance=np.ascontiguousarray(W), interest=np.ascontiguousarray(Z),
        fixed=fixed, c_target=np.asarray(c_target, np.int64), stratum_end=stratum_end,
        rem_trials=rem_trials, later_lo=later_lo, later_hi=later_hi, rem_lo=rem_lo,
        rem_hi=rem_hi, unit_min=unit_min, unit_max=unit_max, s=np.asarray(s, np.int64),
        observed=np.asarray(observed, np.int64), interest_step=z_gcd, interest_offset=z_offset,
        order=order, log_binom=log_binom, c_radix=c_radix, u_lo=u_lo,
        u_stride=np.array(u_stride, dtype=np.int64), v_lo=v_lo,
        v_radix=np.array(v_radix, dtype=np.int64), v_stride=np.array(v_stride, dtype=np.int64))
