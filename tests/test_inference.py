"""Tests of mcexact.inference: conditional tests, estimates and exact limits.

Every expected number names its source beside it:

* scipy: ``scipy.stats.contingency.odds_ratio(table, kind="conditional")``,
  ``scipy.stats.fisher_exact`` and ``scipy.stats.binomtest`` (scipy 1.17);
* statsmodels: ``ConditionalLogit(...).fit()`` (statsmodels 0.15) and the ``spector`` data set;
* brute force: exact counts from ``tests/_reference.py`` (every response vector, Python
  integers), turned into p-values, roots and maxima by the small reference functions of this file
  (section "reference inference"), which use numpy, ``fractions`` and ``scipy.optimize`` only;
* hand computations, shown in the comments;
* METHODS.md section 8.1 (Fisher's tea tasting): the values marked [computed] there were computed
  by an independent enumeration in METHODS.md, not a published value; only ``p = 1/70`` is marked
  as confirmed there.

All designs are invented for these tests, except the ``spector`` data shipped with statsmodels.
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import brentq, linprog, minimize, minimize_scalar
from scipy.spatial import ConvexHull
from scipy.special import logsumexp
from scipy.stats.contingency import odds_ratio

from mcexact import Design, exact_distribution
from mcexact.inference import (_LR_DIRECT_POINTS, TIE_RTOL, cmle_exists, column_inference,
                               joint_cmle, joint_tests)

from _reference import binary_counts, grouped_counts, split_counts


# ============================================================================ reference inference
#
# Everything below works from a dict {t (tuple of ints): count (Python int)} of brute-force counts
# and the observed t; nothing here calls mcexact.


class Reference:
    """Exact counts c(t) of the conditional distribution, with tilted probabilities.

    ``f_b(u) = c(u) exp(b . u) / sum_v c(v) exp(b . v)`` (METHODS.md section 1).
    """

    def __init__(self, counts: dict, observed):
        self.points = sorted(counts)
        self.counts = [counts[p] for p in self.points]
        self.total = sum(self.counts)
        self.T = np.array(self.points, dtype=float)
        self.log_c = np.array([math.log(c) for c in self.counts])
        self.t = tuple(int(v) for v in observed)
        self.obs = self.points.index(self.t)
        self.p0 = np.array([float(Fraction(c, self.total)) for c in self.counts])
        self.q = self.T.shape[1]

    # -- one column ------------------------------------------------------------------------
    def log_tail(self, b: float, mask: np.ndarray) -> float:
        """log P_b(mask), with the observed value subtracted for numerical range."""
        lp = self.log_c + b * (self.T[:, 0] - self.t[0])
        return float(logsumexp(lp[mask]) - logsumexp(lp))

    def tail_ge(self, b: float) -> float:
        return math.exp(self.log_tail(b, self.T[:, 0] >= self.t[0]))

    def tail_le(self, b: float) -> float:
        return math.exp(self.log_tail(b, self.T[:, 0] <= self.t[0]))

    def mean(self, b: float) -> float:
        lp = self.log_c + b * (self.T[:, 0] - self.t[0])
        return float(np.exp(lp - logsumexp(lp)) @ self.T[:, 0])

    def root(self, f) -> float:
        """Root of a monotone f by scipy.optimize.brentq, bracket grown from 1/sd by doubling."""
        sd = math.sqrt(self.p0 @ (self.T[:, 0] - self.p0 @ self.T[:, 0]) ** 2)
        width = 1.0 / sd
        for _ in range(60):
            if np.sign(f(-width)) != np.sign(f(width)):
                return brentq(f, -width, width, xtol=1e-14, rtol=1e-13, maxiter=500)
            width *= 2
        raise AssertionError("no sign change: the root is infinite")

    def exact_tails(self):
        """P(T <= t), P(T >= t), P(T = t) as Fractions of the counts."""
        t = self.t[0]
        le = sum(c for p, c in zip(self.points, self.counts) if p[0] <= t)
        ge = sum(c for p, c in zip(self.points, self.counts) if p[0] >= t)
        eq = self.counts[self.obs]
        return (Fraction(le, self.total), Fraction(ge, self.total), Fraction(eq, self.total))

    def cmle(self) -> float:
        """Solves E_b[T] = t (METHODS.md 5.3)."""
        return self.root(lambda b: self.mean(b) - self.t[0])

    def half_tail_roots(self):
        """b1 with P_b(T >= t) = 1/2 and b2 with P_b(T <= t) = 1/2 (METHODS.md 5.5)."""
        return (self.root(lambda b: self.tail_ge(b) - 0.5),
                self.root(lambda b: self.tail_le(b) - 0.5))

    # -- joint tests -----------------------------------------------------------------------
    def score(self):
        """Q(u) = (u - mu)' Sigma^-1 (u - mu) in exact Fractions, with its p and mid-p."""
        N = self.total
        pts = [[Fraction(v) for v in p] for p in self.points]
        mu = [sum(c * p[j] for p, c in zip(pts, self.counts)) / N for j in range(self.q)]
        d = [[p[j] - mu[j] for j in range(self.q)] for p in pts]
        sigma = [[sum(c * r[i] * r[j] for r, c in zip(d, self.counts)) / N
                  for j in range(self.q)] for i in range(self.q)]
        Q = [quadratic_form(sigma, r) for r in d]
        q_obs = Q[self.obs]
        more = sum(c for x, c in zip(Q, self.counts) if x > q_obs)
        tie = sum(c for x, c in zip(Q, self.counts) if x == q_obs)
        return q_obs, Fraction(more + tie, N), (Fraction(more, N) + Fraction(tie, 2 * N))

    def probability(self):
        """p = P0(f0(T) <= f0(t)); f0 = c / N, so compare the integer counts exactly."""
        N, c_obs = self.total, self.counts[self.obs]
        more = sum(c for c in self.counts if c < c_obs)
        tie = sum(c for c in self.counts if c == c_obs)
        return Fraction(c_obs, N), Fraction(more + tie, N), Fraction(more, N) + Fraction(tie, 2 * N)

    def likelihood_ratio(self, candidates=None):
        """G(u) = 2 (sup_b log f_b(u) - log f0(u)) at every point, its p and mid-p.

        Ties: |G - G(t)| <= TIE_RTOL * G(t), the documented rule of mcexact.inference.
        `candidates` (indices, with the observed one) limits the maximisations to the points
        that can be at least as extreme; the others get G = -inf.
        """
        G = 2.0 * (sup_log_likelihood(self.T, self.log_c, candidates) + logsumexp(self.log_c))
        G = np.maximum(G, 0.0)
        g = G[self.obs]
        tol = TIE_RTOL * abs(g)
        more, tie = G > g + tol, np.abs(G - g) <= tol
        return g, float(self.p0[more | tie].sum()), float(self.p0[more].sum()
                                                             + 0.5 * self.p0[tie].sum())

    def joint_cmle(self) -> np.ndarray:
        """argmax_b b . t - log sum_u c(u) exp(b . u), by scipy.optimize.minimize (BFGS)."""
        D = self.T - self.T[self.obs]
        sd = np.sqrt(self.p0 @ (self.T - self.p0 @ self.T) ** 2)

        def objective(z):
            b = z / sd
            lp = self.log_c + D @ b
            k = logsumexp(lp)
            return k, (np.exp(lp - k) @ D) / sd

        res = minimize(objective, np.zeros(self.q), jac=True, method="BFGS",
                       options={"gtol": 1e-12, "maxiter": 1000})
        return res.x / sd


