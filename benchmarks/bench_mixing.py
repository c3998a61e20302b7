"""Mixing of the block-move Markov chains across strata, before and after cross-strata moves and
overdispersed starts, on the invented ``sparse`` demo (``mcexact.load_demo("sparse")``).

Variants (switched through the private settings of ``mcexact.montecarlo``):

- ``before``: the earlier sampler (half the blocks within one stratum, half from anywhere; every
  chain starts at the observed response);
- ``starts``: the earlier moves, with overdispersed starts (a tilted first half of the warm-up);
- ``after``: overdispersed starts, half of the blocks from two strata, anchored blocks.

Part 1 (subsets of 5 centres, small enough to enumerate): the ``comed`` part against exact
enumeration (``mcexact.validate``): z = (Monte Carlo - exact) / MCSE of the score p-value, the
estimate and both limits, the exact null probability of the support points visited, R-hat, ESS
and the verdict of the score test, the share of moves that changed y, microseconds per move.
Part 2 (all 30 centres): the same part over several seeds; no exact answer, so the spread of the
seeds' values is set against their stated Monte Carlo errors (``spread / mean MCSE``; about 1
when the errors are honest). Part 3 (the subsets again): estimate and limits from null chains
and from chains tilted to the null chains' estimate, against exact enumeration.

Run ``python benchmarks/bench_mixing.py [--quick]`` from the repository root. Prints tables;
asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import sys
from contextlib import contextmanager

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import mcexact  # noqa: E402  (the in-place build of this repository)
from mcexact import montecarlo  # noqa: E402
from mcexact.design import Design  # noqa: E402
from mcexact.validation import validate  # noqa: E402

FORMULA = "rash ~ comed + age + dose_mg_kg"
VARIANTS = {
    "before": {"_CROSS_QUARTERS": 0, "_ANCHORED": False, "_START_SPREAD": 0.0},
    "starts": {"_CROSS_QUARTERS": 0, "_ANCHORED": False},
    "after": {},
}
SUBSETS = (("H01", "H05"), ("H06", "H10"), ("H21", "H25"))


@contextmanager
def variant(name: str):
    """Set the sampler settings of variant `name` for the duration of the block."""
    saved = {k: getattr(montecarlo, k) for k in VARIANTS[name]}
    for k, v in VARIANTS[name].items():
        setattr(montecarlo, k, v)
    try:
        yield
    finally:
        for k, v in saved.items():
            setattr(montecarlo, k, v)


def comed_design(centres: tuple[str, str] | None) -> Design:
    data = mcexact.load_demo("sparse")
    if centres is not None:
        data = data[(data.centre >= centres[0]) & (data.centre <= centres[1])]
    return Design.from_formula(data, FORMULA, strata="centre", interest=["comed"])


def _chain_row(fit_result, seconds: float, n_moves: int) -> dict:
    part = fit_result.method["parts"]["comed"]
    score = fit_result.tests.query("effect == 'comed' and test == 'score'").iloc[0]
    return {"rhat": score["rhat"], "ess": score["ess"], "verdict": score["verdict"][:14],
            "changed": part["changed_share"], "us_move": 1e6 * seconds / n_moves}


def subset_rows(name: str, seeds, n_draws: int, thin: int, block: int, warmup: int) -> list:
    rows = []
    for centres in SUBSETS:
        design = comed_design(centres)
        for seed in seeds:
            with variant(name):
                rep = validate(design, method="mcmc", n_draws=n_draws, thin=thin,
                               block_size=block, n_warmup=warmup, rng=seed)
            comp = rep.comparisons.query("part == 'comed'")

            def z_of(item, quantity):
                row = comp[(comp["item"] == item) & (comp["quantity"] == quantity)].iloc[0]
                return row["z"], row["monte_carlo"], row["exact"]

            zp, p_mc, p_ex = z_of("score", "p_value")
            ze, e_mc, e_ex = z_of("comed", "estimate")
            zl, _, _ = z_of("comed", "ci_lower")
            zu, u_mc, u_ex = z_of("comed", "ci_upper")
            cover = rep.coverage.query("part == 'comed'").iloc[0]
            mc_seconds = rep.monte_carlo.method["parts"]["comed"]["seconds"]
            rows.append({"variant": name, "centres": "-".join(centres), "seed": seed,
                         "p": p_mc, "p_exact": p_ex, "z_p": zp, "est": e_mc, "est_exact": e_ex,
                         "z_est": ze, "z_lo": zl, "upper": u_mc, "upper_exact": u_ex,
                         "z_up": zu, "mass": cover["mass_coverage"],
                         **_chain_row(rep.monte_carlo, mc_seconds,
                                      n_draws * thin + 4 * warmup)})
    return rows


def full_rows(name: str, seeds, n_draws: int, thin: int, block: int, warmup: int) -> list:
    design = comed_design(None)
    rows = []
    for seed in seeds:
        with variant(name):
            r = mcexact.fit(design, method="mcmc", n_draws=n_draws, thin=thin, block_size=block,
                            n_warmup=warmup, rng=seed, asymptotic=False)
        est = r.estimates.iloc[0]
        score = r.tests.query("effect == 'comed' and test == 'score'").iloc[0]
        seconds = r.method["parts"]["comed"]["seconds"]
        rows.append({"variant": name, "seed": seed, "est": est["estimate"],
                     "mcse": est["mcse"], "lower": est["ci_lower"], "upper": est["ci_upper"],
                     "mcse_up": est["mcse_ci_upper"], "p": score["p_value"],
                     "mcse_p": score["mcse"],
                     **_chain_row(r, seconds, n_draws * thin + 4 * warmup)})
    return rows


def tilted_rows(seeds, n_draws: int, thin: int, block: int, warmup: int) -> list:
    """Null chains, then chains tilted to the null chains' estimate (importance-reweighted back to
    the null by ``Sample.to_distribution``): estimate and limits of each against exact
    enumeration. fit() does not tilt Markov chains (yet); this shows what it would give."""
    from mcexact import exact_distribution
    from mcexact.inference import column_inference
    from mcexact.montecarlo import SamplerOptions, draw_mcmc, spawn_seeds

    rows = []
    o = SamplerOptions(n_draws=n_draws, thin=thin, n_warmup=warmup, block_size=block)
    for centres in SUBSETS:
        design = comed_design(centres)
        ex = column_inference(exact_distribution(design), 0.05)
        for seed in seeds:
            null = column_inference(draw_mcmc(design, o, spawn_seeds(seed, 4)).to_distribution())
            b = null.estimate if np.isfinite(null.estimate) else 0.0
            tilted = column_inference(draw_mcmc(design, o, spawn_seeds(seed, 4),
                                                beta=[b]).to_distribution())
            for how, e in (("null", null), ("tilted", tilted)):
                rows.append({"centres": "-".join(centres), "seed": seed, "draws": how,
                             "est - exact": e.estimate - ex.estimate,
                             "lower - exact": e.ci_lower - ex.ci_lower,
                             "upper - exact": e.ci_upper - ex.ci_upper})
    return rows


def _seed_spread(df: pd.DataFrame) -> pd.DataFrame:
    """Per variant: the seeds' standard deviation of each value over the mean stated MCSE."""
    out = []
    for name, g in df.groupby("variant", sort=False):
        out.append({"variant": name,
                    "est sd/mcse": g["est"].std(ddof=1) / g["mcse"].mean(),
                    "upper sd/mcse": g["upper"].std(ddof=1) / g["mcse_up"].mean(),
                    "p sd/mcse": g["p"].std(ddof=1) / g["mcse_p"].mean(),
                    "not converged": int(g["verdict"].str.startswith("not conv").sum())})
    return pd.DataFrame(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer seeds and draws")
    args = ap.parse_args()
    pd.set_option("display.width", 200)
    pd.set_option("display.max_columns", 30)
    pd.set_option("display.float_format", lambda v: f"{v:.4g}")
    thin, block, warmup = 50, 16, 1000
    sub_seeds = (1, 2) if args.quick else (1, 2, 3)
    full_seeds = (1, 2, 3) if args.quick else (1, 2, 3, 4)
    n_sub, n_full = (2000, 4000) if args.quick else (4000, 10000)

    sub = pd.DataFrame([r for name in VARIANTS
                        for r in subset_rows(name, sub_seeds, n_sub, thin, block, warmup)])
    print(f"== subsets of 5 centres, comed part: Monte Carlo against exact enumeration "
          f"({n_sub:,} draws, thin {thin}, blocks of {block}, warm-up {warmup})")
    print(sub.to_string(index=False))
    summary = sub.groupby("variant", sort=False).agg(
        max_abs_z_p=("z_p", lambda v: np.nanmax(np.abs(v))),
        rms_z_p=("z_p", lambda v: np.sqrt(np.nanmean(np.square(v)))),
        rms_z_est=("z_est", lambda v: np.sqrt(np.nanmean(np.square(v)))),
        rms_z_up=("z_up", lambda v: np.sqrt(np.nanmean(np.square(v)))),
        min_mass=("mass", "min"), changed=("changed", "mean"), us_move=("us_move", "mean"))
    print("\nsummary (|z| of an honest error is about 1):")
    print(summary.to_string())

    full = pd.DataFrame([r for name in VARIANTS
                         for r in full_rows(name, full_seeds, n_full, thin, block, warmup)])
    print(f"\n== all 30 centres, comed part, {len(full_seeds)} seeds ({n_full:,} draws)")
    print(full.to_string(index=False))
    print("\nspread of the seeds against their stated errors (about 1 when honest):")
    print(_seed_spread(full).to_string(index=False))
    tilt = pd.DataFrame(tilted_rows(sub_seeds, n_sub, thin, block, warmup))
    print(f"\n== subsets, comed part: null chains and chains tilted to their estimate, against "
          f"exact enumeration ({n_sub:,} draws each)")
    print(tilt.to_string(index=False))
    print("\nroot mean square error against exact:")
    print(tilt.groupby("draws")[["est - exact", "lower - exact", "upper - exact"]].agg(
        lambda v: float(np.sqrt(np.nanmean(np.square(v[np.isfinite(v)]))))).to_string())
    cost = full.groupby("variant")["us_move"].mean()
    print(f"\nper-move cost after / before: {cost['after'] / cost['before']:.2f}")


if __name__ == "__main__":
    main()
