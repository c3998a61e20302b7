"""Calibration of the Monte Carlo standard errors that ``mcexact`` reports: a fast version of
``benchmarks/calibration.py``.

Over many seeds, the interval ``p_mc +/- 1.96 MCSE`` of an honest error covers the exact value in
about 95% of runs and ``z = (p_mc - p_exact) / MCSE`` has mean near 0 and standard deviation near
1. Three checks of that kind:

* fit() itself, each engine at its default thinning, 32 seeds: the score test's p-value and the
  two-sided tail p-value of the estimates frame, with the errors fit() reports;
* unthinned Markov chains (autocorrelation time about 6), 200 seeds, with the error fit() uses
  (``montecarlo.mcse_of_indicator``). ``test_naive_chain_error_fails_the_check`` puts the naive
  binomial error sqrt(p (1 - p) / N), which treats the draws as independent, in its place and
  asserts that the same check catches it;
* a rare tail (about 3 expected hits), 200 seeds, where the Wald error is too small.

Tolerances are set from the binomial spread of a coverage over the runs (given beside each).

References, named beside each expected value:

* exact enumeration, ``mcexact.fit(..., method="enumerate")`` and ``exact_distribution``, for the
  exact p-values and tail probabilities (checked against brute force in tests/test_exact.py and
  tests/test_montecarlo.py);
* ``scipy.stats.t.interval`` for the Student t interval behind fit()'s unsure points;
* the Wald formula for a binomial proportion, restated here by hand.

Data: invented, drawn once from numpy.random.default_rng and listed literally.
"""

from __future__ import annotations

import dataclasses
import importlib
import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

import mcexact
from mcexact import Design, exact_distribution, montecarlo, plan
from mcexact.montecarlo import SamplerOptions, draw_direct, draw_mcmc, spawn_seeds

fit_module = importlib.import_module("mcexact.fit")

# 8 matched sets of 4 subjects, one case each; exposure 0..2. Drawn once with
# numpy.random.default_rng(6): z = rng.integers(0, 3, 32), then one case per set at
# rng.integers(0, 4). Exact score p-value 0.2008; the two-sided score cut 2 mu - t = 7.5 lies half
# way between support points, so the ranking of the support does not hinge on the moments the
# chains estimate, and the check is one of the Monte Carlo error of the indicator.
SETS_Y = [1, 0, 0, 0, 1, 0, 0, 0, 0, 1, 0, 0, 1, 0, 0, 0,
          0, 0, 1, 0, 0, 0, 0, 1, 0, 0, 1, 0, 0, 1, 0, 0]
SETS_Z = [1, 1, 1, 1, 2, 1, 1, 1, 1, 2, 0, 1, 1, 2, 2, 0,
          2, 2, 1, 0, 1, 0, 2, 2, 2, 0, 2, 2, 1, 2, 2, 2]

# fit()-level check: over 32 seeds the coverage of a calibrated error has a binomial sd of
# sqrt(0.95 * 0.05 / 32) = 0.039, so the floor 0.84 lies 2.9 sd below 0.95; the mean of z has sd
# about 1 / sqrt(32) = 0.18 (bound 0.6) and its sd about 1 / sqrt(64) = 0.125 (range 0.6-1.5).
SEEDS = 32
N_DRAWS = 2000
COVERAGE_FLOOR = 0.84
MEAN_Z_BOUND = 0.6
SD_Z_RANGE = (0.6, 1.5)


def sets_design() -> Design:
    return Design.from_arrays(SETS_Y, SETS_Z, strata=np.repeat(np.arange(8), 4),
                              interest_names=["z"])


@pytest.fixture(scope="module")
def exact_rows():
    """Exact score p-value and two-sided tail p-value, 2 min(P(T <= t), P(T >= t)) (exact
    enumeration through fit)."""
    r = mcexact.fit(sets_design(), method="enumerate", asymptotic=False)
    score = float(r.tests[(r.tests.effect == "z") & (r.tests.test == "score")].p_value.iloc[0])
    tail = float(r.estimates.p_value.iloc[0])
    assert 0.15 < score < 0.25 and 0.2 < tail < 0.3
    return score, tail