def quadratic_form(matrix, vector) -> Fraction:
    """v' M^-1 v in exact arithmetic (Gauss-Jordan elimination on Fractions)."""
    n = len(vector)
    a = [list(row) + [vector[i]] for i, row in enumerate(matrix)]
    for col in range(n):
        pivot = next(r for r in range(col, n) if a[r][col] != 0)
        a[col], a[pivot] = a[pivot], a[col]
        for r in range(n):
            if r != col and a[r][col] != 0:
                factor = a[r][col] / a[col][col]
                a[r] = [x - factor * y for x, y in zip(a[r], a[col])]
    solution = [a[i][n] / a[i][i] for i in range(n)]
    return sum(v * s for v, s in zip(vector, solution))


def minimal_face(D: np.ndarray) -> np.ndarray:
    """Indices of the points on the smallest face of the support's hull that holds the origin.

    ``D`` is the support minus the target point.  A linear programme (scipy.optimize.linprog)
    looks for d with ``D d <= 0`` everywhere and as many strict inequalities as possible; points
    with ``D d < 0`` are off the face and dropped, and the search repeats on the rest until no
    direction separates any point (the origin is then relatively interior).
    """
    keep = np.arange(D.shape[0])
    while True:
        Dk = D[keep]
        res = linprog(c=Dk.sum(axis=0), A_ub=Dk, b_ub=np.zeros(len(keep)),
                      bounds=[(-1, 1)] * Dk.shape[1], method="highs")
        assert res.status == 0
        strict = Dk @ res.x < -1e-9
        if not strict.any():
            return keep
        keep = keep[~strict]


def sup_log_likelihood(T: np.ndarray, log_c: np.ndarray, only=None) -> np.ndarray:
    """``S(u) = sup_b [b . u - log sum_v c(v) exp(b . v)]`` at every support point u.

    One maximisation per point with scipy.optimize.  At a point on the boundary of the support's
    hull the supremum is a limit at infinite b: the tilted distribution piles up on the smallest
    face F holding u, so ``S(u)`` is the same supremum over F alone, which is attained (u is
    relatively interior to F).  A vertex is its own face: ``S(u) = -log c(u)``.
    With `only` (indices), the other points get ``-inf``.
    """
    n, q = T.shape
    p0 = np.exp(log_c - logsumexp(log_c))
    mu = p0 @ T
    Tz = (T - mu) / np.sqrt(p0 @ (T - mu) ** 2)     # affine change: S is unchanged
    if q == 1:
        boundary = (T[:, 0] == T[:, 0].min()) | (T[:, 0] == T[:, 0].max())
    else:
        eq = ConvexHull(T).equations
        # Integer points inside the hull are at least ~1/|integer normal| from every facet.
        boundary = np.any(T @ eq[:, :-1].T + eq[:, -1] > -1e-9 * (1 + np.abs(T).max()), axis=1)
    out = np.full(n, -np.inf)
    for j in range(n) if only is None else only:
        D = Tz - Tz[j]
        face = minimal_face(D) if boundary[j] else np.arange(n)
        F, lw = D[face], log_c[face]
        if len(face) == 1:
            out[j] = -lw[0]
            continue

        def parts(b):
            lp = lw + F @ b
            k = logsumexp(lp)
            p = np.exp(lp - k)
            m = p @ F
            return k, m, (F * p[:, None]).T @ F - np.outer(m, m)

        if q == 1:
            res = minimize_scalar(lambda b: parts(np.array([b]))[0], method="brent",
                                  options={"xtol": 1e-12})
        else:
            res = minimize(lambda b: parts(b)[0], np.zeros(q), jac=lambda b: parts(b)[1],
                           hess=lambda b: parts(b)[2], method="trust-exact",
                           options={"gtol": 1e-11})
        out[j] = -res.fun
    return out


def reference_of(design: Design, counts: dict) -> Reference:
    return Reference(counts, design.interest.T @ design.events)


def assert_same_support(dist, ref: Reference, rel: float = 1e-10) -> None:
    assert [tuple(int(v) for v in row) for row in dist.support] == ref.points
    np.testing.assert_allclose(dist.log_weights, ref.log_c, rtol=0, atol=rel)
    assert tuple(int(v) for v in dist.observed) == ref.t


