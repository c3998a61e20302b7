"""The public entry point :func:`fit` and its result object.

`fit` turns data and a formula into a :class:`~mcexact.design.Design`, computes the conditional
distribution of each effect (the other interest terms conditioned on at their observed values) and
the joint distribution of all interest terms, and runs the tests, estimates and limits of
:mod:`mcexact.inference` on them, beside the ordinary logistic fit of :mod:`mcexact.asymptotic`.
"""

from __future__ import annotations

import json
import math
import pathlib
import sys
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from mcexact._exceptions import BudgetExceeded, DataError
from mcexact._json import plain
from mcexact.asymptotic import AsymptoticComparison, asymptotic_fit
from mcexact.design import Design
from mcexact.distribution import ConditionalDistribution
from mcexact.exact import exact_distribution, plan
from mcexact.inference import column_inference, joint_cmle, joint_tests
from mcexact.montecarlo import PartSampler, SamplerOptions, mcse_of_indicator, spawn_seeds

__all__ = ["fit", "FitResult", "METHODS", "CAUTION", "auto_engine"]

#: Engines `fit` accepts.
METHODS = ("auto", "enumerate", "direct", "mcmc")

ENGINE_DESCRIPTIONS = {
    "exact": "exact enumeration by the network algorithm (Hirji, Mehta & Patel 1987)",
    "direct": "independent draws through the nuisance network (Mehta, Patel & Senchaudhuri 2000)",
    "mcmc": "Markov chains with the nuisance statistics fixed (swap or exact block moves)",
}

CAUTION = (
    "Exact conditional results can be conservative, and conditioning on many nuisance terms "
    "loses information. Monte Carlo values, where used, are estimates with the Monte Carlo error "
    "shown. These results support, and do not replace, the study protocol, a qualified "
    "statistician and applicable regulatory guidance.")

_TEST_COLUMNS = ["effect", "test", "statistic", "p_value", "mid_p_value", "df", "n_points",
                 "engine", "mcse", "mcse_mid_p", "n_draws", "ess", "rhat", "verdict",
                 "draws_needed", "note"]
_ESTIMATE_COLUMNS = ["term", "effect", "estimate", "kind", "ci_lower", "ci_upper", "odds_ratio",
                     "or_ci_lower", "or_ci_upper", "p_value", "mid_p_value", "p_lower", "p_upper",
                     "cmle", "median_unbiased", "observed", "n_points", "engine", "mcse",
                     "mcse_ci_lower", "mcse_ci_upper", "mcse_p_value", "n_draws", "ess", "rhat",
                     "verdict", "draws_needed", "note"]


@dataclass
class FitResult:
    """What :func:`fit` found.

    Attributes
    ----------
    design : Design
    tests : pandas.DataFrame
        One row per (effect, test); effect ``"joint"`` is the joint test of all interest terms.
        Columns ``effect, test, statistic, p_value, mid_p_value, df, n_points, note``; ``test`` is
        ``"score"``, ``"probability"`` or ``"likelihood_ratio"``.
    estimates : pandas.DataFrame
        One row per interest column, per original covariate unit: ``term, effect, estimate, kind``
        (``"cmle"``, ``"median_unbiased"`` or ``"none"``), ``ci_lower, ci_upper, odds_ratio,
        or_ci_lower, or_ci_upper, p_value`` (two-sided: twice the smaller tail), ``mid_p_value,
        p_lower, p_upper`` (one-sided tails ``P(T <= t)``, ``P(T >= t)``), ``cmle,
        median_unbiased, observed, n_points, note``.
    joint_estimate : pandas.Series or None
        Joint conditional MLE of all interest columns (per original unit), where it exists.
    distribution : ConditionalDistribution or None
        The joint conditional distribution of all interest statistics (None if it was too large).
    effect_distributions : dict
        Effect name -> its conditional distribution (other interest terms conditioned on).
    method : dict
        Engine used and why, with the planned network sizes.
    asymptotic : AsymptoticComparison or None
    alpha : float
    notes : list of str
    """

    design: Design
    tests: pd.DataFrame
    estimates: pd.DataFrame
    joint_estimate: pd.Series | None
    distribution: ConditionalDistribution | None
    effect_distributions: dict
    method: dict
    asymptotic: AsymptoticComparison | None
    alpha: float
    notes: list = field(default_factory=list)
    interrupted: bool = False
    #: What a continuation needs: settings, per-part seeds, samples and exact distributions.
    _run: dict = field(default_factory=dict, repr=False, compare=False)

    def save(self, path) -> "pathlib.Path":
        """Write this result as a saved run (see :mod:`mcexact.runs`): design, settings, seeds,
        chain states, draws and result tables, atomically (a run killed while writing leaves any
        earlier file intact). Reopen it with :func:`mcexact.load_run`."""
        from mcexact.runs import save_run

        return save_run(self, path)

    def extend(self, n_draws: int | None = None, *, target_mcse: float | None = None,
               time_budget: float | None = None, max_draws: int | None = None,
               progress: bool | None = None, n_jobs: int | None = None,
               backend: str | None = None) -> "FitResult":
        """More draws for every Monte Carlo part, continuing each chain where it stopped.

        Parameters
        ----------
        n_draws : int, optional
            Draws to add to every Monte Carlo part (default: as many as the run asked for at
            first). The result equals that of one uninterrupted run of the total length with the
            same seed; a part an interruption left unsampled starts afresh with `n_draws` draws.
        target_mcse, time_budget, max_draws : optional
            Then go on in rounds as in :func:`fit`, until every Monte Carlo p-value's error is at
            most `target_mcse`, `time_budget` seconds are spent per part or a part has
            `max_draws` draws in all.
        progress, n_jobs, backend
            As in :func:`fit` (they do not change the numbers).

        Returns
        -------
        FitResult
            A new result; this one is unchanged.

        Raises
        ------
        DataError
            If every part is exact (nothing to extend) or an option is invalid.
        """
        return _extend(self, n_draws, target_mcse, time_budget, max_draws, progress, n_jobs,
                       backend)

    def summary(self) -> str:
        """A readable text report."""
        from mcexact.report import text_report

        return text_report(self)

    def __str__(self) -> str:
        return self.summary()

    def to_dict(self) -> dict:
        """JSON-serialisable form (infinite values as the strings ``"inf"`` / ``"-inf"``)."""
        d = self.design
        out = {
            "schema": "mcexact.fit",
            "schema_version": 1,
            "design": {
                "formula": d.formula, "response": d.response_name, "strata": d.strata_name,
                "trials": d.trials_name, "n_rows": d.n_rows, "n_groups": d.n_groups,
                "n_strata": d.n_strata, "n_dropped_strata": d.n_dropped_strata,
                "n_dropped_rows": d.n_dropped_rows, "interest": list(d.interest_names),
                "nuisance": list(d.nuisance_names),
                "effects": {k: list(v) for k, v in d.effects.items()},
                "interest_scales": [float(x) for x in d.interest_scales], "notes": list(d.notes),
            },
            "alpha": self.alpha,
            "method": self.method,
            "tests": _records(self.tests),
            "estimates": _records(self.estimates),
            "joint_estimate": (None if self.joint_estimate is None
                               else {k: plain(v) for k, v in self.joint_estimate.items()}),
            "asymptotic": None if self.asymptotic is None else plain(self.asymptotic.to_dict()),
            "notes": list(self.notes),
            "interrupted": bool(self.interrupted),
            "caution": CAUTION,
        }
        return plain(out)

    def to_json(self, **kwargs) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    def to_html(self, path=None, **kwargs) -> str:
        """Self-contained HTML report (keywords of :func:`mcexact.html_report.render_html`:
        ``title``, ``plots``); also written atomically to `path` when one is given."""
        from mcexact import html_report

        text = html_report.render_html(self, **kwargs)
        if path is not None:
            html_report.write_text_atomically(text, path)
        return text


