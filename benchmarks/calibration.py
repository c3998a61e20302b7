"""Calibration of Monte Carlo standard errors against exact answers.

For a few small invented designs, each engine is run with many seeds; every run's Monte Carlo
p-value p_mc and its standard error are compared with the exact p-value. If the errors are honest,
the interval p_mc +/- 1.96 MCSE covers the exact value in about 95% of runs (93-97% over 200 runs,
METHODS 6.5: 0.95 +/- 1.96 sqrt(0.0475 / 200)) and z = (p_mc - p_exact) / MCSE averages near 0.

Also shown, for the Markov chains: the coverage of a naive error that treats the draws as
independent (sqrt(p (1 - p) / N)), which autocorrelation makes too small. With ``--thin 1`` and
few draws (say ``--draws 2000``) the chains' effective sample is only tens of draws per chain, and
no error estimate from so few is reliable: the table then shows it.

    python benchmarks/calibration.py            # 200 seeds per design and engine
    python benchmarks/calibration.py --quick    # 40 seeds
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import mcexact  # noqa: E402
from mcexact import montecarlo as mc  # noqa: E402
from mcexact.inference import joint_tests  # noqa: E402


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
    return out


def one_run(design, net, engine, seed, n_draws, thin):
    opts = mc.SamplerOptions(n_draws=n_draws, n_chains=4, n_warmup=500, thin=thin)
    seeds = mc.spawn_seeds(seed, 4)
    sample = (mc.draw_direct(net, design, opts, seeds) if engine == "direct"
              else mc.draw_mcmc(design, opts, seeds))
    dist = sample.to_distribution()
    score = [t for t in joint_tests(dist, ("score",))][0]
    values = (score.more | score.tie).astype(float)
    p = float(score.p_value)
    err = mc.mcse_of_indicator(dist, values)
    naive = np.sqrt(max(p * (1 - p), 1e-300) / dist.n_draws)
    return p, err, naive


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--seeds", type=int, default=None)
    parser.add_argument("--draws", type=int, default=4000, help="draws per run (default 4000)")
    parser.add_argument("--thin", type=int, default=10, help="Markov chain thinning (default 10)")
    args = parser.parse_args(argv)
    n_seeds = args.seeds or (40 if args.quick else 200)
    n_draws = args.draws
    thin = args.thin
    print(f"Calibration of Monte Carlo errors of the score-test p-value: {n_seeds} seeds per row, "
          f"{n_draws:,} draws in 4 chains per run; Markov chains record every {thin}th move "
          "(fit()'s default is 10)")
    print(f"  target: 95% interval coverage in [{0.95 - 1.96 * np.sqrt(0.0475 / n_seeds):.3f}, "
          f"{0.95 + 1.96 * np.sqrt(0.0475 / n_seeds):.3f}], mean z near 0")
    head = (f"  {'design':34s} {'engine':7s} {'exact p':>9s} {'coverage':>9s} {'mean z':>7s} "
            f"{'sd z':>6s} {'naive cov.':>10s} {'s/run':>6s}")
    print(head)
    for name, design in designs():
        exact = mcexact.exact_distribution(design)
        p_exact = [t for t in joint_tests(exact, ("score",))][0].p_value
        net = mcexact.plan(design)._network
        for engine in ("direct", "mcmc"):
            t0 = time.perf_counter()
            res = np.array([one_run(design, net, engine, s, n_draws, thin)
                            for s in range(n_seeds)])
            p, err, naive = res.T
            z = (p - p_exact) / err
            cover = np.mean(np.abs(p - p_exact) <= 1.96 * err)
            naive_cover = np.mean(np.abs(p - p_exact) <= 1.96 * naive)
            print(f"  {name:34s} {engine:7s} {p_exact:9.4f} {cover:9.3f} {np.mean(z):+7.2f} "
                  f"{np.std(z):6.2f} {naive_cover:10.3f} {(time.perf_counter() - t0) / n_seeds:6.3f}")
    print("  naive cov.: coverage if the draws were treated as independent (binomial error)")


if __name__ == "__main__":
    main()