def assert_tests_equal_reference(dist, ref: Reference, lr_rtol: float = 1e-7) -> None:
    results = {r.test: r for r in joint_tests(dist)}
    assert set(results) == {"score", "probability", "likelihood_ratio"}
    q_obs, p, mid = ref.score()
    r = results["score"]
    assert r.statistic == pytest.approx(float(q_obs), rel=1e-9, abs=1e-12)
    assert r.p_value == pytest.approx(float(p), rel=1e-12, abs=1e-15)
    assert r.mid_p_value == pytest.approx(float(mid), rel=1e-12, abs=1e-15)
    f_obs, p, mid = ref.probability()
    r = results["probability"]
    assert r.statistic == pytest.approx(float(f_obs), rel=1e-10)
    assert r.p_value == pytest.approx(float(p), rel=1e-12, abs=1e-15)
    assert r.mid_p_value == pytest.approx(float(mid), rel=1e-12, abs=1e-15)
    g, p, mid = ref.likelihood_ratio()
    r = results["likelihood_ratio"]
    assert r.statistic == pytest.approx(g, rel=lr_rtol, abs=1e-9)
    assert r.p_value == pytest.approx(p, rel=1e-12, abs=1e-15)
    assert r.mid_p_value == pytest.approx(mid, rel=1e-12, abs=1e-15)
    assert all(r.df == ref.q for r in results.values())


def rows_with_statistic(z: np.ndarray, k: int, target) -> np.ndarray:
    """A 0/1 response with k events whose statistic z'y equals `target` (first found)."""
    for chosen in itertools.combinations(range(z.shape[0]), k):
        if tuple(int(v) for v in z[list(chosen)].sum(axis=0)) == tuple(target):
            y = np.zeros(z.shape[0], dtype=int)
            y[list(chosen)] = 1
            return y
    raise AssertionError(f"no response with statistic {target}")


# ============================================================================ 2 x 2 tables


def table_design(table) -> Design:
    """Rows of a 2x2 table [[a, b], [c, d]]: response = row 0 (event), exposure = column 0.

    With an intercept, T = a given a + b events: the noncentral hypergeometric law of the
    table's (0, 0) cell given its margins, whose parameter is the odds ratio.
    """
    (a, b), (c, d) = table
    y = [1] * (a + b) + [0] * (c + d)
    x = [1] * a + [0] * b + [1] * c + [0] * d
    return Design.from_arrays(y, x)


INTERIOR_TABLES = [[[3, 1], [1, 3]], [[7, 2], [3, 9]], [[12, 5], [6, 14]], [[2, 3], [4, 1]],
                   [[1, 6], [5, 2]]]


@pytest.mark.parametrize("table", INTERIOR_TABLES)
def test_two_by_two_estimate_limits_and_p_values_equal_scipy(table):
    dist = exact_distribution(table_design(table))
    e = column_inference(dist)
    # Reference: scipy.stats.contingency.odds_ratio(table, kind="conditional"), the conditional
    # MLE and exact limits of the odds ratio.
    ref = odds_ratio(table, kind="conditional")
    ci = ref.confidence_interval(0.95)
    assert e.kind == "cmle" and e.at_edge == ""
    assert np.exp(e.estimate) == pytest.approx(ref.statistic, rel=1e-8)
    assert np.exp(e.cmle) == pytest.approx(ref.statistic, rel=1e-8)
    assert np.exp(e.ci_lower) == pytest.approx(ci.low, rel=1e-8)
    assert np.exp(e.ci_upper) == pytest.approx(ci.high, rel=1e-8)
    # Reference: scipy.stats.fisher_exact(table) two-sided (probability method) and one-sided.
    prob = next(r for r in joint_tests(dist) if r.test == "probability")
    assert prob.p_value == pytest.approx(stats.fisher_exact(table).pvalue, rel=1e-8)
    assert e.p_upper == pytest.approx(
        stats.fisher_exact(table, alternative="greater").pvalue, rel=1e-8)
    assert e.p_lower == pytest.approx(
        stats.fisher_exact(table, alternative="less").pvalue, rel=1e-8)
    # Doubling rule: hand computation from the two scipy tails.
    doubled = min(1.0, 2 * min(stats.fisher_exact(table, alternative="greater").pvalue,
                               stats.fisher_exact(table, alternative="less").pvalue))
    assert e.p_two_sided == pytest.approx(doubled, rel=1e-8)


@pytest.mark.parametrize("table, edge", [([[0, 5], [4, 3]], "lower"),
                                         ([[2, 0], [3, 6]], "upper"),
                                         ([[5, 0], [0, 4]], "upper"),
                                         ([[4, 3], [0, 6]], "upper"),
                                         ([[3, 4], [6, 0]], "lower")])
def test_two_by_two_zero_cell_at_an_edge(table, edge):
    dist = exact_distribution(table_design(table))
    e = column_inference(dist)
    ref = odds_ratio(table, kind="conditional")       # scipy: statistic 0 or inf at an edge
    ci = ref.confidence_interval(0.95)
    assert e.kind == "median_unbiased" and e.at_edge == edge
    assert "median unbiased" in e.note
    assert np.isfinite(e.estimate) and e.estimate == e.median_unbiased
    if edge == "upper":
        assert ref.statistic == np.inf and e.cmle == np.inf
        assert e.ci_upper == np.inf and ci.high == np.inf
        assert np.exp(e.ci_lower) == pytest.approx(ci.low, rel=1e-8)
    else:
        assert ref.statistic == 0 and e.cmle == -np.inf
        assert e.ci_lower == -np.inf and ci.low == 0
        assert np.exp(e.ci_upper) == pytest.approx(ci.high, rel=1e-8)
    prob = next(r for r in joint_tests(dist) if r.test == "probability")
    assert prob.p_value == pytest.approx(stats.fisher_exact(table).pvalue, rel=1e-8)
    assert e.p_upper == pytest.approx(
        stats.fisher_exact(table, alternative="greater").pvalue, rel=1e-8)
    assert e.p_lower == pytest.approx(
        stats.fisher_exact(table, alternative="less").pvalue, rel=1e-8)


# ============================================================================ tea tasting


def tea_design(correct: int) -> Design:
    # METHODS.md 8.1: two binomial stages (m=4, z=1) and (m=4, z=0); y = cups labelled
    # milk-first, 4 in all, `correct` of them among the truly milk-first cups.
    return Design.from_arrays([correct, 4 - correct], [1, 0], trials=[4, 4])


