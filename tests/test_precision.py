"""Tests of sampling to a precision, convergence verdicts, tilted refinement, validation and the
calibration of Monte Carlo errors.

Covered: ``mcexact.fit``'s ``target_mcse``, ``time_budget`` and ``max_draws``, and the rounds of
``montecarlo.PartSampler`` behind them; the ``ess, rhat, verdict, draws_needed`` columns of
Monte Carlo rows; ``tilted=True`` (the direct engine re-solving estimates and limits from draws
of the tilted distribution); ``mcexact.validate``; and METHODS.md 6.5 item 2 (coverage of
``p +/- 1.96 MCSE`` over seeds).

References, named beside each expected value:

* exact enumeration, ``mcexact.fit(..., method="enumerate")`` or ``exact_distribution``, which
  tests/test_exact.py and tests/test_montecarlo.py check against brute force; for the invented
  design below it is also checked here against ``tests/_reference.py``'s ``dictionary_counts``
  (plain recursion, Python integers) with the score p-value worked out by hand from the counts;
* closed forms: the error of a mean of N independent indicators, ``sqrt(p (1 - p) / N)``, and
  the draws it takes to reach an error SE, ``N = p (1 - p) / SE^2`` (METHODS.md 6.1); the
  importance-sampling effective sample size ``(sum w)^2 / sum w^2`` of weights ``w = exp(b t)``;
  the chance that N independent draws miss a point of probability p, ``(1 - p)^N``;
* the verdict rules of ``fit.py``'s ``_convergence`` as stated in the brief of this feature and
  in that function's docstring, restated independently in ``check_verdicts`` below.

Data: an invented intercept-only design (below) and the package's invented demo data
(``mcexact.load_demo("small")``). All seeds are fixed, so every test is deterministic; Monte
Carlo tolerances are in MCSE units.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pandas as pd
import pytest

import mcexact
from mcexact import DataError, Design, exact_distribution, plan
from mcexact.inference import joint_tests
from mcexact.montecarlo import (PartSampler, SamplerOptions, draw_direct, draw_mcmc,
                                mcse_of_indicator, spawn_seeds)
from mcexact.validation import Z_LIMIT, ValidationReport, _z

from _reference import dictionary_counts

# ============================================================================ data

DEMO_FORMULA = "elevation ~ dose_mg + age"

# 40 invented subjects, dose level 0..5, binary response, nuisance = intercept only. Drawn once
# with numpy.random.default_rng(143): z = rng.integers(0, 6, 40), then
# y = rng.random(40) < 0.3 + 0.03 z. Kept because (a) its exact score p-value, 0.0408, lies near
# alpha = 0.05, which the verdict tests need, and (b) the two-sided score test's lower cut
# 2 mu - t = 2 * 24.75 - 35 = 14.5 lies half-way between support points: a Markov chain's score
# test estimates mu from the draws, and only a shift of more than 0.25 in that estimate (about
# three of its standard errors at 4,000 draws thinned by 10) moves a support point across the
# cut. The calibration check below is then one of the Monte Carlo error, not of that plug-in
# ordering (whose error fit() counts separately, by batches).
DOSE_Y = [0, 0, 0, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 0, 0, 0, 0,
          0, 0, 1, 1, 0, 0, 0, 1, 0, 1, 0, 1, 0, 1, 1, 0, 0, 0, 0, 0]
DOSE_Z = [5, 2, 4, 5, 0, 3, 4, 3, 4, 4, 0, 5, 0, 2, 2, 0, 0, 2, 5, 0,
          2, 2, 5, 4, 1, 1, 1, 4, 4, 4, 0, 5, 0, 3, 5, 2, 1, 2, 2, 1]

# Seed of the demo validation run (picked once, not tuned).
VALIDATE_SEED = 31

VERDICT_PREFIXES = ("quotable", "more draws needed", "not converged", "no Monte Carlo error")
# fit.py's documented thresholds (Vehtari et al. 2021, as quoted there).
RHAT_LIMIT, ESS_MIN = 1.01, 400


def dose_design() -> Design:
    return Design.from_arrays(DOSE_Y, DOSE_Z, interest_names=["dose"])


@pytest.fixture(scope="module")
def demo():
    return mcexact.load_demo("small")


def fit_dose(method, **kwargs):
    return mcexact.fit(dose_design(), method=method, asymptotic=False, progress=False, **kwargs)


def fit_demo_dose(data, method, **kwargs):
    """The demo's dose_mg effect alone (age conditioned on as nuisance): the same part fit()
    analyses for dose_mg in the full model, without the joint test's large support."""
    return mcexact.fit(data, DEMO_FORMULA, strata="site", interest="dose_mg", method=method,
                       asymptotic=False, progress=False, **kwargs)


def part(result, name):
    return result.method["parts"][name]


def is_empty(value) -> bool:
    return value is None or value == "" or (isinstance(value, float) and math.isnan(value))


