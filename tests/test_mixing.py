"""Mixing of the block-move chains across strata (mcexact/_sampler.pyx `run_chain`) and their
overdispersed starts (mcexact.montecarlo `draw_mcmc`).

References, named beside every comparison:

* the exact conditional distribution (``mcexact.exact_distribution``) and the exact fit
  (``fit(..., method="enumerate")``, through ``mcexact.validate``), themselves checked against
  brute force in tests/test_exact.py;
* the hypergeometric variance of a sum over a sample drawn without replacement (finite-population
  formula), computed here by hand from the data;
* one uninterrupted run of the same chains, for continuations.

Monte Carlo checks use seeds fixed before the results were seen and tolerances in Monte Carlo
standard errors (MCSE). The data are invented for these tests.
"""

from __future__ import annotations

import numpy as np
import pytest

import mcexact
from mcexact import Design, exact_distribution, montecarlo
from mcexact._stages import recode
from mcexact.montecarlo import (PartSampler, SamplerOptions, draw_mcmc, mcse_of_indicator,
                                spawn_seeds)
from mcexact.validation import validate

K_MCSE = 4.0
SEEDS = (1, 2, 3)
# The earlier kernel's moves: half the blocks within one stratum, half from anywhere, no anchors.
EARLIER_MOVES = {"_CROSS_QUARTERS": 0, "_ANCHORED": False}


def clinic_arrays() -> tuple[list, list, list, list]:
    """Six invented clinics of 18-27 patients, one or two events each (rare outcome), nuisance
    ``visits`` 0..12 (near-continuous, so a block within one clinic rarely keeps its visit sum),
    binary interest ``exposed``: drawn once from a fixed generator. Returns (stratum, events,
    visits, exposed)."""
    rng = np.random.default_rng(11)
    strata, y, w, z = [], [], [], []
    for h in range(6):
        n = int(rng.integers(18, 28))
        visits = rng.integers(0, 13, n)
        exposed = (rng.random(n) < 0.15).astype(int)
        events = np.zeros(n, int)
        events[rng.choice(n, int(rng.integers(1, 3)), replace=False)] = 1
        if exposed.sum() == 0:
            exposed[0] = 1
        strata += [h] * n
        y += events.tolist()
        w += visits.tolist()
        z += exposed.tolist()
    return strata, y, w, z


def clinics() -> Design:
    """`clinic_arrays` as a design: 82 groups, 9 support points; enumerated in well under a
    second."""
    strata, y, w, z = clinic_arrays()
    return Design.from_arrays(y, z, w, strata=strata, interest_names=["exposed"],
                              nuisance_names=["visits"])


@pytest.fixture
def earlier_moves(monkeypatch):
    for name, value in EARLIER_MOVES.items():
        monkeypatch.setattr(montecarlo, name, value)


def test_design_is_as_described():
    d = clinics()
    ex = exact_distribution(d)
    assert d.n_groups == 82 and ex.n_points == 9


@pytest.mark.parametrize("seed", SEEDS)
def test_chains_agree_with_exact_enumeration(seed):
    """p-values, mid-p-values and the estimate within 4 MCSE of exact enumeration (validate), and
    every support point with an exact probability worth 5 or more draws was drawn."""
    n_draws = 4000
    rep = validate(clinics(), method="mcmc", n_draws=n_draws, thin=5, n_warmup=400,
                   block_size=8, rng=seed)
    comp = rep.comparisons
    rows = comp[(comp["item"] == "score") | (comp["item"] == "probability")
                | ((comp["item"] == "exposed") & (comp["quantity"] == "estimate"))]
    assert len(rows) >= 5 and rows["z"].notna().all(), rows
    assert (rows["z"].abs() <= K_MCSE).all(), rows[["item", "quantity", "exact", "monte_carlo",
                                                     "mcse", "z"]]
    assert not rep.coverage["flagged"].any(), rep.coverage
    ex = exact_distribution(clinics())
    dist = rep.monte_carlo.effect_distributions["exposed"]
    drawn = {int(t) for t in dist.support[np.unique(np.concatenate(dist.chain_index)), 0]}
    wanted = {int(t) for t, p in zip(ex.support[:, 0], ex.pmf()) if p * n_draws >= 5}
    assert wanted <= drawn, (wanted, drawn)