def test_tea_tasting_three_correct():
    dist = exact_distribution(tea_design(3))
    # Null counts C(4,t) C(4,4-t) = 1, 16, 36, 16, 1 (METHODS.md 8.1, a reproduced table).
    np.testing.assert_array_equal(dist.support[:, 0], [0, 1, 2, 3, 4])
    np.testing.assert_allclose(np.exp(dist.log_weights), [1, 16, 36, 16, 1], rtol=1e-12)
    e = column_inference(dist)
    # [computed] values of METHODS.md 8.1 (computed by an independent enumeration in METHODS.md,
    # not a published value), compared at the precision of their printed digits.
    assert e.kind == "cmle"
    assert abs(np.exp(e.estimate) - 6.408) < 0.0005
    assert abs(e.estimate - 1.8576) < 0.00005
    assert abs(np.exp(e.ci_lower) - 0.2117) < 0.00005
    assert abs(np.exp(e.ci_upper) - 626.24) < 0.005
    assert abs(np.exp(e.median_unbiased) - 6.50) < 0.005
    assert abs(e.p_two_sided - 0.486) < 0.0005
    # Exact arithmetic from the table: P(T >= 3) = 17/70, mid-p = (1 + 16/2)/70 = 9/70.
    assert e.p_upper == pytest.approx(17 / 70, rel=1e-12)
    assert e.mid_p_upper == pytest.approx(9 / 70, rel=1e-12)
    assert e.p_lower == pytest.approx(69 / 70, rel=1e-12)     # 1 - P(T = 4) = 69/70


def test_tea_tasting_four_correct():
    dist = exact_distribution(tea_design(4))
    e = column_inference(dist)
    # Fisher (1935), confirmed in METHODS.md 8.1: all four correct has p = 1/70.
    assert e.p_upper == pytest.approx(1 / 70, rel=1e-12)
    # [computed] values of METHODS.md 8.1 (computed by an independent enumeration in METHODS.md,
    # not a published value), at the precision of the printed digits.
    assert e.kind == "median_unbiased" and e.at_edge == "upper" and e.cmle == np.inf
    assert abs(np.exp(e.estimate) - 18.04) < 0.005
    assert abs(e.estimate - 2.8928) < 0.00005
    assert abs(np.exp(e.ci_lower) - 1.339) < 0.0005
    assert e.ci_upper == np.inf
    assert abs(e.p_two_sided - 0.0286) < 0.00005
    # By the symmetry c(t) = c(4 - t) the doubled, probability and score p-values coincide
    # (METHODS.md 8.1): hand computation 2/70.
    for r in joint_tests(dist):
        assert r.p_value == pytest.approx(2 / 70, rel=1e-12), r.test


# ============================================================================ matched pairs


def matched_pairs(k: int, n_disc: int, both_exposed: int, neither: int) -> Design:
    """1:1 matched pairs (one case y=1, one control y=0 per pair), binary exposure.

    k discordant pairs with the case exposed, n_disc - k with the control exposed, plus
    concordant pairs.  Strata = pair.
    """
    y, x, pair = [], [], []
    kinds = ([(1, 0)] * k + [(0, 1)] * (n_disc - k) + [(1, 1)] * both_exposed
             + [(0, 0)] * neither)
    for h, (case_x, control_x) in enumerate(kinds):
        y += [1, 0]
        x += [case_x, control_x]
        pair += [h, h]
    return Design.from_arrays(y, x, strata=pair)


@pytest.mark.parametrize("k, n_disc, both, neither",
                         [(7, 10, 3, 2), (2, 9, 0, 4), (6, 12, 5, 0), (9, 11, 2, 2)])
def test_matched_pairs_equal_binomial_test(k, n_disc, both, neither):
    dist = exact_distribution(matched_pairs(k, n_disc, both, neither))
    e = column_inference(dist)
    # Reference: scipy.stats.binomtest(k, n_disc, 0.5).  Given one event per pair, a discordant
    # pair has its case exposed with probability e^b / (1 + e^b) and a concordant pair adds a
    # fixed amount, so T - both ~ Bin(n_disc, e^b / (1 + e^b)) and b = 0 gives p = 1/2.
    assert e.p_upper == pytest.approx(stats.binomtest(k, n_disc, 0.5, "greater").pvalue,
                                      rel=1e-10)
    assert e.p_lower == pytest.approx(stats.binomtest(k, n_disc, 0.5, "less").pvalue, rel=1e-10)
    assert e.p_two_sided == pytest.approx(stats.binomtest(k, n_disc, 0.5).pvalue, rel=1e-10)
    # Closed form: the CMLE solves E_b[T] = t, i.e. n_disc e^b / (1 + e^b) = k, so the odds
    # ratio e^b = k / (n_disc - k).
    assert e.kind == "cmle"
    assert np.exp(e.estimate) == pytest.approx(k / (n_disc - k), rel=1e-9)
    # Exact limits: P_b(T >= t) = alpha/2 at the lower one, the binomial tail at
    # pi = e^b / (1 + e^b) (scipy.stats.binom.sf), and P_b(T <= t) = alpha/2 at the upper one.
    pi_l, pi_u = 1 / (1 + np.exp(-e.ci_lower)), 1 / (1 + np.exp(-e.ci_upper))
    assert stats.binom.sf(k - 1, n_disc, pi_l) == pytest.approx(0.025, rel=1e-8)
    assert stats.binom.cdf(k, n_disc, pi_u) == pytest.approx(0.025, rel=1e-8)


# ============================================================================ strata only


