"""Invented, seeded designs shared by the benchmark scripts.

Every generator returns a :class:`RawDesign`: the plain arrays a user would pass to
:meth:`mcexact.Design.from_arrays`, plus a short label.  Nothing here comes from a real data set;
each design is drawn from ``numpy.random.default_rng([BASE_SEED, family, *size])`` so a run of
the benchmarks always sees the same data, and two families never share a stream.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

import mcexact

__all__ = ["RawDesign", "binary_design", "grouped_design", "stratified_design", "growth_design",
           "sparse_interest_design"]

BASE_SEED = 20_251_201

# Family numbers in the seed, so that (say) binary n=40 and growth n=40 draw different data.
_BINARY, _GROUPED, _STRATIFIED, _GROWTH, _SPARSE = range(5)

# Pool size of the growth families: designs of size n take the first n rows of one pool, so the
# design of size n is contained in every larger one and the network grows smoothly with n.
_POOL_ROWS = 20_000

# Offset between the two bands of the sparse interest column.  It is far above what the low band
# can add up to over a few hundred rows, so the interest partial sums of a nuisance node fill only
# a small part of the range between their least and greatest value.
_SPARSE_BAND = 100_000


@dataclass(frozen=True)
class RawDesign:
    """Arrays of one invented design, as passed to ``Design.from_arrays``."""

    label: str
    y: np.ndarray
    interest: np.ndarray
    nuisance: np.ndarray
    trials: np.ndarray | None = None
    strata: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        return int(self.y.shape[0])

    @property
    def n_events(self) -> int:
        return int(self.y.sum())

    def design(self) -> mcexact.Design:
        return mcexact.Design.from_arrays(self.y, self.interest, self.nuisance,
                                          trials=self.trials, strata=self.strata)


def _rng(family: int, *size: int) -> np.random.Generator:
    return np.random.default_rng([BASE_SEED, family, *size])


def binary_design(n: int, *, levels: int = 5) -> RawDesign:
    """``n`` Bernoulli rows: intercept, one nuisance and one interest column in ``0..levels-1``.

    Exactly ``round(n / 3)`` events, at random rows.
    """
    rng = _rng(_BINARY, n, levels)
    y = np.zeros(n, dtype=np.int64)
    y[rng.choice(n, size=round(n / 3), replace=False)] = 1
    nuisance = rng.integers(0, levels, size=n)
    interest = rng.integers(0, levels, size=n)
    return RawDesign(f"binary n={n}", y, interest, nuisance)


def grouped_design(n_groups: int, max_trials: int) -> RawDesign:
    """Binomial groups with 1..max_trials trials each, covariates in 0..4, about 1/3 events."""
    rng = _rng(_GROUPED, n_groups, max_trials)
    trials = rng.integers(1, max_trials + 1, size=n_groups)
    y = rng.binomial(trials, 1 / 3)
    nuisance = rng.integers(0, 5, size=n_groups)
    interest = rng.integers(0, 5, size=n_groups)
    return RawDesign(f"grouped {n_groups}x(1..{max_trials})", y, interest, nuisance, trials=trials)


def stratified_design(n_strata: int, rows_per_stratum: int) -> RawDesign:
    """Matched sets of equal size, covariates in 0..4, 1 or 2 events in every stratum."""
    rng = _rng(_STRATIFIED, n_strata, rows_per_stratum)
    n = n_strata * rows_per_stratum
    strata = np.repeat(np.arange(n_strata), rows_per_stratum)
    y = np.zeros(n, dtype=np.int64)
    for h in range(n_strata):
        k = int(rng.integers(1, 3))
        y[h * rows_per_stratum + rng.choice(rows_per_stratum, size=k, replace=False)] = 1
    nuisance = rng.integers(0, 5, size=n)
    interest = rng.integers(0, 5, size=n)
    return RawDesign(f"strata {n_strata}x{rows_per_stratum}", y, interest, nuisance, strata=strata)


def growth_design(n: int) -> RawDesign:
    """First ``n`` rows of a pool: intercept, nuisance and interest in 0..9, events at p = 0.2."""
    rng = _rng(_GROWTH)
    nuisance = rng.integers(0, 10, size=_POOL_ROWS)[:n]
    interest = rng.integers(0, 10, size=_POOL_ROWS)[:n]
    y = (rng.random(_POOL_ROWS) < 0.2).astype(np.int64)[:n]
    return RawDesign(f"growth n={n}", y, interest, nuisance)


def sparse_interest_design(n: int) -> RawDesign:
    """Like :func:`growth_design`, but interest is ``a + 100000 b`` (a in 0..9, b in 0/1).

    Its partial sums fall in two far-apart bands, so the box of interest values between the least
    and greatest reachable at a nuisance node is mostly empty: the enumerator then takes its
    hashed layout instead of the dense one.
    """
    rng = _rng(_SPARSE)
    nuisance = rng.integers(0, 10, size=_POOL_ROWS)[:n]
    interest = (rng.integers(0, 10, size=_POOL_ROWS)
                + _SPARSE_BAND * rng.integers(0, 2, size=_POOL_ROWS))[:n]
    y = (rng.random(_POOL_ROWS) < 0.2).astype(np.int64)[:n]
    return RawDesign(f"sparse n={n}", y, interest, nuisance)


# ------------------------------------------------------- families of benchmarks/bench_sampler.py

__all__ += ["distinct_interest_design", "integer_covariate_design"]

# Family numbers in the seed, after the five above.
_DISTINCT, _INTEGER_COVARIATE = 5, 6


def distinct_interest_design(n: int, *, event_share: float = 0.1,
                             nuisance_levels: int = 0) -> RawDesign:
    """``n`` Bernoulli rows whose interest column is a random permutation of ``0..n-1``.

    Every row has its own interest value, so every row is its own binomial group and the Markov
    chains work on ``n`` groups (few distinct values would merge the rows into a few groups).
    Exactly ``round(event_share * n)`` events, at random rows.  With ``nuisance_levels`` > 0 there
    is one nuisance column in ``0..nuisance_levels-1`` (the chains then take block moves);
    otherwise the model is intercept only (swap moves).
    """
    rng = _rng(_DISTINCT, n, round(event_share * 1000), nuisance_levels)
    y = np.zeros(n, dtype=np.int64)
    y[rng.choice(n, size=round(event_share * n), replace=False)] = 1
    interest = rng.permutation(n)
    nuisance = (rng.integers(0, nuisance_levels, size=n) if nuisance_levels > 0
                else np.zeros((n, 0), dtype=np.int64))
    label = f"distinct n={n}" + (f", w in 0..{nuisance_levels - 1}" if nuisance_levels else "")
    return RawDesign(label, y, interest, nuisance)


def integer_covariate_design(n: int, n_events: int, levels: int) -> RawDesign:
    """Intercept only: ``n`` Bernoulli rows, exactly ``n_events`` events at random rows, and an
    interest column in ``0..levels-1`` (so at most ``levels`` binomial groups)."""
    rng = _rng(_INTEGER_COVARIATE, n, n_events, levels)
    y = np.zeros(n, dtype=np.int64)
    y[rng.choice(n, size=n_events, replace=False)] = 1
    interest = rng.integers(0, levels, size=n)
    return RawDesign(f"n={n}, {n_events} events, z in 0..{levels - 1}", y, interest,
                     np.zeros((n, 0), dtype=np.int64))
