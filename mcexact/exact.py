"""Exact conditional distributions by the network algorithm, and planning before running it.

Public entry points: :func:`plan` (how large the networks are, before the full one is built) and
:func:`exact_distribution` (the exact distribution of the interest statistics given the nuisance
statistics). The stage kernels live in ``mcexact/_network.pyx``; this module validates budgets,
orchestrates the stages, and turns status codes into exceptions.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field

import numpy as np

from mcexact import _network
from mcexact._exceptions import BudgetExceeded, DataError
from mcexact._stages import KEY_LIMIT, StageProblem, compile_design
from mcexact.distribution import ConditionalDistribution

__all__ = ["DEFAULT_MAX_NODES", "NuisanceNetwork", "Plan", "plan", "exact_distribution"]

#: Default node budget. Measured by benchmarks/bench_network.py: a live node of the full network
#: costs about 17-23 bytes at a stage's peak in the dense layout (the one used whenever the plan's
#: boxes fit) and 100-160 bytes in the hashed one, so 25 million nodes stay under about 1 GB dense
#: and 4 GB hashed, leaving most of a 24 GB machine to the rest of the work.
DEFAULT_MAX_NODES = 25_000_000

# A dense slot costs 8 bytes per stage array (measured about 17-23 bytes per live node with both
# stages) against 100-160 for a hashed node, so the dense layout is used whenever its largest stage
# needs at most this many slots per node of budget: no more memory than hashing, and far faster.
DENSE_SLOTS_PER_NODE = 5

# Arcs of the nuisance network are kept for the forward pass (16 bytes each); allow a few per node.
ARCS_PER_NODE = 8


def design_key(design) -> str:
    """Fingerprint of the arrays that define a design's exact problem."""
    h = hashlib.sha256()
    for arr in (design.events, design.trials, design.stratum, design.interest, design.nuisance):
        a = np.ascontiguousarray(arr, dtype=np.int64)
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    h.update(b"fixed" if design.fix_stratum_totals else b"free")
    return h.hexdigest()


def _check_budget(max_nodes) -> int:
    if max_nodes is None:
        return DEFAULT_MAX_NODES
    if isinstance(max_nodes, bool) or not isinstance(max_nodes, (int, np.integer)) or max_nodes < 1:
        raise DataError(f"max_nodes must be a positive integer, got {max_nodes!r}")
    return int(max_nodes)


@dataclass
class NuisanceNetwork:
    """The pruned network over nuisance partial sums, with completion weights.

    Attributes
    ----------
    problem : StageProblem
        The coded stages.
    arc_ptr, arc_succ, arc_y, arc_logp : list of arrays, one entry per stage
        Arcs from stage k to stage k + 1: node i's arcs are ``arc_ptr[k][i]:arc_ptr[k][i + 1]``,
        leading to node ``arc_succ`` with ``arc_y`` events in the group, with log transition
        probability ``arc_logp`` under the null (beta = 0).
    log_b : list of arrays
        Log weighted number of completions of every node (stage 0 holds the root only).
    stage_nodes : list of int
        Nodes alive at each stage 0..K.
    """

    problem: StageProblem
    arc_ptr: list
    arc_succ: list
    arc_y: list
    arc_logp: list
    log_b: list
    stage_nodes: list
    seconds: float = 0.0
    _ranges: tuple | None = field(default=None, repr=False)
    #: Derived arrays kept for repeated sampling rounds (alias tables, null moments).
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def n_nodes(self) -> int:
        return int(sum(self.stage_nodes))

    @property
    def n_arcs(self) -> int:
        return int(sum(a.shape[0] for a in self.arc_succ))

    @property
    def log_total(self) -> float:
        """Log of the weighted number of response vectors with the observed nuisance statistics."""
        return float(self.log_b[0][0])


def _raise_budget(what: str, status: int, reached: int, limit: int, stage: int, n_stages: int):
    if status == _network.STATUS_NO_MEMORY:
        raise MemoryError(f"mcexact: out of memory at stage {stage} of {n_stages} of the "
                          f"{what} network; lower max_nodes or use a Monte Carlo method")
    unit = "arcs" if status == _network.STATUS_ARC_BUDGET else "nodes"
    hint = ("a Markov chain Monte Carlo method is needed" if what == "nuisance"
            else "the nuisance network fits, so direct Monte Carlo sampling can run")
    raise BudgetExceeded(
        f"mcexact: the {what} network exceeded its budget of {limit:,} {unit} at stage {stage} "
        f"of {n_stages} (reached {reached:,}); raise max_nodes if memory allows, or {hint}",
        what=what, reached=reached, limit=limit, stage=stage)