def test_strata_only_joint_cmle_equals_statsmodels_conditional_logit():
    pytest.importorskip("statsmodels")
    from statsmodels.discrete.conditional_models import ConditionalLogit

    # Invented: 9 strata of 3-5 binary rows with both outcomes, two integer covariates; one
    # (y, x1, x2) triple per row.
    strata_rows = [
        [(1, 2, 0), (0, 0, 1), (0, 1, 1), (1, 3, 1)],
        [(0, 1, 0), (1, 2, 1), (0, 0, 1)],
        [(1, 3, 1), (1, 1, 0), (0, 0, 0), (0, 2, 1), (0, 1, 1)],
        [(1, 2, 0), (0, 1, 0), (1, 0, 1), (0, 1, 1)],
        [(0, 0, 1), (1, 2, 0), (0, 3, 1)],
        [(0, 1, 0), (0, 2, 0), (1, 0, 1), (1, 1, 1)],
        [(1, 3, 1), (0, 2, 0), (1, 2, 0), (0, 0, 1), (0, 1, 1)],
        [(1, 3, 0), (1, 1, 1), (0, 1, 1)],
        [(0, 0, 0), (1, 1, 1), (0, 2, 1), (1, 2, 0)],
    ]
    groups = [h for h, rows in enumerate(strata_rows) for _ in rows]
    y = [r[0] for rows in strata_rows for r in rows]
    x1 = [r[1] for rows in strata_rows for r in rows]
    x2 = [r[2] for rows in strata_rows for r in rows]
    exog = np.column_stack([x1, x2]).astype(float)
    design = Design.from_arrays(y, exog.astype(int), strata=groups)
    dist = exact_distribution(design)
    assert cmle_exists(dist)
    b = joint_cmle(dist)
    # Reference: statsmodels ConditionalLogit (maximises the same conditional likelihood), fitted
    # by Newton's method: its default BFGS stops with a score of about 2e-4 on these data.
    model = ConditionalLogit(np.asarray(y, float), exog, groups=np.asarray(groups))
    res = model.fit(method="newton", maxiter=100, disp=False)
    assert np.max(np.abs(model.score(res.params))) < 1e-8
    np.testing.assert_allclose(b * dist.scales, res.params, rtol=1e-6, atol=1e-7)


# ============================================================================ joint tests


def random_design(seed: int, n: int, q: int, p: int, grouped: bool = False,
                  strata: bool = False):
    """Invented small design from a seeded generator, with its brute-force counts."""
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 4, (n, q))
    w = rng.integers(0, 3, (n, p)) if p else None
    trials = rng.integers(1, 4, n) if grouped else np.ones(n, dtype=int)
    y = rng.binomial(trials, 0.4)
    h = rng.integers(0, 2, n) if strata else None
    design = Design.from_arrays(y, z, w, trials=trials if grouped else None, strata=h)
    assert np.all(design.interest_scales == 1)
    counts = grouped_counts(y, trials, [0] * n if h is None else h, z, w, True)
    if strata:
        # Brute force on the raw rows conditions on each stratum's events; strata with only
        # events or non-events (dropped by the design) would shift T: none here.
        assert design.n_dropped_strata == 0
    return design, counts


DESIGNS = [dict(seed=9, n=10, q=1, p=1), dict(seed=2, n=11, q=1, p=0),
           dict(seed=3, n=10, q=2, p=0), dict(seed=4, n=11, q=2, p=1),
           dict(seed=5, n=6, q=2, p=1, grouped=True), dict(seed=6, n=10, q=2, p=0, strata=True),
           dict(seed=7, n=7, q=1, p=1, grouped=True)]


@pytest.mark.parametrize("spec", DESIGNS)
def test_joint_tests_equal_brute_force(spec):
    design, counts = random_design(**spec)
    dist = exact_distribution(design)
    ref = reference_of(design, counts)
    assert_same_support(dist, ref)
    assert dist.n_points >= 5
    assert_tests_equal_reference(dist, ref)


@pytest.mark.parametrize("spec", [s for s in DESIGNS if s["q"] == 1])
def test_column_inference_equals_brute_force(spec):
    design, counts = random_design(**spec)
    dist = exact_distribution(design)
    ref = reference_of(design, counts)
    e = column_inference(dist)
    le, ge, eq = ref.exact_tails()          # Fractions of brute-force counts
    assert e.p_lower == pytest.approx(float(le), rel=1e-12)
    assert e.p_upper == pytest.approx(float(ge), rel=1e-12)
    assert e.mid_p_lower == pytest.approx(float(le - eq / 2), rel=1e-12)
    assert e.mid_p_upper == pytest.approx(float(ge - eq / 2), rel=1e-12)
    assert e.p_two_sided == pytest.approx(min(1.0, float(2 * min(le, ge))), rel=1e-12)
    assert e.mid_p_two_sided == pytest.approx(min(1.0, float(2 * min(le, ge) - eq)), rel=1e-12)
    assert e.n_points == len(ref.points)
    assert e.kind == "cmle"
    assert e.cmle == pytest.approx(ref.cmle(), rel=1e-7)


# ============================================================================ LR ordering


def lr_design(seed: int, n: int, q: int, high: int):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n)
    z = rng.integers(0, high, (n, q))
    return y, z


@pytest.mark.slow
@pytest.mark.parametrize("seed, n, q, high", [(0, 22, 2, 6), (2, 21, 2, 6), (3, 14, 3, 4)])
def test_lr_level_set_shortcut_equals_per_point_maximisation(seed, n, q, high):
    # More than 400 support points with 2-4 columns: joint_tests orders the LR statistic by the
    # level-set shortcut.  Reference: G maximised at every point by scipy.optimize (and the face
    # reduction of sup_log_likelihood at hull boundary points) on brute-force counts.
    y, z = lr_design(seed, n, q, high)
    design = Design.from_arrays(y, z)
    dist = exact_distribution(design)
    assert dist.n_points > _LR_DIRECT_POINTS
    ref = Reference(split_counts(y, z), z.T @ y)
    assert_same_support(dist, ref)
    g, p, mid = ref.likelihood_ratio()
    assert 0.05 < p < 0.95          # an ordering with many points on both sides
    r = next(r for r in joint_tests(dist) if r.test == "likelihood_ratio")
    assert r.statistic == pytest.approx(g, rel=1e-7)
    assert r.p_value == pytest.approx(p, rel=1e-12)
    assert r.mid_p_value == pytest.approx(mid, rel=1e-12)