def _records(frame: pd.DataFrame) -> list:
    return [plain(r) for r in frame.to_dict(orient="records")]


def _check_options(method, alpha):
    if method not in METHODS:
        raise DataError(f"method must be one of {', '.join(map(repr, METHODS))}; got {method!r}")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float, np.floating)) \
            or not 0 < float(alpha) < 1:
        raise DataError(f"alpha must be a number strictly between 0 and 1; got {alpha!r}")


@dataclass(frozen=True)
class Precision:
    """When to stop sampling: after ``n_draws`` draws, or, with ``target_mcse`` and/or
    ``time_budget``, in rounds until every monitored p-value's Monte Carlo error is at most
    ``target_mcse``, the time budget (seconds, per part) is spent, or ``max_draws`` is reached."""

    n_draws: int
    target_mcse: float | None = None
    time_budget: float | None = None
    max_draws: int | None = None
    progress: bool = False


def _monitored_mcse(dist: ConditionalDistribution) -> float:
    """Largest Monte Carlo error among a distribution's test p-values and one-sided tails, as
    reported in the result frames."""
    errors = [row["mcse"] for row in _test_rows("", dist, "")]
    if dist.n_columns == 1:
        col, t = dist.support[:, 0], int(dist.observed[0])
        errors += [mcse_of_indicator(dist, (col <= t).astype(float)),
                   mcse_of_indicator(dist, (col >= t).astype(float))]
    return float(np.nanmax(errors)) if np.any(np.isfinite(errors)) else np.nan


# Without a precision target, a fixed number of draws is still taken in this many rounds, so a
# progress bar moves and an interruption (Ctrl-C) keeps the rounds already drawn. Rounds change no
# number: any split into rounds gives the draws of one run (PartSampler).
_FIXED_ROUNDS = 10


class _Interrupt:
    """Shared by the parts of one analysis: set when the user interrupted sampling (Ctrl-C), after
    which no part samples any more and tilted refinements are skipped."""

    def __init__(self):
        self.set = False


