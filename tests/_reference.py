"""Brute-force reference for the exact conditional distribution (METHODS.md section 1).

Slow and obviously right, and independent of mcexact's internals: nothing here imports mcexact.
Every response vector is enumerated one by one, the ones with the observed nuisance statistics
(and, when they are conditioned on, the observed events per stratum) are kept, and their weights
are added up in exact Python integers:

    c(s, t) = sum of prod_i C(m_i, y_i)
              over y with 0 <= y_i <= m_i, W'y = s, n_h(y) = n_h and Z'y = t

Entry points:

* :func:`grouped_counts` works on binomial groups (events, trials, stratum, Z, W), for instance
  the fields of a ``Design``;
* :func:`binary_counts` works on uncollapsed 0/1 rows and enumerates all ``2**n`` binary vectors
  with weight one each, so that comparing it with mcexact also checks the collapsing of rows
  into groups (``C(m, y)`` is the number of 0/1 patterns with ``y`` events among ``m`` rows);
* :func:`dictionary_counts` gives the same counts as :func:`grouped_counts` by merging equal
  partial sums in a dict of Python ints (the plain recursion of METHODS.md section 2), for
  designs with too many response vectors to list one by one.

Each returns a dict mapping the interest statistic ``t`` (a tuple of ints) to its count.
"""

from __future__ import annotations

import itertools
import math
from collections import defaultdict


def _rows(matrix, n):
    """`matrix` as a list of n tuples of Python ints (an (n, 0) matrix gives empty tuples)."""
    if matrix is None:
        return [()] * n
    out = []
    for row in matrix:
        row = row if hasattr(row, "__len__") else [row]
        out.append(tuple(int(v) for v in row))
    if len(out) != n:
        raise ValueError(f"expected {n} rows, got {len(out)}")
    return out


def _dot(columns_by_row, y):
    """Z'y for rows given as tuples: one entry per column."""
    width = len(columns_by_row[0]) if columns_by_row else 0
    return tuple(sum(row[j] * yi for row, yi in zip(columns_by_row, y)) for j in range(width))


def _stratum_totals(stratum, y):
    totals = defaultdict(int)
    for h, yi in zip(stratum, y):
        totals[h] += yi
    return dict(totals)


def grouped_counts(events, trials, stratum, interest, nuisance, fix_stratum_totals):
    """Exact counts c(s, t) by enumerating every y with ``0 <= y_i <= trials_i``.

    Parameters
    ----------
    events, trials, stratum : sequences of int, length G
    interest : (G, q) integers;  nuisance : (G, p) integers or None
    fix_stratum_totals : bool
        Whether the observed number of events in each stratum is conditioned on.

    Returns
    -------
    dict
        ``t`` (tuple of ints) -> count (Python int), over the fiber of the observed statistics.
    """
    events = [int(v) for v in events]
    trials = [int(v) for v in trials]
    stratum = [int(v) for v in stratum]
    n = len(events)
    Z = _rows(interest, n)
    W = _rows(nuisance, n)
    s_obs = _dot(W, events)
    totals_obs = _stratum_totals(stratum, events)
    counts = defaultdict(int)
    for y in itertools.product(*[range(m + 1) for m in trials]):
        if _dot(W, y) != s_obs:
            continue
        if fix_stratum_totals and _stratum_totals(stratum, y) != totals_obs:
            continue
        weight = 1
        for m, yi in zip(trials, y):
            weight *= math.comb(m, yi)
        counts[_dot(Z, y)] += weight
    return dict(counts)


def binary_counts(y, interest, nuisance=None, strata=None, intercept=True):
    """Exact counts from uncollapsed 0/1 rows, enumerating all ``2**n`` binary vectors.

    The conditioning follows the model of METHODS.md section 1 directly: the nuisance
    statistics ``W'y`` are always fixed, and the events per stratum are fixed when the model has
    an intercept or strata (without strata the whole data is one stratum).  Nothing is collapsed
    and no stratum or column is dropped.

    Parameters
    ----------
    y : sequence of 0/1, length n
    interest : (n, q) or (n,) integers;  nuisance : (n, p) or (n,) integers or None
    strata : sequence of hashable labels, optional
    intercept : bool

    Returns
    -------
    dict
        ``t`` (tuple of ints) -> number of binary vectors in the fiber with ``Z'y = t``.
    """
    y = [int(v) for v in y]
    if any(v not in (0, 1) for v in y):
        raise ValueError("binary_counts needs 0/1 responses")
    n = len(y)
    Z = _rows(interest, n)
    W = _rows(nuisance, n)
    stratum = [0] * n if strata is None else list(strata)
    fix_totals = intercept or strata is not None
    s_obs = _dot(W, y)
    totals_obs = _stratum_totals(stratum, y)
    counts = defaultdict(int)
    for candidate in itertools.product((0, 1), repeat=n):
        if _dot(W, candidate) != s_obs:
            continue
        if fix_totals and _stratum_totals(stratum, candidate) != totals_obs:
            continue
        counts[_dot(Z, candidate)] += 1
    return dict(counts)