def z_summary(z) -> tuple[float, float, float]:
    """Coverage of p +/- 1.96 MCSE, mean z and sd z."""
    z = np.asarray(z, float)
    return float(np.mean(np.abs(z) <= 1.96)), float(np.mean(z)), float(np.std(z))


def calibrated(coverage: float, mean_z: float, sd_z: float) -> bool:
    return (coverage >= COVERAGE_FLOOR and abs(mean_z) <= MEAN_Z_BOUND
            and SD_Z_RANGE[0] <= sd_z <= SD_Z_RANGE[1])


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_fit_mcse_is_calibrated(exact_rows, engine):
    """fit() with its default thinning, over 32 seeds, against exact enumeration: the score
    test's p_value +/- 1.96 mcse (tests frame) and the two-sided tail p_value +/- 1.96
    mcse_p_value (estimates frame) each have coverage >= 0.84, |mean z| <= 0.6 and
    0.6 <= sd z <= 1.5."""
    score_exact, tail_exact = exact_rows
    score_z, tail_z = [], []
    for seed in range(SEEDS):
        r = mcexact.fit(sets_design(), method=engine, rng=seed, asymptotic=False, tilted=False,
                        n_draws=N_DRAWS, n_chains=4, progress=False)
        row = r.tests[(r.tests.effect == "z") & (r.tests.test == "score")].iloc[0]
        est = r.estimates.iloc[0]
        assert row.engine == engine and row.mcse > 0 and est.mcse_p_value > 0
        score_z.append((row.p_value - score_exact) / row.mcse)
        tail_z.append((est.p_value - tail_exact) / est.mcse_p_value)
    for z in (score_z, tail_z):
        assert calibrated(*z_summary(z)), (z_summary(score_z), z_summary(tail_z))


# ============================================================================ autocorrelated chains

CHAIN_RUNS = 200
# Unthinned swap chains on sets_design(): the upper-tail indicator has an autocorrelation time
# of about 6 (measured on 400,000 draws), so 2,000 draws hold about 330 effective ones.
CHAIN_DRAWS = 2000
# Over 200 runs the coverage of a calibrated error has sd 0.015: floor 0.90 (3 sd); the mean of z
# has sd 0.07 (bound 0.25) and its sd about 0.05 (range 0.85-1.2).
CHAIN_COVERAGE_FLOOR = 0.90
CHAIN_MEAN_Z_BOUND = 0.25
CHAIN_SD_Z_RANGE = (0.85, 1.2)


def chain_check() -> tuple[float, float, float]:
    """z of the upper tail P(T >= t) from unthinned Markov chains (thin = 1), with the error of
    montecarlo.mcse_of_indicator (looked up on the module when called, so that a test can put
    another error in its place), against exact enumeration."""
    d = sets_design()
    ex = exact_distribution(d)
    t = int(ex.observed[0])
    p_exact = float(ex.pmf()[ex.support[:, 0] >= t].sum())
    assert 0.1 < p_exact < 0.15
    opts = SamplerOptions(n_draws=CHAIN_DRAWS, n_chains=4, n_warmup=1000, thin=1)
    z = []
    for seed in range(CHAIN_RUNS):
        dist = draw_mcmc(d, opts, spawn_seeds(seed, 4)).to_distribution()
        values = (dist.support[:, 0] >= t).astype(float)
        p = float(np.concatenate([values[i] for i in dist.chain_index]).mean())
        z.append((p - p_exact) / montecarlo.mcse_of_indicator(dist, values))
    return z_summary(z)


def chain_calibrated(coverage: float, mean_z: float, sd_z: float) -> bool:
    return (coverage >= CHAIN_COVERAGE_FLOOR and abs(mean_z) <= CHAIN_MEAN_Z_BOUND
            and CHAIN_SD_Z_RANGE[0] <= sd_z <= CHAIN_SD_Z_RANGE[1])


def test_chain_mcse_is_calibrated_when_autocorrelated():
    """Unthinned chains, 200 seeds: coverage >= 0.90, |mean z| <= 0.25, 0.85 <= sd z <= 1.2."""
    result = chain_check()
    assert chain_calibrated(*result), result


