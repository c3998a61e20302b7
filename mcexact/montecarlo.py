"""Monte Carlo estimates of the exact conditional distribution.

Two engines draw the interest statistics T with the nuisance statistics held at their observed
values (kernels in ``mcexact/_sampler.pyx``):

- ``"direct"``: independent exact draws by walks through the nuisance network (Mehta, Patel &
  Senchaudhuri 2000); needs the nuisance network to fit the node budget; can sample a tilted
  target ``exp(beta . t)`` as well.
- ``"mcmc"``: Markov chains on response vectors, with swap moves when the nuisance is only the
  intercept and/or strata, and exact block (Gibbs) moves for integer nuisance columns otherwise;
  starts at the observed response, discards ``n_warmup`` moves and records every ``thin``-th.

Chains run through ``joblib.Parallel`` (threads by default: the kernels release the GIL; any joblib
backend, including ``"dask"`` for a dask.distributed cluster, runs the same chains). Each chain has
its own child of ``SeedSequence`` spawned from ``rng`` before dispatch, so the draws are identical
whatever ``n_jobs`` or the backend.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numpy as np
from joblib import Parallel, delayed
from scipy.special import gammaln

from mcexact import _network, _sampler
from mcexact._exceptions import DataError
from mcexact._stages import recode
from mcexact.distribution import ConditionalDistribution

__all__ = ["ENGINES", "SamplerOptions", "Sample", "draw_direct", "draw_mcmc", "spawn_seeds",
           "mcse_of_indicator"]

ENGINES = ("direct", "mcmc")


@dataclass(frozen=True)
class SamplerOptions:
    """Settings of the Monte Carlo engines.

    Attributes
    ----------
    n_draws : int
        Draws of the statistic in all, shared evenly by the chains.
    n_chains : int
        Independent chains (streams, for the direct sampler).
    n_warmup : int
        Markov chain moves discarded at the start of each chain.
    thin : int
        Markov chain moves between recorded draws.
    block_size : int or None
        Groups redrawn by a block move (default: :func:`default_block_size`).
    n_jobs : int
        Chains run at once (-1: all cores).
    backend : str or None
        joblib backend (default threads; ``"loky"``, ``"multiprocessing"``, ``"dask"``).
    """

    n_draws: int = 20_000
    n_chains: int = 4
    n_warmup: int = 1_000
    thin: int = 10
    block_size: int | None = None
    n_jobs: int = 1
    backend: str | None = None

    def __post_init__(self):
        for name, low in (("n_draws", 1), ("n_chains", 1), ("n_warmup", 0), ("thin", 1)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low:
                raise DataError(f"{name} must be an integer >= {low}, got {v!r}")
        if self.n_draws < self.n_chains:
            raise DataError(f"n_draws ({self.n_draws}) must be at least n_chains ({self.n_chains})")
        if self.block_size is not None and (
                isinstance(self.block_size, bool) or not isinstance(self.block_size, (int, np.integer))
                or not 2 <= self.block_size <= _sampler.MAX_BLOCK):
            raise DataError(f"block_size must be an integer from 2 to {_sampler.MAX_BLOCK}, "
                            f"got {self.block_size!r}")
        if isinstance(self.n_jobs, bool) or not isinstance(self.n_jobs, (int, np.integer)) \
                or self.n_jobs == 0 or self.n_jobs < -1:
            raise DataError(f"n_jobs must be a positive integer or -1, got {self.n_jobs!r}")
        if self.backend is not None and not isinstance(self.backend, str):
            raise DataError(f"backend must be a joblib backend name, got {self.backend!r}")

    def per_chain(self) -> list[int]:
        base, extra = divmod(int(self.n_draws), int(self.n_chains))
        return [base + (1 if c < extra else 0) for c in range(int(self.n_chains))]


def spawn_seeds(rng, n: int) -> list[np.random.SeedSequence]:
    """`n` independent child seeds from `rng` (None, int, SeedSequence or Generator; SPEC 7)."""
    if isinstance(rng, np.random.SeedSequence):
        return rng.spawn(n)
    if isinstance(rng, np.random.Generator):
        return [g.bit_generator.seed_seq for g in rng.spawn(n)]
    if rng is None or (isinstance(rng, (int, np.integer)) and not isinstance(rng, bool)
                       and rng >= 0):
        return np.random.SeedSequence(rng).spawn(n)
    raise DataError(f"rng must be None, a non-negative int, a SeedSequence or a Generator; "
                    f"got {rng!r}")


@dataclass
class Sample:
    """Draws of the interest statistics from one engine.

    Attributes
    ----------
    engine : str
        ``"direct"`` or ``"mcmc"``.
    chains : list of ndarray
        Per chain, the drawn statistics, shape (n_draws_chain, q), on the user's integer scale.
    observed, names, scales : as in ConditionalDistribution
    log_total : float or None
        Log weighted number of response vectors given S (known for the direct engine).
    support_min, support_max : ndarray or None
        Exact range of each statistic given S (direct engine).
    beta : ndarray or None
        Tilt sampled at (coded scale of the support), None for the null.
    counters : list of ndarray
        Per MCMC chain: [moves, accepted, skipped].
    states : list
        Per chain, the state to continue from (MCMC: response vector and bit generator state).
    seconds : float
    """

    engine: str
    chains: list
    observed: np.ndarray
    names: tuple
    scales: np.ndarray
    log_total: float | None = None
    support_min: np.ndarray | None = None
    support_max: np.ndarray | None = None
    beta: np.ndarray | None = None
    counters: list = field(default_factory=list)
    states: list = field(default_factory=list)
    seconds: float = 0.0
    null_mean: np.ndarray | None = None
    null_cov: np.ndarray | None = None
    info: dict = field(default_factory=dict)

    @property
    def n_draws(self) -> int:
        return int(sum(c.shape[0] for c in self.chains))

    def append(self, more: "Sample") -> "Sample":
        """This sample followed by `more` (its continuation): chains joined draw by draw."""
        if more.engine != self.engine or len(more.chains) != len(self.chains):
            raise DataError("only a continuation of the same chains can be appended")
        counters = ([a + b for a, b in zip(self.counters, more.counters)]
                    if self.counters else list(more.counters))
        return Sample(self.engine, [np.concatenate([a, b]) for a, b in zip(self.chains, more.chains)],
                      self.observed, self.names, self.scales, self.log_total, self.support_min,
                      self.support_max, self.beta, counters, more.states,
                      self.seconds + more.seconds, self.null_mean, self.null_cov,
                      {**self.info, **more.info, "n_warmup": self.info.get("n_warmup")})

    def to_distribution(self) -> ConditionalDistribution:
        """The sampled distribution: support = values drawn (plus the observed value), weights =
        relative frequencies (times the total count when it is known), draws kept per chain."""
        allT = np.concatenate(self.chains, axis=0)
        support, inverse, counts = np.unique(allT, axis=0, return_inverse=True, return_counts=True)
        inverse = inverse.reshape(-1)
        if not np.any(np.all(support == self.observed, axis=1)):
            # Keep the observed value as a support point of weight zero, so statistics of the
            # observed data are always defined.
            support = np.vstack([support, self.observed])
            counts = np.r_[counts, 0]
        with np.errstate(divide="ignore"):
            log_w = np.log(counts.astype(float)) - np.log(allT.shape[0])
        if self.beta is not None:
            # Draws from the tilted target c(t) exp(beta . t): reweighting by exp(-beta . t)
            # estimates the null weights (importance sampling), accurately near beta.
            log_w = log_w - support @ self.beta
        elif self.log_total is not None:
            log_w = log_w + self.log_total
        splits = np.cumsum([c.shape[0] for c in self.chains])[:-1]
        info = {"method": self.engine, "n_draws": self.n_draws, "n_chains": len(self.chains),
                "seconds": self.seconds, **self.info}
        if self.beta is not None:
            info["tilt"] = [float(b) for b in self.beta]
        return ConditionalDistribution(
            support=support, log_weights=log_w, observed=self.observed, names=self.names,
            scales=self.scales, info=info, chain_index=tuple(np.split(inverse, splits)),
            iid=self.engine == "direct", support_min=self.support_min,
            support_max=self.support_max,
            null_mean=self.null_mean if self.beta is None else None,
            null_cov=self.null_cov if self.beta is None else None)


# -- direct engine ----------------------------------------------------------------------------

def _flatten(net, arc_logp=None):
    """Global arrays of the nuisance network for the direct kernel, with per-node alias tables."""
    K = net.problem.n_stages
    offsets = np.cumsum([0] + list(net.stage_nodes))
    ptrs, succ, ys, probs = [], [], [], []
    arc_base = 0
    logps = net.arc_logp if arc_logp is None else arc_logp
    for k in range(K):
        ptr = net.arc_ptr[k]
        ptrs.append(ptr[:-1] + arc_base)
        succ.append(net.arc_succ[k].astype(np.int64) + offsets[k + 1])
        ys.append(net.arc_y[k])
        probs.append(np.exp(logps[k]))
        arc_base += ptr[-1]
    # The final stage's single node has no arcs; its pointer entries close the array.
    node_ptr = np.concatenate(ptrs + [np.array([arc_base, arc_base])]).astype(np.int64)
    node_ptr = node_ptr[:offsets[-1] + 1]
    alias_prob, alias_arc = _sampler.build_alias(node_ptr, np.concatenate(probs))
    return (node_ptr, np.concatenate(succ), np.concatenate(ys).astype(np.int32), alias_prob,
            alias_arc)


def _tilted_logp(net, theta_per_stage):
    """Arc log probabilities of the tilted target: weights C(m, y) exp(y theta_k)."""
    K = net.problem.n_stages
    log_b_next = np.zeros(1)
    out = [None] * K
    for k in range(K - 1, -1, -1):
        lb_arr = net.problem.log_binom[k] + theta_per_stage[k] * np.arange(
            net.problem.log_binom[k].shape[0])
        ptr, succ, ys = net.arc_ptr[k], net.arc_succ[k], net.arc_y[k]
        lb = _network.backward_stage(ptr, succ, ys, log_b_next, lb_arr)
        owner = np.repeat(np.arange(ptr.shape[0] - 1), np.diff(ptr))
        out[k] = lb_arr[ys] + log_b_next[succ] - lb[owner]
        log_b_next = lb
    return out


def null_moments(net) -> tuple[np.ndarray, np.ndarray]:
    """Exact null mean and covariance of T given S, by a forward pass of moments over `net`.

    Every nuisance node carries the probability of the paths reaching it and their first and second
    moments of the interest partial sums; an arc of y events in stage k adds ``y z_k`` to each path.
    Used instead of moments estimated from the draws, which would make Monte Carlo p-values of the
    score test jump with their estimation error (METHODS: exact marginals where possible).
    """
    prob = net.problem
    q = prob.interest.shape[1]
    m0 = np.ones(1)
    m1 = np.zeros((1, q))
    m2 = np.zeros((1, q, q))
    for k in range(prob.n_stages):
        ptr, succ, ys = net.arc_ptr[k], net.arc_succ[k], net.arc_y[k]
        owner = np.repeat(np.arange(ptr.shape[0] - 1), np.diff(ptr))
        p = np.exp(net.arc_logp[k]) * m0[owner]
        shift = ys[:, None] * prob.interest[k][None, :].astype(float)        # (A, q)
        mean_in = m1[owner] / np.maximum(m0[owner], 1e-300)[:, None]
        second_in = m2[owner] / np.maximum(m0[owner], 1e-300)[:, None, None]
        a1 = p[:, None] * (mean_in + shift)
        a2 = p[:, None, None] * (second_in + mean_in[:, :, None] * shift[:, None, :]
                                 + shift[:, :, None] * mean_in[:, None, :]
                                 + shift[:, :, None] * shift[:, None, :])
        n_next = net.stage_nodes[k + 1]
        m0 = np.bincount(succ, weights=p, minlength=n_next)
        m1 = np.stack([np.bincount(succ, weights=a1[:, j], minlength=n_next) for j in range(q)],
                      axis=1)
        m2 = np.stack([np.stack([np.bincount(succ, weights=a2[:, i, j], minlength=n_next)
                                 for j in range(q)], axis=1) for i in range(q)], axis=1)
    mean = m1[0] / m0[0]
    cov = m2[0] / m0[0] - np.outer(mean, mean)
    step = prob.interest_step.astype(float)
    return mean * step + prob.interest_offset, cov * np.outer(step, step)


def _direct_worker(flat, z, n, seed, state=None):
    bg = np.random.PCG64(seed)
    if state is not None:
        bg.state = state
    out = np.empty((n, z.shape[1]), dtype=np.int64)
    _sampler.direct_draws(bg, *flat, z, out)
    return out, bg.state


def draw_direct(net, design, options: SamplerOptions, seeds, beta=None,
                continue_from: "Sample | None" = None, sizes=None) -> Sample:
    """Independent draws of T from the nuisance network `net` of `design`.

    Parameters
    ----------
    net : NuisanceNetwork
        From :func:`mcexact.exact.build_nuisance_network` (or a plan).
    beta : array, optional
        Tilt on the coded scale of the user's integer statistics (as ``ConditionalDistribution``).
    continue_from : Sample, optional
        An earlier direct sample of the same design and tilt: its streams are continued, so the
        draws equal those of one longer run.
    sizes : list of int, optional
        Draws per chain (default: ``options.per_chain()``).
    """
    t0 = time.perf_counter()
    prob = net.problem
    arc_logp = None
    beta_arr = None
    if beta is not None:
        beta_arr = np.asarray(beta, float).reshape(-1)
        theta = prob.interest @ (beta_arr * prob.interest_step)
        arc_logp = _tilted_logp(net, theta)
    # Rounds of draws at the null reuse the alias tables and moments of the network.
    cache = getattr(net, "_cache", None) if beta is None else None
    if cache is not None and "flat" in cache:
        flat = cache["flat"]
    else:
        flat = _flatten(net, arc_logp)
        if cache is not None:
            cache["flat"] = flat
    z = np.ascontiguousarray(prob.interest, dtype=np.int64)
    from mcexact.exact import design_key

    key = design_key(design)
    seeds = _check_seeds(seeds, options)
    _check_continuation(continue_from, "direct", key, options, beta)
    sizes = options.per_chain() if sizes is None else [int(s) for s in sizes]
    states = ([s["bit_generator"] for s in continue_from.states] if continue_from is not None
              else [None] * len(sizes))
    config, parallel = _parallel(options)
    with config:
        results = parallel(delayed(_direct_worker)(flat, z, n, seed, st)
                           for n, seed, st in zip(sizes, seeds, states))
    chains = [r[0] * prob.interest_step + prob.interest_offset for r in results]
    from mcexact.exact import interest_ranges

    lo, hi = interest_ranges(net)[-1]
    if beta is not None:
        mean, cov = None, None
    elif cache is not None and "moments" in cache:
        mean, cov = cache["moments"]
    else:
        mean, cov = null_moments(net)
        if cache is not None:
            cache["moments"] = (mean, cov)
    return Sample("direct", chains, np.asarray(design.observed_interest, np.int64),
                  tuple(design.interest_names), np.asarray(design.interest_scales, float),
                  log_total=net.log_total, support_min=lo[0] * prob.interest_step + prob.interest_offset,
                  support_max=hi[0] * prob.interest_step + prob.interest_offset, beta=beta_arr,
                  states=[{"bit_generator": r[1]} for r in results],
                  seconds=time.perf_counter() - t0, null_mean=mean, null_cov=cov,
                  info={"nuisance_nodes": net.n_nodes, "nuisance_arcs": net.n_arcs,
                        "design_key": key})


# -- Markov chains ----------------------------------------------------------------------------

def default_block_size(n_nuisance: int) -> int:
    """Groups per block move: 8, plus 2 per nuisance column beyond the first, at most MAX_BLOCK.

    Each nuisance column is one more linear constraint a block's redraw must meet, so a block
    needs more groups to have more than one way to meet them all; 8 groups mixed well on the test
    designs with one near-continuous nuisance covariate, where 4 left the chain almost stuck
    (measured with tests/test_montecarlo.py's designs), and enumeration costs grow quickly beyond 16.
    """
    return int(min(_sampler.MAX_BLOCK, max(8, 6 + 2 * n_nuisance)))


def _block_worker(arrays, y0, n, seed, block_size, warmup, thin, state=None):
    bg = np.random.PCG64(seed)
    if state is not None:
        bg.state = state
    y = np.array(y0, dtype=np.int64, copy=True)
    out = np.empty((n, arrays["z"].shape[1]), dtype=np.int64)
    counters = np.zeros(3, dtype=np.int64)
    _sampler.run_chain(bg, y, arrays["m"], arrays["z"], arrays["w"], arrays["stratum"],
                       arrays["start"], arrays["size"], arrays["theta"], arrays["log_fact"],
                       arrays["fixed"], block_size, warmup, thin, out, counters)
    return out, counters, y, bg.state, None


def _units(arrays, y):
    """Per stratum, the event trials and the non-event trials of response `y`, as lists of
    (group, interest covariates), laid out stratum after stratum."""
    m, z, stratum = arrays["m"], arrays["z"], arrays["stratum"]
    groups = np.arange(m.shape[0])
    ev = np.repeat(groups, y)                     # groups are in stratum order already
    non = np.repeat(groups, m - y)
    H = arrays["start"].shape[0]
    return {"ev_group": ev.astype(np.int32), "ev_z": np.ascontiguousarray(z[ev]),
            "non_group": non.astype(np.int32), "non_z": np.ascontiguousarray(z[non]),
            "T": (y @ z).astype(np.int64),
            "ev_count": np.bincount(stratum[ev], minlength=H).astype(np.int64),
            "non_count": np.bincount(stratum[non], minlength=H).astype(np.int64)}


def _swap_worker(arrays, y0, n, seed, warmup, thin, state=None, units=None):
    bg = np.random.PCG64(seed)
    if state is not None:
        bg.state = state
    u = _units(arrays, np.asarray(y0, np.int64)) if units is None else {
        k: np.array(v, copy=True) for k, v in units.items()}
    ev_start = np.r_[0, np.cumsum(u["ev_count"])[:-1]].astype(np.int64)
    non_start = np.r_[0, np.cumsum(u["non_count"])[:-1]].astype(np.int64)
    informative = np.flatnonzero((u["ev_count"] > 0) & (u["non_count"] > 0)).astype(np.int64)
    out = np.empty((n, arrays["z"].shape[1]), dtype=np.int64)
    counters = np.zeros(3, dtype=np.int64)
    theta = arrays["theta"]
    _sampler.run_unit_swaps(bg, u["ev_group"], u["ev_z"], u["non_group"], u["non_z"], ev_start,
                            u["ev_count"], non_start, u["non_count"], informative, theta,
                            bool(np.any(theta != 0)), u["T"], warmup, thin, out, counters)
    y = np.bincount(u["ev_group"], minlength=arrays["m"].shape[0]).astype(np.int64)
    return out, counters, y, bg.state, u


def _parallel(options: SamplerOptions):
    """joblib's Parallel for the chains. A named backend is set through parallel_config, which is
    how joblib selects externally registered backends such as dask's."""
    import contextlib

    import joblib

    if options.backend is None:
        return contextlib.nullcontext(), Parallel(n_jobs=options.n_jobs, prefer="threads")
    if options.backend == "dask":
        try:
            import distributed  # noqa: F401  (registers joblib's "dask" backend)
        except ImportError as exc:
            raise DataError("backend='dask' needs the dask.distributed package "
                            "(pip install 'mcexact[cluster]')") from exc
    return (joblib.parallel_config(backend=options.backend, n_jobs=options.n_jobs),
            Parallel(n_jobs=options.n_jobs))


def _check_seeds(seeds, options: SamplerOptions) -> list:
    seeds = list(seeds)
    if len(seeds) != options.n_chains:
        raise DataError(f"{len(seeds)} seeds given for {options.n_chains} chains")
    return seeds


def _check_continuation(previous, engine: str, design_key: str, options: SamplerOptions, beta):
    if previous is None:
        return
    if previous.engine != engine:
        raise DataError(f"cannot continue a {previous.engine} sample with the {engine} engine")
    if len(previous.states) != options.n_chains:
        raise DataError(f"the sample to continue has {len(previous.states)} chains, not "
                        f"{options.n_chains}")
    if previous.info.get("design_key") != design_key:
        raise DataError("the sample to continue was drawn for another design")
    same_tilt = (previous.beta is None and beta is None) or (
        previous.beta is not None and beta is not None
        and np.array_equal(previous.beta, np.asarray(beta, float).reshape(-1)))
    if not same_tilt:
        raise DataError("the sample to continue was drawn at another tilt")


def draw_mcmc(design, options: SamplerOptions, seeds, beta=None, continue_from=None,
              sizes=None) -> Sample:
    """Markov chain draws of T given the nuisance statistics of `design`.

    Parameters
    ----------
    beta : array, optional
        Tilt on the coded scale of the user's integer statistics.
    continue_from : Sample, optional
        An earlier MCMC sample of the same design and options, whose chains are continued exactly
        (no new warm-up), so that the draws equal those of one longer run.
    sizes : list of int, optional
        Draws per chain (default: ``options.per_chain()``).
    """
    t0 = time.perf_counter()
    rc = recode(design)
    K = rc.events.shape[0]
    beta_arr = None if beta is None else np.asarray(beta, float).reshape(-1)
    theta = (np.zeros(K) if beta_arr is None
             else rc.interest @ (beta_arr * rc.step)).astype(float)
    p = rc.nuisance.shape[1]
    swap = rc.fixed and p == 0
    block = options.block_size or default_block_size(p)
    stratum_index = np.repeat(np.arange(rc.starts.shape[0]), rc.ends - rc.starts)
    arrays = {
        "m": rc.trials, "z": rc.interest, "w": rc.nuisance,
        "stratum": stratum_index.astype(np.int64), "start": rc.starts.astype(np.int64),
        "size": (rc.ends - rc.starts).astype(np.int64), "theta": np.ascontiguousarray(theta),
        "log_fact": gammaln(np.arange(int(rc.trials.max()) + 2) + 1.0), "fixed": rc.fixed,
    }
    from mcexact.exact import design_key

    key = design_key(design)
    seeds = _check_seeds(seeds, options)
    _check_continuation(continue_from, "mcmc", key, options, beta)
    sizes = options.per_chain() if sizes is None else [int(s) for s in sizes]
    if continue_from is not None:
        starts = [s["y"] for s in continue_from.states]
        states = [s["bit_generator"] for s in continue_from.states]
        units = [s.get("units") for s in continue_from.states]
        warmup = 0
    else:
        starts = [rc.events] * len(sizes)
        states = [None] * len(sizes)
        units = [None] * len(sizes)
        warmup = int(options.n_warmup)
    config, parallel = _parallel(options)
    thin = int(options.thin)
    with config:
        if swap:
            results = parallel(
                delayed(_swap_worker)(arrays, y0, n, seed, warmup, thin, st, un)
                for y0, n, seed, st, un in zip(starts, sizes, seeds, states, units))
        else:
            results = parallel(
                delayed(_block_worker)(arrays, y0, n, seed, block, warmup, thin, st)
                for y0, n, seed, st in zip(starts, sizes, seeds, states))
    chains = [r[0] * rc.step + rc.offset for r in results]
    return Sample("mcmc", chains, np.asarray(design.observed_interest, np.int64),
                  tuple(design.interest_names), np.asarray(design.interest_scales, float),
                  beta=beta_arr, counters=[r[1] for r in results],
                  states=[{"y": r[2], "bit_generator": r[3], "units": r[4]}
                          for r in results],
                  seconds=time.perf_counter() - t0,
                  info={"move": "swap" if swap else "block",
                        "block_size": None if swap else block,
                        "thin": int(options.thin), "n_warmup": warmup, "design_key": key})


# -- Monte Carlo standard errors ----------------------------------------------------------------

def mcse_of_indicator(dist: ConditionalDistribution, values: np.ndarray) -> float:
    """Monte Carlo standard error of the mean of ``values[point]`` over a distribution's draws.

    `values` gives, per support point, the quantity averaged (1 for "at least as extreme", 0.5 for
    a tie in a mid-p-value, ...). Independent draws: ``sqrt(var / N)``. Markov chains: batch means
    (Flegal & Jones 2010) with batches of about ``sqrt(n)`` draws in every chain, pooled over the
    chains around the grand mean, so disagreement between chains inflates the error too.
    """
    if dist.chain_index is None:
        return 0.0
    from mcexact.diagnostics import mcse_mean

    series = [np.asarray(values, float)[idx] for idx in dist.chain_index]
    allv = np.concatenate(series)
    N = allv.shape[0]
    if N < 2:
        return np.nan
    # Floor: an estimate of 0 or 1 is only known to about one draw's resolution, never exactly.
    floor = (1.0 / (N + 2)) * (1.0 - 1.0 / (N + 2))
    if dist.iid:
        return float(np.sqrt(max(allv.var(ddof=1), floor) / N))
    # Chains differ in length by at most one draw (n_draws is shared out evenly): cut to the
    # shortest. Batches of sqrt(n) draws are too short when the autocorrelation is long; the error
    # from the initial-sequence effective sample size (Geyer 1992) adapts to it: report the larger.
    n_min = min(s.shape[0] for s in series)
    if n_min < 4:
        return np.nan
    chains = np.stack([s[:n_min] for s in series])
    if np.ptp(chains) == 0:
        return float(np.sqrt(floor / N))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        errors = [mcse_mean(chains, method="batch"), mcse_mean(chains, method="ess")]
    errors = [e for e in errors if np.isfinite(e)]
    return float(max(errors + [np.sqrt(floor / N)]))



class PartSampler:
    """Draws for one design by one engine, extendable exactly: ``run(n)`` adds n draws in all
    (shared by the chains), continuing every chain's state, so any split into rounds gives the
    draws of one uninterrupted run.

    Parameters
    ----------
    design : Design
    engine : {"direct", "mcmc"}
    options : SamplerOptions
        ``n_draws`` there is ignored; ``run`` says how many.
    seed : SeedSequence
        Spawned into one child per chain.
    net : NuisanceNetwork, optional
        Needed by the direct engine.
    beta : array, optional
        Tilt (coded scale of the user's integer statistics).
    """

    def __init__(self, design, engine: str, options: SamplerOptions, seed, net=None, beta=None):
        if engine not in ENGINES:
            raise DataError(f"engine must be one of {ENGINES}, got {engine!r}")
        if engine == "direct" and net is None:
            raise DataError("the direct engine needs the nuisance network")
        self.design, self.engine, self.options, self.net, self.beta = design, engine, options, net, beta
        self.seeds = seed.spawn(options.n_chains)
        self.sample: Sample | None = None

    def run(self, n_draws: int) -> Sample:
        """Add `n_draws` draws (in all) and return the whole sample so far.

        The draws in all are shared out as one run of that total would share them (the first
        ``total % n_chains`` chains one more), and each round adds to every chain the difference,
        so any split into rounds gives exactly the chains of one run. The first round must give
        every chain at least one draw (its warm-up runs then).
        """
        import dataclasses

        before = 0 if self.sample is None else self.sample.n_draws
        total = before + int(n_draws)
        if self.sample is None and total < self.options.n_chains:
            raise DataError(f"the first round needs at least one draw per chain "
                            f"({self.options.n_chains})")
        opts = dataclasses.replace(self.options, n_draws=max(total, self.options.n_chains))
        now = opts.per_chain()
        had = ([c.shape[0] for c in self.sample.chains] if self.sample is not None
               else [0] * len(now))
        sizes = [a - b for a, b in zip(now, had)]
        if self.engine == "direct":
            more = draw_direct(self.net, self.design, opts, self.seeds, beta=self.beta,
                               continue_from=self.sample, sizes=sizes)
        else:
            more = draw_mcmc(self.design, opts, self.seeds, beta=self.beta,
                             continue_from=self.sample, sizes=sizes)
        self.sample = more if self.sample is None else self.sample.append(more)
        return self.sample