def check_verdicts(frame: pd.DataFrame, kind: str, engine: str, alpha: float = 0.05,
                   target: float | None = None) -> list:
    """The verdict rules, restated: a row is "quotable" when its p-value's Monte Carlo error is at
    most the goal (the target, or |p - alpha| / 2.576 so that p +/- 2.576 MCSE is on one side of
    alpha) and, for Markov chains, R-hat <= 1.01 and ESS >= 400 (and the chains agree); "more
    draws needed" when only the precision fails, with more draws needed than used; "not
    converged" only for chains, and whenever R-hat or ESS fails; "no Monte Carlo error" when the
    error is missing. Test rows use (p_value, mcse, alpha); estimate rows the smaller one-sided
    tail with half the two-sided error and alpha / 2 (fit.py, _estimate_row). Returns the
    verdicts seen."""
    seen = []
    for _, row in frame.iterrows():
        verdict = row["verdict"]
        assert isinstance(verdict, str) and verdict.startswith(VERDICT_PREFIXES), verdict
        seen.append(verdict)
        if kind == "tests":
            p, err, level = row["p_value"], row["mcse"], alpha
        else:
            p, err, level = min(row["p_lower"], row["p_upper"]), row["mcse_p_value"] / 2, alpha / 2
        if not np.isfinite(err):
            assert verdict.startswith("no Monte Carlo error"), (row.to_dict())
            continue
        goal = target if target is not None else abs(p - level) / 2.576
        if engine == "direct":
            assert math.isnan(row["rhat"]) and row["ess"] == row["n_draws"], row.to_dict()
        else:
            assert np.isfinite(row["rhat"]) and row["ess"] > 0, row.to_dict()
        failing = engine == "mcmc" and (row["rhat"] > RHAT_LIMIT or row["ess"] < ESS_MIN)
        if failing:
            assert verdict.startswith("not converged"), row.to_dict()
        if verdict == "quotable":
            assert err <= goal * (1 + 1e-9), row.to_dict()
        elif verdict.startswith("more draws needed"):
            assert err > goal * (1 - 1e-9), row.to_dict()
            assert row["draws_needed"] > row["n_draws"], row.to_dict()
        elif verdict.startswith("not converged"):
            assert engine == "mcmc" and (failing or "chains disagree" in verdict), row.to_dict()
    return seen


# ============================================================================ 1. precision

@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_target_reached_means_every_reported_error_meets_it(engine):
    """With target_mcse = 0.005 the sampler goes on in rounds past the 1,000 draws asked for
    (the score p-value's binomial error at 1,000 draws, sqrt(0.041 * 0.959 / 1000) = 0.0063, is
    above the target), and when it says the target was reached every reported Monte Carlo error
    of a p-value, and half of every estimate row's two-sided p-value error (a one-sided tail's
    error, also monitored), is at most the target."""
    target = 0.005
    r = fit_dose(engine, n_draws=1000, target_mcse=target, rng=11)
    info = part(r, "dose")
    assert info["stopped"] == f"target Monte Carlo error {target:g} reached"
    assert info["n_draws"] > 1000
    assert set(r.tests["n_draws"]) == {info["n_draws"]}
    assert r.effect_distributions["dose"].n_draws == info["n_draws"]
    errors = r.tests["mcse"].to_numpy(float)
    assert np.isfinite(errors).any()
    assert np.all(errors[np.isfinite(errors)] <= target), r.tests[["test", "mcse"]]
    assert np.all(r.estimates["mcse_p_value"].to_numpy(float) / 2 <= target)
    seen = check_verdicts(r.tests, "tests", engine, target=target)
    check_verdicts(r.estimates, "estimates", engine, target=target)
    assert seen.count("quotable") >= 1


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_tiny_time_budget_stops_after_the_first_round(engine):
    """A budget of 1e-9 s is spent before a second round can start: the draws asked for, and no
    more, even with a target far out of reach."""
    r = fit_dose(engine, n_draws=1000, target_mcse=1e-9, time_budget=1e-9, rng=12)
    for name in ("dose", "joint"):
        assert part(r, name)["stopped"] == "time budget of 1e-09 s spent"
        assert part(r, name)["n_draws"] == 1000
    assert set(r.tests["n_draws"]) == {1000}


def test_time_budget_does_not_preempt_a_reachable_target():
    """With a generous budget the target stops sampling, not the clock."""
    r = fit_dose("direct", n_draws=1000, target_mcse=0.005, time_budget=600.0, rng=11)
    assert part(r, "dose")["stopped"] == "target Monte Carlo error 0.005 reached"


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_max_draws_caps_an_unreachable_target(engine):
    """target_mcse = 1e-9 cannot be reached; max_draws = 2,500 stops it at exactly 2,500
    (rounds of 1,000, 1,000, then the 500 left)."""
    r = fit_dose(engine, n_draws=1000, target_mcse=1e-9, max_draws=2500, rng=13)
    info = part(r, "dose")
    assert info["stopped"] == "draw limit of 2,500 reached"
    assert info["n_draws"] == 2500
    assert set(r.tests["n_draws"]) == {2500}
    assert r.tests.loc[r.tests["test"] == "score", "verdict"].str.startswith(
        ("more draws needed", "not converged")).all()