def test_point_frequencies_match_exact_pmf():
    """The stationary distribution: every support point's frequency within 4 MCSE (batch means
    of its indicator, mcse_of_indicator) of its exact probability (exact_distribution)."""
    d = clinics()
    ex = exact_distribution(d)
    s = draw_mcmc(d, SamplerOptions(n_draws=20_000, thin=5, n_warmup=400, block_size=8),
                  spawn_seeds(17, 4))
    dist = s.to_distribution()
    allT = np.concatenate(s.chains)[:, 0]
    assert set(allT.tolist()) <= set(ex.support[:, 0].tolist())
    bad = []
    for t, p in zip(ex.support[:, 0], ex.pmf()):
        mcse = mcse_of_indicator(dist, (dist.support[:, 0] == t).astype(float))
        freq = float(np.mean(allT == t))
        if abs(freq - p) > K_MCSE * mcse:
            bad.append((int(t), freq, float(p), mcse))
    assert not bad, bad


def _kernel_run(design, moves, n_moves=4000, seed=5):
    """Run the block kernel directly from the observed y; returns (y after, counters[5])."""
    rc = recode(design)
    arrays = _arrays(rc)
    y = rc.events.copy()
    counters = np.zeros(5, dtype=np.int64)
    out = np.empty((1, rc.interest.shape[1]), dtype=np.int64)
    mcexact._sampler.run_chain(np.random.PCG64(seed), y, arrays["m"], arrays["z"], arrays["w"],
                               arrays["stratum"], arrays["start"], arrays["size"],
                               arrays["theta"], arrays["log_fact"], True, 8, n_moves - 1, 1,
                               out, counters, *moves)
    return rc, y, counters


def _arrays(rc):
    from scipy.special import gammaln

    return {"m": rc.trials, "z": rc.interest, "w": rc.nuisance,
            "stratum": np.repeat(np.arange(rc.starts.shape[0]), rc.ends - rc.starts),
            "start": rc.starts.astype(np.int64), "size": (rc.ends - rc.starts).astype(np.int64),
            "theta": np.zeros(rc.events.shape[0]),
            "log_fact": gammaln(np.arange(int(rc.trials.max()) + 2) + 1.0)}


def test_cross_strata_moves_keep_the_fiber_and_move_more():
    """After 4,000 moves the response still has every stratum's event count and the nuisance sum
    of the data (the fiber, computed here from the data), and each cross-strata move, anchored,
    changes y more often than the earlier kernel's moves on this design do."""
    d = clinics()
    rc, y, counters = _kernel_run(d, (2, 2, True))
    stratum = np.repeat(np.arange(rc.starts.shape[0]), rc.ends - rc.starts)
    assert np.array_equal(np.bincount(stratum, weights=y), np.bincount(stratum, weights=rc.events))
    assert np.array_equal(y @ rc.nuisance, rc.events @ rc.nuisance)
    assert np.all((0 <= y) & (y <= rc.trials))
    assert counters[0] == 4000 and 0 < counters[3] < counters[0] and counters[4] > 0
    _, _, before = _kernel_run(d, (0, 2, False))
    assert before[3] == 0
    assert counters[1] / counters[0] > 1.5 * before[1] / before[0], (counters, before)


def test_strata_scale_is_the_hypergeometric_variance():
    """_strata_sd equals the exact null SD of T given the strata alone (exact_distribution of
    the same data without the nuisance column) and the finite-population variance of a sum of
    d of a stratum's n values, ``d (n - d) / (n - 1) * var``, computed here from the raw data."""
    strata, y, w, z = clinic_arrays()
    d = clinics()
    rc = recode(d)
    sd = float(montecarlo._strata_sd(rc)[0] * rc.step[0])
    ex = exact_distribution(Design.from_arrays(y, z, strata=strata, interest_names=["exposed"]))
    t, p = ex.support[:, 0].astype(float), ex.pmf()
    assert sd == pytest.approx(np.sqrt(p @ (t - p @ t) ** 2), rel=1e-9)
    strata, y, z = np.array(strata), np.array(y), np.array(z, float)
    var = 0.0
    for h in np.unique(strata):
        zh, dh, n = z[strata == h], y[strata == h].sum(), (strata == h).sum()
        var += dh * (n - dh) / (n - 1) * zh.var()
    assert sd == pytest.approx(np.sqrt(var), rel=1e-12)