def expand_to_binary(events, trials, *columns):
    """Turn binomial rows into 0/1 rows: a row with k events out of m becomes m rows, k of them 1.

    Each extra argument (a per-row sequence, e.g. a covariate matrix or stratum labels) is
    repeated alongside.  Returns ``(y, *expanded_columns)`` as lists.
    """
    y = []
    expanded = [[] for _ in columns]
    for i, (k, m) in enumerate(zip(events, trials)):
        k, m = int(k), int(m)
        y.extend([1] * k + [0] * (m - k))
        for out, column in zip(expanded, columns):
            out.extend([column[i]] * m)
    return (y, *expanded)


def dictionary_counts(events, trials, stratum, interest, nuisance, fix_stratum_totals):
    """The same counts as :func:`grouped_counts`, by the plain recursion of METHODS.md section 2.

    For designs too large to enumerate one vector at a time (tens of groups).  Groups are taken
    in the order given; a state is (events so far in each stratum, nuisance partial sums,
    interest partial sums) and states that meet are merged by adding their Python-int weights.
    The only pruning is the obvious one: a stratum's running event count never exceeds its
    observed total (counts only grow).  No recoding, no bounds, no hashing tricks.
    """
    events = [int(v) for v in events]
    trials = [int(v) for v in trials]
    stratum = [int(v) for v in stratum]
    n = len(events)
    Z = _rows(interest, n)
    W = _rows(nuisance, n)
    labels = sorted(set(stratum))
    position = {h: k for k, h in enumerate(labels)}
    totals_obs = _stratum_totals(stratum, events)
    cap = tuple(totals_obs[h] for h in labels)
    s_obs = _dot(W, events)
    p, q = len(s_obs), len(Z[0])
    states = {((0,) * len(labels), (0,) * p, (0,) * q): 1}
    for i in range(n):
        k = position[stratum[i]]
        grown = defaultdict(int)
        for (c, u, v), weight in states.items():
            for y in range(trials[i] + 1):
                c2 = c[:k] + (c[k] + y,) + c[k + 1:]
                if fix_stratum_totals and c2[k] > cap[k]:
                    break
                u2 = tuple(a + y * b for a, b in zip(u, W[i]))
                v2 = tuple(a + y * b for a, b in zip(v, Z[i]))
                grown[(c2, u2, v2)] += weight * math.comb(trials[i], y)
        states = grown
    counts = defaultdict(int)
    for (c, u, v), weight in states.items():
        if u == s_obs and (not fix_stratum_totals or c == cap):
            counts[v] += weight
    return dict(counts)


def space_size(trials):
    """Number of response vectors :func:`grouped_counts` would visit."""
    return math.prod(int(m) + 1 for m in trials)


def split_counts(y, interest, nuisance=None):
    """The counts of :func:`binary_counts` (0/1 rows, one intercept), meeting in the middle.

    For binary designs with too many rows to list all ``2**n`` vectors and too many distinct
    nuisance sums for :func:`dictionary_counts` (e.g. a covariate with two decimals scaled by 100).
    The rows are split into two halves; every 0/1 vector of each half is listed (``2**(n/2)``
    each) with its number of events, nuisance sums and interest sums.  A full vector is in the
    fiber exactly when the two halves' events and nuisance sums add up to the observed ones, so
    the second half is indexed by (events, nuisance sums) and each first-half vector is paired
    with the complementary entries.  Exact Python integers throughout.
    """
    y = [int(v) for v in y]
    if any(v not in (0, 1) for v in y):
        raise ValueError("split_counts needs 0/1 responses")
    n = len(y)
    Z = _rows(interest, n)
    W = _rows(nuisance, n)
    target = (sum(y),) + _dot(W, y)

    def half(rows):
        listed = defaultdict(lambda: defaultdict(int))
        for pattern in itertools.product((0, 1), repeat=len(rows)):
            key = (sum(pattern),) + _dot([W[i] for i in rows], pattern)
            listed[key][_dot([Z[i] for i in rows], pattern)] += 1
        return listed

    first, second = half(range(n // 2)), half(range(n // 2, n))
    counts = defaultdict(int)
    for key, by_t in first.items():
        rest = second.get(tuple(a - b for a, b in zip(target, key)))
        if rest is None:
            continue
        for t1, c1 in by_t.items():
            for t2, c2 in rest.items():
                counts[tuple(a + b for a, b in zip(t1, t2))] += c1 * c2
    return dict(counts)