def test_default_draw_limit_is_fifty_times_n_draws():
    """Without max_draws the limit is 50 * n_draws (fit's docstring): 50 * 200 = 10,000."""
    r = fit_dose("direct", n_draws=200, target_mcse=1e-9, rng=14)
    assert part(r, "dose")["stopped"] == "draw limit of 10,000 reached"
    assert part(r, "dose")["n_draws"] == 10_000


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_max_draws_is_never_exceeded(engine):
    """n_draws = 1,000, max_draws = 1,002: the second round may add only 2 draws, fewer than the
    4 chains. The cap is a cap: exactly 1,002 draws, as the stop message says."""
    r = fit_dose(engine, n_draws=1000, target_mcse=1e-9, max_draws=1002, rng=15)
    assert part(r, "dose")["stopped"] == "draw limit of 1,002 reached"
    assert part(r, "dose")["n_draws"] == 1002
    assert set(r.tests["n_draws"]) == {1002}


@pytest.fixture(scope="module")
def demo_dose_design(demo):
    d = Design.from_formula(demo, DEMO_FORMULA, strata="site", interest="dose_mg")
    return d, plan(d)._network


def _same_chains(a, b) -> bool:
    return len(a.chains) == len(b.chains) and all(
        x.shape == y.shape and np.array_equal(x, y) for x, y in zip(a.chains, b.chains))


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
@pytest.mark.parametrize("first, second, seed", [(400, 800, 41), (301, 499, 42)])
def test_part_sampler_rounds_equal_one_run_on_the_demo(demo_dose_design, engine, first, second,
                                                       seed):
    """run(first) then run(second) gives, chain by chain, the draws of one run of the total (the
    demo's dose_mg part: strata plus a nuisance covariate, so block moves for the chains). The
    uneven split matters: fit() picks round sizes freely (fit.py, _sample_to_precision), so
    rounds must not depend on divisibility by n_chains."""
    d, net = demo_dose_design
    o = SamplerOptions(n_draws=4, n_chains=4, n_warmup=50, thin=3)
    rounds = PartSampler(d, engine, o, np.random.SeedSequence(seed), net=net)
    rounds.run(first)
    split = rounds.run(second)
    whole = PartSampler(d, engine, o, np.random.SeedSequence(seed), net=net).run(first + second)
    assert split.n_draws == whole.n_draws == first + second
    assert _same_chains(split, whole)
    if engine == "mcmc":
        assert all(np.array_equal(a, b) for a, b in zip(split.counters, whole.counters))


def test_part_sampler_rounds_smaller_than_the_chains(demo_dose_design):
    """A later round of 1 draw adds exactly 1 (to the first chain that one run would give it
    to); a first round with fewer draws than chains is refused, since every chain's warm-up runs
    in its first round (PartSampler.run's docstring)."""
    d, net = demo_dose_design
    o = SamplerOptions(n_draws=4, n_chains=4, n_warmup=50, thin=3)
    rounds = PartSampler(d, "direct", o, np.random.SeedSequence(43), net=net)
    rounds.run(8)
    assert rounds.run(1).n_draws == 9
    assert _same_chains(rounds.sample,
                        PartSampler(d, "direct", o, np.random.SeedSequence(43), net=net).run(9))
    with pytest.raises(DataError, match="first round"):
        PartSampler(d, "mcmc", o, np.random.SeedSequence(43), net=net).run(3)


@pytest.mark.parametrize("engine, start, target", [("direct", 1001, 0.01),
                                                   ("mcmc", 1001, 0.02)])
def test_fit_in_rounds_equals_one_run_of_the_same_draws(demo, engine, start, target):
    """fit with a target, from 1,001 draws asked for (so rounds not divisible by the 4 chains),
    gives the same tests and estimates as one fit of the total number of draws, same seed
    (direct: the demo's dose_mg part; chains: the invented design, where the demo's p-values of
    0 stop the chains at once)."""
    if engine == "direct":
        def run(**kw):
            return fit_demo_dose(demo, engine, rng=5, **kw)
        name = "dose_mg"
    else:
        def run(**kw):
            return fit_dose(engine, rng=5, **kw)
        name = "dose"
    r = run(n_draws=start, target_mcse=target)
    n = part(r, name)["n_draws"]
    assert part(r, name)["stopped"] == f"target Monte Carlo error {target:g} reached"
    assert n > start
    one = run(n_draws=n)
    assert part(one, name)["n_draws"] == n
    for a, b in ((r.tests, one.tests), (r.estimates, one.estimates)):
        numeric = a.select_dtypes("number").columns.drop(["draws_needed"])
        assert np.array_equal(a[numeric].to_numpy(float), b[numeric].to_numpy(float),
                              equal_nan=True)


