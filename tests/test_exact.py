"""Tests of mcexact.exact: the exact conditional distribution, planning and budgets.

Every expected number names its source beside it: a brute-force enumeration from
``tests/_reference.py`` (all response vectors, exact Python integers), a scipy call, a
log-space recursion written out in this file, a hand computation shown in a comment, or the
published example of METHODS.md section 8.  All data are invented for these tests, except the
``spector`` data shipped with statsmodels.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import gammaln, logsumexp

import mcexact
from mcexact import (BudgetExceeded, DataError, Design, McexactError, exact_distribution,
                     plan)

from _reference import (binary_counts, dictionary_counts, expand_to_binary, grouped_counts,
                        space_size)

PROPERTY = settings(max_examples=100, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])


# ============================================================================ helpers


def design_counts(design: Design) -> dict:
    """Brute-force counts over the design's own (collapsed, reduced) groups."""
    return grouped_counts(design.events, design.trials, design.stratum, design.interest,
                          design.nuisance, design.fix_stratum_totals)


def assert_counts(dist, reference: dict, rel: float = 1e-10) -> None:
    """Same support, in lexicographic order, and every count within `rel` (relative)."""
    support = [tuple(int(v) for v in row) for row in dist.support]
    assert support == sorted(reference), "support differs from the reference"
    assert np.all(np.isfinite(dist.log_weights))
    for point, log_weight in zip(support, dist.log_weights):
        # |log a - log b| <= rel bounds the relative error of the count to about rel.
        assert abs(log_weight - math.log(reference[point])) <= rel, point


def assert_same_distribution(a, b, tol: float = 1e-10) -> None:
    np.testing.assert_array_equal(a.support, b.support)
    np.testing.assert_allclose(a.log_weights, b.log_weights, rtol=0, atol=tol)
    np.testing.assert_array_equal(a.observed, b.observed)


def assert_valid(dist, design: Design) -> None:
    """Structural checks that need no reference."""
    assert dist.support.ndim == 2 and dist.support.shape[1] == design.interest.shape[1]
    assert dist.support.dtype == np.int64
    assert np.all(np.isfinite(dist.log_weights))
    # Sorted lexicographically (first column most significant) and without repeats.
    keys = [tuple(row) for row in dist.support.tolist()]
    assert keys == sorted(set(keys))
    assert abs(dist.pmf().sum() - 1.0) < 1e-9
    np.testing.assert_array_equal(dist.observed, design.interest.T @ design.events)
    assert dist.observed_index is not None, "the observed statistic must be a support point"


@dataclass
class Raw:
    """Invented raw input rows for Design.from_arrays (integer covariates)."""

    y: list
    interest: np.ndarray          # (n, q)
    nuisance: np.ndarray | None   # (n, p) or None
    trials: list | None
    strata: list | None
    intercept: bool

    def design(self, **kwargs) -> Design:
        return Design.from_arrays(self.y, self.interest, self.nuisance, trials=self.trials,
                                  strata=self.strata, intercept=self.intercept, **kwargs)

    @property
    def row_trials(self) -> list:
        return [1] * len(self.y) if self.trials is None else list(self.trials)

    def reference(self) -> dict:
        """Brute force on the raw rows: nothing collapsed, no stratum or column dropped."""
        fix = self.intercept or self.strata is not None
        stratum = [0] * len(self.y) if self.strata is None else list(self.strata)
        return grouped_counts(self.y, self.row_trials, stratum, self.interest, self.nuisance,
                              fix)

    def binary_reference(self) -> dict:
        """Brute force over all 2**n 0/1 vectors of the rows expanded to Bernoulli rows."""
        n = len(self.y)
        strata = [0] * n if self.strata is None else list(self.strata)
        nuisance = [()] * n if self.nuisance is None else [tuple(r) for r in self.nuisance]
        y, z, w, h = expand_to_binary(self.y, self.row_trials, [tuple(r) for r in self.interest],
                                      nuisance, strata)
        return binary_counts(y, z, w if self.nuisance is not None else None,
                             None if self.strata is None else h, self.intercept)

    def dropped_shift(self) -> tuple:
        """Contribution to Z'y of the strata that hold only events or only non-events.

        Those strata have a single response once their totals are fixed, so the design drops
        them and its T leaves their (constant) contribution out.
        """
        q = self.interest.shape[1]
        if self.strata is None:    # one stratum, never uninformative (the design would refuse)
            return (0,) * q
        shift = [0] * q
        for h in set(self.strata):
            rows = [i for i, g in enumerate(self.strata) if g == h]
            events = sum(self.y[i] for i in rows)
            if events in (0, sum(self.row_trials[i] for i in rows)):
                for i in rows:
                    for j in range(q):
                        shift[j] += int(self.interest[i, j]) * self.y[i]
        return tuple(shift)