# Invented: 12 binary rows, two interest columns, intercept; four events.  Hand computation: at a
# vertex u of the support's hull the tilted probability of u tends to 1 along its normal cone, so
# sup_b log f_b(u) = 0 and G(u) = -2 log f0(u) = 2 log(N / c(u)).  Every other point has
# G(u) <= -2 log f0(u) too, with equality only at vertices; so with the observed point a vertex of
# count 1, P0(G(T) >= G(t)) = (number of count-1 vertices) / N, all of them ties.
VERTEX_Z = np.array([[4, 3], [0, 0], [5, 1], [5, 4], [0, 2], [3, 2], [0, 4], [1, 2], [2, 1],
                     [2, 5], [2, 4], [5, 1]])
VERTEX_Y = np.array([0, 0, 0, 1, 0, 0, 1, 0, 0, 1, 1, 0])        # T = (9, 17), a vertex


def test_lr_ties_between_hull_vertices_direct_route():
    counts = binary_counts(VERTEX_Y, VERTEX_Z)                       # brute force, 2**12 vectors
    ref = Reference(counts, VERTEX_Z.T @ VERTEX_Y)
    N = ref.total
    assert N == math.comb(12, 4)
    hull = ConvexHull(ref.T)
    vertices = [ref.points[v] for v in hull.vertices]
    assert ref.t in vertices and counts[ref.t] == 1
    singles = [v for v in vertices if counts[v] == 1]
    assert len(singles) == 9
    # The per-point maximisation of this file agrees with the hand computation.
    g, p, mid = ref.likelihood_ratio()
    assert g == pytest.approx(2 * math.log(N), rel=1e-12)
    assert p == pytest.approx(len(singles) / N, rel=1e-12)
    dist = exact_distribution(Design.from_arrays(VERTEX_Y, VERTEX_Z))
    assert dist.n_points <= _LR_DIRECT_POINTS            # every point maximised directly
    r = next(r for r in joint_tests(dist) if r.test == "likelihood_ratio")
    assert r.statistic == pytest.approx(2 * math.log(N), rel=1e-9)   # hand: G = 2 log(N / 1)
    # Hand computation above: p = 9 / 495, mid-p = 4.5 / 495 (every one a tie).
    assert r.p_value == pytest.approx(len(singles) / N, rel=1e-12)
    assert r.mid_p_value == pytest.approx(len(singles) / (2 * N), rel=1e-12)


@pytest.mark.slow
def test_lr_ties_between_hull_vertices_shortcut_route():
    # Invented, from a seeded generator: 22 binary rows, 11 events, two interest columns with
    # 702 support points (the level-set shortcut).  The observed point (7, 32) is a hull vertex
    # of count 2; the other count-2 vertices tie with it (hand computation above: G = 2 log(N/2)).
    # Reference: per-point maximisation (sup_log_likelihood) on brute-force counts.
    _, z = lr_design(1, 22, 2, 6)
    # 11 events with T = (7, 32), found once by rows_with_statistic(z, 11, (7, 32)).
    y = np.array([0, 0, 1, 1, 1, 0, 0, 0, 0, 1, 1, 0, 1, 0, 1, 1, 0, 0, 1, 1, 1, 0])
    assert tuple(z.T @ y) == (7, 32)
    ref = Reference(split_counts(y, z), z.T @ y)
    N = ref.total
    assert ref.counts[ref.obs] == 2
    dist = exact_distribution(Design.from_arrays(y, z))
    assert dist.n_points > _LR_DIRECT_POINTS
    # G(u) <= 2 log(N / c(u)) (hand computation above), so only points with c(u) <= 2 can be as
    # extreme as the observed one: the others need no maximisation.
    candidates = [j for j, c in enumerate(ref.counts) if c <= 2]
    g, p, mid = ref.likelihood_ratio(candidates)
    assert g == pytest.approx(2 * math.log(N / 2), rel=1e-12)
    r = next(r for r in joint_tests(dist) if r.test == "likelihood_ratio")
    assert r.p_value == pytest.approx(p, rel=1e-12)
    assert r.mid_p_value == pytest.approx(mid, rel=1e-12)
    assert r.statistic == pytest.approx(g, rel=1e-7)


def test_split_counts_reference_equals_full_enumeration():
    # The meet-in-the-middle reference of tests/_reference.py against binary_counts (all 2**n
    # vectors one by one) on invented designs, with and without nuisance columns.
    rng = np.random.default_rng(21)
    for n, q, p in [(11, 1, 1), (12, 2, 1), (10, 2, 0), (9, 3, 2)]:
        y = rng.integers(0, 2, n)
        z = rng.integers(-2, 4, (n, q))
        w = rng.integers(0, 3, (n, p)) if p else None
        assert split_counts(y, z, w) == binary_counts(y, z, w)


# ============================================================================ Spector data


@pytest.fixture(scope="module")
def spector():
    sm_datasets = pytest.importorskip("statsmodels.datasets")
    data = sm_datasets.spector.load_pandas().data
    return (data["GRADE"].astype(int).to_numpy(), data["GPA"].to_numpy(),
            data["TUCE"].astype(int).to_numpy(), data["PSI"].astype(int).to_numpy())


@pytest.mark.slow
def test_spector_psi_given_gpa_and_tuce(spector):
    # statsmodels.datasets.spector: GRADE ~ GPA + TUCE + PSI; interest PSI, nuisance intercept,
    # GPA (two decimals: scaled by 100) and TUCE.
    y, gpa, tuce, psi = spector
    design = Design.from_arrays(y, psi, np.column_stack([gpa, tuce]),
                                interest_names=["PSI"], nuisance_names=["GPA", "TUCE"])
    np.testing.assert_array_equal(design.nuisance_scales, [100, 1])
    dist = exact_distribution(design)
    gpa100 = np.round(gpa * 100).astype(int)
    assert np.all(np.abs(gpa100 - gpa * 100) < 1e-9)
    # Reference: meet-in-the-middle enumeration of all 2**32 responses (tests/_reference.py).
    ref = Reference(split_counts(y, psi, np.column_stack([gpa100, tuce])), [psi @ y])
    assert_same_support(dist, ref)
    assert_tests_equal_reference(dist, ref)
    e = column_inference(dist)
    le, ge, eq = ref.exact_tails()
    assert e.p_lower == pytest.approx(float(le), rel=1e-12)
    assert e.p_upper == pytest.approx(float(ge), rel=1e-12)
    assert e.mid_p_upper == pytest.approx(float(ge - eq / 2), rel=1e-12)
    assert e.p_two_sided == pytest.approx(min(1.0, float(2 * min(le, ge))), rel=1e-12)
    # t = 8 is the largest support point of the brute force: the CMLE is +inf, the MUE solves
    # P_b(T >= t) = 1/2 and the lower limit P_b(T >= t) = alpha/2 (brentq on the counts).
    assert ref.t[0] == max(p[0] for p in ref.points)
    assert e.kind == "median_unbiased" and e.cmle == np.inf and e.ci_upper == np.inf
    assert e.estimate == pytest.approx(ref.root(lambda b: ref.tail_ge(b) - 0.5), rel=1e-8)
    assert e.ci_lower == pytest.approx(ref.root(lambda b: ref.tail_ge(b) - 0.025), rel=1e-8)