@pytest.mark.parametrize("kwargs", [
    {"target_mcse": 0}, {"target_mcse": -0.01}, {"target_mcse": float("nan")},
    {"target_mcse": True}, {"target_mcse": "0.01"},
    {"time_budget": 0}, {"time_budget": -1.0}, {"time_budget": False}, {"time_budget": "10"},
    {"max_draws": 999}, {"max_draws": 2000.0}, {"max_draws": True}, {"max_draws": "5000"},
])
def test_bad_precision_options_are_refused(kwargs):
    """Each bad value raises DataError naming the option (n_draws = 1,000, so max_draws = 999
    is below it)."""
    with pytest.raises(DataError, match=next(iter(kwargs))):
        fit_dose("direct", n_draws=1000, rng=1, **kwargs)


# ============================================================================ 2. verdicts

@pytest.fixture(scope="module")
def demo_validation(demo):
    return mcexact.validate(demo, DEMO_FORMULA, strata="site", method="direct", n_draws=20_000,
                            rng=VALIDATE_SEED)


def test_exact_rows_have_no_convergence_values(demo_validation):
    """Exact rows carry no Monte Carlo error, so no ESS, R-hat, verdict or draws needed."""
    for frame in (demo_validation.exact.tests, demo_validation.exact.estimates):
        assert (frame["engine"] == "exact").all()
        assert frame["verdict"].map(is_empty).all(), frame["verdict"].tolist()
        for col in ("ess", "rhat", "draws_needed"):
            assert frame[col].isna().all(), col
        assert (frame["mcse"] == 0).all()


def test_a_settled_p_value_is_quotable(demo_validation):
    """The demo's dose_mg score p-value (exact 0.00084) with 20,000 independent draws: its error,
    about sqrt(0.00084 / 20000) = 0.0002, is far inside (0.05 - p) / 2.576 = 0.019, so it is
    "quotable", with fewer draws needed than used; every Monte Carlo row follows the rules."""
    mc = demo_validation.monte_carlo
    row = mc.tests.set_index(["effect", "test"]).loc[("dose_mg", "score")]
    assert row["verdict"] == "quotable"
    assert row["draws_needed"] <= row["n_draws"] == 20_000
    assert row["ess"] == 20_000 and math.isnan(row["rhat"])
    check_verdicts(mc.tests, "tests", "direct")
    check_verdicts(mc.estimates, "estimates", "direct")


def test_a_p_value_near_alpha_needs_more_draws():
    """The invented design's score p-value (exact 0.0408) with 1,000 independent draws: its error
    (about sqrt(0.041 * 0.959 / 1000) = 0.0063) exceeds |p - 0.05| / 2.576 = 0.0036, so p +/-
    2.576 MCSE straddles alpha: "more draws needed", and draws_needed is at least the closed form
    p (1 - p) / goal^2 (METHODS.md 6.1; the reported error is never below the binomial one) and
    more than the draws used."""
    r = fit_dose("direct", n_draws=1000, rng=21)
    row = r.tests.set_index(["effect", "test"]).loc[("dose", "score")]
    assert row["verdict"].startswith("more draws needed")
    assert "straddles alpha" in row["verdict"]
    p = row["p_value"]
    goal = abs(p - 0.05) / 2.576
    assert row["draws_needed"] > 1000
    assert row["draws_needed"] >= math.floor(p * (1 - p) / goal ** 2)
    check_verdicts(r.tests, "tests", "direct")
    check_verdicts(r.estimates, "estimates", "direct")


def test_short_unthinned_chains_are_not_converged():
    """200 draws in all from 4 chains with thin = 1 cannot have 400 effective draws: some row is
    "not converged" naming the ESS, and the rules hold on every row."""
    r = fit_dose("mcmc", n_draws=200, thin=1, rng=22)
    verdicts = check_verdicts(r.tests, "tests", "mcmc") + check_verdicts(r.estimates,
                                                                          "estimates", "mcmc")
    assert any(v.startswith("not converged") and "ESS" in v for v in verdicts), verdicts
    assert (r.tests["ess"].dropna() < ESS_MIN).all()


def test_long_thinned_chains_can_be_quotable():
    """The other side of the rule: 40,000 thinned draws on the same design give quotable chain
    rows, each with R-hat <= 1.01 and ESS >= 400 (checked in check_verdicts)."""
    r = fit_dose("mcmc", n_draws=40_000, rng=23)
    verdicts = check_verdicts(r.tests, "tests", "mcmc")
    assert "quotable" in verdicts


# ============================================================================ 3. tilting

