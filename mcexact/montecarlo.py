"""Monte Carlo estimates of the exact conditional distribution.

Two engines draw the interest statistics T with the nuisance statistics held at their observed
values (kernels in ``mcexact/_sampler.pyx``):

- ``"direct"``: independent exact draws by walks through the nuisance network (Mehta, Patel &
  Senchaudhuri 2000); needs the nuisance network to fit the node budget; can sample a tilted
  target ``exp(beta . t)`` as well.
- ``"mcmc"``: Markov chains on response vectors, with swap moves when the nuisance is only the
  intercept and/or strata, and exact block (Gibbs) moves for integer nuisance columns otherwise
  (some of them across two strata); starts at the observed response, runs the first half of the
  ``n_warmup`` discarded moves under a tilt that differs between chains (overdispersed starts,
  Gelman & Rubin 1992) and the rest at the target, then records every ``thin``-th move.

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
    null_mean, null_cov : ndarray or None
        Exact null moments of T when known: from the network for direct draws, in closed form
        for swap chains (nuisance: intercept and/or strata only).
    info : dict
    moment_draws : list of ndarray or None
        Block chains at the null: per chain and draw, the Rao-Blackwellized moments of
        T - observed over the moves since the previous draw, shape (n_draws_chain, q + q * q):
        the mean deviation, then the second moments row by row (see :func:`moments_of_draws`).
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
    moment_draws: list | None = None

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
                      {**self.info, **more.info, "n_warmup": self.info.get("n_warmup")},
                      None if self.moment_draws is None or more.moment_draws is None
                      else [np.concatenate([a, b])
                            for a, b in zip(self.moment_draws, more.moment_draws)])

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
        mean, cov, rows = self.null_mean, self.null_cov, None
        if self.beta is None and mean is None and self.moment_draws is not None:
            rows = tuple(np.asarray(r, float) for r in self.moment_draws)
            mean, cov = moments_of_draws(rows, self.observed)
        return ConditionalDistribution(
            support=support, log_weights=log_w, observed=self.observed, names=self.names,
            scales=self.scales, info=info, chain_index=tuple(np.split(inverse, splits)),
            iid=self.engine == "direct", support_min=self.support_min,
            support_max=self.support_max,
            null_mean=mean if self.beta is None else None,
            null_cov=cov if self.beta is None else None, moment_draws=rows)


def moments_of_draws(rows, observed) -> tuple[np.ndarray, np.ndarray]:
    """Null mean and covariance of T from a block chain's Rao-Blackwellized moment records.

    `rows` holds, per chain, one row per draw: the mean over the moves since the previous draw of
    E[D | y outside the moved block] and of E[D D' | y outside the block], D = T - `observed`
    (``Sample.moment_draws``). Each is an unbiased draw of the target's moments of D (Gelfand &
    Smith 1990), so their averages over all draws estimate E D and E D D', with less Monte Carlo
    error than the draws of T (every move counts, and each conditional expectation averages over
    a fiber; Liu, Wong & Kong 1994). Then ``E T = observed + E D`` and ``Cov T = E D D' - E D
    E D'`` (deviations from the observed value keep that difference well conditioned). Returns
    (mean, covariance); the covariance is symmetrised.

    References
    ----------
    .. [1] Gelfand, A. E. & Smith, A. F. M. (1990). Sampling-based approaches to calculating
       marginal densities. *Journal of the American Statistical Association* 85, 398-409.
    .. [2] Liu, J. S., Wong, W. H. & Kong, A. (1994). Covariance structure of the Gibbs sampler
       with applications to the comparisons of estimators and augmentation schemes.
       *Biometrika* 81(1), 27-40.
    """
    obs = np.asarray(observed, float).reshape(-1)
    q = obs.shape[0]
    allr = np.concatenate([np.asarray(r, float).reshape(-1, q + q * q) for r in rows])
    avg = allr.mean(axis=0)
    d = avg[:q]
    cov = avg[q:].reshape(q, q) - np.outer(d, d)
    return obs + d, 0.5 * (cov + cov.T)


# -- direct engine ----------------------------------------------------------------------------

def _flatten(net, arc_logp=None):
    """Global arrays of the nuisance network for the direct kernel, with per-node alias tables.

    The structure (node pointers, successors, events per arc) is the same for every tilt, so it is
    built once per network and kept in the network's cache; only the alias tables depend on the
    arc probabilities. Arrays are filled in place, stage by stage, so the peak memory is about
    the arrays returned (no per-stage copies joined at the end)."""
    cache = getattr(net, "_cache", None)
    structure = cache.get("structure") if cache is not None else None
    if structure is None:
        structure = _flat_structure(net)
        if cache is not None:
            cache["structure"] = structure
    node_ptr, succ, ys = structure
    logps = net.arc_logp if arc_logp is None else arc_logp
    probs = np.empty(succ.shape[0])
    base = 0
    for lp in logps:
        np.exp(lp, out=probs[base:base + lp.shape[0]])
        base += lp.shape[0]
    alias_prob, alias_arc = _sampler.build_alias(node_ptr, probs)
    return node_ptr, succ, ys, alias_prob, alias_arc


def _flat_structure(net):
    """(node_ptr, succ, ys) of `_flatten`: arcs of all stages in one array, node pointers into it
    and global successor indices."""
    K = net.problem.n_stages
    offsets = np.cumsum([0] + list(net.stage_nodes))
    n_arcs = int(sum(int(net.arc_ptr[k][-1]) for k in range(K)))
    node_ptr = np.empty(int(offsets[-1]) + 1, dtype=np.int64)
    succ = np.empty(n_arcs, dtype=np.int64)
    ys = np.empty(n_arcs, dtype=np.int32)
    arc_base = 0
    for k in range(K):
        ptr = net.arc_ptr[k]
        n_k, a_k = ptr.shape[0] - 1, int(ptr[-1])
        np.add(ptr[:-1], arc_base, out=node_ptr[offsets[k]:offsets[k] + n_k])
        np.add(net.arc_succ[k], offsets[k + 1], out=succ[arc_base:arc_base + a_k],
               casting="unsafe")
        ys[arc_base:arc_base + a_k] = net.arc_y[k]
        arc_base += a_k
    # The final stage's single node has no arcs; its pointer entries close the array.
    node_ptr[offsets[K]:] = arc_base
    return node_ptr, succ, ys


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


# Block moves: of every 4, this many take the block from `_N_CROSS` distinct strata (fixed strata
# only), and each stratum's part of a block starts at a random trial of its rarer outcome
# (`_ANCHORED`; see `fill_from` in _sampler.pyx). Chain starts: with two or more fresh chains, the
# first `_TILTED_WARMUP_SHARE` of the warm-up runs under a tilt that differs between chains, so
# that they start in regions of T spread over +/- `_START_SPREAD` null standard deviations.
# benchmarks/bench_mixing.py sets these to 0 / False to measure the earlier sampler.
_CROSS_QUARTERS = 2
_N_CROSS = 2
_ANCHORED = True
_START_SPREAD = 2.0
_TILTED_WARMUP_SHARE = 0.5
# Null block chains record Rao-Blackwellized moments of T (see moments_of_draws) for the score
# test's null moments; benchmarks/bench_moments.py sets this to False to measure without.
_RB_MOMENTS = True


def _strata_sd(rc) -> np.ndarray:
    """Null standard deviation of each interest statistic given the strata alone, by the normal
    approximation of the score variance (coded scale of `rc`): sum over strata of
    ``D (N - D) / (N - 1)`` times the variance of z over the stratum's N trials, D of them events;
    without fixed strata, ``sum m p (1 - p) z^2`` with the overall event rate p. Conditioning on
    the other nuisance terms only lowers it on average, so it is a cheap upper scale for spreading
    the chains' starts."""
    m = rc.trials.astype(float)
    z = rc.interest.astype(float)
    y = rc.events.astype(float)
    if not rc.fixed:
        p = min(max(y.sum() / max(m.sum(), 1.0), 1e-3), 1 - 1e-3)
        return np.sqrt(np.maximum((m[:, None] * z ** 2).sum(axis=0) * p * (1 - p), 0.0))
    var = np.zeros(z.shape[1])
    for a, b in zip(rc.starts, rc.ends):
        n_h, d_h = m[a:b].sum(), y[a:b].sum()
        if n_h < 2 or d_h == 0 or d_h == n_h:
            continue
        mean = m[a:b] @ z[a:b] / n_h
        s2 = m[a:b] @ (z[a:b] - mean) ** 2 / n_h
        var += d_h * (n_h - d_h) / (n_h - 1) * s2
    return np.sqrt(var)


