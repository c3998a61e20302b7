"""Calibration of Monte Carlo standard errors against exact answers.

For a few small invented designs, ``mcexact.fit`` is run with each Monte Carlo engine and many
seeds; every run's score-test p-value p_mc and its reported standard error (the ``p_value`` and
``mcse`` columns of ``result.tests``, so exactly what a user sees) are compared with the exact
p-value of ``fit(method="enumerate")``. If the errors are honest, the interval p_mc +/- 1.96 MCSE
covers the exact value in about 95% of runs (93-97% over 200 runs: 0.95 +/- 1.96
sqrt(0.0475 / 200)) and z = (p_mc - p_exact) / MCSE has mean near 0 and standard deviation near 1.

Columns of the main table, per design and engine:

- ``coverage``, ``mean z``, ``sd z``: of fit()'s p-value and MCSE.
- ``naive cov.``: coverage of the same p-values with the naive error sqrt(p (1 - p) / N), which
  treats the draws as independent; autocorrelated chains make it too small.
- ``ordered cov.``, ``ord. sd z``: the same draws with the support ranked by the exact test
  statistic (exact null moments) and the error of ``mcse_of_indicator``: the Monte Carlo error of
  the indicator mean alone; ``ord. naive``: the coverage of that estimate with the naive error.
  Block chains (the nuisance design) estimate the null moments of the score test, from
  Rao-Blackwellized records of every move, so a support point near the observed statistic can
  fall on either side; fit() then counts it half, with half its probability as error. The gap
  between the two coverages is that ranking's share. (The direct engine and swap chains use
  exact null moments.)
- ``unsure``: share of runs in which fit() counted such points half.

``--thin 1`` records every move: the chains are then strongly autocorrelated and the naive error
fails. ``--rare`` adds a table for tails with few hits (p near 0.006 and 0.0007 at 4,000 draws),
where the Wald error p (1 - p) / n_e is too small when the estimate is low by chance.

    python benchmarks/calibration.py                 # 200 seeds per row (about 15 minutes)
    python benchmarks/calibration.py --quick         # 40 seeds
    python benchmarks/calibration.py --thin 1 --rare
    python benchmarks/calibration.py --design 1 --engine direct --first-seed 200   # one row
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import mcexact  # noqa: E402
from mcexact import montecarlo as mc  # noqa: E402
from mcexact.inference import joint_tests  # noqa: E402

ENGINES = ("direct", "mcmc")
N_CHAINS = 4


def designs():
    """Small invented designs (name, Design), each enumerable exactly."""
    rng = np.random.default_rng(20261201)
    out = []
    n = 40
    z = rng.integers(0, 6, n)
    y = (rng.random(n) < 0.2 + 0.05 * z).astype(int)
    out.append(("intercept only, n=40", mcexact.Design.from_arrays(y, z)))
    strata = np.repeat(np.arange(10), 4)
    z = rng.integers(0, 3, 40)
    y = np.zeros(40, int)
    for h in range(10):
        y[4 * h + rng.integers(0, 4)] = 1
    out.append(("10 matched sets of 4", mcexact.Design.from_arrays(y, z, strata=strata)))
    n = 36
    w = rng.integers(0, 3, n)
    z = rng.integers(0, 5, n)
    y = (rng.random(n) < 0.3).astype(int)
    out.append(("intercept + nuisance 0..2, n=36", mcexact.Design.from_arrays(y, z, w)))
    # Strata and a nuisance covariate (block chains with fixed strata), from its own stream.
    rng = np.random.default_rng(777)
    strata = np.repeat(np.arange(6), 8)
    w = rng.integers(0, 3, 48)
    z = rng.integers(0, 4, 48)
    y = (rng.random(48) < 0.3).astype(int)
    out.append(("6 strata of 8 + nuisance 0..2", mcexact.Design.from_arrays(y, z, w,
                                                                            strata=strata)))
    return out


def score_row(result):
    """The score-test row of the (single) effect."""
    tests = result.tests
    return tests[(tests.test == "score") & (tests.effect != "joint")].iloc[0]


def exact_score(design):
    """Exact score p-value (fit's own enumeration) and, per support point, whether it is at least
    as extreme as the observed statistic."""
    p = float(score_row(mcexact.fit(design, method="enumerate", asymptotic=False)).p_value)
    ex = mcexact.exact_distribution(design)
    t = joint_tests(ex, ("score",))[0]
    extreme = {tuple(u): bool(m or k) for u, m, k in zip(ex.support.tolist(), t.more, t.tie)}
    return p, extreme


def fit_run(design, engine, seed, n_draws, thin, extreme):
    """One fit(): its p-value and MCSE, the naive error, whether points were counted half, and the
    indicator mean with the exact ranking with its mcse_of_indicator."""
    r = mcexact.fit(design, method=engine, rng=seed, asymptotic=False, tilted=False,
                    n_draws=n_draws, n_chains=N_CHAINS, thin=thin, progress=False)
    row = score_row(r)
    dist = r.effect_distributions[row.effect]
    p = float(row.p_value)
    naive = math.sqrt(max(p * (1.0 - p), 1e-300) / dist.n_draws)
    values = np.array([float(extreme.get(tuple(u), False)) for u in dist.support.tolist()])
    ordered = float(np.concatenate([values[i] for i in dist.chain_index]).mean())
    return (p, float(row.mcse), naive, "count half" in str(row.note), ordered,
            mc.mcse_of_indicator(dist, values))


def summary(p, err, p_exact):
    z = (np.asarray(p) - p_exact) / np.asarray(err)
    return float(np.mean(np.abs(z) <= 1.96)), float(np.mean(z)), float(np.std(z))


def fit_table(n_seeds, n_draws, thin, first_seed=0, only_design=None, only_engine=None):
    lo, hi = 0.95 - 1.96 * math.sqrt(0.0475 / n_seeds), 0.95 + 1.96 * math.sqrt(0.0475 / n_seeds)
    print(f"fit()-level calibration of the score-test p-value: {n_seeds} seeds per row, "
          f"{n_draws:,} draws in {N_CHAINS} chains per run, Markov chains record every "
          f"{thin}th move (fit()'s default is 10); seeds {first_seed}-{first_seed + n_seeds - 1}")
    print(f"  target: coverage in [{lo:.3f}, {hi:.3f}], mean z near 0, sd z near 1")
    print(f"  {'design':32s} {'engine':6s} {'exact p':>7s} {'coverage':>8s} {'mean z':>6s} "
          f"{'sd z':>5s} {'naive cov.':>10s} {'ordered cov.':>12s} {'ord. sd z':>9s} "
          f"{'ord. naive':>10s} {'unsure':>6s} {'s/run':>6s}")
    for k, (name, design) in enumerate(designs()):
        if only_design is not None and k != only_design:
            continue
        p_exact, extreme = exact_score(design)
        for engine in ENGINES:
            if only_engine is not None and engine != only_engine:
                continue
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                runs = [fit_run(design, engine, s, n_draws, thin, extreme)
                        for s in range(first_seed, first_seed + n_seeds)]
            p, err, naive, unsure, ordered, ordered_err = (np.array(c, float) for c in zip(*runs))
            cover, mean_z, sd_z = summary(p, err, p_exact)
            naive_cover = summary(p, naive, p_exact)[0]
            ord_cover, _, ord_sd = summary(ordered, ordered_err, p_exact)
            ord_naive = np.sqrt(np.maximum(ordered * (1 - ordered), 1e-300) / n_draws)
            ord_naive_cover = summary(ordered, ord_naive, p_exact)[0]
            print(f"  {name:32s} {engine:6s} {p_exact:7.4f} {cover:8.3f} {mean_z:+6.2f} "
                  f"{sd_z:5.2f} {naive_cover:10.3f} {ord_cover:12.3f} {ord_sd:9.2f} "
                  f"{ord_naive_cover:10.3f} {np.mean(unsure):6.2f} "
                  f"{(time.perf_counter() - t0) / n_seeds:6.3f}", flush=True)


def rare_table(n_seeds, n_draws):
    """Kernel-level table: the upper tail P(T >= c) of the intercept-only design at thresholds c
    with few expected hits, mcse_of_indicator against the Wald error p (1 - p) / n_e with the same
    effective sample size (what the error was before the pseudo-draws)."""
    name, design = designs()[0]
    ex = mcexact.exact_distribution(design)
    pmf, T = ex.pmf(), ex.support[:, 0]
    upper = np.cumsum(pmf[::-1])[::-1]
    net = mcexact.plan(design)._network
    print(f"\nRare tails of '{name}': P(T >= c), {n_seeds} seeds, {n_draws:,} draws in "
          f"{N_CHAINS} chains; coverage of p +/- 1.96 MCSE (mean z)")
    print(f"  {'c':>3s} {'exact p':>7s} {'hits':>5s} {'engine':6s} {'thin':>4s} "
          f"{'mcse_of_indicator':>17s} {'Wald, same n_e':>14s}")
    for target in (0.006, 0.0007):
        k = int(np.argmin(np.abs(upper - target)))
        c, p_exact = int(T[k]), float(upper[k])
        for engine, thin in (("direct", 1), ("mcmc", 10), ("mcmc", 1)):
            rows = []
            opts = mc.SamplerOptions(n_draws=n_draws, n_chains=N_CHAINS, n_warmup=1000, thin=thin)
            for s in range(n_seeds):
                seeds = mc.spawn_seeds(s, N_CHAINS)
                sample = (mc.draw_direct(net, design, opts, seeds) if engine == "direct"
                          else mc.draw_mcmc(design, opts, seeds))
                dist = sample.to_distribution()
                values = (dist.support[:, 0] >= c).astype(float)
                draws = np.concatenate([values[i] for i in dist.chain_index])
                p = float(draws.mean())
                err = mc.mcse_of_indicator(dist, values)
                series = [values[i] for i in dist.chain_index]
                n_eff = (float(dist.n_draws) if dist.iid
                         else mc._chain_effective_draws(dist, series))
                wald = math.sqrt(max(p * (1 - p), 1 / (n_draws + 2)) / n_eff)
                rows.append((p, err, wald))
            p, err, wald = (np.array(x) for x in zip(*rows))
            a, b = summary(p, err, p_exact), summary(p, wald, p_exact)
            print(f"  {c:3d} {p_exact:7.4f} {p_exact * n_draws:5.1f} {engine:6s} {thin:4d} "
                  f"{a[0]:10.3f} ({a[1]:+.2f}) {b[0]:7.3f} ({b[1]:+.2f})", flush=True)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="40 seeds per row")
    parser.add_argument("--seeds", type=int, default=None)
    parser.add_argument("--draws", type=int, default=4000, help="draws per run (default 4000)")
    parser.add_argument("--thin", type=int, default=10, help="Markov chain thinning (default 10)")
    parser.add_argument("--rare", action="store_true", help="also the rare-tail table")
    parser.add_argument("--first-seed", type=int, default=0, help="first seed (default 0)")
    parser.add_argument("--design", type=int, choices=range(4), default=None,
                        help="only this design (0 to 3, in table order)")
    parser.add_argument("--engine", choices=ENGINES, default=None, help="only this engine")
    args = parser.parse_args(argv)
    n_seeds = args.seeds or (40 if args.quick else 200)
    fit_table(n_seeds, args.draws, args.thin, args.first_seed, args.design, args.engine)
    if args.rare:
        rare_table(max(n_seeds, 200), args.draws)


if __name__ == "__main__":
    main()