TILT_SEEDS = range(1, 9)
TILT_DRAWS = 5000
_REFINED = re.compile(r"refined by sampling the distribution tilted to it: ([a-z_, ]+)")


def refined_names(note: str) -> set:
    m = _REFINED.search(note or "")
    return set() if m is None else {s.strip() for s in m.group(1).split(",")}


def importance_ess(dist, b: float) -> float:
    """(sum w)^2 / sum w^2 over the null draws, w = exp(b t): how many draws effectively support
    the distribution tilted to b (coded scale)."""
    counts = np.bincount(np.concatenate(dist.chain_index), minlength=dist.n_points)
    t = dist.support[:, 0].astype(float)
    logw = b * t
    logw = logw - logw[counts > 0].max()
    w = np.exp(logw) * (counts > 0)
    return float((counts @ w) ** 2 / (counts @ (w * w)))


@pytest.fixture(scope="module")
def tilt_runs(demo):
    exact = fit_demo_dose(demo, "enumerate").estimates.iloc[0]
    runs = [(fit_demo_dose(demo, "direct", n_draws=TILT_DRAWS, rng=s),
             fit_demo_dose(demo, "direct", n_draws=TILT_DRAWS, rng=s, tilted=False))
            for s in TILT_SEEDS]
    return exact, runs


@pytest.mark.slow
def test_tilting_shrinks_far_tail_errors(tilt_runs):
    """The demo's dose_mg statistic is observed far in the upper tail (exact P(T >= t) = 0.00084),
    where the null draws are thin: re-solving the CMLE and the upper limit from draws of the
    tilted distribution makes their errors several times smaller at the same draws and seed.
    (The null draws are shared: the p-values are identical.)"""
    exact, runs = tilt_runs
    est_ratio, upper_ratio = [], []
    for tilted, plain in runs:
        a, b = tilted.estimates.iloc[0], plain.estimates.iloc[0]
        assert a["p_value"] == b["p_value"] and a["mcse_p_value"] == b["mcse_p_value"]
        assert a["kind"] == b["kind"] == exact["kind"] == "cmle"
        dist = plain.effect_distributions["dose_mg"]
        if np.any(np.concatenate(dist.chain_index) == dist.observed_index):
            assert {"estimate", "ci_upper"} <= refined_names(a["note"])
        else:
            # No null draw reached the observed value: estimate and limits come from draws
            # tilted to it (then only limits far from it are refined again).
            assert "never drawn under the null" in a["note"]
        assert refined_names(b["note"]) == set()
        est_ratio.append(b["mcse"] / a["mcse"])
        upper_ratio.append(b["mcse_ci_upper"] / a["mcse_ci_upper"])
    assert min(est_ratio) >= 4, est_ratio
    assert np.median(upper_ratio) >= 4, upper_ratio


@pytest.mark.slow
def test_tilted_values_agree_with_exact_within_their_errors(tilt_runs):
    """Over 8 seeds every refined estimate and limit lies within 4 MCSE of the exact one
    (exact enumeration is the reference), and the errors are not inflated to make that easy:
    the median |z| exceeds 0.1 (for honest errors |z| is half-normal, median 0.67)."""
    exact, runs = tilt_runs
    errors = {"estimate": "mcse", "ci_lower": "mcse_ci_lower", "ci_upper": "mcse_ci_upper"}
    zs = []
    for tilted, _ in runs:
        row = tilted.estimates.iloc[0]
        for name in refined_names(row["note"]):
            z = (row[name] - exact[name]) / row[errors[name]]
            assert abs(z) <= 4, (name, row[name], exact[name], row[errors[name]])
            zs.append(z)
    assert len(zs) >= 2 * len(runs)
    assert np.median(np.abs(zs)) > 0.1, zs


@pytest.mark.slow
def test_tilting_follows_the_thin_draws_rule(tilt_runs):
    """A value is refined exactly when the importance ESS of the null draws at it, recomputed
    here from the untilted fit's draws, is below 25% of the draws (fit.py, _TILT_ESS_SHARE)."""
    _, runs = tilt_runs
    checked = 0
    for tilted, plain in runs:
        dist = plain.effect_distributions["dose_mg"]
        if not np.any(np.concatenate(dist.chain_index) == dist.observed_index):
            # No null draw reached the observed value: the values then come from draws tilted
            # to it first (test_direct_engine_tilts_to_an_observed_value_no_null_draw_reached).
            assert "never drawn under the null" in tilted.estimates.iloc[0]["note"]
            continue
        scale = float(plain.design.interest_scales[0])
        row = plain.estimates.iloc[0]
        expected = {name for name in ("estimate", "ci_lower", "ci_upper")
                    if np.isfinite(row[name])
                    and importance_ess(dist, row[name] / scale) < 0.25 * dist.n_draws}
        assert refined_names(tilted.estimates.iloc[0]["note"]) == expected
        checked += len(expected)
    assert checked > 0