@st.composite
def raw_problems(draw, values=st.integers(-3, 3), max_q=2, min_q=1) -> Raw:
    """Small random designs: binary or grouped, strata or not, 0-3 nuisance and 1-2 interest
    columns, negative and positive covariate values, intercept or not."""
    grouped = draw(st.booleans())
    n = draw(st.integers(2, 6 if grouped else 10))
    q = draw(st.integers(min_q, max_q))
    p = draw(st.integers(0, 3))
    if grouped:
        trials = draw(st.lists(st.integers(1, 4), min_size=n, max_size=n))
        y = [draw(st.integers(0, m)) for m in trials]
    else:
        trials = None
        y = draw(st.lists(st.integers(0, 1), min_size=n, max_size=n))
    matrix = lambda k: np.array(draw(st.lists(st.lists(values, min_size=k, max_size=k),
                                              min_size=n, max_size=n)),
                                dtype=np.int64).reshape(n, k)
    interest = matrix(q)
    nuisance = matrix(p) if p else None
    strata = draw(st.none() | st.lists(st.integers(0, 2), min_size=n, max_size=n))
    intercept = draw(st.booleans())
    return Raw(y, interest, nuisance, trials, strata, intercept)


def build(raw: Raw, **kwargs) -> Design:
    try:
        return raw.design(**kwargs)
    except DataError:
        assume(False)   # an invalid draw (no events, collinear columns, ...): not a test case


# ============================================================================ property tests


@pytest.mark.slow
@PROPERTY
@given(raw_problems())
def test_exact_counts_equal_brute_force(raw):
    design = build(raw)
    dist = exact_distribution(design)
    # Reference 1: brute force over the design's collapsed groups.
    assert_counts(dist, design_counts(design))
    # Reference 2: brute force over the raw rows, uncollapsed (checks the collapsing and the
    # dropping of uninformative strata): T differs by those strata's constant contribution.
    shift = raw.dropped_shift()
    raw_ref = {tuple(a - b for a, b in zip(t, shift)): c for t, c in raw.reference().items()}
    assert_counts(dist, raw_ref)
    assert_valid(dist, design)


@pytest.mark.slow
@PROPERTY
@given(raw_problems(), st.data())
def test_exact_counts_do_not_depend_on_order(raw, data):
    design = build(raw)
    order = data.draw(st.permutations(range(design.n_groups)))
    dist = exact_distribution(design, order=np.array(order))
    assert_counts(dist, design_counts(design))          # brute force of tests/_reference.py
    assert_same_distribution(dist, exact_distribution(design))