def build_nuisance_network(problem: StageProblem, max_nodes: int) -> NuisanceNetwork:
    """Grow the nuisance network forward with bound pruning, then prune it backward exactly."""
    t0 = time.perf_counter()
    K = problem.n_stages
    max_arcs = ARCS_PER_NODE * max_nodes
    (status, stage, reached), arc_ptr, arc_succ, arc_y, arc_logp, log_b, stage_nodes = \
        _network.build_nuisance(
            problem.trials, problem.nuisance, problem.fixed, problem.c_target,
            problem.stratum_end.view(np.uint8), problem.rem_trials, problem.s, problem.later_lo,
            problem.later_hi, problem.rem_lo, problem.rem_hi, problem.unit_min, problem.unit_max,
            problem.u_stride, problem.u_lo, problem.log_binom, max_nodes, max_arcs)
    if status != _network.STATUS_OK:
        limit = max_arcs if status == _network.STATUS_ARC_BUDGET else max_nodes
        _raise_budget("nuisance", status, reached, limit, stage, K)
    if stage_nodes[0] != 1:
        raise AssertionError("mcexact internal error: the observed response is not in the network")
    return NuisanceNetwork(problem, arc_ptr, arc_succ, arc_y, arc_logp, log_b, stage_nodes,
                           seconds=time.perf_counter() - t0)


def interest_ranges(net: NuisanceNetwork) -> list[tuple[np.ndarray, np.ndarray]]:
    """Least and greatest coded interest partial sums at every node of every stage."""
    los, his, _ = _ranges(net)
    return list(zip(los, his))


def _ranges(net: NuisanceNetwork):
    """(least sums, greatest sums, box slots per stage), computed once per network."""
    if net._ranges is None:
        prob = net.problem
        net._ranges = _network.interest_ranges_all(net.arc_ptr, net.arc_succ, net.arc_y,
                                                   prob.interest, net.stage_nodes)
    return net._ranges


@dataclass(frozen=True)
class Plan:
    """Sizes of the exact problem, measured or estimated before the full network is built.

    Attributes
    ----------
    n_stages : int
        Binomial groups processed (one stage each).
    max_nodes : int
        The node budget the plan was made for.
    nuisance_nodes, nuisance_peak, nuisance_arcs : int or None
        Nodes (in all, and in the largest stage) and arcs of the pruned nuisance network; None when
        it exceeded the budget (then ``nuisance_reached`` holds how far it got).
    full_peak_estimate, full_total_estimate : float or None
        Upper-bound estimates of the full network's largest stage and of all its nodes: for every
        nuisance node, the number of interest partial sums between the least and greatest reachable.
    fits_full, fits_nuisance : bool
        Whether the full and the nuisance network fit the budget (``fits_full`` compares the
        estimate, which may be pessimistic).
    interest_min, interest_max : ndarray or None
        Exact range of every interest statistic given the nuisance statistics (user's integer scale).
    reason : str
        One sentence on the outcome.
    """

    n_stages: int
    max_nodes: int
    nuisance_nodes: int | None
    nuisance_peak: int | None
    nuisance_arcs: int | None
    nuisance_reached: int | None
    full_peak_estimate: float | None
    full_total_estimate: float | None
    fits_nuisance: bool
    fits_full: bool
    interest_min: np.ndarray | None
    interest_max: np.ndarray | None
    reason: str
    seconds: float
    _network: NuisanceNetwork | None = field(default=None, repr=False, compare=False)
    _design_key: str = field(default="", repr=False, compare=False)

    def to_dict(self) -> dict:
        """JSON-serialisable summary."""
        out = {k: getattr(self, k) for k in (
            "n_stages", "max_nodes", "nuisance_nodes", "nuisance_peak", "nuisance_arcs",
            "nuisance_reached", "full_peak_estimate", "full_total_estimate", "fits_nuisance",
            "fits_full", "reason", "seconds")}
        for k in ("interest_min", "interest_max"):
            v = getattr(self, k)
            out[k] = None if v is None else [int(x) for x in v]
        return out


def plan(design, *, max_nodes: int | None = None, order=None) -> Plan:
    """Measure the nuisance network and estimate the full network, without building the latter.

    Parameters
    ----------
    design : mcexact.Design
    max_nodes : int, optional
        Node budget (default :data:`DEFAULT_MAX_NODES`); applies to all nodes of the nuisance
        network and to any one stage of the full network.
    order : permutation of the groups, optional
        Processing order within strata (default: covariate-sorted).

    Returns
    -------
    Plan
    """
    budget = _check_budget(max_nodes)
    t0 = time.perf_counter()
    key = design_key(design)
    try:
        problem = compile_design(design, order)
        net = build_nuisance_network(problem, budget)
    except BudgetExceeded as exc:
        where = f" at stage {exc.stage}" if exc.stage is not None else ""
        return Plan(int(design.n_groups), budget, None, None, None, exc.reached, None, None,
                    False, False, None, None,
                    f"the nuisance network exceeds the budget ({exc.reached:,} nodes, arcs or "
                    f"key values reached{where})", time.perf_counter() - t0, _design_key=key)
    los, his, stage_sizes = _ranges(net)
    peak, total_est = float(stage_sizes.max()), float(stage_sizes.sum())
    lo_final, hi_final = los[-1], his[-1]
    step, offset = problem.interest_step, problem.interest_offset
    fits_full = peak <= budget
    reason = (f"nuisance network of {net.n_nodes:,} nodes; full network estimated at most "
              f"{peak:,.0f} nodes in its largest stage "
              + ("(fits the budget)" if fits_full else f"(over the budget of {budget:,})"))
    return Plan(problem.n_stages, budget, net.n_nodes, int(max(net.stage_nodes)), net.n_arcs,
                None, peak, total_est, True, fits_full, lo_final[0] * step + offset,
                hi_final[0] * step + offset, reason, time.perf_counter() - t0, _network=net,
                _design_key=key)