@pytest.mark.slow
def test_spector_psi_and_tuce_jointly_given_gpa(spector):
    # Interest PSI and TUCE jointly, nuisance intercept and GPA (x100): joint tests, joint CMLE
    # and the PSI slice (given TUCE) against the meet-in-the-middle enumeration.
    y, gpa, tuce, psi = spector
    z = np.column_stack([psi, tuce])
    design = Design.from_arrays(y, z, gpa, interest_names=["PSI", "TUCE"],
                                nuisance_names=["GPA"])
    dist = exact_distribution(design)
    gpa100 = np.round(gpa * 100).astype(int)
    counts = split_counts(y, z, gpa100)
    ref = Reference(counts, z.T @ y)
    assert_same_support(dist, ref)
    assert_tests_equal_reference(dist, ref)
    assert cmle_exists(dist)
    np.testing.assert_allclose(joint_cmle(dist), ref.joint_cmle(), rtol=1e-6)
    # The TUCE slice (PSI fixed at its observed value) is interior: a finite CMLE.
    slice_counts = {(t[1],): c for t, c in counts.items() if t[0] == ref.t[0]}
    sref = Reference(slice_counts, [ref.t[1]])
    e = column_inference(dist.condition(["PSI"]))
    assert e.kind == "cmle"
    assert e.estimate == pytest.approx(sref.cmle(), rel=1e-7)
    assert e.ci_lower == pytest.approx(sref.root(lambda b: sref.tail_ge(b) - 0.025), rel=1e-7)
    assert e.ci_upper == pytest.approx(sref.root(lambda b: sref.tail_le(b) - 0.025), rel=1e-7)


# ============================================================================ degenerate slices


def assert_degenerate(dist):
    assert dist.n_points == 1
    e = column_inference(dist)
    assert e.kind == "none" and e.n_points == 1
    assert "no inference is possible" in e.note
    assert e.p_lower == e.p_upper == e.p_two_sided == 1.0
    assert e.mid_p_two_sided == 1.0
    for value in (e.p_lower, e.p_upper, e.mid_p_lower, e.mid_p_upper, e.p_two_sided,
                  e.mid_p_two_sided):
        assert not np.isnan(value)
    for r in joint_tests(dist):
        assert r.p_value == 1.0 and not np.isnan(r.mid_p_value)
        assert "no test is possible" in r.note


def test_degenerate_slice_after_conditioning():
    # Invented: given the intercept (2 events) and T2 = 2, both events are among the three
    # z2 = 1 rows, where z1 = 1 throughout, so T1 = 2 is forced (hand computation), although z1
    # varies among the z2 = 0 rows and is not collinear with the intercept and z2.
    z1 = [1, 1, 1, 0, 1, 0, 1]
    z2 = [1, 1, 1, 0, 0, 0, 0]
    y = [1, 1, 0, 0, 0, 0, 0]
    dist = exact_distribution(Design.from_arrays(y, np.column_stack([z1, z2]),
                                                 interest_names=["z1", "z2"]))
    assert dist.n_points > 1
    piece = dist.condition(["z1"])   # T2 given T1: not degenerate
    assert piece.n_points > 1
    assert_degenerate(dist.condition(["z2"]))    # T1 given T2: forced


def test_degenerate_design_with_forced_statistic():
    # Invented: nuisance powers of two, so W'y (with the number of events) has exactly one 0/1
    # solution and T is forced (hand computation: binary expansion is unique).
    w = [1, 2, 4, 8, 16, 32]
    z = [3, 0, 1, 2, 0, 1]
    y = [1, 0, 1, 0, 1, 0]
    assert binary_counts(y, z, w) == {(4,): 1}           # brute force of tests/_reference.py
    assert_degenerate(exact_distribution(Design.from_arrays(y, z, w)))


# ============================================================================ MUE and limits


def test_median_unbiased_at_the_upper_edge_solves_the_half_tail():
    # Table [[4, 1], [0, 5]]: T = 4 at the top of its support.  Reference: brute-force counts.
    design = table_design([[4, 1], [0, 5]])
    ref = Reference(binary_counts(*design_rows(design)), design.interest.T @ design.events)
    e = column_inference(exact_distribution(design))
    assert e.at_edge == "upper" and e.kind == "median_unbiased"
    # Definition (METHODS.md 5.5): at t_max the MUE solves P_b(T >= t) = P_b(T = t) = 1/2.
    assert ref.tail_ge(e.median_unbiased) == pytest.approx(0.5, abs=1e-9)
    assert e.median_unbiased == pytest.approx(ref.root(lambda b: ref.tail_ge(b) - 0.5),
                                              rel=1e-8)


def test_median_unbiased_at_the_lower_edge_solves_the_half_tail():
    design = table_design([[0, 4], [3, 2]])
    ref = Reference(binary_counts(*design_rows(design)), design.interest.T @ design.events)
    e = column_inference(exact_distribution(design))
    assert e.at_edge == "lower" and e.kind == "median_unbiased" and e.cmle == -np.inf
    # At t_min only P_b(T <= t) = 1/2 has a root (METHODS.md 5.5).
    assert ref.tail_le(e.median_unbiased) == pytest.approx(0.5, abs=1e-9)