def _start_tilts(rc, n_chains: int, spread: float) -> np.ndarray:
    """Per chain, a tilt b (coded scale of `rc`, shape (n_chains, q)) that moves the null mean of
    each statistic by about s standard deviations, s spread evenly over [-spread, spread] across
    the chains (shifted by one chain per further column, so the chains also differ in direction):
    overdispersed starting points for the chains (Gelman & Rubin 1992), reached by running part of
    the warm-up under that tilt. By the normal approximation a tilt b moves the mean by
    ``b Var(T)``, so ``b = s / sd``."""
    sd = _strata_sd(rc)
    q = sd.shape[0]
    steps = (np.linspace(-spread, spread, n_chains) if n_chains > 1 else np.zeros(1))
    out = np.zeros((n_chains, q))
    for j in range(q):
        if sd[j] > 0:
            out[:, j] = np.roll(steps, -j) / sd[j]
    return out


def _block_worker(arrays, y0, n, seed, block_size, warmup, thin, state=None, start_theta=None,
                  n_tilt=0, moves=None, ref=None):
    """One block-move chain: `n` records after `warmup` moves, of which the first `n_tilt` (fresh
    chains) run under the per-group tilt `start_theta`. `moves` = (cross quarters, strata per
    cross move, anchored), see run_chain (default: this module's settings). Returns the
    records, [moves, changed, skipped], the end state y, the bit generator state, None (no swap
    units), T after the tilted warm-up, [cross-strata moves, of which changed y] and, with `ref`
    (the coded T to measure from), the records' Rao-Blackwellized moments (see run_chain; else
    None)."""
    if moves is None:
        moves = (int(_CROSS_QUARTERS), int(_N_CROSS), bool(_ANCHORED))
    bg = np.random.PCG64(seed)
    if state is not None:
        bg.state = state
    y = np.array(y0, dtype=np.int64, copy=True)
    q = arrays["z"].shape[1]
    out = np.empty((n, q), dtype=np.int64)
    counters = np.zeros(5, dtype=np.int64)
    common = (arrays["m"], arrays["z"], arrays["w"], arrays["stratum"], arrays["start"],
              arrays["size"])
    if start_theta is not None and 0 < n_tilt <= warmup and n > 0:
        # n_tilt moves: n_tilt - 1 of warm-up, then one recorded into a scratch row.
        _sampler.run_chain(bg, y, *common, np.ascontiguousarray(start_theta, float),
                           arrays["log_fact"], arrays["fixed"], block_size, n_tilt - 1, 1,
                           np.empty((1, q), dtype=np.int64), counters, *moves)
        warmup -= n_tilt
    start_T = (y @ arrays["z"]).astype(np.int64)
    moments = None if ref is None else np.zeros((n, q + q * q))
    _sampler.run_chain(bg, y, *common, arrays["theta"], arrays["log_fact"], arrays["fixed"],
                       block_size, warmup, thin, out, counters, *moves, moments,
                       None if ref is None else np.ascontiguousarray(ref, np.int64))
    return out, counters[:3].copy(), y, bg.state, None, start_T, counters[3:].copy(), moments


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


