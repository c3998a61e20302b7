"""Tests of mcexact.diagnostics: autocorrelation, ESS, R-hat, Monte Carlo standard errors.

Every expected number names its source beside it:

* closed forms, derived in the comments: the AR(1) chain x_t = a x_{t-1} + e_t (e_t ~ N(0, 1),
  started from its stationary law N(0, 1/(1 - a^2))) and the two-state Markov chain on {0, 1};
* brute-force sums written out in the test (autocorrelation, R-hat of a single chain);
* METHODS.md section 6.1: the table of draws needed at p = 0.05 (computed arithmetic there,
  ``N = p (1 - p) / SE^2`` rounded up, recomputed by hand in the comments);
* arviz_stats 0.8.0, the array interface ``arviz_stats.base.array_stats`` (the top-level
  ``arviz_stats.ess`` needs xarray, which the test environment lacks), called on numpy arrays
  shaped (chain, draw) as shown beside each comparison; run 2026-12-01 on Linux with Python
  3.11, numpy 2.4.6, scipy 1.17.1.

Monte Carlo tolerances are stated in standard deviations of the estimator, with the source of
each standard deviation in the comment. All seeds are fixed, so every test is deterministic; the
a-priori risk quoted for a seed is the chance that an arbitrary seed would fail.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from mcexact import DataError
from mcexact.diagnostics import (ChainAgreementResult, autocorrelation, chain_agreement,
                                 draws_needed, ess, mcse_mean, mcse_proportion, rhat)


# ------------------------------------------------------------------------------- generators

def ar1(rng: np.random.Generator, a: float, n_chain: int, n_draw: int) -> np.ndarray:
    """Stationary AR(1) chains: x_0 ~ N(0, 1/(1 - a^2)), x_t = a x_{t-1} + e_t."""
    e = rng.normal(size=(n_chain, n_draw))
    e[:, 0] /= math.sqrt(1.0 - a * a)
    return lfilter([1.0], [1.0, -a], e, axis=1)


def ar1_tau(a: float) -> float:
    # rho_k = a^k for the AR(1) chain, so the integrated autocorrelation time is
    # tau = 1 + 2 sum_{k>=1} a^k = 1 + 2a / (1 - a) = (1 + a) / (1 - a).
    return (1.0 + a) / (1.0 - a)


def two_state(rng: np.random.Generator, p: float, lam: float, n_chain: int,
              n_draw: int) -> np.ndarray:
    """Stationary 0/1 Markov chains with P(x = 1) = p and lag-1 autocorrelation lam.

    Flip rates alpha = P(0 -> 1) = p (1 - lam) and beta = P(1 -> 0) = (1 - p)(1 - lam): then
    alpha / (alpha + beta) = p is stationary and the transition matrix has second eigenvalue
    1 - alpha - beta = lam, so rho_k = lam^k and tau = (1 + lam) / (1 - lam) as for AR(1).
    """
    alpha, beta = p * (1.0 - lam), (1.0 - p) * (1.0 - lam)
    u = rng.random((n_chain, n_draw))
    x = np.empty((n_chain, n_draw))
    x[:, 0] = u[:, 0] < p
    for t in range(1, n_draw):
        x[:, t] = np.where(x[:, t - 1] == 1.0, u[:, t] >= beta, u[:, t] < alpha)
    return x


# --------------------------------------------------------------------------- autocorrelation

@pytest.mark.parametrize("shape", [(1, 7), (3, 50), (2, 33)])
def test_autocorrelation_equals_direct_sum(shape):
    # Reference: the definition written out, rho_t = sum_s d_s d_{s+t} / sum_s d_s^2 with
    # d = x - mean(x) per chain (divisor n on both sides, so it cancels).
    x = np.random.default_rng(11).normal(size=shape)
    d = x - x.mean(axis=1, keepdims=True)
    n = shape[1]
    expected = np.array([[np.dot(row[:n - t], row[t:]) / np.dot(row, row) for t in range(n)]
                         for row in d])
    np.testing.assert_allclose(autocorrelation(x), expected, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(autocorrelation(x, max_lag=3), expected[:, :4], rtol=1e-10,
                               atol=1e-12)


def test_autocorrelation_of_ar1_is_geometric():
    # Closed form rho_k = a^k. The sample autocorrelation at lag k of a long AR(1) chain has sd
    # about sqrt((1 + a^2)/(1 - a^2) / n) (Bartlett's formula, from memory) = 0.004 here at
    # n = 10^5, a = 0.6; tolerance 0.02 is 5 sd.
    a = 0.6
    rho = autocorrelation(ar1(np.random.default_rng(3), a, 1, 100_000), max_lag=5)
    assert rho.shape == (1, 6)
    np.testing.assert_allclose(rho[0], a ** np.arange(6), atol=0.02)


def test_autocorrelation_constant_chain_and_bad_lag():
    rho = autocorrelation([[1.0, 2.0, 4.0, 3.0], [5.0, 5.0, 5.0, 5.0]])
    assert np.all(np.isfinite(rho[0])) and np.all(np.isnan(rho[1]))
    for bad in (-1, 4, 1.5, True):
        with pytest.raises(DataError, match="max_lag"):
            autocorrelation(np.arange(4.0), max_lag=bad)


# ------------------------------------------------------------------------ ESS: closed form

@pytest.mark.parametrize("a, rtol", [
    # Relative sd of the estimated tau is about sqrt(2 (2M + 1) / N) with M the lags summed
    # (Sokal's approximation, from memory): M ~ 10 for a = 0.5 or -0.3, M ~ 100 for a = 0.9,
    # N = 4 x 10^5 draws, i.e. about 1% and 2.2%. Tolerances are 5 sd and 4.5 sd.
    (0.5, 0.05),
    (-0.3, 0.05),
    (0.9, 0.10),
])
@pytest.mark.parametrize("method", ["mean", "identity"])
def test_ess_of_ar1_matches_closed_form(a, rtol, method):
    n_chain, n_draw = 4, 100_000
    x = ar1(np.random.default_rng(2024), a, n_chain, n_draw)
    expected = n_chain * n_draw / ar1_tau(a)          # ESS = N / tau = N (1 - a) / (1 + a)
    assert ess(x, method=method) == pytest.approx(expected, rel=rtol)


def test_ess_of_binary_markov_chain_matches_closed_form():
    # Tied 0/1 data: tau = (1 + lam) / (1 - lam) = 4 for lam = 0.6 (see two_state). Here
    # N = 4 x 20000, M ~ 20: relative sd of tau about sqrt(2 * 41 / 80000) = 3.2%; tolerance
    # 13% is 4 sd.
    lam = 0.6
    x = two_state(np.random.default_rng(5), 0.3, lam, 4, 20_000)
    assert ess(x, method="mean") == pytest.approx(x.size / ar1_tau(lam), rel=0.13)


# ---------------------------------------------------------------- comparison with arviz_stats

def _cases():
    rng = np.random.default_rng(20250101)
    walk = np.cumsum(rng.normal(size=(4, 300)), axis=1)
    cases = {
        "normal 4x500": rng.normal(size=(4, 500)),
        "normal odd 3x101": rng.normal(size=(3, 101)),
        "poisson ties 4x300": rng.poisson(2.0, size=(4, 300)).astype(float),
        "three values 5x200": rng.integers(0, 3, size=(5, 200)).astype(float),
        "binary p=0.1 4x250": (rng.random((4, 250)) < 0.1).astype(float),
        "binary sticky 2x400": two_state(rng, 0.4, 0.8, 2, 400),
        "rounded ar1 4x400": np.round(ar1(rng, 0.7, 4, 400)),
        "antithetic ar1 2x300": ar1(rng, -0.6, 2, 300),
        "random walk 4x300": walk,
        "shifted chain 4x200": rng.normal(size=(4, 200)) + np.array([[0.0], [0.0], [0.0], [1.5]]),
        "short 2x6": rng.poisson(1.0, size=(2, 6)).astype(float),
    }
    return cases


CASES = _cases()


@pytest.mark.parametrize("name", list(CASES))
def test_ess_matches_arviz_stats(name):
    base = pytest.importorskip("arviz_stats.base")
    x = CASES[name]
    # arviz_stats 0.8.0: base.array_stats.ess(x, method=..., prob=...) with x (chain, draw);
    # the tail method needs prob=(0.05, 0.95) given explicitly in the array interface.
    # Observed agreement: about 3e-15 relative; rtol 1e-6 as asked for.
    ref = base.array_stats
    np.testing.assert_allclose(ess(x, method="bulk"), ref.ess(x, method="bulk"), rtol=1e-6)
    np.testing.assert_allclose(ess(x, method="tail"),
                               ref.ess(x, method="tail", prob=(0.05, 0.95)), rtol=1e-6)
    np.testing.assert_allclose(ess(x, method="mean"), ref.ess(x, method="mean"), rtol=1e-6)
    np.testing.assert_allclose(ess(x, method="identity"), ref.ess(x, method="identity"),
                               rtol=1e-6)
    # arviz_stats 0.8.0: base.array_stats.mcse(x, method="mean") = sd / sqrt(ess mean).
    np.testing.assert_allclose(mcse_mean(x, method="ess"), ref.mcse(x, method="mean"),
                               rtol=1e-6)
    # A single chain, 1-D: ref.ess(x[0], chain_axis=None, method="bulk") in arviz_stats 0.8.0.
    np.testing.assert_allclose(ess(x[0], method="bulk"),
                               ref.ess(x[0], chain_axis=None, method="bulk"), rtol=1e-6)


@pytest.mark.parametrize("name", list(CASES))
def test_rhat_matches_arviz_stats(name):
    base = pytest.importorskip("arviz_stats.base")
    x = CASES[name]
    ref = base.array_stats
    # arviz_stats 0.8.0: base.array_stats.rhat(x, method="rank") (max of bulk and folded),
    # method="z_scale" (bulk: rank-normalised split chains) and method="folded".
    np.testing.assert_allclose(rhat(x), ref.rhat(x, method="rank"), rtol=1e-6)
    np.testing.assert_allclose(rhat(x, method="bulk"), ref.rhat(x, method="z_scale"), rtol=1e-6)
    np.testing.assert_allclose(rhat(x, method="folded"), ref.rhat(x, method="folded"),
                               rtol=1e-6)


def test_documented_differences_from_arviz_stats():
    base = pytest.importorskip("arviz_stats.base")
    ref = base.array_stats
    constant = np.full((4, 100), 3.0)
    # Constant series: arviz_stats 0.8.0 returns the number of draws (ref.ess(constant,
    # method="bulk") == 400); mcexact returns NaN (no autocorrelation exists).
    assert ref.ess(constant, method="bulk") == 400
    for method in ("mean", "identity", "bulk", "tail"):
        assert math.isnan(ess(constant, method=method))
    # One chain: arviz_stats 0.8.0 rhat needs 2 chains (NaN); mcexact compares its two halves.
    one = np.random.default_rng(8).normal(size=200)
    assert math.isnan(ref.rhat(one[np.newaxis, :]))
    assert math.isfinite(rhat(one))


def test_rhat_single_chain_equals_hand_computation():
    # Reference written out: halves of one chain (odd length: middle draw dropped), joint
    # average ranks r, z = Phi^{-1}((r - 3/8)/(S + 1/4)), R = sqrt(((n-1)/n W + B/n) / W).
    x = np.random.default_rng(9).poisson(3.0, size=201).astype(float)
    x[120:] += 3.0            # a jump of about 1.7 sd, 81 draws into the second half

    def classic(halves):
        n = halves.shape[1]
        w = halves.var(axis=1, ddof=1).mean()
        b_n = halves.mean(axis=1).var(ddof=1)
        return math.sqrt(((n - 1) / n * w + b_n) / w)

    def zscore(v):
        r = stats.rankdata(v, method="average", axis=None).reshape(v.shape)
        return stats.norm.ppf((r - 0.375) / (v.size + 0.25))

    halves = np.vstack([x[:100], x[101:]])
    bulk = classic(zscore(halves))
    folded = classic(zscore(np.abs(halves - np.median(halves))))
    assert rhat(x, method="bulk") == pytest.approx(bulk, rel=1e-12)
    assert rhat(x, method="folded") == pytest.approx(folded, rel=1e-12)
    assert rhat(x) == pytest.approx(max(bulk, folded), rel=1e-12)
    assert rhat(x) > 1.05


# ------------------------------------------------------------------------ R-hat behaviour

@pytest.mark.parametrize("draws", ["normal", "poisson"])
def test_rhat_near_one_for_well_mixed_chains(draws):
    # Independent draws, 8 split chains of 500: R^2 - 1 is about (B/W - 1)/n with
    # B/W ~ chi2_7 / 7, so R - 1 rarely exceeds 0.004; the 1.01 threshold is far away.
    rng = np.random.default_rng(12)
    x = rng.normal(size=(4, 1000)) if draws == "normal" else \
        rng.poisson(1.5, size=(4, 1000)).astype(float)
    assert 0.99 < rhat(x) < 1.01


def test_rhat_flags_shifted_chain():
    # One of four chains shifted by 1 sd: the variance of the 8 split-chain means is about
    # (6 * 0.25^2 + 2 * 0.75^2) / 7 = 0.21 (in sd^2), so R ~ sqrt(1 + 0.21) ~ 1.10 > 1.05.
    x = np.random.default_rng(13).normal(size=(4, 1000))
    x[2] += 1.0
    assert rhat(x) > 1.05
    assert rhat(x, method="bulk") > 1.05


def test_folded_rhat_catches_different_spread():
    # Same mean, one chain with 3 times the sd: the chain means of the rank-normalised draws
    # agree (symmetric about the common median), so the bulk R-hat stays near 1; |x - median|
    # is larger in the wide chain, so the folded R-hat, and hence the default, exceeds 1.05.
    x = np.random.default_rng(14).normal(size=(4, 1000))
    x[1] *= 3.0
    assert rhat(x, method="bulk") < 1.01
    assert rhat(x, method="folded") > 1.05
    assert rhat(x) == rhat(x, method="folded")


def test_rhat_constant_chains():
    assert math.isnan(rhat(np.ones((3, 50))))
    # every chain constant but the chains differ: infinitely far from agreement
    assert rhat(np.repeat([[0.0], [1.0]], 40, axis=1)) == math.inf


# --------------------------------------------------------------------------------- MCSE

def test_mcse_mean_iid_normal():
    # sd / sqrt(N) is the MCSE of independent draws. Batch means: with K = 4 * 200 batches of
    # b = 200, the estimated sigma has relative sd about sqrt(1 / (2K)) = 2.5% (sigma^2 is a
    # chi-square with K - 1 df scaled); tolerance 10% is 4 sd. ESS: tau from a few lags of
    # noise, relative sd of sqrt(tau) well under 1%; tolerance 4%.
    x = np.random.default_rng(21).normal(size=(4, 40_000))
    expected = x.std(ddof=1) / math.sqrt(x.size)
    assert mcse_mean(x, method="batch") == pytest.approx(expected, rel=0.10)
    assert mcse_mean(x, method="ess") == pytest.approx(expected, rel=0.04)


def test_mcse_mean_ar1():
    # AR(1), a = 0.5: stationary sd 1/sqrt(1 - a^2), tau = 3 (closed form above), so
    # MCSE = sd sqrt(tau / N). Batch means: K = 4 * 316 batches, relative sd about
    # sqrt(1 / (2K)) = 2%, bias of order -2 sum_k k rho_k / (b tau) = -0.4%: tolerance 8%
    # (4 sd). ESS: relative sd half that of tau (1%, see test_ess_of_ar1...): tolerance 3%.
    a = 0.5
    x = ar1(np.random.default_rng(22), a, 4, 100_000)
    expected = math.sqrt(ar1_tau(a) / x.size) / math.sqrt(1.0 - a * a)
    assert mcse_mean(x, method="batch") == pytest.approx(expected, rel=0.08)
    assert mcse_mean(x, method="ess") == pytest.approx(expected, rel=0.03)


def test_mcse_mean_batch_hand_computation():
    # Two chains of 9 draws: b = 3, three batches per chain. Batch means 2, 5, 8 and 11, 14, 17
    # (chain 2 is chain 1 + 9); their mean 9.5, sum of squares 2 * (56.25 + 20.25 + 2.25) =
    # 157.5, sigma^2 = 3 * 157.5 / 5 = 94.5, MCSE = sqrt(94.5 / 18).
    x = np.vstack([np.arange(1.0, 10.0), np.arange(10.0, 19.0)])
    assert mcse_mean(x, method="batch") == pytest.approx(math.sqrt(94.5 / 18), rel=1e-12)


def test_mcse_proportion_iid_and_floor():
    # Binomial: p = 0.25 over N = 400 -> sqrt(0.25 * 0.75 / 400).
    ind = np.tile([1.0, 0.0, 0.0, 0.0], (4, 25))
    assert mcse_proportion(ind, iid=True) == pytest.approx(math.sqrt(0.1875 / 400), rel=1e-12)
    # Mid-p ties count half: mean (0.5 + 0 + 1 + 0) / 4 = 0.375 -> sqrt(0.375 * 0.625 / 400).
    mid = np.tile([0.5, 0.0, 1.0, 0.0], (4, 25))
    assert mcse_proportion(mid, iid=True) == pytest.approx(math.sqrt(0.234375 / 400), rel=1e-12)
    # Floors: an estimate of 0 or 1 from N = 1000 draws keeps the variance of one draw's
    # resolution, (1/1002)(1 - 1/1002), so MCSE = sqrt(1001 / 1002^2 / 1000) in both modes.
    floor = math.sqrt(1001.0 / 1002.0 ** 2 / 1000.0)
    for value in (0.0, 1.0):
        const = np.full((4, 250), value)
        assert mcse_proportion(const, iid=True) == pytest.approx(floor, rel=1e-12)
        assert mcse_proportion(const, iid=False) == pytest.approx(floor, rel=1e-12)


def test_mcse_proportion_markov_chain():
    # Two-state chain, p = 0.2, lam = 0.6: tau = 4, MCSE = sqrt(p (1 - p) tau / N). Relative sd
    # of the ESS-based value: half that of tau, about 1.6% (see the binary ESS test at this N);
    # tolerance 7%. The i.i.d. formula must be too small by about sqrt(tau) = 2.
    p, lam = 0.2, 0.6
    x = two_state(np.random.default_rng(31), p, lam, 4, 20_000)
    expected = math.sqrt(p * (1 - p) * ar1_tau(lam) / x.size)
    assert mcse_proportion(x) == pytest.approx(expected, rel=0.07)
    assert mcse_proportion(x, iid=True) == pytest.approx(expected / 2.0, rel=0.07)


def test_mcse_proportion_rejects_values_outside_unit_interval():
    with pytest.raises(DataError, match=r"\[0, 1\]"):
        mcse_proportion([0.0, 1.0, 2.0, 0.0])


# --------------------------------------------------------------------------- draws_needed

@pytest.mark.parametrize("target, expected", [
    # METHODS.md 6.1, p = 0.05 so p (1 - p) = 0.0475:
    (0.005, 1900),                                  # 0.0475 / 0.005^2 = 1900
    (0.0025, 7600),                                 # 0.0475 / 0.0025^2 = 7600
    (0.001, 47500),                                 # 0.0475 / 0.001^2 = 47500
    (0.005 / stats.norm.ppf(0.975), 7299),          # 0.0475 (1.95996 / 0.005)^2 = 7298.8 -> 7299
    (0.005 / stats.norm.ppf(0.995), 12607),         # 0.0475 (2.57583 / 0.005)^2 = 12606.3 -> 12607
])
def test_draws_needed_reproduces_methods_table(target, expected):
    assert draws_needed(0.05, target) == expected


def test_draws_needed_scales_with_autocorrelation_and_checks_input():
    # METHODS 6.1: for MCMC multiply by tau = N / ESS; tau = 3 gives 3 * 1900.
    assert draws_needed(0.05, 0.005, ess_per_draw=1.0 / 3.0) == 5700
    # the result really meets the target, and one draw fewer does not
    n = draws_needed(0.3, 0.0037)
    assert math.sqrt(0.21 / n) <= 0.0037 < math.sqrt(0.21 / (n - 1))
    assert draws_needed(0.0, 0.01) == 1
    # 0.1 * 0.9 / 0.01^2 = 900 exactly, which float arithmetic gives as 900.0000000000001;
    # 0.01 * 0.99 / 0.001^2 = 9900 exactly (float: 9900.000000000002).
    assert draws_needed(0.1, 0.01) == 900
    assert draws_needed(0.01, 0.001) == 9900
    for args in [(1.5, 0.01), (0.05, 0.0), (0.05, -1.0), (0.05, 0.01, 0.0)]:
        with pytest.raises(DataError):
            draws_needed(*args)


# ------------------------------------------------------------------------ chain_agreement

def test_chain_agreement_flags_a_stuck_chain():
    # Three chains at p = 0.3 and one stuck in a part of the support where p = 0.15, all with
    # tau = 4 (lam = 0.6), 2000 draws: ESS ~ 500 per chain, sd of a chain's estimate about
    # sqrt(0.21 / 500) = 0.02, so the stuck chain is ~6 sd off and X^2 ~ 30 on 3 df.
    rng = np.random.default_rng(41)
    x = np.vstack([two_state(rng, 0.3, 0.6, 3, 2000), two_state(rng, 0.15, 0.6, 1, 2000)])
    res = chain_agreement(x)
    assert isinstance(res, ChainAgreementResult)
    assert res.df == 3
    assert res.pvalue < 1e-4
    assert int(np.argmax(np.abs(res.z_scores))) == 3
    np.testing.assert_allclose(res.estimates, x.mean(axis=1))
    assert res.statistic == pytest.approx(float(np.sum(res.z_scores ** 2)))


def test_chain_agreement_flags_a_chain_with_constant_indicator():
    # A chain that never reaches the rejection region (indicator all 0) beside three chains at
    # p = 0.3: it has no ESS of its own and borrows the others' median relative ESS.
    rng = np.random.default_rng(42)
    x = np.vstack([two_state(rng, 0.3, 0.6, 3, 1000), np.zeros((1, 1000))])
    res = chain_agreement(x)
    assert res.pvalue < 1e-6
    assert int(np.argmax(np.abs(res.z_scores))) == 3
    assert res.ess[3] == pytest.approx(np.median(res.ess[:3]))


def test_chain_agreement_accepts_homogeneous_chains():
    # Four chains of the same sticky chain (tau = 4). A priori the p-value is about uniform, so
    # the risk that a seed fails this check is about 1%; the seed is fixed.
    x = two_state(np.random.default_rng(43), 0.3, 0.6, 4, 2000)
    assert chain_agreement(x).pvalue > 0.01
    # All chains constant at the same value: nothing to disagree about.
    res = chain_agreement(np.zeros((4, 100)))
    assert res.statistic == 0.0 and res.pvalue == 1.0


def test_chain_agreement_false_alarm_rate():
    # Calibration of the chi-square approximation with per-chain ESS: 300 replicates of 4
    # homogeneous sticky chains (p = 0.2, tau = 4, 1000 draws). The rate of p-values below 0.05
    # must lie in 0.05 +- 3 sqrt(0.0475 / 300) = [0.012, 0.088]. Ignoring the autocorrelation
    # (ESS = draws) would inflate X^2 about 4-fold and push the rate above one half.
    n_rep = 300
    x = two_state(np.random.default_rng(44), 0.2, 0.6, 4 * n_rep, 1000).reshape(n_rep, 4, 1000)
    rate = np.mean([chain_agreement(rep).pvalue < 0.05 for rep in x])
    assert 0.012 <= rate <= 0.088


def test_chain_agreement_needs_two_chains():
    with pytest.raises(DataError, match="at least 2 chains"):
        chain_agreement(np.zeros(100))


# ----------------------------------------------------------------------------- edge cases

def test_constant_series_give_nan_without_warning():
    const = np.full((2, 50), 7.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for method in ("mean", "identity", "bulk", "tail"):
            assert math.isnan(ess(const, method=method))
        assert math.isnan(rhat(const))
        assert mcse_mean(const) == 0.0 and mcse_mean(const, method="ess") == 0.0


def test_tail_ess_with_ties_at_the_maximum():
    # 0/1 draws with p = 0.2: q95 = 1, so the indicator x <= q95 is always true and counts as
    # S draws; the tail ESS is then min(ESS(x <= q05), S) with x <= q05 = 1 - x, whose ESS
    # equals that of x (same autocorrelation), i.e. ess(x, "mean") unless that exceeds S.
    x = (np.random.default_rng(51).random((4, 500)) < 0.2).astype(float)
    assert ess(x, method="tail") == pytest.approx(min(ess(x, method="mean"), x.size), rel=1e-12)


def test_too_short_chains_warn_and_give_nan():
    x = np.array([[1.0, 2.0, 3.0], [2.0, 3.0, 1.0]])
    for call in (lambda: ess(x), lambda: ess(x, method="bulk"), lambda: rhat(x),
                 lambda: mcse_mean(x), lambda: mcse_proportion(x / 3.0)):
        with pytest.warns(RuntimeWarning, match="at least 4 draws"):
            assert math.isnan(call())
    with pytest.warns(RuntimeWarning, match="at least 4 draws"):
        res = chain_agreement(x / 3.0)
    assert math.isnan(res.pvalue)
    # independent draws need no chain length: the binomial value is defined
    assert mcse_proportion(x / 3.0, iid=True) > 0.0


def test_one_dimensional_input_is_one_chain():
    x = np.random.default_rng(61).poisson(2.0, size=400).astype(float)
    for method in ("mean", "identity", "bulk", "tail"):
        assert ess(x, method=method) == ess(x[np.newaxis, :], method=method)
    assert rhat(x) == rhat(x[np.newaxis, :])
    assert mcse_mean(x) == mcse_mean(x[np.newaxis, :])
    assert autocorrelation(x).shape == (1, 400)


def test_unequal_chains_are_truncated_to_the_shortest():
    rng = np.random.default_rng(62)
    chains = [rng.normal(size=n) for n in (120, 100, 137)]
    trimmed = np.vstack([c[:100] for c in chains])
    for method in ("mean", "bulk", "tail"):
        assert ess(chains, method=method) == ess(trimmed, method=method)
    assert rhat(chains) == rhat(trimmed)
    assert mcse_mean(chains) == mcse_mean(trimmed)
    ind = [(c > 0).astype(float) for c in chains]
    assert mcse_proportion(ind) == mcse_proportion(np.vstack([i[:100] for i in ind]))
    np.testing.assert_array_equal(chain_agreement(ind).estimates,
                                  np.vstack([i[:100] for i in ind]).mean(axis=1))


@pytest.mark.parametrize("bad, match", [
    (np.zeros((2, 3, 4)), "1-D .* or 2-D"),
    (np.zeros((2, 0)), "no draws"),
    (np.array([[0.0, np.nan, 1.0, 2.0]]), "NaN or infinite"),
    ([["a", "b", "c", "d"]], "real numbers"),
])
def test_invalid_draws_raise(bad, match):
    with pytest.raises(DataError, match=match):
        ess(bad)


def test_unknown_methods_raise():
    x = np.zeros((2, 10))
    with pytest.raises(DataError, match="method"):
        ess(x, method="median")
    with pytest.raises(DataError, match="method"):
        rhat(x, method="split")
    with pytest.raises(DataError, match="method"):
        mcse_mean(x, method="overlapping")