def test_starts_are_spread_and_recorded():
    """Fresh chains record their start tilts (symmetric, distinct) and where the tilted warm-up
    left them (spread over at least 2 units of T on this design, whose null SD is about 1); a
    single chain and a continuation get no tilt."""
    d = clinics()
    o = SamplerOptions(n_draws=800, thin=2, n_warmup=200, block_size=8)
    s = draw_mcmc(d, o, spawn_seeds(3, 4))
    tilts = np.array(s.info["start_tilts"])[:, 0]
    assert tilts.shape == (4,) and np.all(np.diff(tilts) > 0)
    assert tilts[0] == pytest.approx(-tilts[-1])
    assert s.info["tilted_warmup"] == 100
    starts = np.array(s.info["start_statistics"])[:, 0]
    assert np.ptp(starts) >= 2, starts
    one = draw_mcmc(d, SamplerOptions(n_draws=200, n_chains=1, thin=2, n_warmup=200,
                                      block_size=8), spawn_seeds(3, 1))
    assert "start_tilts" not in one.info
    more = draw_mcmc(d, o, spawn_seeds(3, 4), continue_from=s)
    assert "start_tilts" not in more.info and more.info["n_warmup"] == 0


@pytest.mark.parametrize("seed", SEEDS)
def test_dispersed_start_flags_a_chain_that_does_not_mix(earlier_moves, seed):
    """The earlier moves (crossing strata only through blocks from anywhere), run deliberately
    short (thin 1), from dispersed starts: the score test's verdict is "not converged" by R-hat
    or chain disagreement, not only by a small ESS."""
    r = mcexact.fit(clinics(), method="mcmc", n_draws=2000, thin=1, n_warmup=200,
                    block_size=8, rng=seed, asymptotic=False)
    verdict = r.tests.query("test == 'score'").iloc[0]["verdict"]
    assert verdict.startswith("not converged") and ("R-hat" in verdict
                                                    or "disagree" in verdict), verdict


def test_rounds_and_continuations_equal_one_run():
    """PartSampler rounds and continue_from give exactly the draws of one uninterrupted run
    with dispersed starts (which only fresh chains take)."""
    d = clinics()
    o = SamplerOptions(n_draws=4, thin=3, n_warmup=120, block_size=8)
    seed = np.random.SeedSequence(29)
    rounds = PartSampler(d, "mcmc", o, seed)
    for n in (401, 250, 349):
        rounds.run(n)
    whole = PartSampler(d, "mcmc", o, np.random.SeedSequence(29)).run(1000)
    for a, b in zip(rounds.sample.chains, whole.chains):
        assert np.array_equal(a, b)
    assert rounds.sample.info["start_tilts"] == whole.info["start_tilts"]
    first = draw_mcmc(d, SamplerOptions(n_draws=600, thin=3, n_warmup=120, block_size=8),
                      spawn_seeds(30, 4))
    second = draw_mcmc(d, SamplerOptions(n_draws=400, thin=3, n_warmup=120, block_size=8),
                       spawn_seeds(30, 4), continue_from=first)
    one = draw_mcmc(d, SamplerOptions(n_draws=1000, thin=3, n_warmup=120, block_size=8),
                    spawn_seeds(30, 4))
    for a, b, c in zip(first.chains, second.chains, one.chains):
        assert np.array_equal(np.concatenate([a, b]), c)


def test_draws_do_not_depend_on_jobs():
    d = clinics()
    runs = [draw_mcmc(d, SamplerOptions(n_draws=1200, thin=2, n_warmup=100, block_size=8,
                                        n_jobs=j), spawn_seeds(8, 4)) for j in (1, 2, -1)]
    for other in runs[1:]:
        assert other.info["start_tilts"] == runs[0].info["start_tilts"]
        assert other.info["start_statistics"] == runs[0].info["start_statistics"]
        for a, b in zip(runs[0].chains, other.chains):
            assert np.array_equal(a, b)