def naive_mcse(dist, values) -> float:
    """The broken error: every draw treated as independent, sqrt(v / N), whatever the engine."""
    draws = np.concatenate([np.asarray(values, float)[idx] for idx in dist.chain_index])
    return math.sqrt(max(float(draws.var(ddof=1)), 1.0 / draws.size) / draws.size)


def test_naive_chain_error_fails_the_check(monkeypatch):
    """The same check with the naive binomial error in place of mcse_of_indicator (on the module,
    and so in fit() too): the chains' estimates are as before, their errors too small by the
    square root of the autocorrelation time, and the check fails."""
    monkeypatch.setattr(montecarlo, "mcse_of_indicator", naive_mcse)
    monkeypatch.setattr(fit_module, "mcse_of_indicator", naive_mcse)
    coverage, mean_z, sd_z = chain_check()
    assert not chain_calibrated(coverage, mean_z, sd_z)
    assert coverage < 0.8 and sd_z > 1.5, (coverage, mean_z, sd_z)
    # fit() reports the naive error too: the tail's mcse_p_value is twice the naive error of the
    # smaller tail (reference: naive_mcse by hand on fit's own draws).
    r = mcexact.fit(sets_design(), method="mcmc", rng=0, asymptotic=False, tilted=False,
                    n_draws=CHAIN_DRAWS, thin=1, progress=False)
    dist = r.effect_distributions["z"]
    ge = (dist.support[:, 0] >= int(dist.observed[0])).astype(float)
    assert r.estimates.mcse_p_value.iloc[0] == pytest.approx(2 * naive_mcse(dist, ge), rel=1e-12)


# ============================================================================ rare tails

# 40 invented subjects, dose 0..5, binary response, intercept only: drawn once with
# numpy.random.default_rng(20261201): z = rng.integers(0, 6, 40), then
# y = rng.random(40) < 0.2 + 0.05 z (the first design of benchmarks/calibration.py).
RARE_Y = [0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 1, 0, 0, 0, 1, 1, 1, 1, 1, 0,
          0, 0, 0, 1, 0, 0, 0, 1, 0, 1, 1, 0, 0, 1, 1, 0, 0, 1, 1, 1]
RARE_Z = [2, 3, 1, 0, 3, 2, 2, 2, 5, 3, 2, 0, 2, 2, 5, 2, 0, 1, 5, 3,
          1, 0, 3, 1, 0, 1, 1, 5, 2, 3, 5, 1, 5, 3, 4, 3, 2, 3, 4, 2]
RARE_RUNS = 200
RARE_DRAWS = 4000


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_rare_tail_error_covers_few_hits(engine):
    """A tail of exact probability below 0.001 (exact enumeration): about 3 hits expected in
    4,000 draws. Over 200 seeds, p +/- 1.96 mcse_of_indicator covers the exact tail in at least
    95% of runs. For independent draws the Wald error sqrt(max(p (1 - p), 1 / (N + 2)) / N) (the
    error before the pseudo-draws of Agresti & Coull 1998) covers it in fewer: it is too small
    when the estimate is low by chance, and 0 hits leave it at 1 / N."""
    d = Design.from_arrays(RARE_Y, RARE_Z, interest_names=["dose"])
    ex = exact_distribution(d)
    pmf, T = ex.pmf(), ex.support[:, 0]
    upper = np.cumsum(pmf[::-1])[::-1]
    c = int(T[np.flatnonzero(upper < 0.001)[0]])
    p_exact = float(pmf[T >= c].sum())
    assert 1.5 < p_exact * RARE_DRAWS < 4.0, p_exact
    net = plan(d)._network
    opts = SamplerOptions(n_draws=RARE_DRAWS, n_chains=4, n_warmup=1000, thin=10)
    ours = wald = 0
    for seed in range(RARE_RUNS):
        seeds = spawn_seeds(seed, 4)
        s = draw_direct(net, d, opts, seeds) if engine == "direct" else draw_mcmc(d, opts, seeds)
        dist = s.to_distribution()
        values = (dist.support[:, 0] >= c).astype(float)
        err = montecarlo.mcse_of_indicator(dist, values)
        p = float(np.concatenate([values[i] for i in dist.chain_index]).mean())
        wald_err = math.sqrt(max(p * (1 - p), 1 / (RARE_DRAWS + 2)) / RARE_DRAWS)
        ours += abs(p - p_exact) <= 1.96 * err
        wald += abs(p - p_exact) <= 1.96 * wald_err
    assert ours / RARE_RUNS >= 0.95, (ours, wald)
    if engine == "direct":
        assert wald / RARE_RUNS < 0.95, (ours, wald)