def _swap_worker(arrays, y0, n, seed, warmup, thin, state=None, units=None, start_theta=None,
                 n_tilt=0):
    """One swap chain, with the same tilted start and returns as `_block_worker`."""
    bg = np.random.PCG64(seed)
    if state is not None:
        bg.state = state
    u = _units(arrays, np.asarray(y0, np.int64)) if units is None else {
        k: np.array(v, copy=True) for k, v in units.items()}
    ev_start = np.r_[0, np.cumsum(u["ev_count"])[:-1]].astype(np.int64)
    non_start = np.r_[0, np.cumsum(u["non_count"])[:-1]].astype(np.int64)
    informative = np.flatnonzero((u["ev_count"] > 0) & (u["non_count"] > 0)).astype(np.int64)
    q = arrays["z"].shape[1]
    out = np.empty((n, q), dtype=np.int64)
    counters = np.zeros(3, dtype=np.int64)
    lists = (u["ev_group"], u["ev_z"], u["non_group"], u["non_z"], ev_start, u["ev_count"],
             non_start, u["non_count"], informative)
    if start_theta is not None and 0 < n_tilt <= warmup and n > 0:
        start_theta = np.ascontiguousarray(start_theta, float)
        _sampler.run_unit_swaps(bg, *lists, start_theta, bool(np.any(start_theta != 0)), u["T"],
                                n_tilt - 1, 1, np.empty((1, q), dtype=np.int64), counters)
        warmup -= n_tilt
    start_T = u["T"].copy()
    theta = arrays["theta"]
    _sampler.run_unit_swaps(bg, *lists, theta, bool(np.any(theta != 0)), u["T"], warmup, thin,
                            out, counters)
    y = np.bincount(u["ev_group"], minlength=arrays["m"].shape[0]).astype(np.int64)
    return out, counters, y, bg.state, u, start_T, np.zeros(2, dtype=np.int64)


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

    Notes
    -----
    Fresh chains (two or more) start overdispersed (Gelman & Rubin 1992): the first half of the
    warm-up runs under a per-chain tilt (`_start_tilts`, spread over +/- 2 null standard
    deviations of T given the strata), the second half at the null or at `beta`, so chains that
    do not mix stay apart and R-hat and the chain-agreement test see it. ``info`` records
    ``start_tilts`` (per chain, coded scale of the user's statistics, added to `beta`),
    ``tilted_warmup`` (moves) and ``start_statistics`` (T after the tilted moves).
    Continuations take no tilt.

    References
    ----------
    .. [1] Gelman, A. & Rubin, D. B. (1992). Inference from iterative simulation using multiple
       sequences. *Statistical Science* 7(4), 457-472.
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
    start_info = {}
    if continue_from is not None:
        starts = [s["y"] for s in continue_from.states]
        states = [s["bit_generator"] for s in continue_from.states]
        units = [s.get("units") for s in continue_from.states]
        warmup = 0
        start_thetas, n_tilt = [None] * len(sizes), 0
    else:
        starts = [rc.events] * len(sizes)
        states = [None] * len(sizes)
        units = [None] * len(sizes)
        warmup = int(options.n_warmup)
        # Overdispersed starts (Gelman & Rubin 1992), for fresh chains only: a continuation
        # carries on from its saved states, so it stays exactly one longer run.
        n_tilt = (int(warmup * _TILTED_WARMUP_SHARE)
                  if len(sizes) > 1 and _START_SPREAD > 0 else 0)
        start_thetas = [None] * len(sizes)
        if n_tilt > 0:
            tilts = _start_tilts(rc, len(sizes), _START_SPREAD)
            start_thetas = [theta + rc.interest @ b for b in tilts]
            start_info = {"start_tilts": (tilts / rc.step).tolist(), "tilted_warmup": n_tilt}
    config, parallel = _parallel(options)
    thin = int(options.thin)
    moves = (int(_CROSS_QUARTERS), int(_N_CROSS), bool(_ANCHORED))
    with config:
        if swap:
            results = parallel(
                delayed(_swap_worker)(arrays, y0, n, seed, warmup, thin, st, un, th, n_tilt)
                for y0, n, seed, st, un, th in zip(starts, sizes, seeds, states, units,
                                                   start_thetas))
        else:
            # Null chains also record Rao-Blackwellized moments of T about the observed value,
            # from which the score test takes its null moments (see moments_of_draws).
            ref = ((rc.events @ rc.interest).astype(np.int64)
                   if beta_arr is None and _RB_MOMENTS else None)
            results = parallel(
                delayed(_block_worker)(arrays, y0, n, seed, block, warmup, thin, st, th, n_tilt,
                                       moves, ref)
                for y0, n, seed, st, th in zip(starts, sizes, seeds, states, start_thetas))
    chains = [r[0] * rc.step + rc.offset for r in results]
    if n_tilt > 0:
        # The statistics where the chains stood after the tilted part of the warm-up.
        start_info["start_statistics"] = [(r[5] * rc.step + rc.offset).tolist() for r in results]
    moments = stratified_moments(design) if swap and beta_arr is None else (None, None)
    moment_draws = None
    if not swap and beta_arr is None and _RB_MOMENTS:
        # Coded deviations from the observed T to the user's scale: times the step per column.
        step = np.broadcast_to(np.asarray(rc.step, float).reshape(-1), (rc.interest.shape[1],))
        scale = np.r_[step, np.outer(step, step).reshape(-1)]
        moment_draws = [r[7] * scale for r in results]
    return Sample("mcmc", chains, np.asarray(design.observed_interest, np.int64),
                  tuple(design.interest_names), np.asarray(design.interest_scales, float),
                  beta=beta_arr, counters=[r[1] for r in results],
                  states=[{"y": r[2], "bit_generator": r[3], "units": r[4]}
                          for r in results],
                  seconds=time.perf_counter() - t0,
                  null_mean=moments[0], null_cov=moments[1], moment_draws=moment_draws,
                  info={"move": "swap" if swap else "block",
                        "block_size": None if swap else block,
                        "thin": int(options.thin), "n_warmup": warmup, "design_key": key,
                        **start_info})


def stratified_moments(design) -> tuple[np.ndarray, np.ndarray]:
    """Exact null mean and covariance of T = Z'y given the events of every stratum (intercept or
    strata the only nuisance terms): within stratum h, the k_h events fall on k_h of its n_h
    trials drawn without replacement, so (the moments of a sample sum from a finite population)
    ``E T = sum_h k_h zbar_h`` and ``Cov T = sum_h k_h (n_h - k_h) / (n_h (n_h - 1)) S_h`` with
    S_h the scatter ``sum_i m_i (z_i - zbar_h)(z_i - zbar_h)'`` of the stratum's trials. Used so
    that the chains' score test ranks the support exactly, as the direct engine's does."""
    z = np.asarray(design.interest, float)
    m = np.asarray(design.trials, float)
    y = np.asarray(design.events, float)
    q = z.shape[1]
    mean, cov = np.zeros(q), np.zeros((q, q))
    strata = np.asarray(design.stratum) if design.n_strata > 1 else np.zeros(z.shape[0], int)
    for h in np.unique(strata):
        rows = strata == h
        n, k = m[rows].sum(), y[rows].sum()
        if n < 2:
            continue
        zbar = (m[rows] @ z[rows]) / n
        dev = z[rows] - zbar
        mean += k * zbar
        cov += k * (n - k) / (n * (n - 1)) * (dev.T * m[rows]) @ dev
    return mean, cov


# -- Monte Carlo standard errors ----------------------------------------------------------------

# Pseudo-draws added at 0 and at 1 to the effective sample of a mean of values in [0, 1] before
# its variance is taken: z^2 / 2 = 1.92 of each at the 95% level, rounded to 2 (Agresti & Coull
# 1998, "add two successes and two failures").
_PSEUDO_DRAWS = 2.0


def mcse_of_indicator(dist: ConditionalDistribution, values: np.ndarray) -> float:
    """Monte Carlo standard error of the mean of ``values[point]`` over a distribution's draws.

    `values` gives, per support point, the quantity averaged (1 for "at least as extreme", 0.5 for
    a tie in a mid-p-value, ...). The error comes in two steps.

    1. The effective sample size ``n_e``. Independent draws: ``n_e = N``. Markov chains: the
       error of the mean is the larger of lugsail batch means and ``sd / sqrt(ESS)``, and
       ``n_e = v / error^2`` with ``v`` the variance of the draws. Batch means (Flegal & Jones
       2010) use batches of ``b = floor(sqrt(n))`` draws in every chain, pooled over the chains
       around the grand mean, so that disagreement between chains inflates the error too; the
       lugsail form (Vats & Flegal 2022) subtracts the larger downward bias of batches of
       ``b / 3`` draws, which offsets the batches' own when the autocorrelation is long against
       ``b`` (short chains). The ESS is the multi-chain initial-monotone-sequence one (Geyer
       1992; Vehtari et al. 2021), which adapts when the autocorrelation outlasts a batch. A
       series that is constant in every chain says nothing about its own autocorrelation: it
       gets the autocorrelation time of the sampled statistic itself, ``n_e = N / tau_T``.
    2. For values in [0, 1] (indicators and mid-p halves), the variance is that of the effective
       sample with two pseudo-draws added at 0 and two at 1, ``MCSE^2 = v~ / (n_e + 4)``; for a
       0/1 indicator with ``k`` hits that is ``p~ (1 - p~) / (n_e + 4)``, ``p~ = (k + 2) / (n_e +
       4)``: the Agresti & Coull (1998) variance, with the effective sample size in place of the
       number of draws as Korn & Graubard (1998) do for clustered samples. The plain
       ``p (1 - p) / n_e`` (Wald) is too small exactly when the estimate is low by chance, which
       matters when there are few hits (``benchmarks/calibration.py --rare``: with about 3 hits
       expected in 4,000 independent draws it covers the exact tail in 91% of 200 runs, these
       pseudo-draws in all of them); with hundreds of hits the two differ by well under 1%. Other values (the
       influence terms of :func:`mcexact.fit._root_mcse`) get ``sqrt(max(v, floor) / n_e)``
       with the floor ``1/(N + 2) (1 - 1/(N + 2))`` of one draw's resolution.

    References
    ----------
    .. [1] Flegal, J. M. & Jones, G. L. (2010). Batch means and spectral variance estimators in
       Markov chain Monte Carlo. *Annals of Statistics* 38(2), 1034-1070.
    .. [2] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.
    .. [3] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
       Rank-normalization, folding, and localization: an improved R-hat for assessing
       convergence of MCMC. *Bayesian Analysis* 16(2), 667-718.
    .. [4] Vats, D. & Flegal, J. M. (2022). Lugsail lag windows for estimating time-average
       covariance matrices. *Biometrika* 109(3), 735-750.
    .. [5] Agresti, A. & Coull, B. A. (1998). Approximate is better than "exact" for interval
       estimation of binomial proportions. *The American Statistician* 52(2), 119-126.
    .. [6] Korn, E. L. & Graubard, B. I. (1998). Confidence intervals for proportions with small
       expected number of positive counts estimated from survey data. *Survey Methodology*
       24(2), 193-201.
    """
    if dist.chain_index is None:
        return 0.0
    values = np.asarray(values, float)
    series = [values[idx] for idx in dist.chain_index]
    allv = np.concatenate(series)
    N = allv.shape[0]
    if N < 2:
        return np.nan
    bounded = bool(np.all((allv >= 0.0) & (allv <= 1.0)))
    if dist.iid:
        n_eff = float(N)
    else:
        n_eff = _chain_effective_draws(dist, series)
        if not np.isfinite(n_eff):
            return np.nan
    if bounded:
        return _pseudo_draw_mcse(float(allv.mean()), float(allv.var()), n_eff)
    # Floor: an estimate is only known to about one draw's resolution, never exactly.
    floor = (1.0 / (N + 2)) * (1.0 - 1.0 / (N + 2))
    return float(np.sqrt(max(float(allv.var(ddof=1)), floor) / n_eff))


def _chain_effective_draws(dist: ConditionalDistribution, series: list) -> float:
    """Effective number of draws behind the mean of `series` (one array per chain): ``v / e^2``
    with ``e`` the larger of the lugsail batch-means and ESS errors of the mean (see
    :func:`mcse_of_indicator`); ``N / tau_T`` for a constant series; NaN below 4 draws a chain."""
    from mcexact.diagnostics import mcse_mean

    # Chains differ in length by at most one draw (n_draws is shared out evenly): cut to the
    # shortest.
    n_min = min(s.shape[0] for s in series)
    if n_min < 4:
        return np.nan
    chains = np.stack([s[:n_min] for s in series])
    total = sum(s.shape[0] for s in series)
    if np.ptp(chains) == 0:
        return total / _statistic_tau(dist)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        errors = [mcse_mean(chains, method="lugsail"), mcse_mean(chains, method="ess")]
    errors = [e for e in errors if np.isfinite(e) and e > 0]
    if not errors:
        return np.nan
    return float(np.var(chains, ddof=1)) / max(errors) ** 2 * (total / chains.size)


def _statistic_tau(dist: ConditionalDistribution) -> float:
    """Integrated autocorrelation time of the sampled statistic (the largest over its columns,
    from the multi-chain ESS of the raw values), at least 1; 1 when the statistic is constant or
    `dist` carries no support (a bare record of chain indices)."""
    from mcexact.diagnostics import ess

    if getattr(dist, "support", None) is None:
        return 1.0
    n_min = min(idx.shape[0] for idx in dist.chain_index)
    rows = np.stack([idx[:n_min] for idx in dist.chain_index])
    tau = 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for j in range(dist.support.shape[1]):
            column = dist.support[rows, j].astype(float)
            if np.ptp(column) > 0:
                e = ess(column, method="mean")
                if np.isfinite(e) and e > 0:
                    tau = max(tau, column.size / e)
    return tau


def _pseudo_draw_mcse(mean: float, variance: float, n_eff: float) -> float:
    """Error of a mean of values in [0, 1] from ``n_eff`` effective draws of population variance
    `variance`, with ``_PSEUDO_DRAWS`` pseudo-draws added at 0 and at 1 (Agresti & Coull 1998)."""
    a = _PSEUDO_DRAWS
    total = n_eff + 2.0 * a
    shrunk = (n_eff * mean + a) / total
    spread = (n_eff * (variance + (mean - shrunk) ** 2) + a * shrunk ** 2
              + a * (1.0 - shrunk) ** 2) / total
    return float(np.sqrt(spread / total))


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