def test_chains_refine_limits_but_not_estimates_by_tilting(demo):
    """Markov chain fits re-solve far-tail limits from tilted chains, never the estimate (tilted
    chains' estimates were not better calibrated; fit.py, _refine_by_tilting); the exact limits
    (enumeration, the reference) lie within 4 of their Monte Carlo errors."""
    exact = fit_demo_dose(demo, "enumerate").estimates.iloc[0]
    r = fit_demo_dose(demo, "mcmc", n_draws=2000, rng=24).estimates.iloc[0]
    names = refined_names(r["note"])
    assert "estimate" not in names
    assert names <= {"ci_lower", "ci_upper"} and names
    for name in names:
        assert abs(r[name] - exact[name]) <= 4 * r[f"mcse_{name}"], name


# ============================================================================ 4. validate

def test_validation_coverage_of_the_effect_parts(demo_validation):
    """Share of exact support points the draws visited, and their exact probability, recomputed
    from the two fits. age (124 points, least likely 1/1230) is missed by 20,000 independent draws
    with probability below 124 (1 - 1/1230)^20000 = 1e-5, so all its points are visited; dose_mg's
    least likely point (probability 7e-5) is missed with probability (1 - 7e-5)^20000 = 0.25, so
    only its points with a miss chance below 1e-6 must be visited."""
    rep = demo_validation
    cov = rep.coverage.set_index("part")
    assert list(cov.index) == ["dose_mg", "age", "joint"]
    assert (cov["engine"] == "direct").all() and (cov["n_draws"] == 20_000).all()
    for name in ("dose_mg", "age", "joint"):
        ex = rep.exact.distribution if name == "joint" else rep.exact.effect_distributions[name]
        mc = rep.monte_carlo.distribution if name == "joint" else \
            rep.monte_carlo.effect_distributions[name]
        drawn = {tuple(p) for p in mc.support[np.unique(np.concatenate(mc.chain_index))].tolist()}
        hit = np.array([tuple(p) in drawn for p in ex.support.tolist()])
        pmf = ex.pmf()
        assert cov.loc[name, "exact_points"] == ex.n_points
        assert cov.loc[name, "visited_points"] == hit.sum()
        assert cov.loc[name, "point_coverage"] == pytest.approx(hit.mean(), abs=1e-12)
        assert cov.loc[name, "mass_coverage"] == pytest.approx(pmf[hit].sum(), abs=1e-12)
        assert hit[(1 - pmf) ** 20_000 < 1e-6].all(), name
    assert cov.loc["age", "point_coverage"] == 1.0
    assert cov.loc["age", "mass_coverage"] == pytest.approx(1.0, abs=1e-12)
    assert cov.loc["joint", "point_coverage"] < 1.0      # 5,818 points, many below 1e-5


def same(a, b) -> bool:
    return a == b or (math.isnan(a) and math.isnan(b))


def test_validation_z_values_equal_a_hand_computation(demo_validation):
    """z = (Monte Carlo - exact) / MCSE, from the two fits' frames, row by row; NaN where the
    error is missing or zero or a value infinite; flagged exactly when |z| > 4."""
    rep = demo_validation
    ex_t, mc_t = (f.tests.set_index(["effect", "test"]) for f in (rep.exact, rep.monte_carlo))
    ex_e, mc_e = (f.estimates.set_index("term") for f in (rep.exact, rep.monte_carlo))
    error_of = {"p_value": "mcse", "mid_p_value": "mcse_mid_p"}
    est_error = {"estimate": "mcse", "ci_lower": "mcse_ci_lower", "ci_upper": "mcse_ci_upper",
                 "p_value": "mcse_p_value"}
    comp = rep.comparisons
    assert len(comp) == 2 * len(ex_t) + 4 * len(ex_e)
    for _, row in comp.iterrows():
        if row["item"] in ex_e.index:
            e, m = ex_e.loc[row["item"]], mc_e.loc[row["item"]]
            err = m[est_error[row["quantity"]]]
        else:
            e, m = ex_t.loc[(row["part"], row["item"])], mc_t.loc[(row["part"], row["item"])]
            err = m[error_of[row["quantity"]]]
        q = row["quantity"]
        ok = np.isfinite(e[q]) and np.isfinite(m[q]) and np.isfinite(err) and err > 0
        z = (m[q] - e[q]) / err if ok else np.nan
        assert same(row["exact"], e[q]) and same(row["monte_carlo"], m[q])
        if ok:
            assert row["z"] == pytest.approx(z, rel=1e-12, abs=1e-12)
        else:
            assert np.isnan(row["z"])
        assert bool(row["flagged"]) == bool(abs(z) > Z_LIMIT)
    assert comp["z"].notna().sum() >= 10
    assert rep.passed == (not comp["flagged"].any())