def exact_distribution(design, *, max_nodes: int | None = None, order=None,
                       plan_result: Plan | None = None) -> ConditionalDistribution:
    """Exact conditional distribution of the interest statistics given the nuisance statistics.

    Implements the network (multivariate shift) recursion of Hirji, Mehta & Patel (1987), with
    strata handled stage by stage as in Hirji, Mehta & Patel (1988): see ``mcexact/_network.pyx``.

    Parameters
    ----------
    design : mcexact.Design
    max_nodes : int, optional
        Node budget (default :data:`DEFAULT_MAX_NODES`). The nuisance network may hold this many
        nodes in all, and any single stage of the full network this many.
    order : permutation of the groups, optional
        Processing order within strata (default: covariate-sorted). The result does not depend on it.
    plan_result : Plan, optional
        A plan made for the same design and order, whose nuisance network is then reused.

    Returns
    -------
    ConditionalDistribution
        Support points T (user's integer scale), log counts ``log c(s, t)``, observed T.

    Raises
    ------
    BudgetExceeded
        When a network needs more nodes than `max_nodes` (the message says which network, where,
        and which Monte Carlo method would fit).
    """
    budget = _check_budget(max_nodes)
    t0 = time.perf_counter()
    if plan_result is not None and plan_result._design_key != design_key(design):
        raise DataError("plan_result was made for another design")
    if plan_result is not None and plan_result._network is not None and order is None:
        net = plan_result._network
    else:
        net = build_nuisance_network(compile_design(design, order), budget)
    prob = net.problem
    if float(_ranges(net)[2].max()) <= DENSE_SLOTS_PER_NODE * budget:
        support_coded, log_p, total, peak = _full_dense(net)
        layout = "dense"
    else:
        support_coded, log_p, total, peak = _full_hashed(net, budget)
        layout = "hashed"
    order_t = np.lexsort(support_coded.T[::-1])
    support = support_coded[order_t] * prob.interest_step + prob.interest_offset
    log_weights = log_p[order_t] + net.log_total
    observed = np.asarray(design.observed_interest, dtype=np.int64)
    info = {
        "method": "exact",
        "stages": prob.n_stages,
        "nuisance_nodes": net.n_nodes,
        "nuisance_arcs": net.n_arcs,
        "full_nodes": int(total),
        "full_peak": int(peak),
        "max_nodes": budget,
        "layout": layout,
        "seconds": time.perf_counter() - t0,
    }
    return ConditionalDistribution(
        support=support, log_weights=log_weights, observed=observed,
        names=tuple(design.interest_names), scales=np.asarray(design.interest_scales, float),
        info=info)


def _full_dense(net: NuisanceNetwork):
    """Full network on direct-addressed blocks (``_network.full_dense``)."""
    los, his, _ = _ranges(net)
    log_p, total, peak = _network.full_dense(los, his, net.arc_ptr, net.arc_succ, net.arc_y,
                                             net.arc_logp, net.problem.interest)
    width = his[-1][0] - los[-1][0] + 1
    stride = np.ones_like(width)
    stride[1:] = np.cumprod(width[:-1])
    slots = np.flatnonzero(log_p > -np.inf)
    digits = (slots[:, None] // stride) % width
    return los[-1][0] + digits, log_p[slots], int(total), int(peak)


def _full_hashed(net: NuisanceNetwork, budget: int):
    """Full network on hashed (node, packed v) keys (``forward_full_stage``)."""
    prob = net.problem
    v_size = prob.v_size
    if max(net.stage_nodes) * v_size >= KEY_LIMIT:
        raise BudgetExceeded(
            "mcexact: the full network's keys would overflow (nuisance nodes times the range of "
            "the interest statistics is too large); use a Monte Carlo method",
            what="key_space", reached=min(max(net.stage_nodes) * v_size, 2**63 - 1), limit=KEY_LIMIT)
    node = np.zeros(1, dtype=np.int64)
    v = np.array([int(-prob.v_lo @ prob.v_stride)], dtype=np.int64)   # packed zero sums
    log_p = np.zeros(1)
    total = peak = 1
    K = prob.n_stages
    for k in range(K):
        status, node, v, log_p = _network.forward_full_stage(
            node, v, log_p, net.arc_ptr[k], net.arc_succ[k], net.arc_y[k], net.arc_logp[k],
            prob.z_step(k), v_size, budget)
        if status != _network.STATUS_OK:
            _raise_budget("full", status, int(node), budget, k + 1, K)
        peak = max(peak, node.shape[0])
        total += node.shape[0]
    coded = np.stack([(v // prob.v_stride[j]) % prob.v_radix[j] + prob.v_lo[j]
                      for j in range(prob.v_radix.shape[0])], axis=1)
    return coded, log_p, total, peak