def _run_rounds(sampler: PartSampler, n: int, bar) -> None:
    """Add `n` draws to `sampler` in up to `_FIXED_ROUNDS` rounds."""
    done = 0
    first = sampler.sample is None
    step = max(-(-n // _FIXED_ROUNDS), sampler.options.n_chains if first else 1)
    while done < n:
        k = min(step, n - done)
        sampler.run(k)
        done += k
        if bar is not None:
            bar.update(k)


def _sample_to_precision(sampler: PartSampler, precision: Precision, what: str,
                         interrupt: _Interrupt):
    """Run `sampler` for ``precision.n_draws`` more draws, then, with a target or budget, in
    rounds until the precision, the budget or the draw limit is reached.

    Returns the sample (None if an interruption came before any draw) and why sampling stopped.
    Ctrl-C (KeyboardInterrupt) between or during rounds stops cleanly: the draws of the rounds
    completed are kept and ``interrupt.set`` tells the other parts not to start.
    """
    if interrupt.set:
        return sampler.sample, "interrupted by the user"
    before = 0 if sampler.sample is None else sampler.sample.n_draws
    rounds = precision.target_mcse is not None or precision.time_budget is not None
    limit = precision.max_draws or before + 50 * (precision.n_draws or before)
    bar = None
    if precision.progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=limit if rounds else before + precision.n_draws, initial=before,
                   desc=f"sampling {what}", unit="draw", leave=False, dynamic_ncols=True)
    t0 = time.perf_counter()
    try:
        _run_rounds(sampler, precision.n_draws, bar)
        sample = sampler.sample
        if not rounds:
            return sample, "the requested number of draws"
        while True:
            n = sample.n_draws
            worst = _monitored_mcse(sample.to_distribution())
            if precision.target_mcse is not None and worst <= precision.target_mcse:
                return sample, f"target Monte Carlo error {precision.target_mcse:g} reached"
            elapsed = time.perf_counter() - t0
            if precision.time_budget is not None and elapsed >= precision.time_budget:
                return sample, f"time budget of {precision.time_budget:g} s spent"
            if n >= limit:
                return sample, f"draw limit of {limit:,} reached"
            # Draws for the target by the 1/sqrt(N) law, at least a quarter more, at most double.
            more = n
            if precision.target_mcse is not None and np.isfinite(worst):
                more = int(n * ((worst / precision.target_mcse) ** 2 - 1) * 1.1)
            more = int(min(max(more, n // 4, 1), n, limit - n))
            if precision.time_budget is not None and elapsed > 0:
                rate = n / max(sample.seconds, 1e-9)
                more = int(max(1, min(more, rate * (precision.time_budget - elapsed))))
            _run_rounds(sampler, more, bar)
            sample = sampler.sample
    except KeyboardInterrupt:
        interrupt.set = True
        return sampler.sample, "interrupted by the user"
    finally:
        if bar is not None:
            bar.close()


_AUTO_REASONS = {
    "exact": "the full network fits the node budget",
    "direct": "the full network is over the node budget but the nuisance network fits, so "
              "independent draws are possible",
    "mcmc": "even the nuisance network is over the node budget, so Markov chains are used",
}


def auto_engine(p) -> tuple[str, str]:
    """The engine ``method="auto"`` chooses for a part with plan `p` (:func:`mcexact.plan`), and
    why. (If the full network then overflows while being built, auto falls back to "direct".)"""
    engine = "exact" if p.fits_full else "direct" if p.fits_nuisance else "mcmc"
    return engine, _AUTO_REASONS[engine]


# Tilted refinement with Markov chains (of the limits; see _refine_by_tilting). A switch kept for
# measuring.
_TILT_CHAINS = True


def _conditional(design: Design, method: str, max_nodes, options: SamplerOptions, seed, what,
                 precision: Precision, interrupt: _Interrupt, previous: dict | None = None):
    """The conditional distribution of `design`'s interest statistics by the engine `method`
    selects, with a record of the engine and the reason.

    Returns ``(dist, info, tilter, sample)``; `dist` is None when an interruption came before the
    part drew anything. With `previous` (this part's record from an earlier run: engine, info,
    exact distribution or sample), an exact part is reused and a Monte Carlo part continued.
    """
    if previous is not None and previous["engine"] == "exact":
        return previous["dist"], dict(previous["info"]), None, None
    engine = method
    if previous is not None and previous["engine"] in ("direct", "mcmc"):
        engine = previous["engine"]
        info = {k: v for k, v in previous["info"].items()
                if k not in ("seconds", "stopped", "n_draws")}
        p = plan(design, max_nodes=max_nodes) if engine == "direct" else None
    else:
        p = plan(design, max_nodes=max_nodes)
        info = {"plan": p.to_dict()}
        if method == "auto":
            engine, info["reason"] = auto_engine(p)
        else:
            engine = "exact" if method == "enumerate" else method
            info["reason"] = "requested"
    if engine == "exact":
        if not p.fits_full:
            raise BudgetExceeded(f"mcexact: exact enumeration of {what} does not fit: {p.reason}; "
                                 "use method='auto', 'direct' or 'mcmc'", what="full",
                                 reached=int(p.full_peak_estimate or p.nuisance_reached or 0),
                                 limit=p.max_nodes)
        try:
            dist = exact_distribution(design, max_nodes=max_nodes, plan_result=p)
        except BudgetExceeded:
            if method != "auto":
                raise
            engine = "direct"
            info["reason"] = "the full network exceeded the budget while being built"
    if engine == "direct" and not p.fits_nuisance:
        raise BudgetExceeded(f"mcexact: direct sampling of {what} needs the nuisance network, "
                             f"which does not fit: {p.reason}; use method='mcmc'",
                             what="nuisance", reached=int(p.nuisance_reached or 0),
                             limit=p.max_nodes)
    sample = None
    if engine in ("direct", "mcmc"):
        sampler = PartSampler(design, engine, options, seed,
                              net=p._network if engine == "direct" else None)
        if previous is not None and previous.get("sample") is not None:
            sampler.sample = previous["sample"]
        sample, stop = _sample_to_precision(sampler, precision, what, interrupt)
        info["engine"] = engine
        if sample is None:
            return None, info, None, None
        dist = sample.to_distribution()
        info.update(seconds=sample.seconds, stopped=stop)
    if engine == "mcmc":
        moves = sum(int(c[0]) for c in sample.counters)
        info.update(seconds=sample.seconds, move=sample.info["move"],
                    block_size=sample.info["block_size"],
                    changed_share=sum(int(c[1]) for c in sample.counters) / max(moves, 1),
                    skipped_share=sum(int(c[2]) for c in sample.counters) / max(moves, 1))
    info["engine"] = engine
    tilter = None
    if dist.is_monte_carlo:
        info["n_draws"] = dist.n_draws
        info["null_moments"] = ("rao_blackwellized" if dist.moment_draws is not None
                                else "exact" if dist.null_mean is not None else "draws")
    if (engine == "direct" or (engine == "mcmc" and _TILT_CHAINS)) and not interrupt.set:

        def tilter(beta, _net=p._network if p is not None else None, _engine=engine):
            return PartSampler(design, _engine, options, seed, net=_net, beta=beta).run(
                dist.n_draws).to_distribution()
    return dist, info, tilter, sample


def _batches(dist: ConditionalDistribution, n_batches: int = 10):
    """The draws of a Monte Carlo distribution cut into `n_batches` batches (the same share of
    every chain in each), each as a distribution over the same support. Null moments that the
    draws estimate (block chains' Rao-Blackwellized records) are estimated per batch as well, so
    that the batches show their error; exact ones are shared."""
    from mcexact.montecarlo import moments_of_draws

    out = []
    for b in range(n_batches):
        counts = np.zeros(dist.n_points)
        for idx in dist.chain_index:
            n = idx.shape[0]
            part = idx[b * n // n_batches:(b + 1) * n // n_batches]
            counts += np.bincount(part, minlength=dist.n_points)
        if counts.sum() == 0:
            continue
        with np.errstate(divide="ignore"):
            lw = np.log(counts)
        mean, cov = dist.null_mean, dist.null_cov
        if dist.moment_draws is not None:
            mean, cov = moments_of_draws(
                [r[b * r.shape[0] // n_batches:(b + 1) * r.shape[0] // n_batches]
                 for r in dist.moment_draws], dist.observed)
        out.append(ConditionalDistribution(dist.support, lw, dist.observed, dist.names,
                                           dist.scales, null_mean=mean, null_cov=cov))
    return out


# A support point is "unsure" when the two-sided confidence interval of this level for the
# difference between its statistic and the observed one contains zero. A point placed on the wrong
# side with confidence moves the p-value by its whole probability, far outside p +/- 1.96 MCSE, so
# the ranking gets a small share of the 5% that those intervals may miss: 99% intervals leave it
# at most 0.5% per point near the observed value (a point on the wrong side half the time when it
# escapes; Bonferroni's split of the miss rate between the ranking and the indicator's error).
_UNSURE_LEVEL = 0.99


def _unsure_points(result, batch_diffs: list, dist: ConditionalDistribution) -> np.ndarray:
    """Support points whose side of the observed statistic the draws do not settle.

    Tests that rank points by quantities estimated from the draws (moments, point probabilities,
    the likelihood's supremum) can put a point that nearly ties the observed value on either side;
    the indicator's error cannot show that jump. The difference ``d(u) = stat(u) - stat(t)`` is
    computed on each of B batches of the draws; with ``s`` the standard deviation of its finite
    batch values (B' of them), ``s / sqrt(B')`` is the standard error of the full run's difference,
    and ``d / (s / sqrt(B'))`` is approximately Student t with B' - 1 degrees of freedom however
    long the batches (the fixed-number-of-batches result of Schmeiser 1982, Glynn & Iglehart
    1990). A point is unsure when ``|d| < t_{B'-1} s / sqrt(B')`` at ``_UNSURE_LEVEL``: its 99%
    confidence interval holds zero, so the draws do not say on which side of the observed value
    it lies. A batch in which the point or the observed value was never drawn gives an infinite
    or undefined difference and is left out for that point; a point with fewer than two finite
    batch values is never unsure.

    The rule is Schmeiser's t interval rather than a robust scale (1.4826 times the median
    absolute deviation) with a fixed band: the t interval has a stated level, and on 10 batches
    the median absolute deviation has only about a third of the efficiency of the standard
    deviation, so its band had to be wide for the same protection. The standard errors were
    checked on two of ``benchmarks/calibration.py``'s designs (Markov chains, 4,000 draws): over
    60 and 200 runs their mean was within 6% of the spread of the full runs' differences.

    References
    ----------
    .. [1] Schmeiser, B. (1982). Batch size effects in the analysis of simulation output.
       *Operations Research* 30(3), 556-568.
    .. [2] Glynn, P. W. & Iglehart, D. L. (1990). Simulation output analysis using standardized
       time series. *Mathematics of Operations Research* 15(1), 1-16.
    """
    from scipy import stats

    unsure = np.zeros(dist.n_points, dtype=bool)
    if len(batch_diffs) < 2 or result.values is None:
        return unsure
    diffs = np.asarray(batch_diffs, float)
    finite = np.isfinite(diffs)
    count = finite.sum(axis=0)
    usable = count >= 2
    if not usable.any():
        return unsure
    safe = np.where(finite, diffs, 0.0)
    n = np.maximum(count, 1)
    mean = safe.sum(axis=0) / n
    square = np.where(finite, (diffs - mean) ** 2, 0.0).sum(axis=0)
    se = np.full(dist.n_points, np.nan)
    se[usable] = np.sqrt(square[usable] / (count[usable] - 1) / count[usable])
    band = np.full(dist.n_points, np.nan)
    band[usable] = stats.t.ppf(0.5 + _UNSURE_LEVEL / 2, count[usable] - 1) * se[usable]
    full = result.values - result.observed_value
    with np.errstate(invalid="ignore"):
        unsure = np.abs(full) < band
    unsure &= usable & (se > 0) & np.isfinite(full)
    if dist.observed_index is not None:
        unsure[dist.observed_index] = False
    return unsure


def _test_mcse(indicator_mcse: float, batch_values: list, full_value: float) -> float:
    """A Monte Carlo p-value's error once its support points are ranked: the error of the mean of
    its indicator over the draws.

    With the ranking fixed (unsure points counted half, see :func:`_unsure_points`), a Monte Carlo
    p-value is exactly the mean over the draws of ``values[point]``, so its error is
    :func:`mcexact.montecarlo.mcse_of_indicator`'s; the ranking's own uncertainty is the half
    probability of the unsure points, which :func:`_test_rows` adds as a bounded bias
    (:func:`_bias_aware_mcse`). The spread of
    the p-value re-computed on B batches is used only when the indicator's error is unknown
    (NaN). It is not a further error term: a batch holds N / B draws, so its ranking is estimated
    with sqrt(B) times the full run's noise, and a point that the full run places safely crosses
    the observed value in some batches; the spread then measures the batches' ranking errors, not
    the full run's (in ``benchmarks/calibration.py`` it doubled the reported error of the
    matched-set design, whose p +/- 1.96 MCSE then covered the exact p-value in 99-99.5% of runs).
    For the same reason no jackknife bias term (Quenouille 1956) is added: the bias of a ranking
    by estimated quantities is not of order 1 / N.
    """
    if np.isfinite(indicator_mcse):
        return float(indicator_mcse)
    return _batch_mcse(batch_values)


def _bias_aware_mcse(sigma: float, bias: float) -> float:
    """Monte Carlo error of a p-value whose unsure points (counted half) may put it off by up to
    `bias` (half their probability) besides its random error `sigma`: the error whose 95%
    interval ``p +/- 1.96 MCSE`` covers the exact value at least 95% of the time whatever the
    offset within +/- `bias`. That interval's half-width is ``sigma cv(bias / sigma)``, with
    ``cv(b)`` the 0.95 quantile of |N(b, 1)| (the folded normal; Armstrong & Kolesar 2020's
    critical value for an estimate of bounded bias), about ``bias + 1.645 sigma`` once the bias
    dominates; the MCSE is that half-width over 1.96. At wider levels (p +/- 2.576 MCSE, the
    verdicts) it stays conservative. Without unsure points it is `sigma` itself.

    The worst case is the usual one here: a point counted half is, in truth, either in or out,
    so the offset is its whole half probability. The earlier error, ``sqrt(sigma^2 + bias^2)``
    (the worst-case root-mean-square error), gave intervals about twice as wide as needed (in
    ``benchmarks/calibration.py``, coverage 100% on the design with strata and a nuisance
    covariate, where most runs had an unsure point).

    References
    ----------
    .. [1] Armstrong, T. B. & Kolesar, M. (2020). Simple and honest confidence intervals in
       nonparametric regression. *Quantitative Economics* 11(1), 1-39.
    """
    from scipy import stats

    if not np.isfinite(sigma) or bias <= 0.0:
        return float(sigma)
    if sigma <= 0.0:
        return float(bias / 1.959963984540054)
    return float(sigma * stats.foldnorm.ppf(0.95, bias / sigma) / 1.959963984540054)


def _batch_mcse(values: list) -> float:
    v = np.asarray(values, float)
    if v.shape[0] < 2 or not np.all(np.isfinite(v)):
        return np.nan
    return float(v.std(ddof=1) / np.sqrt(v.shape[0]))


# The probability test orders support points by their estimated probabilities; below this many
# draws at the observed value that order is dominated by noise (our rule, from the calibration of
# tests/test_montecarlo.py, not a published threshold).
_PROBABILITY_DRAWS = 20

# Common-practice convergence thresholds (Vehtari et al. 2021 recommend R-hat below 1.01 and at
# least 400 effective draws before trusting summaries; our reading of that paper, from memory).
_RHAT_LIMIT = 1.01
_ESS_MIN = 400
# Chains whose estimates disagree beyond this p-value are flagged (chain_agreement).
_AGREEMENT_P = 0.001


def _convergence(dist: ConditionalDistribution, values: np.ndarray, p: float, mcse: float,
                 alpha: float, target_mcse: float | None) -> dict:
    """ESS, R-hat and chain agreement of a Monte Carlo p-value's indicator, and a verdict.

    The verdict is "quotable" when the Monte Carlo error meets `target_mcse` (or, without a
    target, when p +/- 2.576 MCSE lies on one side of `alpha`, so the conclusion at that level is
    settled), and, for Markov chains, R-hat <= 1.01, ESS >= 400 and the chains agree.
    ``draws_needed`` estimates the draws in all that would reach the precision.
    """
    from mcexact.diagnostics import chain_agreement, draws_needed, ess, rhat

    out = {"ess": np.nan, "rhat": np.nan, "verdict": "", "draws_needed": np.nan}
    if not dist.is_monte_carlo or not np.isfinite(mcse):
        out["verdict"] = "" if not dist.is_monte_carlo else "no Monte Carlo error: not quotable"
        return out
    series = [np.asarray(values, float)[idx] for idx in dist.chain_index]
    n_min = min(s.shape[0] for s in series)
    chains = np.stack([s[:n_min] for s in series])
    N = dist.n_draws
    problems = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        if dist.iid:
            out["ess"] = float(N)
        else:
            e = ess(chains, method="mean") if np.ptp(chains) > 0 else float(N)
            out["ess"] = float(e) if np.isfinite(e) else np.nan
            r = rhat(chains) if np.ptp(chains) > 0 else 1.0
            out["rhat"] = float(r)
            if not np.isfinite(r) or r > _RHAT_LIMIT:
                problems.append(f"R-hat {r:.3f} > {_RHAT_LIMIT}")
            if not np.isfinite(out["ess"]) or out["ess"] < _ESS_MIN:
                problems.append(f"ESS {out['ess']:.0f} < {_ESS_MIN}")
            if chains.shape[0] >= 2 and np.ptp(chains) > 0:
                agree = chain_agreement(chains)
                if np.isfinite(agree.pvalue) and agree.pvalue < _AGREEMENT_P:
                    problems.append(f"chains disagree (p = {agree.pvalue:.2g})")
    goal = target_mcse if target_mcse is not None else abs(p - alpha) / 2.576
    if goal > 0 and np.isfinite(out["ess"]) and out["ess"] > 0:
        # Scale by the observed error rather than p(1 - p): the error may include more than the
        # binomial part (batches, plug-in bias, unsure points).
        out["draws_needed"] = float(np.ceil(N * (mcse / goal) ** 2))
    precise = mcse <= goal
    if problems:
        out["verdict"] = "not converged: " + "; ".join(problems)
    elif precise:
        out["verdict"] = "quotable"
    else:
        what = (f"Monte Carlo error {mcse:.2g} above the target {target_mcse:g}"
                if target_mcse is not None else f"p +/- 2.576 MCSE straddles alpha = {alpha:g}")
        out["verdict"] = f"more draws needed ({what})"
    return out


# Supports up to this size also get the likelihood-ratio test re-evaluated on every batch of draws
# for its Monte Carlo error; beyond, that test's error counts the indicator's variability only.
_BATCH_LR_POINTS = 2000


def _test_rows(effect: str, dist: ConditionalDistribution, engine: str,
               convergence: tuple | None = None) -> list:
    """Rows of the tests frame. A Monte Carlo p-value's error is the larger of two estimates: that
    of the mean of the "at least as extreme" indicator over the draws (binomial, or batch means
    for chains), and that of the p-value re-evaluated on batches of the draws, which also counts
    the error of whatever the test estimates from the draws (moments, point probabilities)."""
    rows = []
    results = joint_tests(dist)
    observed_draws = 0
    if dist.is_monte_carlo and dist.observed_index is not None:
        observed_draws = int(sum(np.count_nonzero(c == dist.observed_index)
                                 for c in dist.chain_index))
    batch_p = {t.test: [] for t in results}
    batch_mid = {t.test: [] for t in results}
    batch_counted = {t.test: [] for t in results}
    if dist.is_monte_carlo:
        which = tuple(t.test for t in results
                      if t.test != "likelihood_ratio" or dist.n_points <= _BATCH_LR_POINTS)
        for piece in _batches(dist):
            for bt in joint_tests(piece, which):
                batch_p[bt.test].append(bt.p_value)
                batch_mid[bt.test].append(bt.mid_p_value)
                if bt.values is not None:
                    with np.errstate(invalid="ignore"):      # inf - inf where never drawn
                        batch_counted[bt.test].append(bt.values - bt.observed_value)
    for t in results:
        row = {"effect": effect, "test": t.test, "statistic": t.statistic,
               "p_value": t.p_value, "mid_p_value": t.mid_p_value, "df": t.df,
               "n_points": dist.n_points, "engine": engine, "mcse": 0.0, "mcse_mid_p": 0.0,
               "n_draws": dist.n_draws, "ess": np.nan, "rhat": np.nan, "verdict": "",
               "draws_needed": np.nan, "note": t.note}
        if (dist.is_monte_carlo and t.test == "likelihood_ratio"
                and dist.n_points > _BATCH_LR_POINTS):
            row["mcse"] = row["mcse_mid_p"] = np.nan
            row["note"] = (f"the likelihood-ratio ordering of {dist.n_points:,} support points is "
                           "estimated from the draws and was not re-evaluated on batches (too "
                           "costly), so its Monte Carlo error is unknown: use the score test")
        elif dist.is_monte_carlo and t.test == "probability" and observed_draws < _PROBABILITY_DRAWS:
            row["mcse"] = row["mcse_mid_p"] = np.nan
            row["note"] = (f"the observed statistic was drawn {observed_draws} times: too few to "
                           "rank support points by estimated probability; this Monte Carlo "
                           "p-value is not reliable (use the score or likelihood-ratio test, or "
                           "more draws)")
        elif dist.is_monte_carlo and t.more is not None:
            more, tie = t.more.copy(), t.tie.copy()
            unsure = _unsure_points(t, batch_counted[t.test], dist)
            p0 = np.exp(dist.log_weights - logsumexp(dist.log_weights))
            half_unsure = 0.5 * float(p0[unsure].sum())
            if unsure.any():
                # Count points whose side of the observed statistic the draws cannot settle as
                # half in, with half their probability as a possible offset that the error
                # covers (_bias_aware_mcse), so the interval covers both rankings.
                more[unsure] = tie[unsure] = False
                row["p_value"] = float(p0[more | tie].sum()) + half_unsure
                row["mid_p_value"] = float(p0[more].sum() + 0.5 * p0[tie].sum()) + half_unsure
                row["note"] = (f"{int(unsure.sum())} support points were ranked against the "
                               "observed value differently on batches of the draws; they count "
                               "half, within the Monte Carlo error")
            values = more + tie + 0.5 * unsure
            mid_values = more + 0.5 * tie + 0.5 * unsure
            row["mcse"] = _bias_aware_mcse(_test_mcse(mcse_of_indicator(dist, values),
                                                      batch_p[t.test], row["p_value"]),
                                           half_unsure)
            row["mcse_mid_p"] = _bias_aware_mcse(_test_mcse(mcse_of_indicator(dist, mid_values),
                                                            batch_mid[t.test],
                                                            row["mid_p_value"]),
                                                 half_unsure)
            if convergence is not None:
                row.update(_convergence(dist, values, row["p_value"], row["mcse"], *convergence))
        if dist.is_monte_carlo and convergence is not None and not row.get("verdict"):
            row["verdict"] = "no Monte Carlo error: not quotable"
        rows.append(row)
    return rows


def _weights_ess(piece: ConditionalDistribution, b: float) -> float:
    """Effective number of the draws behind tilted quantities at b: (sum w)^2 / sum w^2, with
    importance weights w = p_b / f of the b-tilted target over the distribution f the draws came
    from (their frequencies), so the null draws and draws tilted elsewhere are judged alike."""
    counts = np.bincount(np.concatenate(piece.chain_index), minlength=piece.n_points)
    drawn = counts > 0
    col = piece.support[:, 0].astype(float)
    lw = piece.log_weights[drawn] + b * col[drawn] - np.log(counts[drawn])
    w = np.exp(lw - lw.max())
    c = counts[drawn]
    return float((c @ w) ** 2 / max(c @ (w * w), 1e-300))


# Refine by tilted sampling when fewer than this share of the draws effectively support a limit
# or estimate (importance ESS of the tilt): there the null draws are too thin to locate it.
_TILT_ESS_SHARE = 0.25


def _refine_by_tilting(piece, e, k, others, tilter, alpha, n_draws):
    """Re-solve the estimate and limits that lie where the null draws are thin, from draws of the
    distribution tilted to each (reweighted back to the null; METHODS 5.6). Returns the updated
    values and Monte Carlo errors (coded scale) and a note."""
    col = piece.support[:, 0].astype(float)
    t = int(piece.observed[0])
    le, ge = (col <= t).astype(float), (col >= t).astype(float)
    out, refined = {}, []
    wanted = []
    if e.kind == "cmle":
        wanted.append(("estimate", e.estimate, "mean", None))
    elif e.kind == "median_unbiased":
        wanted.append(("estimate", e.estimate, "ge" if e.at_edge == "upper" else "le", 0.5))
    wanted += [("ci_lower", e.ci_lower, "ge", alpha / 2), ("ci_upper", e.ci_upper, "le", alpha / 2)]
    anchor = e.estimate if np.isfinite(e.estimate) else 0.0
    for name, b, which, target in wanted:
        if not np.isfinite(b) or _weights_ess(piece, b) >= _TILT_ESS_SHARE * piece.n_draws:
            continue
        if name == "estimate" and not piece.iid:
            # Markov chains: re-solving the estimate from tilted chains was not better calibrated
            # than the null chains' estimate on enumerable subsets of the sparse demo (RMS z 2.0
            # against 1.5 over 9 runs), while the limits improved (RMS z 0.8 against 3.5).
            continue
        goal = t if which == "mean" else target
        b_try = b
        # A value estimated from thin null draws can be far off, and a tilt too far from the
        # root brackets nothing: move the tilt halfway towards the (refined) estimate and retry.
        for _ in range(3):
            beta = np.zeros(len(others) + 1)
            beta[k] = b_try
            tilted = tilter(beta)
            tp = tilted.condition(others) if others else tilted
            tcol = tp.support[:, 0].astype(float)
            h = {"ge": (tcol >= t).astype(float), "le": (tcol <= t).astype(float),
                 "mean": tcol}[which]
            value = _local_root(tp, b_try, h, goal)
            if np.isfinite(value):
                out[name] = (value, max(_root_mcse(tp, value, h, goal),
                                        _chain_root_spread(tp, b_try, h, goal)))
                refined.append(name)
                if name == "estimate":
                    anchor = value
                break
            b_try = 0.5 * (b_try + anchor)
    note = ("refined by sampling the distribution tilted to it: " + ", ".join(refined)
            if refined else "")
    return out, note


def _chain_root_spread(piece: ConditionalDistribution, b0: float, h: np.ndarray,
                       target: float) -> float:
    """For Markov chains: the standard error of a root from its spread over the chains (the root
    re-solved on each chain's draws alone; chain re-estimation), ``sd / sqrt(chains)``. Chains
    that do not mix give different roots, which the delta-method error of the pooled draws cannot
    show. 0 for independent draws; NaN if some chain gives no root."""
    import dataclasses

    if piece.iid or piece.chain_index is None or len(piece.chain_index) < 2:
        return 0.0
    roots = [_local_root(dataclasses.replace(piece, chain_index=(idx,)), b0, h, target)
             for idx in piece.chain_index]
    if not np.all(np.isfinite(roots)):
        return np.nan
    return float(np.std(roots, ddof=1) / np.sqrt(len(roots)))


def _local_root(piece: ConditionalDistribution, b0: float, h: np.ndarray, target: float) -> float:
    """The b near `b0` with ``E_b[h(T)] = target``, from draws of the distribution tilted to b0.

    The draws' own frequencies f(t) estimate the b0-tilted distribution, so ``E_b`` weights them by
    ``exp((b - b0) t)``; working in units of the draws' spread keeps the search local (the null
    weights, ``f exp(-b0 t)``, would put all the mass on the few draws in the null bulk). E_b[h] is
    monotone in b for the tails and the mean, so a bracket and Brent's method find the root.
    Returns NaN if no root is bracketed within 50 spreads.
    """
    from scipy.optimize import brentq

    counts = np.bincount(np.concatenate(piece.chain_index), minlength=piece.n_points)
    keep = counts > 0
    col = piece.support[keep, 0].astype(float)
    f = counts[keep] / counts.sum()
    hk = h[keep]
    mu = f @ col
    sd = float(np.sqrt(max(f @ (col - mu) ** 2, 0.0))) or 1.0
    u = (col - mu) / sd

    def g(d):
        lw = np.log(f) + d * u
        p = np.exp(lw - logsumexp(lw))
        return float(p @ hk) - target

    lo, hi = -1.0, 1.0
    while np.sign(g(lo)) == np.sign(g(hi)):
        lo, hi = 2 * lo, 2 * hi
        if hi > 50:
            return np.nan
    d = brentq(g, lo, hi, xtol=1e-12, rtol=1e-12)
    return float(b0 + d / sd)


def _estimate_values(e, s: float) -> dict:
    """The estimate, limit and odds-ratio columns of an estimates row, per original unit."""
    return {"estimate": e.estimate * s, "kind": e.kind, "ci_lower": e.ci_lower * s,
            "ci_upper": e.ci_upper * s, "odds_ratio": np.exp(e.estimate * s),
            "or_ci_lower": np.exp(e.ci_lower * s), "or_ci_upper": np.exp(e.ci_upper * s),
            "cmle": e.cmle * s, "median_unbiased": e.median_unbiased * s}


def _join(*notes: str) -> str:
    return "; ".join(n for n in notes if n)


def _observed_draws(piece: ConditionalDistribution) -> int:
    """How often the draws of a Monte Carlo distribution hit the observed statistic."""
    if piece.observed_index is None:
        return 0
    return int(sum(np.count_nonzero(c == piece.observed_index) for c in piece.chain_index))


def _tilt_to_observed(piece: ConditionalDistribution, k: int, others: list, tilter,
                      tries: int = 4):
    """Draws of the distribution tilted so that the observed statistic, never drawn under the
    null, is typical: beta from Newton steps on the cumulant function, ``beta += (t - mean_beta) /
    var_beta`` with the moments of the latest draws (the tilted mean of T is the derivative of
    the cumulant function, its variance the second derivative). Returns the (conditioned) tilted
    distribution once it holds the observed value, or None."""
    t = float(piece.observed[0])
    b, current = 0.0, piece
    for _ in range(tries):
        counts = np.bincount(np.concatenate(current.chain_index), minlength=current.n_points)
        col = current.support[:, 0].astype(float)
        f = counts / counts.sum()
        mean = float(f @ col)
        var = float(f @ (col - mean) ** 2)
        if var <= 0:
            # All draws at one value: step by one unit of the coded scale towards t.
            var = 1.0
        b += (t - mean) / var
        beta = np.zeros(len(others) + 1)
        beta[k] = b
        tilted = tilter(beta)
        current = tilted.condition(others) if others else tilted
        if _observed_draws(current) > 0:
            return current
    return None


def _estimate_row(term, effect, piece: ConditionalDistribution, scale: float, alpha: float,
                  engine: str, tilter=None, k: int = 0, others=(), n_draws: int = 0,
                  convergence: tuple | None = None) -> dict:
    e = column_inference(piece, alpha)
    s = scale
    row = {
        "term": term, "effect": effect, **_estimate_values(e, s), "p_value": e.p_two_sided,
        "mid_p_value": e.mid_p_two_sided, "p_lower": e.p_lower, "p_upper": e.p_upper,
        "observed": int(piece.observed[0]), "n_points": e.n_points, "engine": engine,
        "mcse": 0.0, "mcse_ci_lower": 0.0, "mcse_ci_upper": 0.0, "mcse_p_value": 0.0,
        "n_draws": piece.n_draws, "ess": np.nan, "rhat": np.nan, "verdict": "",
        "draws_needed": np.nan, "note": e.note}
    if not piece.is_monte_carlo:
        return row
    t = int(piece.observed[0])
    col = piece.support[:, 0].astype(float)
    le, ge = (col <= t).astype(float), (col >= t).astype(float)
    smaller = le if e.p_lower <= e.p_upper else ge
    row["mcse_p_value"] = min(1.0, 2 * mcse_of_indicator(piece, smaller))
    if convergence is not None:
        conv = _convergence(piece, smaller, min(e.p_lower, e.p_upper),
                            row["mcse_p_value"] / 2, convergence[0] / 2, convergence[1])
        row.update(conv)
    drawn = _observed_draws(piece)
    # An edge of the values drawn is an edge of the support only where the exact range says so
    # (the direct engine knows it); otherwise values beyond may exist that the null draws missed.
    bound = None
    if e.kind == "median_unbiased" and piece.n_columns == 1:
        bound = piece.support_max if e.at_edge == "upper" else piece.support_min
    unconfirmed_edge = e.kind == "median_unbiased" and (bound is None or int(bound[0]) != t)
    if (drawn == 0 or unconfirmed_edge) and tilter is not None and e.kind != "none":
        tilted = _tilt_to_observed(piece, k, list(others), tilter)
        if tilted is not None:
            # Estimate and limits from draws of the distribution tilted to the observed value
            # (reweighted to the null); the p-values above stay those of the null draws.
            why = ("was never drawn under the null" if drawn == 0 else
                   "was at the edge of the values drawn under the null")
            piece, e = tilted, column_inference(tilted, alpha)
            row.update(_estimate_values(e, s))
            row["note"] = _join(e.note, f"the observed statistic {why}: estimate and limits "
                                "from draws tilted to it")
            col = piece.support[:, 0].astype(float)
            le, ge = (col <= t).astype(float), (col >= t).astype(float)
            drawn = _observed_draws(piece)
    if e.kind == "cmle":
        row["mcse"] = s * _root_error(piece, e.estimate, col, t)
    elif e.kind == "median_unbiased":
        h = ge if e.at_edge == "upper" else le
        row["mcse"] = s * _root_error(piece, e.estimate, h, 0.5)
    else:
        row["mcse"] = np.nan
    row["mcse_ci_lower"] = s * _root_error(piece, e.ci_lower, ge, alpha / 2)
    row["mcse_ci_upper"] = s * _root_error(piece, e.ci_upper, le, alpha / 2)
    if drawn == 0:
        # Never drawn: the observed value lies beyond every value drawn, so it looks like an edge
        # of the support and the estimate and a limit come out infinite, which the exact
        # distribution need not say. No error estimate covers that.
        row["verdict"] = ("not quotable: the observed statistic was never drawn, so the "
                          "estimate and limits are only bounded by the values drawn")
        row["draws_needed"] = np.nan
    elif tilter is not None:
        better, note = _refine_by_tilting(piece, e, k, list(others), tilter, alpha, n_draws)
        for name, (value, err) in better.items():
            mcse_col = "mcse" if name == "estimate" else f"mcse_{name}"
            row[name] = value * s
            row[mcse_col] = err * s
            if name == "estimate":
                row["odds_ratio"] = np.exp(value * s)
                row["cmle" if e.kind == "cmle" else "median_unbiased"] = value * s
            else:
                row["or_" + name] = np.exp(value * s)
        row["note"] = _join(row["note"], note)
    return row


def _root_error(piece: ConditionalDistribution, b: float, h: np.ndarray, target) -> float:
    """The larger of the delta-method error of a root and, for chains, its spread over chains."""
    err = _root_mcse(piece, b, h, target)
    if not np.isfinite(b) or piece.iid or piece.chain_index is None:
        return err
    return float(np.nanmax([err, _chain_root_spread(piece, b, h, target)]))


def _root_mcse(piece: ConditionalDistribution, b: float, h: np.ndarray, target) -> float:
    """Monte Carlo error of a coefficient b solving ``E_b[h(T)] = target`` on sampled draws.

    The tilted mean is a ratio of averages over the draws, ``E_b[h] = mean(w h) / mean(w)``
    with ``w = exp(b T)``; to first order its error is the mean over the draws of the influence
    ``psi(T) = w (h(T) - E_b[h]) / mean(w)``, and the root's error is that divided by the slope
    ``d E_b[h] / d b = Cov_b(h, T)`` (delta method). The mean of psi's error comes from
    ``mcse_of_indicator``: binomial-type for independent draws, batch means for chains.
    """
    if not np.isfinite(b):
        return np.nan
    col = piece.support[:, 0].astype(float)
    with np.errstate(divide="ignore"):
        lw = piece.log_weights + b * col
    p_b = np.exp(lw - logsumexp(lw))                      # tilted probabilities of the points
    mean_h = float(p_b @ h)
    slope = float(p_b @ ((h - mean_h) * (col - p_b @ col)))
    if slope == 0 or not np.isfinite(slope):
        return np.nan
    counts = np.bincount(np.concatenate(piece.chain_index), minlength=piece.n_points)
    freq = counts / counts.sum()                          # the distribution the draws came from
    ratio = np.divide(p_b, freq, out=np.zeros_like(p_b), where=freq > 0)   # w / mean(w)
    psi = ratio * (h - mean_h)
    return float(mcse_of_indicator(piece, psi) / abs(slope))


def fit(data, formula: str | None = None, *, interest=None, strata: str | None = None,
        trials: str | None = None, method: str = "auto", alpha: float = 0.05,
        max_nodes: int | None = None, decimals: int = 6, asymptotic: bool = True,
        n_draws: int = 20_000, n_chains: int = 4, n_warmup: int = 1_000, thin: int = 10,
        block_size: int | None = None, rng=None, n_jobs: int = 1,
        backend: str | None = None, target_mcse: float | None = None,
        time_budget: float | None = None, max_draws: int | None = None,
        progress: bool | None = None, tilted: bool = True) -> FitResult:
    """Exact conditional logistic regression: tests, estimates and limits for the interest terms.

    Parameters
    ----------
    data : pandas.DataFrame or Design
        The data (with `formula`), or a ready :class:`Design` (then leave the other data options
        unset).
    formula : str
        Wilkinson formula, e.g. ``"events ~ dose + C(breed) + weight"``.
    interest : str or list of str, optional
        Terms of interest (default: every term but the intercept); the rest is nuisance.
    strata : str, optional
        Column of matched sets / strata, whose intercepts are conditioned away.
    trials : str, optional
        Column of trials per row, for grouped binomial data (the response then counts events).
    method : {"auto", "enumerate", "direct", "mcmc"}
        Engine. "auto" enumerates exactly when the full network fits the node budget (by the
        plan), samples independent draws from the nuisance network when only that fits, and runs
        Markov chains otherwise; it decides for each effect and for the joint test separately.
    alpha : float
        Confidence limits are at level ``1 - alpha``.
    max_nodes : int, optional
        Node budget of the network algorithm (default ``mcexact.DEFAULT_MAX_NODES``).
    decimals : int
        Most decimals a covariate may have before it is rejected (it is scaled to integers).
    asymptotic : bool
        Also fit the ordinary logistic model for comparison.
    n_draws, n_chains, n_warmup, thin, block_size, n_jobs, backend
        Monte Carlo settings (see :class:`mcexact.montecarlo.SamplerOptions`): draws in all per
        part of the analysis, chains, Markov chain moves discarded at the start and between
        records, groups per block move, parallel jobs and joblib backend.
    target_mcse, time_budget, max_draws : optional
        Sample in rounds until every Monte Carlo p-value's standard error is at most
        `target_mcse`, `time_budget` seconds are spent on a part, or `max_draws` draws (default
        50 times `n_draws`) are reached; ``result.method["parts"][part]["stopped"]`` says which.
    progress : bool, optional
        Progress bar while sampling in rounds (default: when standard error is a terminal).
    tilted : bool
        With the direct engine, re-solve each estimate and limit that lies where the null draws
        are thin from as many draws of the distribution tilted to it (reweighted back to the
        null), which shrinks their Monte Carlo errors in far tails.
    rng : None, int, SeedSequence or Generator
        Source of random numbers (SPEC 7). Results are identical for the same `rng` whatever
        `n_jobs` and `backend`; without it, the fresh entropy drawn is recorded in
        ``result.method["rng"]``.

    Returns
    -------
    FitResult

    Raises
    ------
    DataError
        Invalid data or options (the message names the column or option).
    BudgetExceeded
        When no effect's network fits the node budget.

    Examples
    --------
    >>> import mcexact
    >>> data = mcexact.load_demo("small")
    >>> result = mcexact.fit(data, "elevation ~ dose_mg + age", strata="site",
    ...                      interest="dose_mg")
    >>> result.estimates.loc[0, "kind"]
    'cmle'
    """
    _check_options(method, alpha)
    alpha = float(alpha)
    options = SamplerOptions(n_draws=n_draws, n_chains=n_chains, n_warmup=n_warmup, thin=thin,
                             block_size=block_size, n_jobs=n_jobs, backend=backend)
    _check_positive(target_mcse=target_mcse, time_budget=time_budget)
    if max_draws is not None and (isinstance(max_draws, bool)
                                  or not isinstance(max_draws, (int, np.integer))
                                  or max_draws < n_draws):
        raise DataError(f"max_draws must be an integer >= n_draws, got {max_draws!r}")
    precision = Precision(n_draws, target_mcse, time_budget, max_draws,
                          sys.stderr.isatty() if progress is None else bool(progress))
    if isinstance(data, Design):
        if formula is not None or interest is not None or strata is not None or trials is not None:
            raise DataError("pass formula, interest, strata and trials only with a data frame, "
                            "not with a ready Design")
        design = data
    else:
        if formula is None:
            raise DataError("a formula is needed to analyse a data frame")
        design = Design.from_formula(data, formula, interest=interest, strata=strata,
                                     trials=trials, decimals=decimals)

    # One seed per part of the analysis (each effect, then the joint test), so that every part's
    # draws are reproducible on their own. Without rng, fresh entropy is drawn and recorded.
    root = rng if rng is not None else np.random.SeedSequence()
    parts = list(design.effects) + ["joint"]
    seeds = dict(zip(parts, spawn_seeds(root, len(parts))))
    settings = {"method": method, "alpha": alpha, "max_nodes": max_nodes, "options": options,
                "n_draws": int(n_draws), "target_mcse": target_mcse, "time_budget": time_budget,
                "max_draws": max_draws, "tilted": bool(tilted), "asymptotic": bool(asymptotic),
                "rng": _rng_record(root)}
    return _analyse(design, settings, seeds, precision)


def _analyse(design: Design, settings: dict, seeds: dict, precision: Precision,
             previous: dict | None = None, fresh: Precision | None = None) -> FitResult:
    """The analysis behind :func:`fit` and :meth:`FitResult.extend`: every part's conditional
    distribution (continuing `previous` parts where given, sampling the others to `fresh`), then
    tests, estimates and limits."""
    method, alpha, max_nodes = settings["method"], settings["alpha"], settings["max_nodes"]
    options, tilted = settings["options"], settings["tilted"]
    target_mcse = settings["target_mcse"]
    previous = previous or {}
    interrupt = _Interrupt()
    notes = list(design.notes)
    effects = dict(design.effects)
    names = list(design.interest_names)
    scales = np.asarray(design.interest_scales, float)
    # The part seeds are recreated from their records for every run, so that a continuation
    # spawns the same child streams (chains, then tilts) as one uninterrupted run.
    seeds = {k: _seed_copy(s) for k, s in seeds.items()}
    test_rows, estimate_rows = [], []
    effect_dists, parts, records = {}, {}, {}
    for effect, cols in effects.items():
        sub = design if len(effects) == 1 else design.with_interest([effect])
        dist, info, tilter, sample = _conditional(
            sub, method, max_nodes, options, seeds[effect], f"effect {effect!r}",
            precision if effect in previous else fresh or precision, interrupt,
            previous.get(effect))
        parts[effect] = info
        records[effect] = _part_record(info, dist, sample)
        if dist is None:
            notes.append(f"effect {effect!r} was not computed: sampling was interrupted before "
                         "it started (extend the run to compute it)")
            continue
        effect_dists[effect] = dist
        rows = _test_rows(effect, dist, info["engine"], (alpha, target_mcse))
        est = []
        for k, c in enumerate(cols):
            others = [j for j in range(len(cols)) if j != k]
            piece = dist.condition(others) if others else dist
            est.append(_estimate_row(names[c], effect, piece, scales[c], alpha, info["engine"],
                                     tilter if tilted else None, k, others, settings["n_draws"],
                                     (alpha, target_mcse)))
        test_rows += _flag_frozen(info, rows)
        estimate_rows += _flag_frozen(info, est)
        # The tilter holds this part's nuisance network: release it before the next part plans
        # its own, so that two networks never sit in memory together.
        tilter = None

    # Joint distribution of all interest columns.
    joint_estimate = None
    if len(effects) == 1:
        joint = next(iter(effect_dists.values()), None)
        parts["joint"] = next(iter(parts.values()))
    else:
        try:
            joint, info, _, sample = _conditional(design, method, max_nodes, options,
                                                  seeds["joint"], "the joint test",
                                                  precision if "joint" in previous
                                                  else fresh or precision,
                                                  interrupt, previous.get("joint"))
            parts["joint"] = info
            records["joint"] = _part_record(info, joint, sample)
            if joint is None:
                notes.append("the joint test was not computed: sampling was interrupted before "
                             "it started (extend the run to compute it)")
        except BudgetExceeded as exc:
            joint = None
            notes.append(f"the joint test was not computed: {exc}")
    if joint is not None:
        test_rows += _flag_frozen(parts["joint"], _test_rows("joint", joint,
                                                             parts["joint"]["engine"],
                                                             (alpha, target_mcse)))
        b = joint_cmle(joint)
        if b is None:
            notes.append("the joint conditional MLE does not exist: the observed statistics lie "
                         "on the boundary of their support's convex hull"
                         + (" (of the values drawn)" if joint.is_monte_carlo else ""))
        else:
            joint_estimate = pd.Series(b * scales, index=names, name="joint_cmle")
    for part, dist in list(effect_dists.items()) + [("joint", joint)]:
        if dist is not None and dist.is_monte_carlo:
            row = dist.observed_index
            if row is None or not np.isfinite(dist.log_weights[row]):
                notes.append(f"{part}: the observed statistic was never drawn; its p-values are "
                             "estimated as 0 and need more draws to be quoted")
    if interrupt.set:
        notes.append("sampling was interrupted by the user: the results use the draws made "
                     "until then and no tilted refinement; extend the run before quoting them")

    tests = pd.DataFrame(test_rows, columns=_TEST_COLUMNS)
    estimates = pd.DataFrame(estimate_rows, columns=_ESTIMATE_COLUMNS)
    engines = sorted({info["engine"] for info in parts.values()})
    method_info = {
        "requested": method,
        "engines": engines,
        "description": "; ".join(ENGINE_DESCRIPTIONS[e] for e in engines),
        "parts": parts,
        "options": {"n_draws": settings["n_draws"], "n_chains": options.n_chains,
                    "n_warmup": options.n_warmup, "thin": options.thin,
                    "block_size": options.block_size, "n_jobs": options.n_jobs,
                    "backend": options.backend, "max_nodes": max_nodes,
                    "target_mcse": target_mcse, "time_budget": settings["time_budget"],
                    "max_draws": settings["max_draws"]},
        "rng": settings["rng"],
    }
    comparison = asymptotic_fit(design) if settings["asymptotic"] else None
    run = {"settings": settings, "seeds": seeds, "parts": records}
    return FitResult(design, tests, estimates, joint_estimate, joint, effect_dists, method_info,
                     comparison, alpha, notes, interrupt.set, run)


def _flag_frozen(info: dict, rows: list) -> list:
    """Rows of a Markov chain part whose moves never changed the response: all chains sat at the
    observed data, so they agree trivially and say nothing about the distribution."""
    if info.get("engine") != "mcmc" or info.get("changed_share", 1) > 0:
        return rows
    for row in rows:
        row["verdict"] = ("not converged: no move of the chains changed the response; the "
                          "conditional distribution may be a single point, or the moves cannot "
                          "reach the rest of it (check with method='enumerate' on a smaller "
                          "version of the design)")
        row["draws_needed"] = np.nan
    return rows


def _seed_copy(seed: np.random.SeedSequence) -> np.random.SeedSequence:
    """A fresh SeedSequence equal to `seed` when it was created (no children spawned yet)."""
    return np.random.SeedSequence(seed.entropy, spawn_key=seed.spawn_key,
                                  pool_size=seed.pool_size)


def _part_record(info: dict, dist, sample) -> dict:
    """What a continuation of a part needs: its engine and record, and its exact distribution or
    its sample (with the chains' states). An unsampled part has engine "skipped"."""
    if dist is None:
        return {"engine": "skipped", "info": info, "dist": None, "sample": None}
    if info["engine"] == "exact":
        return {"engine": "exact", "info": info, "dist": dist, "sample": None}
    return {"engine": info["engine"], "info": info, "dist": None, "sample": sample}


def _extend(result: FitResult, n_draws, target_mcse, time_budget, max_draws, progress, n_jobs,
            backend) -> FitResult:
    """:meth:`FitResult.extend`."""
    import dataclasses

    run = result._run
    if not run:
        raise DataError("this result holds no run to extend (it was not made by fit or "
                        "load_run)")
    records = run["parts"]
    if all(r["engine"] == "exact" for r in records.values()):
        raise DataError("nothing to extend: every part of this analysis is exact")
    settings = dict(run["settings"])
    options = settings["options"]
    changes = {k: v for k, v in (("n_jobs", n_jobs), ("backend", backend)) if v is not None}
    if changes:
        options = dataclasses.replace(options, **changes)
    add = settings["n_draws"] if n_draws is None else n_draws
    if isinstance(add, bool) or not isinstance(add, (int, np.integer)) or add < 0:
        raise DataError(f"n_draws must be a non-negative integer, got {n_draws!r}")
    if add == 0 and target_mcse is None and time_budget is None:
        raise DataError("extend needs n_draws > 0, a target_mcse or a time_budget")
    _check_positive(target_mcse=target_mcse, time_budget=time_budget)
    if max_draws is not None and (isinstance(max_draws, bool)
                                  or not isinstance(max_draws, (int, np.integer))
                                  or max_draws < 1):
        raise DataError(f"max_draws must be a positive integer, got {max_draws!r}")
    sampled = [r["sample"].n_draws for r in records.values() if r.get("sample") is not None]
    settings.update(options=options, n_draws=int(max(sampled, default=0) + add),
                    target_mcse=target_mcse if target_mcse is not None
                    else settings["target_mcse"],
                    time_budget=time_budget, max_draws=max_draws)
    # A part that was never sampled starts with the draws added to the others (at least one per
    # chain); `add` = 0 (a target only) starts it with the run's first request.
    precision = Precision(int(add), target_mcse, time_budget, max_draws,
                          sys.stderr.isatty() if progress is None else bool(progress))
    previous = {k: r for k, r in records.items() if r["engine"] != "skipped"}
    fresh = dataclasses.replace(
        precision, n_draws=max(int(add) or run["settings"]["n_draws"], options.n_chains))
    return _analyse(result.design, settings, run["seeds"], precision, previous, fresh)


def _check_positive(**values) -> None:
    for name, value in values.items():
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                                  or not value > 0):
            raise DataError(f"{name} must be a positive number, got {value!r}")


def _rng_record(root) -> dict:
    """How to reproduce the run's random numbers."""
    if isinstance(root, np.random.SeedSequence):
        return {"kind": "SeedSequence", "entropy": plain(root.entropy),
                "spawn_key": list(root.spawn_key)}
    if isinstance(root, (int, np.integer)):
        return {"kind": "int", "seed": int(root)}
    return {"kind": type(root).__name__}