def test_validation_effect_parts_agree_with_exact(demo_validation):
    """No dose_mg or age value is flagged (|z| > 4) at this seed."""
    comp = demo_validation.comparisons
    flagged = comp[comp["part"].isin(["dose_mg", "age"]) & comp["flagged"]]
    assert flagged.empty, flagged


def test_validation_passes_on_the_demo(demo_validation):
    """validate() of the direct engine on the demo agrees with exact enumeration: no |z| > 4."""
    assert demo_validation.passed, demo_validation.summary()


def test_a_broken_comparison_is_flagged(demo_validation):
    """A Monte Carlo value moved 10 MCSE from the exact one gets z = 10 and is flagged, the report
    no longer passes, and the summary names it."""
    assert _z(1.0, 0.0, 0.1) == pytest.approx(10.0)
    assert math.isnan(_z(1.0, 0.0, 0.0)) and math.isnan(_z(np.inf, 0.0, 0.1))
    assert math.isnan(_z(1.0, 0.0, np.nan))
    rep = demo_validation
    comp = rep.comparisons.copy()
    i = comp.index[(comp["part"] == "dose_mg") & (comp["item"] == "score")
                   & (comp["quantity"] == "p_value")][0]
    comp.loc[i, "monte_carlo"] = comp.loc[i, "exact"] + 10 * comp.loc[i, "mcse"]
    comp.loc[i, "z"] = _z(comp.loc[i, "monte_carlo"], comp.loc[i, "exact"], comp.loc[i, "mcse"])
    comp["flagged"] = np.abs(comp["z"].to_numpy(float)) > Z_LIMIT
    assert comp.loc[i, "z"] == pytest.approx(10.0) and comp.loc[i, "flagged"]
    broken = ValidationReport(comp, rep.coverage, rep.engine, rep.exact, rep.monte_carlo)
    assert not broken.passed
    text = broken.summary()
    assert "flagged: dose_mg score p_value" in text
    assert "verdict: DISAGREEMENT" in text


def test_validation_summary_names_engine_and_verdict(demo_validation):
    text = demo_validation.summary()
    lines = text.splitlines()
    assert lines[0] == "Monte Carlo (direct) against exact enumeration"
    assert lines[-1].startswith("  verdict: ")
    assert ("agreement within the Monte Carlo error" in lines[-1]) == demo_validation.passed
    assert "dose_mg: 20,000 draws visited" in text


@pytest.mark.parametrize("method", ["bogus", "enumerate", "auto"])
def test_validate_refuses_other_engines(method):
    with pytest.raises(DataError, match="method"):
        mcexact.validate(dose_design(), method=method, n_draws=1000, rng=1)


# ============================================================================ 5. calibration

CALIBRATION_RUNS = 40
CALIBRATION_OPTIONS = dict(n_draws=4000, n_chains=4, thin=10)


def score_p_by_hand(counts: dict, t: int) -> float:
    """Two-sided score p-value from exact counts: P(|T - mu| >= |t - mu|), mu the null mean
    (in one dimension the score statistic is (T - mu)^2 / var)."""
    total = sum(counts.values())
    mu = sum(k[0] * c for k, c in counts.items()) / total
    return sum(c for k, c in counts.items()
               if abs(k[0] - mu) >= abs(t - mu) - 1e-9) / total


@pytest.fixture(scope="module")
def exact_score_p():
    d = dose_design()
    ex = exact_distribution(d)
    p = joint_tests(ex, ("score",))[0].p_value
    ref = dictionary_counts(DOSE_Y, [1] * len(DOSE_Y), [0] * len(DOSE_Y),
                            [[z] for z in DOSE_Z], None, True)
    t = sum(y * z for y, z in zip(DOSE_Y, DOSE_Z))
    assert p == pytest.approx(score_p_by_hand(ref, t), rel=1e-12)
    assert 0.03 < p < 0.06
    return p


def coverage_over_seeds(engine: str, p_exact: float, thin: int):
    """Share of runs whose p +/- 1.96 MCSE covers the exact p: with the reported error
    (mcse_of_indicator) and with the naive binomial error sqrt(p (1 - p) / N)."""
    d = dose_design()
    net = plan(d)._network
    opts = SamplerOptions(**{**CALIBRATION_OPTIONS, "thin": thin})
    honest = naive = 0
    for r in range(CALIBRATION_RUNS):
        seeds = spawn_seeds(1000 + r, opts.n_chains)
        s = draw_direct(net, d, opts, seeds) if engine == "direct" else draw_mcmc(d, opts, seeds)
        dist = s.to_distribution()
        t = joint_tests(dist, ("score",))[0]
        err = mcse_of_indicator(dist, (t.more | t.tie).astype(float))
        naive_err = math.sqrt(t.p_value * (1 - t.p_value) / dist.n_draws)
        honest += abs(t.p_value - p_exact) <= 1.96 * err
        naive += abs(t.p_value - p_exact) <= 1.96 * naive_err
    return honest / CALIBRATION_RUNS, naive / CALIBRATION_RUNS