@pytest.mark.parametrize("spec", [s for s in DESIGNS if s["q"] == 1])
def test_median_unbiased_interior_is_the_average_of_the_half_tail_roots(spec):
    design, counts = random_design(**spec)
    ref = reference_of(design, counts)
    e = column_inference(exact_distribution(design))
    assert e.at_edge == ""
    b1, b2 = ref.half_tail_roots()            # brentq on the brute-force pmf
    assert b1 < b2
    assert e.median_unbiased == pytest.approx(0.5 * (b1 + b2), rel=1e-8)


@pytest.mark.parametrize("alpha", [0.05, 0.1, 0.01])
@pytest.mark.parametrize("spec", [s for s in DESIGNS if s["q"] == 1])
def test_exact_limits_solve_the_tail_equations(spec, alpha):
    design, counts = random_design(**spec)
    ref = reference_of(design, counts)
    e = column_inference(exact_distribution(design), alpha=alpha)
    # METHODS.md 5.4: P_L(T >= t) = alpha/2 and P_U(T <= t) = alpha/2, from brute-force counts.
    assert ref.tail_ge(e.ci_lower) == pytest.approx(alpha / 2, rel=1e-8)
    assert ref.tail_le(e.ci_upper) == pytest.approx(alpha / 2, rel=1e-8)
    assert e.ci_lower < e.cmle < e.ci_upper


def design_rows(design: Design):
    """Binary rows of a design built from 0/1 data with trials 1 (for binary_counts)."""
    assert np.all(design.trials >= 1)
    y, z = [], []
    for events, trials, row in zip(design.events, design.trials, design.interest):
        y += [1] * int(events) + [0] * int(trials - events)
        z += [tuple(int(v) for v in row)] * int(trials)
    return y, z


# ============================================================================ CMLE existence


# Invented: 9 binary rows, two interest columns, intercept, 4 events.
HULL_Z = np.array([[2, 3], [0, 3], [1, 2], [2, 1], [3, 0], [1, 1], [2, 1], [0, 0], [0, 0]])


def on_hull_boundary(points, t) -> bool:
    """Exact integer test in 2-D: t is on the boundary iff some line through t and another point
    has every point on one side (a supporting line through t can be turned until it meets
    another point)."""
    D = [(p[0] - t[0], p[1] - t[1]) for p in points]
    for u in D:
        if u == (0, 0):
            continue
        for d in ((-u[1], u[0]), (u[1], -u[0])):
            if all(d[0] * v[0] + d[1] * v[1] <= 0 for v in D):
                return True
    return False


@pytest.mark.parametrize("target, boundary", [((7, 7), True), ((2, 3), True), ((8, 6), True),
                                              ((4, 4), False), ((5, 6), False)])
def test_cmle_exists_only_inside_the_hull(target, boundary):
    y = rows_with_statistic(HULL_Z, 4, target)
    counts = binary_counts(y, HULL_Z)                    # brute force
    points = sorted(counts)
    assert on_hull_boundary(points, target) is boundary
    if boundary:
        # A slanted face: neither coordinate is at its own minimum or maximum.
        lo, hi = np.min(points, axis=0), np.max(points, axis=0)
        assert np.all((lo < target) & (target < hi))
    dist = exact_distribution(Design.from_arrays(y, HULL_Z))
    assert cmle_exists(dist) is (not boundary)
    b = joint_cmle(dist)
    if boundary:
        assert b is None
    else:
        np.testing.assert_allclose(b, Reference(counts, target).joint_cmle(), rtol=1e-6,
                                   atol=1e-9)


# ============================================================================ ties


def test_score_and_probability_ties_count_both_points():
    # Invented, symmetric under swapping the two columns: the null law of T = (T1, T2) is too,
    # so (3, 1) and (1, 3) have the same count, and Q is the same at both (mu and Sigma are
    # symmetric) -- ties in exact arithmetic, checked below with Fractions.
    z = np.array([[0, 0], [1, 0], [0, 1], [2, 0], [0, 2], [1, 1], [2, 1], [1, 2]])
    y = rows_with_statistic(z, 3, (3, 1))
    counts = binary_counts(y, z)
    assert counts[(3, 1)] == counts[(1, 3)]
    ref = Reference(counts, (3, 1))
    q_obs, p_score, mid_score = ref.score()
    mirror = Reference(counts, (1, 3))
    assert mirror.score()[0] == q_obs                  # exact tie of Q
    dist = exact_distribution(Design.from_arrays(y, z))
    results = {r.test: r for r in joint_tests(dist)}
    # Counting the tie partner matters: without it the p-value would be smaller by its mass.
    partner = Fraction(counts[(1, 3)], ref.total)
    assert p_score - partner < p_score
    assert results["score"].p_value == pytest.approx(float(p_score), rel=1e-12)
    assert results["score"].mid_p_value == pytest.approx(float(mid_score), rel=1e-12)
    f_obs, p_prob, mid_prob = ref.probability()
    assert results["probability"].p_value == pytest.approx(float(p_prob), rel=1e-12)
    assert results["probability"].mid_p_value == pytest.approx(float(mid_prob), rel=1e-12)


def test_score_tie_in_one_column_tea_tasting():
    # METHODS.md 8.1 null counts 1, 16, 36, 16, 1 (mean 2): Q(1) = Q(3), so the score p-value at
    # t = 3 is P(T <= 1) + P(T >= 3) = 34/70 and the mid-p (1 + 1 + (16 + 16)/2)/70 = 18/70
    # (hand computation in exact arithmetic).
    r = next(r for r in joint_tests(exact_distribution(tea_design(3))) if r.test == "score")
    assert r.p_value == pytest.approx(34 / 70, rel=1e-12)
    assert r.mid_p_value == pytest.approx(18 / 70, rel=1e-12)
    # Q(3) = (3 - 2)^2 / Var, Var = (4*1 + 1*16 + 1*16 + 4*1)/70 = 40/70.
    assert r.statistic == pytest.approx(70 / 40, rel=1e-12)