# ============================================================================ unsure points

def test_unsure_points_are_those_whose_student_t_interval_holds_zero():
    """fit()'s unsure points (support points whose side of the observed statistic the draws do not
    settle): exactly those whose 99% Student t interval (scipy.stats.t.interval, B' - 1 degrees of
    freedom, scale sd / sqrt(B') of the finite batch values) around the full run's difference
    contains 0; never the observed point; not a point with fewer than 2 finite batch values."""
    rng = np.random.default_rng(5)
    n_points, n_batches = 40, 10
    full = rng.normal(0.0, 1.0, n_points)
    diffs = full + rng.normal(0.0, 1.0, (n_batches, n_points)) * rng.uniform(0.2, 2.0, n_points)
    diffs[0, :5] = np.inf            # never drawn in the first batch
    diffs[:9, 5] = np.nan            # one finite batch value
    result = SimpleNamespace(values=full + 3.0, observed_value=3.0)
    dist = SimpleNamespace(n_points=n_points, observed_index=7)
    got = fit_module._unsure_points(result, list(diffs), dist)
    expect = np.zeros(n_points, bool)
    for j in range(n_points):
        finite = diffs[np.isfinite(diffs[:, j]), j]
        if j == 7 or finite.size < 2:
            continue
        lo, hi = stats.t.interval(0.99, finite.size - 1, loc=full[j],
                                  scale=finite.std(ddof=1) / math.sqrt(finite.size))
        expect[j] = lo < 0 < hi
    np.testing.assert_array_equal(got, expect)
    assert 3 <= expect.sum() <= n_points - 3       # the example has both kinds


# ============================================================================ lugsail batch means

def test_lugsail_batch_means_equal_a_hand_computation():
    """mcse_mean(method="lugsail") = sqrt((2 sigma2_b - sigma2_{b/3}) / N), with the batch-means
    variances sigma2_b = b var(batch means) (ddof 1, batches of all chains pooled) computed here
    with numpy reshapes: b = floor(sqrt(100)) = 10 and b / 3 -> 3 (the last draw of each chain
    left out)."""
    from mcexact.diagnostics import mcse_mean

    rng = np.random.default_rng(3)
    x = np.cumsum(rng.normal(size=(2, 100)), axis=1) * 0.1 + rng.normal(size=(2, 100))

    def batch_variance(size):
        k = 100 // size
        return size * np.var(x[:, :k * size].reshape(-1, size).mean(axis=1), ddof=1)

    lugsail = 2 * batch_variance(10) - batch_variance(3)
    assert lugsail > 0
    assert mcse_mean(x, method="lugsail") == pytest.approx(math.sqrt(lugsail / x.size), rel=1e-12)
    assert mcse_mean(x, method="batch") == pytest.approx(math.sqrt(batch_variance(10) / x.size),
                                                         rel=1e-12)


def test_lugsail_offsets_the_bias_of_short_batches():
    """AR(1) chains x_t = 0.9 x_{t-1} + e_t (unit normal innovations), 4 chains of 400 draws:
    batches of 20 draws are about one autocorrelation time (19) long. The variance of the mean
    times N has the closed form 1 / (1 - 0.9)^2 = 100; averaged over 300 replicates, plain batch
    means give about 57% of it, the lugsail form (Vats & Flegal 2022) about 88%. Asserted: batch
    below 70%, lugsail within 80-110%."""
    from scipy.signal import lfilter

    from mcexact.diagnostics import mcse_mean

    rng = np.random.default_rng(11)
    rho, truth = 0.9, 1.0 / (1.0 - 0.9) ** 2
    ratios = {"batch": [], "lugsail": []}
    for _ in range(300):
        x = lfilter([1.0], [1.0, -rho], rng.normal(size=(4, 600)), axis=1)[:, 200:]
        for method, out in ratios.items():
            out.append(mcse_mean(x, method=method) ** 2 * x.size / truth)
    assert np.mean(ratios["batch"]) < 0.7, np.mean(ratios["batch"])
    assert 0.8 <= np.mean(ratios["lugsail"]) <= 1.1, np.mean(ratios["lugsail"])


