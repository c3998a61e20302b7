"""Null moments of block chains: Rao-Blackwellized records against the draws' own moments.

Markov chains with integer nuisance columns (block moves) have no exact null moments of T, and
the score test ranks the support by (T - mu)' V^-1 (T - mu) with estimated mu and V. A support
point near the test's cut is ranked by the estimate, and when the draws cannot settle its side
fit() counts it half, with half its probability as error. Since every block move redraws its
block from an enumerated fiber, the fiber's own moments (E[T | y outside the block]) can be
recorded at every move (``montecarlo.moments_of_draws``): unbiased, and less noisy than T.

Table 1, per design and seed over ``--seeds`` seeds at equal draws: the spread (sd over seeds) of
the null mean of T from the draws and from the records, their ratio, and for designs small
enough to enumerate, the records' mean minus the exact mean in units of its standard error over
seeds (exact enumeration, ``mcexact.exact_distribution``).
Table 2: wall time of the same chains with and without the records, side by side in one run
(best of a few repeats; ratio = with / without).

Designs: the nuisance design of ``benchmarks/calibration.py`` and the ``comed`` part of the
invented ``sparse`` demo (strata ``centre``, nuisance age and dose) on 5 of its centres and on
all 30.

    python benchmarks/bench_moments.py            # 20 seeds
    python benchmarks/bench_moments.py --quick    # 8 seeds

Prints tables; asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import mcexact  # noqa: E402  (the in-place build of this repository)
from mcexact import montecarlo as mc  # noqa: E402

import bench_mixing  # noqa: E402
import calibration  # noqa: E402

N_CHAINS = 4


def designs():
    out = [(calibration.designs()[2][0], calibration.designs()[2][1], True)]
    out.append(("demo comed, centres H01-H05", bench_mixing.comed_design(("H01", "H05")), True))
    out.append(("demo comed, all 30 centres", bench_mixing.comed_design(None), False))
    return out


def run(design, seed, n_draws, thin, records):
    saved = mc._RB_MOMENTS
    mc._RB_MOMENTS = records
    try:
        opts = mc.SamplerOptions(n_draws=n_draws, n_chains=N_CHAINS, n_warmup=1000, thin=thin)
        t0 = time.perf_counter()
        sample = mc.draw_mcmc(design, opts, mc.spawn_seeds(seed, N_CHAINS))
        return sample, time.perf_counter() - t0
    finally:
        mc._RB_MOMENTS = saved


def precision_table(n_seeds, n_draws, thin):
    print(f"Table 1. Null mean of T from block chains: {n_seeds} seeds, {n_draws:,} draws in "
          f"{N_CHAINS} chains, thin {thin}")
    print(f"  {'design':30s} {'column':>10s} {'sd, draws':>10s} {'sd, records':>11s} "
          f"{'ratio':>6s} {'records - exact':>15s}")
    for name, design, small in designs():
        exact = mcexact.exact_distribution(design).mean() if small else None
        plain, rb = [], []
        for seed in range(n_seeds):
            sample, _ = run(design, seed, n_draws, thin, True)
            plain.append(np.concatenate(sample.chains).mean(axis=0))
            rb.append(mc.moments_of_draws(sample.moment_draws, sample.observed)[0])
        plain, rb = np.array(plain), np.array(rb)
        for j, col in enumerate(design.interest_names):
            a, b = plain[:, j].std(ddof=1), rb[:, j].std(ddof=1)
            off = ("" if exact is None else
                   f"{(rb[:, j].mean() - exact[j]) / (b / np.sqrt(n_seeds)):+.2f} se")
            print(f"  {name:30s} {col:>10s} {a:10.4f} {b:11.4f} {a / b:6.2f} {off:>15s}",
                  flush=True)
    print()


def cost_table(n_draws, thin, repeats):
    print(f"Table 2. Wall time of {N_CHAINS} block chains ({n_draws:,} draws, thin {thin}), "
          f"with and without the moment records; best of {repeats}")
    print(f"  {'design':30s} {'without':>9s} {'with':>9s} {'with / without':>15s}")
    for name, design, _ in designs():
        best = {True: np.inf, False: np.inf}
        for r in range(repeats):
            for records in (False, True):
                best[records] = min(best[records], run(design, 100 + r, n_draws, thin, records)[1])
        print(f"  {name:30s} {best[False]:8.2f}s {best[True]:8.2f}s "
              f"{best[True] / best[False]:15.2f}", flush=True)
    print()


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="8 seeds")
    parser.add_argument("--draws", type=int, default=4000)
    parser.add_argument("--thin", type=int, default=10)
    args = parser.parse_args(argv)
    n_seeds = 8 if args.quick else 20
    precision_table(n_seeds, args.draws, args.thin)
    cost_table(args.draws, args.thin, 2 if args.quick else 3)


if __name__ == "__main__":
    main()
