"""Speed of the Monte Carlo engines, ``mcexact.montecarlo.draw_mcmc`` and ``draw_direct``.

Run ``python benchmarks/bench_sampler.py`` (about 3-5 minutes on 2 cores) or add ``--quick``
(about a minute).  Four tables, each a ratio measured side by side in this run:

1. **Swap step vs one bounded draw.**  Cost of one swap move of the Markov chain (intercept-only
   design, 2000 binary rows, 10% events, every row its own group) over the cost of one bounded
   integer draw (``mcexact._sampler.bounded_draws``, Lemire's method on the same PCG64 bit
   generator).  Target: at most 4.
2. **Direct sampler vs scipy.stats.permutation_test.**  Intercept-only design of 200 binary rows,
   20 events, interest in 0..9, statistic ``T = z'y``.  Independent draws of T per second from
   ``draw_direct`` (sampling only, and with the nuisance network build included) against
   resamples of the same statistic per second from ``scipy.stats.permutation_test`` (both the
   one-sample "pairings" form that permutes y and the two-sample "independent" form, at a few
   batch sizes; the fastest is the reference).  Target: direct at least 30x faster.  Both null
   means must agree with the exact one.
3. **Two chains on two cores vs one after the other.**  ``n_jobs=1`` time over ``n_jobs=2`` time
   (joblib threads) for two MCMC chains and for two direct-sampler streams of a few seconds each.
   Target: at least 1.8.  Draws must be identical for both settings.
4. **MCMC step cost vs n.**  Cost of one move at n = 100 and n = 100,000 binary rows (every row
   its own group, 10% events), for swap moves (intercept only) and block moves (one nuisance
   column in 0..3).  Target: within 1.5x.

Per-step and per-draw costs are marginal: each run is timed at two lengths and the difference in
time is divided by the difference in moves (or draws), which removes the fixed cost of a call
(recoding the design, allocating, joblib).  Every timing is the best of a few repeats, the
lengths of one table interleaved so that a change in the machine's load hits all of them alike.
A missed target prints "NOT met"; nothing here fails on time.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
from pathlib import Path

import joblib
import numpy as np
import scipy
from scipy import stats

# Benchmark this checkout (its in-place build), not whatever mcexact may be installed.
_ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(_ROOT))

import mcexact  # noqa: E402
from mcexact import _sampler  # noqa: E402
from mcexact.montecarlo import SamplerOptions, draw_direct, draw_mcmc, spawn_seeds  # noqa: E402
from _designs import distinct_interest_design, integer_covariate_design  # noqa: E402

_SWAP_TARGET = 4.0        # swap move / bounded draw, at most
_DIRECT_TARGET = 30.0     # direct draws per second / scipy resamples per second, at least
_PARALLEL_TARGET = 1.8    # time(n_jobs=1) / time(n_jobs=2) for two chains, at least
_SCALING_TARGET = 1.5     # step cost at n = 100,000 vs n = 100 (either way), at most

# Bound of the reference draws: any bound far below 2**32 costs the same (Lemire's rejection
# branch is then almost never taken); 1000 is the order of the swap move's own bounds.
_BOUND = 1000

# Moves between recorded draws in the per-step runs: large, so that recording T (a store per
# record) is a negligible part of the step cost being measured.
_THIN = 1000

_SEED = 20_251_202


# ---------------------------------------------------------------------------------------- timing

def _verdict(met: bool) -> str:
    return "met" if met else "NOT met"


def _ns(seconds: float) -> str:
    return f"{seconds * 1e9:,.1f} ns"


def _rate(per_second: float) -> str:
    return f"{per_second:,.0f}/s"


def _ratio(r: float) -> str:
    return f"{r:.2f}x" if r < 10 else f"{r:.1f}x"


def wall(fn):
    """Wall time of one call of `fn`, and its result."""
    t0 = time.perf_counter()
    result = fn()
    return time.perf_counter() - t0, result


def marginal_costs(jobs: dict, repeats: int) -> dict:
    """Marginal cost per unit of work of each job, from the best times at two lengths.

    `jobs` maps a name to ``(run, n_short, n_long)``, where ``run(n)`` does ``n`` units of work.
    Every repeat times all jobs at both lengths in turn (interleaved, so load changes hit all of
    them).  Returns, per name, ``(seconds_per_unit, fixed_seconds, best_short, best_long)``.
    """
    best = {name: [math.inf, math.inf] for name in jobs}
    for _ in range(repeats):
        for name, (run, n_short, n_long) in jobs.items():
            for i, n in enumerate((n_short, n_long)):
                best[name][i] = min(best[name][i], wall(lambda: run(n))[0])
    out = {}
    for name, (run, n_short, n_long) in jobs.items():
        t_short, t_long = best[name]
        per_unit = (t_long - t_short) / (n_long - n_short)
        if per_unit <= 0:       # the noise swamped the difference: fall back to the plain mean
            per_unit = t_long / n_long
        out[name] = (per_unit, t_short - per_unit * n_short, t_short, t_long)
    return out


def bounded_run(n: int) -> None:
    _sampler.bounded_draws(np.random.PCG64(_SEED), _BOUND, n)


def mcmc_run(design: mcexact.Design, moves: int, *, n_chains: int = 1, n_jobs: int = 1,
             thin: int = _THIN):
    """`moves` moves in each of `n_chains` chains (no warm-up); checks the move counters."""
    per_chain = max(1, moves // thin)
    options = SamplerOptions(n_draws=per_chain * n_chains, n_chains=n_chains, n_warmup=0,
                             thin=thin, n_jobs=n_jobs)
    sample = draw_mcmc(design, options, spawn_seeds(_SEED, n_chains))
    assert all(int(c[0]) == per_chain * thin for c in sample.counters), sample.counters
    return sample


def pilot_cost(run, n: int, min_seconds: float = 0.05) -> float:
    """Rough marginal cost per unit of `run`, to choose run lengths.

    `n` grows fourfold until a run takes `min_seconds` (so the fixed cost of a call no longer
    dominates), then runs of n and 3n units give the estimate.
    """
    while wall(lambda: run(n))[0] < min_seconds:
        n *= 4
    t1 = wall(lambda: run(n))[0]
    t3 = wall(lambda: run(3 * n))[0]
    return max((t3 - t1) / (2 * n), t3 / (3 * n) / 10, 1e-10)


def lengths(cost: float, seconds: float, unit: int = 1) -> tuple[int, int]:
    """Short and long run lengths (multiples of `unit`) for a long run of about `seconds`."""
    n_long = max(4 * unit, int(seconds / cost) // unit * unit)
    return max(unit, n_long // 4 // unit * unit), n_long


# ---------------------------------------------------------------------------------------- tables

def table_swap_vs_draw(quick: bool) -> dict:
    raw = distinct_interest_design(2000)
    design = raw.design()
    seconds, repeats = (0.3, 3) if quick else (1.5, 5)
    print("Table 1. Swap move vs one bounded draw (same bit generator, PCG64)")
    print(f"  design: {raw.label}, intercept only, {raw.n_events} events, {design.n_groups} groups;"
          f" moves from draw_mcmc(thin={_THIN}, n_warmup=0)")
    print(f"  reference: mcexact._sampler.bounded_draws(PCG64, bound={_BOUND}, n), Lemire's "
          "method on next_uint32 in a nogil loop")
    run_chain = lambda n: mcmc_run(design, n)  # noqa: E731
    draw_cost = pilot_cost(bounded_run, 2_000_000)
    move_cost = pilot_cost(run_chain, 20 * _THIN)
    jobs = {"bounded draw": (bounded_run, *lengths(draw_cost, seconds)),
            "swap move": (run_chain, *lengths(move_cost, seconds, _THIN))}
    costs = marginal_costs(jobs, repeats)
    print(f"  {'':<14}{'short run':>20}{'long run':>20}{'fixed cost':>13}{'per unit':>12}")
    for name, (per, fixed, t_short, t_long) in costs.items():
        n_short, n_long = jobs[name][1:]
        print(f"  {name:<14}{n_short:>13,} {t_short:>5.2f}s{n_long:>13,} {t_long:>5.2f}s"
              f"{fixed * 1e3:>10.1f} ms{_ns(per):>12}")
    print("  (fixed cost = short-run time minus its marginal share: the cost of a call; a "
          "negative value is timing noise)")
    ratio = costs["swap move"][0] / costs["bounded draw"][0]
    print(f"  swap move / bounded draw = {_ratio(ratio)}; target <= {_SWAP_TARGET:g}: "
          f"{_verdict(ratio <= _SWAP_TARGET)}")
    print("  (a swap move itself makes 3 bounded draws: stratum, receiving and giving group)")
    print()
    return {"swap move / bounded draw": (ratio, f"<= {_SWAP_TARGET:g}", ratio <= _SWAP_TARGET)}


def _pairings_test(y: np.ndarray, z: np.ndarray, n_resamples: int, batch, rng):
    """``permutation_test`` permuting the response: the one-sample "pairings" form."""
    zf = z.astype(float)
    return stats.permutation_test((y.astype(float),), lambda yy, axis: yy @ zf,
                                  permutation_type="pairings", n_resamples=n_resamples,
                                  vectorized=True, axis=-1, batch=batch, alternative="greater",
                                  rng=rng)


def _independent_test(y: np.ndarray, z: np.ndarray, n_resamples: int, batch, rng):
    """``permutation_test`` over the two samples z[y == 1] and z[y == 0]; T = sum of the first."""
    zf = z.astype(float)
    return stats.permutation_test((zf[y == 1], zf[y == 0]),
                                  lambda a, b, axis: a.sum(axis=axis),
                                  permutation_type="independent", n_resamples=n_resamples,
                                  vectorized=True, axis=-1, batch=batch, alternative="greater",
                                  rng=rng)


def table_direct_vs_scipy(quick: bool) -> dict:
    raw = integer_covariate_design(200, 20, 10)
    design = raw.design()
    y, z = raw.y, np.asarray(raw.interest, dtype=np.int64)
    n_draws = 200_000
    n_resamples = 20_000 if quick else 100_000
    batches = (100, 1_000, 10_000)   # scipy's speed peaks at a few hundred per batch here
    repeats = 3 if quick else 5
    print("Table 2. Direct sampler vs scipy.stats.permutation_test, null draws of T = z'y")
    print(f"  design: intercept only, {raw.label} ({design.n_groups} groups)")
    print(f"  direct: net = mcexact.plan(design)._network; draw_direct(net, design, "
          f"SamplerOptions(n_draws={n_draws:,}, n_chains=1), seeds)")
    print(f"  scipy {scipy.__version__}, n_resamples={n_resamples:,}, vectorized=True, axis=-1, "
          "alternative='greater', rng=seed, batch in " + ", ".join(f"{b:,}" for b in batches) + ":")
    print("    pairings:    permutation_test((y,), lambda y, axis: y @ z, "
          "permutation_type='pairings', ...)")
    print("    independent: permutation_test((z[y == 1], z[y == 0]), lambda a, b, axis: "
          "a.sum(axis), permutation_type='independent', ...)")

    t_build, best_direct, sample = math.inf, math.inf, None
    options = SamplerOptions(n_draws=n_draws, n_chains=1)
    for _ in range(repeats):
        dt, planned = wall(lambda: mcexact.plan(design))
        t_build = min(t_build, dt)
        dt, sample = wall(lambda: draw_direct(planned._network, design, options,
                                              spawn_seeds(_SEED, 1)))
        best_direct = min(best_direct, dt)
    net = planned._network
    direct_rate = n_draws / best_direct
    built_rate = n_draws / (best_direct + t_build)

    forms = {"pairings": _pairings_test, "independent": _independent_test}
    best_scipy = {(f, b): math.inf for f in forms for b in batches}
    results = {}
    for _ in range(max(2, repeats - 2)):
        for (form, batch) in best_scipy:
            dt, res = wall(lambda: forms[form](y, z, n_resamples, batch, _SEED))
            best_scipy[(form, batch)] = min(best_scipy[(form, batch)], dt)
            results[form] = res

    print(f"  {'':<32}{'best time':>11}{'draws per second':>20}{'direct / this':>16}")
    print(f"  {'network build (plan)':<32}{t_build * 1e3:>8.2f} ms{'':>20}{'':>16}   "
          f"({net.n_nodes} nuisance nodes, {net.n_arcs} arcs)")
    print(f"  {'direct, sampling only':<32}{best_direct * 1e3:>8.1f} ms{_rate(direct_rate):>20}")
    print(f"  {'direct, including the build':<32}{(best_direct + t_build) * 1e3:>8.1f} ms"
          f"{_rate(built_rate):>20}")
    for (form, batch), dt in best_scipy.items():
        rate = n_resamples / dt
        print(f"  {f'scipy {form}, batch={batch:,}':<32}{dt * 1e3:>8.1f} ms{_rate(rate):>20}"
              f"{_ratio(direct_rate / rate):>16}")
    (ref_form, ref_batch), ref_time = min(best_scipy.items(), key=lambda kv: kv[1])
    ref_rate = n_resamples / ref_time
    ratio, ratio_built = direct_rate / ref_rate, built_rate / ref_rate
    print(f"  reference: the fastest scipy setting ({ref_form}, batch={ref_batch:,}), "
          f"{_rate(ref_rate)}")
    print(f"  direct / scipy = {_ratio(ratio)} sampling only, {_ratio(ratio_built)} including the "
          f"network build; target >= {_DIRECT_TARGET:g}: {_verdict(ratio >= _DIRECT_TARGET)} "
          f"(sampling only), {_verdict(ratio_built >= _DIRECT_TARGET)} (with the build)")

    # Sanity check: every engine's null mean of T must match the exact one, E T = k mean(z) for
    # k events among n rows (each row is an event with probability k / n under the null).
    exact_mean = raw.n_events * z.mean()
    exact_sd = math.sqrt(float(sample.null_cov[0, 0]))
    means = {"direct": (float(sample.chains[0][:, 0].mean()), n_draws)}
    for form, res in results.items():
        means[f"scipy {form}"] = (float(res.null_distribution.mean()), n_resamples)
    assert abs(float(sample.null_mean[0]) - exact_mean) < 1e-9 * exact_mean
    parts = []
    for name, (mean, count) in means.items():
        z_score = (mean - exact_mean) / (exact_sd / math.sqrt(count))
        assert abs(z_score) < 5, f"{name}: null mean {mean} far from exact {exact_mean}"
        parts.append(f"{name} {mean:.3f} ({z_score:+.1f} se)")
    print(f"  null mean of T: exact {exact_mean:.3f} (k mean(z); network {sample.null_mean[0]:.3f},"
          f" sd {exact_sd:.3f}); " + ", ".join(parts) + " (within 5 se: asserted)")
    print()
    return {"direct / scipy, sampling only": (ratio, f">= {_DIRECT_TARGET:g}",
                                              ratio >= _DIRECT_TARGET),
            "direct / scipy, with the build": (ratio_built, f">= {_DIRECT_TARGET:g}",
                                               ratio_built >= _DIRECT_TARGET)}


def _parallel_pair(run, repeats: int):
    """Best times of run(n_jobs=1) and run(n_jobs=2), interleaved; both results; and the cores
    the best n_jobs=2 run obtained (process CPU time over wall time: below 2 when other work on
    the machine took a share of the cores)."""
    best = {1: math.inf, 2: math.inf}
    out, cores = {}, math.nan
    for _ in range(repeats):
        for n_jobs in (1, 2):
            cpu0 = time.process_time()
            dt, out[n_jobs] = wall(lambda: run(n_jobs))
            if dt < best[n_jobs]:
                best[n_jobs] = dt
                if n_jobs == 2:
                    cores = (time.process_time() - cpu0) / dt
    return best, out, cores


def table_parallel(quick: bool) -> dict:
    per_chain_seconds = 0.5 if quick else 3.0
    repeats = 3
    print(f"Table 3. Two chains on two cores vs one after the other (joblib threads; about "
          f"{per_chain_seconds:g} s of work per chain; best of {repeats}, interleaved)")
    print(f"  machine: os.cpu_count()={os.cpu_count()}, load average now "
          f"{os.getloadavg()[0]:.2f} (other work on the machine lowers the two-core time's share)")
    print(f"  {'engine':<8}{'design':<33}{'work per chain':>19}{'n_jobs=1':>10}{'n_jobs=2':>10}"
          f"{'cores used':>12}{'ratio':>8}  target >= {_PARALLEL_TARGET:g}")
    summary = {}

    raw = distinct_interest_design(2000)
    design = raw.design()
    move_cost = pilot_cost(lambda n: mcmc_run(design, n), 20 * _THIN)
    moves = lengths(move_cost, per_chain_seconds, _THIN)[1]
    best, out, cores = _parallel_pair(lambda j: mcmc_run(design, moves, n_chains=2, n_jobs=j),
                                      repeats)
    assert all(np.array_equal(a, b) for a, b in zip(out[1].chains, out[2].chains)), \
        "MCMC draws differ between n_jobs=1 and n_jobs=2"
    ratio = best[1] / best[2]
    summary["MCMC: n_jobs=1 / n_jobs=2"] = (ratio, f">= {_PARALLEL_TARGET:g}",
                                            ratio >= _PARALLEL_TARGET)
    print(f"  {'mcmc':<8}{raw.label + ', swap moves':<33}{moves:>13,} moves{best[1]:>9.2f}s"
          f"{best[2]:>9.2f}s{cores:>12.2f}{_ratio(ratio):>8}  "
          f"{_verdict(ratio >= _PARALLEL_TARGET)}")

    raw = integer_covariate_design(2000, 200, 200)
    design = raw.design()
    net = mcexact.plan(design)._network

    def direct_run(n_draws, n_jobs=1, n_chains=2):
        options = SamplerOptions(n_draws=n_chains * n_draws, n_chains=n_chains, n_jobs=n_jobs)
        return draw_direct(net, design, options, spawn_seeds(_SEED, n_chains))

    draws = lengths(pilot_cost(lambda n: direct_run(n, n_chains=1), 20_000), per_chain_seconds)[1]
    best, out, cores = _parallel_pair(lambda j: direct_run(draws, j), repeats)
    assert all(np.array_equal(a, b) for a, b in zip(out[1].chains, out[2].chains)), \
        "direct draws differ between n_jobs=1 and n_jobs=2"
    ratio = best[1] / best[2]
    summary["direct: n_jobs=1 / n_jobs=2"] = (ratio, f">= {_PARALLEL_TARGET:g}",
                                              ratio >= _PARALLEL_TARGET)
    print(f"  {'direct':<8}{raw.label:<33}{draws:>13,} draws{best[1]:>9.2f}s{best[2]:>9.2f}s"
          f"{cores:>12.2f}{_ratio(ratio):>8}  {_verdict(ratio >= _PARALLEL_TARGET)}")
    print("  cores used = process CPU time / wall time of the best n_jobs=2 run; draws identical "
          "for n_jobs=1 and n_jobs=2 (asserted)")
    print()
    return summary


def table_step_vs_n(quick: bool) -> dict:
    sizes = (100, 100_000)
    seconds, repeats = (0.3, 3) if quick else (1.5, 5)
    print(f"Table 4. MCMC step cost vs n (every row its own group, 10% events; marginal cost "
          f"per move, thin={_THIN})")
    print(f"  {'move':<7}{'design':<26}{'groups':>8}{'fixed cost':>13}{'per move':>13}")
    summary = {}
    for move, levels in (("swap", 0), ("block", 4)):
        jobs, labels = {}, {}
        for n in sizes:
            raw = distinct_interest_design(n, nuisance_levels=levels)
            design = raw.design()
            run = (lambda d: lambda k: mcmc_run(d, k))(design)
            assert run(_THIN).info["move"] == move
            jobs[n] = (run, *lengths(pilot_cost(run, 20 * _THIN), seconds, _THIN))
            labels[n] = (raw.label, design.n_groups)
        costs = marginal_costs(jobs, repeats)
        for n in sizes:
            per, fixed = costs[n][:2]
            print(f"  {move:<7}{labels[n][0]:<26}{labels[n][1]:>8,}{fixed * 1e3:>10.1f} ms"
                  f"{_ns(per):>13}")
        small, large = costs[sizes[0]][0], costs[sizes[1]][0]
        ratio = max(large / small, small / large)
        met = ratio <= _SCALING_TARGET
        summary[f"{move}: step cost n={sizes[1]:,} / n={sizes[0]}"] = (
            large / small, f"within {_SCALING_TARGET:g}x", met)
        print(f"  {move}: n={sizes[1]:,} / n={sizes[0]} = {_ratio(large / small)}; target within "
              f"{_SCALING_TARGET:g}x: {_verdict(met)}")
    print()
    return summary


# ---------------------------------------------------------------------------------------- main

def _header(quick: bool) -> None:
    print("mcexact Monte Carlo benchmarks" + (" (--quick)" if quick else ""))
    print("  compared: MCMC swap moves against bounded draws; draw_direct against "
          f"scipy.stats.permutation_test (scipy {scipy.__version__}); n_jobs=2 against n_jobs=1; "
          "step cost at two sizes")
    print(f"  machine: {platform.machine()}, os.cpu_count()={os.cpu_count()}, "
          f"load average {os.getloadavg()[0]:.2f}; Python {platform.python_version()}, "
          f"numpy {np.__version__}, joblib {joblib.__version__}, mcexact {mcexact.__version__}")
    print(f"  date: {time.strftime('%Y-%m-%d %H:%M:%S')}; times are the best of a few repeats, "
          "per-unit costs are marginal (two run lengths)")
    print()


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="shorter runs, about a minute")
    quick = parser.parse_args(argv).quick
    _header(quick)
    summary = {}
    for table in (table_swap_vs_draw, table_direct_vs_scipy, table_parallel, table_step_vs_n):
        summary.update(table(quick))
    print("Summary (information only; nothing fails on time)")
    for name, (value, target, met) in summary.items():
        print(f"  {name:<40}{_ratio(value):>9}  target {target:<12}{_verdict(met)}")


if __name__ == "__main__":
    main()