# ============================================================================ block chains

# 36 invented subjects: outcome y, exposure z in 0..4 and a nuisance covariate w in 0..2 besides
# the intercept (the third design of benchmarks/calibration.py: numpy.random.default_rng(20261201)
# after the other two designs' draws, w = rng.integers(0, 3, 36), z = rng.integers(0, 5, 36),
# y = rng.random(36) < 0.3). Exact enumeration: score p-value 0.8721, null mean of T 19.0885 and
# observed T = 20, so the score test's cut 2 mu - t = 18.177 lies 0.18 from the support point 18
# (probability 0.119): a chain must estimate mu to within 0.09 to rank that point, and its plain
# draw mean (sd 0.049 at 4,000 draws in benchmarks/calibration.py's setting) often cannot.
NUIS_Y = [0, 0, 0, 1, 1, 0, 0, 1, 0, 0, 0, 1, 0, 0, 1, 0, 0, 0,
          0, 0, 0, 0, 0, 0, 1, 1, 0, 0, 0, 0, 1, 0, 0, 0, 0, 1]
NUIS_Z = [1, 2, 1, 0, 3, 0, 3, 3, 3, 3, 2, 2, 2, 0, 4, 2, 4, 2,
          4, 2, 4, 3, 2, 1, 2, 2, 3, 3, 1, 0, 3, 3, 1, 3, 1, 1]
NUIS_W = [0, 1, 2, 0, 1, 0, 1, 0, 0, 2, 2, 1, 0, 1, 2, 1, 0, 2,
          0, 0, 0, 1, 2, 1, 2, 0, 0, 0, 1, 2, 0, 1, 2, 1, 2, 2]
NUIS_DRAWS = 4000


def nuisance_design() -> Design:
    return Design.from_arrays(NUIS_Y, NUIS_Z, NUIS_W, interest_names=["z"])


def block_chain_check() -> tuple[float, float, float]:
    """fit()'s block chains (default thinning), 32 seeds, 4,000 draws: z of the score test's
    p-value against exact enumeration."""
    d = nuisance_design()
    exact = mcexact.fit(d, method="enumerate", asymptotic=False).tests
    p_exact = float(exact[(exact.effect == "z") & (exact.test == "score")].p_value.iloc[0])
    assert abs(p_exact - 0.8721) < 1e-4
    z = []
    for seed in range(SEEDS):
        r = mcexact.fit(d, method="mcmc", rng=seed, asymptotic=False, tilted=False,
                        n_draws=NUIS_DRAWS, n_chains=4, progress=False)
        row = r.tests[(r.tests.effect == "z") & (r.tests.test == "score")].iloc[0]
        assert row.engine == "mcmc" and r.effect_distributions["z"].info["move"] == "block"
        z.append((row.p_value - p_exact) / row.mcse)
    return z_summary(z)


def test_block_chain_mcse_is_calibrated_on_a_nuisance_design():
    """Block chains estimate the score test's null moments from Rao-Blackwellized records; over
    32 seeds the score p-value +/- 1.96 mcse is calibrated by the fit()-level tolerances above."""
    result = block_chain_check()
    assert calibrated(*result), result


def test_plain_draw_moments_fail_the_block_chain_check(monkeypatch):
    """The same check with the null moments taken from the draws of T (the Rao-Blackwellized
    records dropped): the point near the cut is then counted half in most runs, so those
    p-values sit about half its probability below the exact one, inside their (bias-aware)
    error but always on the same side: mean z far below 0 (measured: -1.57 over these seeds;
    with the records -0.24)."""
    plain = montecarlo.Sample.to_distribution

    def without_records(self):
        return plain(dataclasses.replace(self, moment_draws=None))

    monkeypatch.setattr(montecarlo.Sample, "to_distribution", without_records)
    coverage, mean_z, sd_z = block_chain_check()
    assert not calibrated(coverage, mean_z, sd_z)
    assert mean_z < -1.0, (coverage, mean_z, sd_z)