@settings(max_examples=40, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(raw_problems())
def test_bernoulli_rows_equal_grouped_rows(raw):
    # Binomial and Bernoulli input give identical results (METHODS.md section 1): expand the
    # groups into 0/1 rows and enumerate all 2**n binary vectors.
    assume(sum(raw.row_trials) <= 12)
    design = build(raw)
    shift = raw.dropped_shift()
    binary_ref = {tuple(a - b for a, b in zip(t, shift)): c
                  for t, c in raw.binary_reference().items()}
    assert_counts(exact_distribution(design), binary_ref)


@settings(max_examples=30, deadline=None, database=None)
@given(raw_problems())
def test_the_two_references_agree(raw):
    # The references check each other: one vector at a time against merged partial sums.
    stratum = [0] * len(raw.y) if raw.strata is None else raw.strata
    fix = raw.intercept or raw.strata is not None
    args = (raw.y, raw.row_trials, stratum, raw.interest, raw.nuisance, fix)
    assert dictionary_counts(*args) == grouped_counts(*args)


@st.composite
def wide_two_column_problems(draw) -> Raw:
    """Two interest columns whose values are far apart (a + 40 b), so the boxes of interest
    sums that the dense layout allocates are much larger than the number of sums reached;
    with or without intercept and strata."""
    n = draw(st.integers(5, 9))
    y = draw(st.lists(st.integers(0, 1), min_size=n, max_size=n))
    spread = st.builds(lambda a, b: a + 40 * b, st.integers(0, 2), st.integers(-2, 2))
    interest = np.array(draw(st.lists(st.tuples(spread, spread), min_size=n, max_size=n)))
    p = draw(st.integers(0, 1))
    nuisance = (np.array(draw(st.lists(st.integers(-1, 2), min_size=n, max_size=n)))[:, None]
                if p else None)
    strata = draw(st.none() | st.lists(st.integers(0, 1), min_size=n, max_size=n))
    return Raw(y, interest, nuisance, None, strata, draw(st.booleans()))


@settings(max_examples=60, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(wide_two_column_problems())
def test_dense_and_hashed_layouts_agree(raw):
    design = build(raw)
    dense = exact_distribution(design)
    assume(dense.info["layout"] == "dense")
    # A budget just large enough for both networks (start at the larger of the nuisance
    # network and the full network's largest stage, double until the run fits): the dense
    # boxes then hold far more than 5 slots per node of budget, which selects hashing.
    budget = max(plan(design).nuisance_nodes, dense.info["full_peak"])
    while True:
        try:
            hashed = exact_distribution(design, max_nodes=budget)
            break
        except BudgetExceeded:
            budget *= 2
    assume(hashed.info["layout"] == "hashed")
    reference = design_counts(design)                   # brute force of tests/_reference.py
    assert_counts(dense, reference)
    assert_counts(hashed, reference)


def test_hashed_layout_on_a_fixed_design():
    # Invented 8-row design with two widely spread interest columns: the support spans
    # 2..242 x 31..182 (241 x 152 boxes of slots) but holds only 56 points (brute force).
    z = np.array([[0, 0], [1, 30], [40, 1], [41, 31], [80, 0], [81, 30], [0, 60], [1, 61]])
    y = [1, 0, 1, 0, 0, 1, 1, 0]
    design = Design.from_arrays(y, z)
    hashed = exact_distribution(design, max_nodes=200)
    dense = exact_distribution(design)
    assert hashed.info["layout"] == "hashed"
    assert dense.info["layout"] == "dense"
    reference = design_counts(design)                   # brute force of tests/_reference.py
    assert_counts(hashed, reference)
    assert_counts(dense, reference)
    # Reference: brute force over all 2**8 binary vectors of the raw rows.
    assert_counts(hashed, binary_counts(y, z))
    order = np.array([7, 3, 5, 1, 0, 6, 2, 4])
    assert_same_distribution(exact_distribution(design, max_nodes=200, order=order), dense)


# ============================================================================ closed forms


def test_hand_computed_four_rows():
    # x = 0, 1, 2, 3 with an intercept and 2 events (rows 1 and 3, so T_obs = 1 + 3 = 4).
    # The C(4, 2) = 6 response vectors with two events and their T = sum x*y:
    #   {0,1}: 1   {0,2}: 2   {0,3}: 3   {1,2}: 3   {1,3}: 4   {2,3}: 5
    # so c(T) = 1, 1, 2, 1, 1 for T = 1..5 (hand computation).
    design = Design.from_arrays([0, 1, 0, 1], [0, 1, 2, 3])
    dist = exact_distribution(design)
    assert dist.support[:, 0].tolist() == [1, 2, 3, 4, 5]
    np.testing.assert_allclose(np.exp(dist.log_weights), [1, 1, 2, 1, 1], rtol=1e-12)
    assert dist.observed.tolist() == [4]
    # P(T >= 4) = (1 + 1) / 6 (hand computation from the list above).
    assert dist.pmf()[dist.support[:, 0] >= 4].sum() == pytest.approx(2 / 6, rel=1e-12)


def test_hand_computed_without_intercept():
    # No intercept and no strata: nothing is conditioned on, all 2**3 vectors count.  With
    # z = (1, 2, -1), T = z'y over y in {0,1}^3 takes the values (hand computation)
    #   000: 0  100: 1  010: 2  001: -1  110: 3  101: 0  011: 1  111: 2
    # so c(T) = 1, 2, 2, 2, 1 for T = -1, 0, 1, 2, 3.
    design = Design.from_arrays([1, 0, 1], [1, 2, -1], intercept=False)
    assert not design.fix_stratum_totals
    dist = exact_distribution(design)
    assert dist.support[:, 0].tolist() == [-1, 0, 1, 2, 3]
    np.testing.assert_allclose(np.exp(dist.log_weights), [1, 2, 2, 2, 1], rtol=1e-12)


def test_hand_computed_with_a_nuisance_column():
    # Rows (w, z): (0,0) (0,1) (1,0) (1,1), intercept, events in rows 1 and 2: n = 2,
    # S = w'y = 1, T = z'y = 1.  Pairs with exactly one event among the w = 1 rows:
    #   {0,2}: T=0  {0,3}: T=1  {1,2}: T=1  {1,3}: T=2   -> c(T) = 1, 2, 1 for T = 0, 1, 2
    # (hand computation).
    design = Design.from_arrays([0, 1, 1, 0], [0, 1, 0, 1], [0, 0, 1, 1])
    dist = exact_distribution(design)
    assert dist.support[:, 0].tolist() == [0, 1, 2]
    np.testing.assert_allclose(np.exp(dist.log_weights), [1, 2, 1], rtol=1e-12)


def test_fisher_tea_tasting():
    # Fisher (1935), The Design of Experiments; METHODS.md 8.1: 8 cups, 4 truly milk-first,
    # 4 labelled milk-first.  Stages (m=4, z=1) and (m=4, z=0); T = correct milk-first labels.
    # c(4, t) = C(4, t) C(4, 4 - t) = 1, 16, 36, 16, 1 for t = 0..4, total 70.
    design = Design.from_arrays([3, 1], [1, 0], trials=[4, 4])
    dist = exact_distribution(design)
    assert dist.support[:, 0].tolist() == [0, 1, 2, 3, 4]
    np.testing.assert_allclose(np.exp(dist.log_weights), [1, 16, 36, 16, 1], rtol=1e-12)
    assert dist.log_total == pytest.approx(math.log(70), abs=1e-12)
    # 3 correct: P(T >= 3) = 17/70 (METHODS.md 8.1, exact arithmetic from the table).
    assert dist.pmf()[3:].sum() == pytest.approx(17 / 70, rel=1e-12)
    # All 4 correct: p = 1/70 (Fisher 1935, as confirmed in METHODS.md 8.1).
    four = exact_distribution(Design.from_arrays([4, 0], [1, 0], trials=[4, 4]))
    assert four.pmf()[four.support[:, 0] >= 4].sum() == pytest.approx(1 / 70, rel=1e-12)
    # The same experiment as eight Bernoulli cups gives the same counts.
    cups = Design.from_arrays([1, 1, 1, 0, 1, 0, 0, 0], [1, 1, 1, 1, 0, 0, 0, 0])
    assert_same_distribution(exact_distribution(cups), dist)


TABLES_2X2 = [(3, 1, 1, 3), (5, 2, 1, 6), (0, 4, 3, 2), (7, 0, 0, 5), (2, 9, 4, 1), (1, 1, 1, 30)]


@pytest.mark.parametrize(("a", "b", "c", "d"), TABLES_2X2)
def test_2x2_table_is_hypergeometric(a, b, c, d):
    # Exposed: a cases of a + b; unexposed: c cases of c + d.  Given the a + c cases, the
    # exposed-case count is hypergeometric: scipy.stats.hypergeom(M=a+b+c+d, n=a+b, N=a+c).
    design = Design.from_arrays([a, c], [1, 0], trials=[a + b, c + d])
    dist = exact_distribution(design)
    M, n_exposed, n_cases = a + b + c + d, a + b, a + c
    k = np.arange(max(0, n_cases - (M - n_exposed)), min(n_exposed, n_cases) + 1)
    assert dist.support[:, 0].tolist() == k.tolist()
    np.testing.assert_allclose(dist.pmf(), stats.hypergeom(M, n_exposed, n_cases).pmf(k),
                               rtol=1e-12, atol=0)
    # Reference: scipy.stats.fisher_exact([[a, b], [c, d]], alternative="greater").pvalue,
    # the hypergeometric upper tail P(T >= a).
    upper = dist.pmf()[dist.support[:, 0] >= a].sum()
    expected = stats.fisher_exact([[a, b], [c, d]], alternative="greater").pvalue
    assert upper == pytest.approx(expected, rel=1e-12)
    lower = dist.pmf()[dist.support[:, 0] <= a].sum()
    expected = stats.fisher_exact([[a, b], [c, d]], alternative="less").pvalue
    assert lower == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("tables", [
    [(3, 1, 1, 3), (2, 2, 1, 4)],
    [(1, 4, 2, 2), (5, 1, 2, 2), (0, 3, 2, 6)],
    [(6, 2, 3, 9), (2, 7, 1, 1), (4, 4, 4, 4)],
])
def test_stratified_2x2_tables_convolve_hypergeometrics(tables):
    # Each stratum's exposed-case count is hypergeometric given the stratum's cases, independent
    # across strata, so T = their sum has the convolution of the per-stratum pmfs (computed here
    # with scipy.stats.hypergeom and numpy.convolve).
    y, trials, x, strata = [], [], [], []
    conv = np.array([1.0])
    for h, (a, b, c, d) in enumerate(tables):
        y += [a, c]
        trials += [a + b, c + d]
        x += [1, 0]
        strata += [h, h]
        cases = a + c
        conv = np.convolve(conv, stats.hypergeom(a + b + c + d, a + b, cases).pmf(
            np.arange(cases + 1)))
    design = Design.from_arrays(y, x, trials=trials, strata=strata)
    dist = exact_distribution(design)
    t = np.flatnonzero(conv > 0)
    assert dist.support[:, 0].tolist() == t.tolist()
    np.testing.assert_allclose(dist.pmf(), conv[t], rtol=1e-12, atol=0)
    assert dist.observed.tolist() == [sum(a for a, _, _, _ in tables)]


# ============================================================================ magnitudes


def log_counts_given_total(trials, doses, n_events):
    """log c(t) for T = sum dose_i y_i given sum y_i = n_events, y_i <= trials_i (doses >= 0).

    Dynamic programme in log space over (events so far, T so far): the multivariate
    hypergeometric, written with scipy.special.gammaln and numpy.logaddexp only.
    """
    t_max = max(doses) * n_events
    table = np.full((n_events + 1, t_max + 1), -np.inf)
    table[0, 0] = 0.0
    for m, dose in zip(trials, doses):
        grown = np.full_like(table, -np.inf)
        for y in range(min(m, n_events) + 1):
            log_binom = gammaln(m + 1) - gammaln(y + 1) - gammaln(m - y + 1)
            shifted = np.full_like(table, -np.inf)
            shifted[y:, dose * y:] = table[:n_events + 1 - y, :t_max + 1 - dose * y] + log_binom
            grown = np.logaddexp(grown, shifted)
        table = grown
    row = table[n_events]
    support = np.flatnonzero(np.isfinite(row))
    return support, row[support]


def test_ten_thousand_trials_in_ten_dose_groups():
    doses = list(range(10))
    trials = [1000] * 10
    events = [1, 2, 2, 3, 4, 5, 6, 7, 9, 11]               # 50 events in 10,000 trials
    design = Design.from_arrays(events, doses, trials=trials)
    dist = exact_distribution(design)
    assert np.all(np.isfinite(dist.log_weights))
    assert abs(dist.pmf().sum() - 1.0) < 1e-12
    support, log_ref = log_counts_given_total(trials, doses, 50)   # DP above, in log space
    assert dist.support[:, 0].tolist() == support.tolist()
    assert support.tolist() == list(range(0, 9 * 50 + 1))          # every T in 0..450
    np.testing.assert_allclose(dist.log_weights, log_ref, rtol=0, atol=1e-9)
    # Vandermonde: summed over T the counts give C(10000, 50) (closed form with gammaln).
    log_c = gammaln(10001) - gammaln(51) - gammaln(9951)
    assert dist.log_total == pytest.approx(log_c, abs=1e-9)
    np.testing.assert_allclose(dist.pmf(), np.exp(log_ref - logsumexp(log_ref)), rtol=1e-8,
                               atol=1e-300)
    assert dist.observed.tolist() == [int(np.dot(doses, events))]


def test_huge_counts_stay_finite_in_log_space():
    # 3,000 events among 15,000 trials in two groups: c(s, t) = C(10000, t) C(5000, 3000 - t)
    # reaches about exp(7000), far beyond float64.  T is hypergeometric,
    # scipy.stats.hypergeom(M=15000, n=10000, N=3000).logpmf.
    design = Design.from_arrays([2100, 900], [1, 0], trials=[10_000, 5_000])
    dist = exact_distribution(design)
    t = np.arange(0, 3001)
    assert dist.support[:, 0].tolist() == t.tolist()
    assert np.all(np.isfinite(dist.log_weights))
    assert abs(dist.pmf().sum() - 1.0) < 1e-12
    expected = stats.hypergeom(15_000, 10_000, 3_000).logpmf(t)
    central = expected > -700           # where scipy's log pmf is computed without underflow
    np.testing.assert_allclose(dist.log_pmf()[central], expected[central], rtol=1e-9)
    # Far tail: log c(0) = log C(5000, 3000) (closed form with gammaln), about -2000 below
    # the mode but still finite.
    assert dist.log_weights[0] == pytest.approx(gammaln(5001) - gammaln(3001) - gammaln(2001),
                                                rel=1e-12)


def test_decimal_covariates_are_scaled_to_integers():
    y = [1, 0, 1, 1, 0, 0, 1]
    x = [0.5, 1.25, 0.0, 2.0, 0.75, 1.25, -0.5]
    design = Design.from_arrays(y, x)
    assert design.interest_scales.tolist() == [100.0]      # 1.25 needs 10**2
    dist = exact_distribution(design)
    coded = [int(round(v * 100)) for v in x]                # 50, 125, 0, 200, 75, 125, -50
    # Support on the scaled integer scale: brute force over the 2**7 binary vectors.
    assert_counts(dist, binary_counts(y, coded))
    integer = exact_distribution(Design.from_arrays(y, coded))
    assert_same_distribution(dist, integer)
    np.testing.assert_allclose(dist.pmf(), integer.pmf(), rtol=1e-12)
    assert dist.scales.tolist() == [100.0]


# ============================================================================ real data


def test_spector_data_with_a_nuisance_covariate():
    # statsmodels.datasets.spector (32 students): GRADE ~ PSI + TUCE, interest PSI, nuisance
    # TUCE (an integer score).  Reference: the dict recursion of tests/_reference.py in
    # Python integers over the raw, uncollapsed rows.
    sm_datasets = pytest.importorskip("statsmodels.datasets")
    data = sm_datasets.spector.load_pandas().data
    y = data["GRADE"].astype(int).to_numpy()
    psi = data["PSI"].astype(int).to_numpy()
    tuce = data["TUCE"].astype(int).to_numpy()
    design = Design.from_arrays(y, psi, tuce)
    dist = exact_distribution(design)
    reference = dictionary_counts(y, [1] * 32, [0] * 32, psi[:, None], tuce[:, None], True)
    assert_counts(dist, reference)
    # Intercept only: PSI is then hypergeometric, scipy.stats.hypergeom(32, sum PSI, sum GRADE).
    alone = exact_distribution(Design.from_arrays(y, psi))
    k = alone.support[:, 0]
    np.testing.assert_allclose(alone.pmf(), stats.hypergeom(32, psi.sum(), y.sum()).pmf(k),
                               rtol=1e-12)
    assert stats.hypergeom(32, psi.sum(), y.sum()).pmf(k).sum() == pytest.approx(1, abs=1e-12)


# ============================================================================ plan


@settings(max_examples=50, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(raw_problems())
def test_plan_ranges_equal_brute_force_range(raw):
    design = build(raw)
    result = plan(design)
    reference = np.array(sorted(design_counts(design)))     # brute force of tests/_reference.py
    assert result.fits_nuisance and result.fits_full
    np.testing.assert_array_equal(result.interest_min, reference.min(axis=0))
    np.testing.assert_array_equal(result.interest_max, reference.max(axis=0))
    assert result.nuisance_nodes >= 1 and result.nuisance_peak >= 1
    assert result.nuisance_arcs >= 1
    assert result.nuisance_peak <= result.nuisance_nodes
    # The estimate bounds the stage sizes of the full network from above.
    dist = exact_distribution(design, plan_result=result)
    assert dist.info["full_peak"] <= result.full_peak_estimate
    assert dist.info["nuisance_nodes"] == result.nuisance_nodes
    assert_same_distribution(dist, exact_distribution(design))


def plan_design() -> Design:
    # Invented: 12 binary rows, a nuisance score and two interest columns.
    y = [1, 0, 1, 0, 0, 1, 1, 0, 0, 1, 0, 1]
    z = np.array([[0, 3], [1, 0], [2, 1], [3, 3], [1, 2], [2, 0],
                  [0, 1], [3, 2], [1, 1], [2, 3], [3, 0], [0, 2]])
    w = [0, 1, 2, 0, 1, 2, 0, 1, 2, 0, 1, 2]
    return Design.from_arrays(y, z, w)


def test_plan_then_exact_equals_fresh_run():
    design = plan_design()
    result = plan(design)
    assert result.fits_nuisance and result.fits_full
    assert result.nuisance_nodes > 0 and result.nuisance_peak > 0 and result.nuisance_arcs > 0
    assert result.n_stages == design.n_groups
    assert_same_distribution(exact_distribution(design, plan_result=result),
                             exact_distribution(design))
    summary = result.to_dict()
    assert json.loads(json.dumps(summary)) == summary          # JSON-serialisable
    reference = np.array(sorted(design_counts(design)))       # brute force of tests/_reference.py
    assert summary["interest_min"] == reference.min(axis=0).tolist()
    assert summary["interest_max"] == reference.max(axis=0).tolist()


def test_plan_with_tiny_budget_reports_instead_of_raising():
    design = plan_design()
    result = plan(design, max_nodes=3)
    assert result.fits_nuisance is False
    assert result.fits_full is False
    assert result.nuisance_reached is not None and result.nuisance_reached > 3
    assert result.nuisance_nodes is None and result.interest_min is None
    assert isinstance(result.reason, str) and result.reason
    json.dumps(result.to_dict())
    # A plan without a network is not reused: the exact run builds its own.
    assert_same_distribution(exact_distribution(design, plan_result=result),
                             exact_distribution(design))


def test_plan_of_another_design_is_not_reused_silently():
    # A plan carries the nuisance network of the design it was made for.  Handed a plan of a
    # different design, exact_distribution must refuse it (DataError) or ignore it; it must not
    # return the other design's distribution under this design's observed statistic.
    first = Design.from_arrays([1, 0, 1, 0, 1, 0], [0, 1, 2, 3, 4, 5])
    second = Design.from_arrays([1, 1, 0, 0, 0, 1], [0, 1, 0, 1, 2, 2], trials=[1, 2, 3, 1, 1, 2])
    stale = plan(first)
    try:
        dist = exact_distribution(second, plan_result=stale)
    except DataError:
        return
    assert_counts(dist, design_counts(second))              # brute force of tests/_reference.py


def test_plan_with_order_matches_default():
    design = plan_design()
    order = np.arange(design.n_groups)[::-1].copy()
    a, b = plan(design), plan(design, order=order)
    np.testing.assert_array_equal(a.interest_min, b.interest_min)
    np.testing.assert_array_equal(a.interest_max, b.interest_max)


# ============================================================================ budgets


def test_budget_exceeded_in_the_nuisance_network():
    design = plan_design()
    with pytest.raises(BudgetExceeded) as excinfo:
        exact_distribution(design, max_nodes=5)
    error = excinfo.value
    assert isinstance(error, McexactError)
    assert error.what == "nuisance"
    assert error.limit == 5
    assert error.reached > error.limit
    assert 1 <= error.stage <= design.n_groups


def test_budget_exceeded_in_the_full_network():
    # Same fixed design as test_hashed_layout_on_a_fixed_design: with only an intercept its
    # nuisance network fits in 40 nodes, while the 56 support points (brute force) cannot all
    # fit in the last stage of the full network.
    z = np.array([[0, 0], [1, 30], [40, 1], [41, 31], [80, 0], [81, 30], [0, 60], [1, 61]])
    design = Design.from_arrays([1, 0, 1, 0, 0, 1, 1, 0], z)
    assert plan(design, max_nodes=40).fits_nuisance
    with pytest.raises(BudgetExceeded) as excinfo:
        exact_distribution(design, max_nodes=40)
    assert excinfo.value.what == "full"
    assert excinfo.value.limit == 40
    assert excinfo.value.reached >= excinfo.value.limit


@pytest.mark.parametrize("bad", [0, -3, 2.5, "x", True, False, 1000.0, [10]])
def test_bad_budgets_raise_data_error(bad):
    design = plan_design()
    with pytest.raises(DataError):
        exact_distribution(design, max_nodes=bad)
    with pytest.raises(DataError):
        plan(design, max_nodes=bad)


def test_numpy_integer_budget_is_accepted():
    design = plan_design()
    assert_same_distribution(exact_distribution(design, max_nodes=np.int64(10_000)),
                             exact_distribution(design))


# ============================================================================ order argument


@pytest.mark.parametrize("order", [
    [0, 0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10],       # a repeat, group 11 missing
    list(range(11)),                             # too short
    list(range(13)),                             # too long (index 12 does not exist)
    [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 99],      # out of range
])
def test_order_that_is_not_a_permutation_raises(order):
    # `order` must be a permutation of the design's groups; anything else has to be refused
    # with a DataError rather than silently giving another design's distribution.
    design = plan_design()
    assert design.n_groups == 12
    with pytest.raises(DataError):
        exact_distribution(design, order=order)


# ============================================================================ fuzzing


@st.composite
def extreme_problems(draw):
    """Designs at the edges: covariates up to 1e6 (and decimals), up to 10**4 trials in a few
    groups, single-group strata and many strata, with or without intercept."""
    n = draw(st.integers(1, 12))
    q = draw(st.integers(1, 2))
    p = draw(st.integers(0, 2))
    trials = draw(st.lists(st.integers(1, 5), min_size=n, max_size=n))
    for i in draw(st.lists(st.integers(0, n - 1), max_size=3, unique=True)):
        trials[i] = draw(st.integers(6, 10_000))
    y = [draw(st.integers(0, m)) for m in trials]
    value = st.one_of(st.integers(-3, 3), st.integers(-10**6, 10**6),
                      st.sampled_from([0.5, -1.25, 2.75, 1e-3, 123456.5]))
    matrix = lambda k: np.array(draw(st.lists(st.lists(value, min_size=k, max_size=k),
                                              min_size=n, max_size=n)),
                                dtype=np.float64).reshape(n, k)
    interest = matrix(q)
    nuisance = matrix(p) if p else None
    n_strata = draw(st.sampled_from([0, 1, 2, n, max(1, n // 2)]))
    strata = (None if n_strata == 0 else
              draw(st.lists(st.integers(0, n_strata - 1), min_size=n, max_size=n)))
    intercept = draw(st.booleans())
    grouped = draw(st.booleans()) or any(m > 1 for m in trials)
    if not grouped:
        trials = None
    budget = draw(st.sampled_from([50, 2_000, 20_000]))
    return y, interest, nuisance, trials, strata, intercept, budget


@pytest.mark.slow
@settings(max_examples=300, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(extreme_problems())
def test_fuzz_public_api_returns_valid_result_or_mcexact_error(problem):
    y, interest, nuisance, trials, strata, intercept, budget = problem
    try:
        design = Design.from_arrays(y, interest, nuisance, trials=trials, strata=strata,
                                    intercept=intercept)
    except McexactError as error:
        event(f"design refused: {type(error).__name__}")
        return
    try:
        result = plan(design, max_nodes=budget)
    except McexactError:
        result = None
    try:
        dist = exact_distribution(design, max_nodes=budget)
    except McexactError as error:
        event(f"exact refused: {type(error).__name__} {getattr(error, 'what', '')}")
        return
    event(f"distribution ({dist.info['layout']})")
    assert_valid(dist, design)
    assert np.isfinite(dist.log_total)
    if result is not None and result.fits_nuisance:
        np.testing.assert_array_equal(result.interest_min, dist.support.min(axis=0))
        np.testing.assert_array_equal(result.interest_max, dist.support.max(axis=0))
    if space_size(design.trials) <= 3_000:
        event("checked against brute force")
        assert_counts(dist, design_counts(design), rel=1e-9)   # brute force, tests/_reference.py


def test_mcexact_error_is_the_base_of_public_errors():
    for error in (BudgetExceeded, DataError, mcexact.FileFormatError):
        assert issubclass(error, McexactError)