# The target coverage of p +/- 1.96 MCSE is 0.95 (METHODS.md 6.5 item 2). Over 40 seeds its
# binomial sd is sqrt(0.95 * 0.05 / 40) = 0.034, so the floors are set for 40 seeds: 0.85 for
# independent draws (3 sd), 0.75 for chains (whose errors are themselves estimated from 40
# batch means or an initial-sequence ESS, and so vary more).
@pytest.mark.slow
@pytest.mark.parametrize("engine, floor", [("direct", 0.85), ("mcmc", 0.75)])
def test_mcse_covers_the_exact_p_value(exact_score_p, engine, floor):
    honest, _ = coverage_over_seeds(engine, exact_score_p, thin=10)
    assert honest >= floor, honest


@pytest.mark.slow
def test_naive_binomial_error_fails_the_same_check(exact_score_p):
    """The tolerance a broken MCSE would fail: unthinned chains (thin = 1) are strongly
    autocorrelated, and the independent-draws error sqrt(p (1 - p) / N) then covers the exact p
    far less often than the error that accounts for the autocorrelation, on the same draws."""
    honest, naive = coverage_over_seeds("mcmc", exact_score_p, thin=1)
    assert naive < honest - 0.1, (honest, naive)
    assert naive < 0.7, (honest, naive)


def test_direct_engine_tilts_to_an_observed_value_no_null_draw_reached():
    """The observed statistic lies so far in the tail that no null draw reaches it: the estimate
    and limits come from draws tilted to it and agree with exact enumeration (the reference)
    within 4 of their Monte Carlo errors; without tilting they would be infinite."""
    z = np.arange(40) % 10
    y = (z >= 8).astype(int)                      # invented: events only at the top two doses
    y[3] = 1
    design = mcexact.Design.from_arrays(y, z)
    exact = mcexact.fit(design, asymptotic=False).estimates.loc[0]
    assert exact["kind"] == "cmle"
    for seed in range(3):
        result = mcexact.fit(design, method="direct", n_draws=300, rng=seed, asymptotic=False)
        dist = result.effect_distributions["z0"]
        assert not np.any(np.concatenate(dist.chain_index) == dist.observed_index)
        row = result.estimates.loc[0]
        assert row["kind"] == "cmle"
        assert "never drawn under the null" in row["note"]
        for value, err in (("estimate", "mcse"), ("ci_lower", "mcse_ci_lower"),
                           ("ci_upper", "mcse_ci_upper")):
            assert np.isfinite(row[value]) and row[err] > 0
            assert abs(row[value] - exact[value]) < 4 * row[err], (seed, value)
    untilted = mcexact.fit(design, method="direct", n_draws=300, rng=0, asymptotic=False,
                           tilted=False).estimates.loc[0]
    assert untilted["verdict"].startswith("not quotable")


def test_validation_flags_draws_that_never_reach_part_of_the_support():
    """A sampler that cannot reach part of the support (simulated: the draws of a correct run
    with every draw of the two most likely support points removed) is flagged by coverage even
    where no p-value shows it, and `passed` turns false; the correct run is not flagged."""
    from mcexact.distribution import ConditionalDistribution
    from mcexact.validation import coverage_row

    z = np.arange(30) % 5
    y = (np.arange(30) % 3 == 0).astype(int)
    design = mcexact.Design.from_arrays(y, z)
    exact = mcexact.fit(design, asymptotic=False).effect_distributions["z0"]
    mc_fit = mcexact.fit(design, method="direct", n_draws=4000, rng=2, asymptotic=False)
    good = mc_fit.effect_distributions["z0"]
    row = coverage_row("z0", exact, good)
    assert not row["flagged"]
    assert row["missed_mass"] <= row["expected_missed_mass"] + 0.01
    # Remove the two most likely points (exact pmf, the reference): 4000 draws cannot miss them.
    top = np.argsort(exact.pmf())[-2:]
    removed = {tuple(exact.support[i]) for i in top}
    assert exact.pmf()[top].sum() > 0.2
    keep_rows = np.array([tuple(r) not in removed for r in good.support])
    chains = tuple(idx[keep_rows[idx]] for idx in good.chain_index)
    broken = ConditionalDistribution(good.support, good.log_weights, good.observed, good.names,
                                     good.scales, info=good.info, chain_index=chains, iid=True)
    bad = coverage_row("z0", exact, broken)
    assert bad["flagged"]
    rep = mcexact.validate(design, method="direct", n_draws=4000, rng=2)
    assert rep.passed and not rep.coverage["flagged"].any()
    import dataclasses
    broken_rep = dataclasses.replace(rep, coverage=pd.DataFrame([bad]))
    assert not broken_rep.passed
    assert "FLAGGED" in broken_rep.summary()