def test_rao_blackwellized_moments_beat_the_draw_moments():
    """Over 20 seeds of block chains on nuisance_design() (4 chains, 2,000 draws, thin 10): the
    Rao-Blackwellized null mean and variance of T (montecarlo.moments_of_draws) are within 4 of
    their own standard errors of the exact ones (exact enumeration: ConditionalDistribution.mean
    and .cov), and the spread of the mean over seeds is under 0.6 of that of the plain draw
    mean (measured: about 0.34)."""
    d = nuisance_design()
    ex = exact_distribution(d)
    mu, var = float(ex.mean()[0]), float(ex.cov()[0, 0])
    opts = SamplerOptions(n_draws=2000, n_chains=4, n_warmup=500, thin=10)
    rb_mean, rb_var, plain_mean = [], [], []
    for seed in range(20):
        s = draw_mcmc(d, opts, spawn_seeds(seed, 4))
        assert [r.shape for r in s.moment_draws] == [(500, 2)] * 4
        m, c = montecarlo.moments_of_draws(s.moment_draws, s.observed)
        rb_mean.append(m[0])
        rb_var.append(c[0, 0])
        plain_mean.append(np.concatenate(s.chains)[:, 0].mean())
        dist = s.to_distribution()
        np.testing.assert_allclose(dist.null_mean, m, rtol=0, atol=1e-12)
    rb_mean, rb_var, plain_mean = map(np.asarray, (rb_mean, rb_var, plain_mean))
    for est, truth in ((rb_mean, mu), (rb_var, var)):
        se = est.std(ddof=1) / math.sqrt(est.size)
        assert abs(est.mean() - truth) < 4 * se, (est.mean(), truth, se)
    assert rb_mean.std() < 0.6 * plain_mean.std(), (rb_mean.std(), plain_mean.std())


# An invented binary second exposure for the 36 subjects of nuisance_design().
NUIS_X = [1, 0, 0, 1, 0, 1, 1, 0, 0, 0, 1, 0, 0, 1, 0, 0, 1, 0,
          1, 1, 0, 0, 1, 0, 0, 1, 0, 0, 0, 1, 1, 0, 1, 0, 0, 1]


def test_rao_blackwellized_moments_of_two_columns_match_exact_ones():
    """Two interest columns (z and NUIS_X) with the nuisance covariate: over 12 seeds of block
    chains, every entry of the Rao-Blackwellized null mean and covariance of T is within 4 of its
    own standard errors (over seeds) of the exact one (exact enumeration); the sampled
    distribution carries them as null_cov, which the score test uses."""
    d = Design.from_arrays(NUIS_Y, np.column_stack([NUIS_Z, NUIS_X]), NUIS_W,
                           interest_names=["z", "x"])
    ex = exact_distribution(d)
    opts = SamplerOptions(n_draws=2000, n_chains=4, n_warmup=500, thin=10)
    means, covs = [], []
    for seed in range(12):
        s = draw_mcmc(d, opts, spawn_seeds(seed, 4))
        m, c = montecarlo.moments_of_draws(s.moment_draws, s.observed)
        means.append(m)
        covs.append(c)
        np.testing.assert_allclose(c, c.T, rtol=0, atol=1e-12)
        dist = s.to_distribution()
        np.testing.assert_allclose(dist.null_cov, c, rtol=0, atol=1e-12)
    for est, truth in ((np.array(means), ex.mean()), (np.array(covs), ex.cov())):
        se = est.std(axis=0, ddof=1) / math.sqrt(est.shape[0])
        assert np.all(np.abs(est.mean(axis=0) - truth) < 4 * se), (est.mean(axis=0), truth, se)


def test_a_move_that_cannot_change_y_records_a_point_mass():
    """Blocks whose fibers are single points leave y fixed: with one trial per row and the
    nuisance covariate 1, 2, 4, ..., 32, a block's nuisance sum names its events (binary digits).
    Each record's moments are then those of a point mass at T: measured from ref = T - 2 (the
    kernel's own argument), every record is (2, 4) exactly, the mean over its `thin` moves."""
    from scipy.special import gammaln

    from mcexact import _sampler

    y = np.array([1, 0, 1, 0, 1, 0], np.int64)
    z = np.array([[3], [1], [4], [1], [5], [9]], np.int64)
    w = np.array([[1], [2], [4], [8], [16], [32]], np.int64)
    t = int(y @ z[:, 0])
    out = np.zeros((20, 1), np.int64)
    moments = np.full((20, 2), np.nan)
    counters = np.zeros(3, np.int64)
    _sampler.run_chain(np.random.PCG64(1), y, np.ones(6, np.int64), z, w, np.zeros(6, np.int64),
                       np.array([0], np.int64), np.array([6], np.int64), np.zeros(6),
                       gammaln(np.arange(3) + 1.0), False, 4, 5, 3, out, counters, 2, 2, True,
                       moments, np.array([t - 2], np.int64))
    assert counters[0] == 5 + 3 * 20 and counters[1] == 0
    np.testing.assert_array_equal(out, np.full((20, 1), t))
    np.testing.assert_array_equal(moments, np.tile([2.0, 4.0], (20, 1)))


def test_each_part_says_where_its_null_moments_come_from(monkeypatch):
    """method["parts"][...]["null_moments"]: "exact" for direct draws (the network's moments) and
    swap chains (closed form), "rao_blackwellized" for block chains, "draws" for block chains
    without the records; the HTML report's engine table says the same."""
    fast = dict(n_draws=400, asymptotic=False, tilted=False, progress=False, rng=1)
    kinds = {
        "exact": [mcexact.fit(nuisance_design(), method="direct", **fast),
                  mcexact.fit(sets_design(), method="mcmc", **fast)],
        "rao_blackwellized": [mcexact.fit(nuisance_design(), method="mcmc", **fast)],
    }
    monkeypatch.setattr(montecarlo, "_RB_MOMENTS", False)
    kinds["draws"] = [mcexact.fit(nuisance_design(), method="mcmc", **fast)]
    shown = {"exact": "exact</td>", "rao_blackwellized": "Rao-Blackwellized over every chain move",
             "draws": "estimated from the draws"}
    for kind, results in kinds.items():
        for r in results:
            assert r.method["parts"]["z"]["null_moments"] == kind
            assert shown[kind] in r.to_html(), kind
    exact = mcexact.fit(nuisance_design(), asymptotic=False)
    assert "null_moments" not in exact.method["parts"]["z"]


@pytest.mark.parametrize("sigma, bias", [(0.01, 0.0), (0.01, 0.002), (0.01, 0.01), (0.003, 0.03),
                                         (0.02, 0.2)])
def test_bias_aware_error_covers_the_worst_offset_at_95_percent(sigma, bias):
    """fit._bias_aware_mcse: for an estimate off by exactly `bias` with normal noise `sigma`, the
    interval +/- 1.96 MCSE covers the truth with probability 0.95 (scipy.stats.norm, by hand:
    P(|bias + sigma Z| <= h) = Phi((h - bias) / sigma) - Phi((-h - bias) / sigma)), more for any
    smaller offset; it is sigma without bias and never above sqrt(sigma^2 + bias^2), the
    worst-case root-mean-square error used before."""
    err = fit_module._bias_aware_mcse(sigma, bias)
    h = 1.959963984540054 * err

    def coverage(offset):
        return stats.norm.cdf((h - offset) / sigma) - stats.norm.cdf((-h - offset) / sigma)

    assert coverage(bias) == pytest.approx(0.95, abs=1e-9)
    assert all(coverage(f * bias) >= 0.95 - 1e-9 for f in (0.0, 0.3, 0.7))
    assert err <= math.hypot(sigma, bias) + 1e-15
    if bias == 0.0:
        assert err == sigma


def test_bias_aware_error_edge_cases():
    """No random error: the interval must reach the offset itself (bias / 1.96); an unknown
    error stays unknown."""
    assert fit_module._bias_aware_mcse(0.0, 0.05) == pytest.approx(0.05 / 1.959963984540054)
    assert math.isnan(fit_module._bias_aware_mcse(float("nan"), 0.05))
