"""Conditional tests, estimates and confidence limits from a conditional distribution.

Everything here reads a :class:`~mcexact.distribution.ConditionalDistribution` (support points and
log weights) and nothing else, so it serves exact and Monte Carlo distributions alike.

Notation: ``f_b(u) = c(u) exp(b . u) / sum_v c(v) exp(b . v)`` on the support, ``t`` the observed
statistic. All root finding works on a standardised copy of the support, ``(u - t) / sd``, so that
the coefficient being solved for is of order one whatever the covariate's units.

References
----------
Cox, D. R. (1970). Analysis of Binary Data. (Conditional inference on canonical parameters.)
Hirji, K. F., Mehta, C. R. & Patel, N. R. (1987). Computing distributions for exact logistic
regression. JASA 82, 1110-1117.
Hirji, K. F., Tsiatis, A. A. & Mehta, C. R. (1989). Median unbiased estimation for binary data.
The American Statistician 43, 7-11.
Lancaster, H. O. (1961). Significance tests in discrete distributions. JASA 56, 223-234.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq, linprog
from scipy.special import logsumexp

from mcexact.distribution import ConditionalDistribution

__all__ = [
    "TIE_RTOL",
    "TestResult",
    "ColumnEstimate",
    "joint_tests",
    "column_inference",
    "joint_cmle",
    "cmle_exists",
]

#: Relative tolerance under which two values of a test statistic count as tied. Statistics are
#: computed in floating point from integer support points, so exact ties (symmetric designs) come
#: out equal only to rounding; 1e-7 is far above rounding error and far below any real difference.
TIE_RTOL = 1e-7

# Supports up to this size get a full maximisation at every point in the likelihood-ratio test;
# larger ones are ordered against the observed value's level set (see _lr_statistics), for up to
# this many columns (beyond, the level set needs too many rays to trace).
_LR_DIRECT_POINTS = 400
_LR_MAX_BOUNDED_COLUMNS = 4

# Coefficients (in standard-deviation units of the statistic) beyond which a tail is treated as
# unreachable: exp(-200) is below any probability worth reporting.
_BETA_CAP = 200.0


@dataclass(frozen=True)
class TestResult:
    """One conditional test.

    Attributes
    ----------
    test : str
        ``"score"``, ``"probability"`` or ``"likelihood_ratio"``.
    statistic : float
        Score: ``(t - mu)' Sigma^-1 (t - mu)``; probability: the null probability of the observed
        point; likelihood ratio: ``2 (sup_b log f_b(t) - log f_0(t))``.
    p_value : float
        Null probability of a statistic at least as extreme as observed (ties included).
    mid_p_value : float
        Lancaster's mid-p: more extreme, plus half the probability of ties.
    df : int
        Number of interest columns tested.
    note : str
        Why a value is missing, if one is.
    more, tie : ndarray of bool or None
        Per support point: strictly more extreme than observed, and tied with it (for Monte Carlo
        errors of the p-values).
    values, observed_value : ndarray, float
        The statistic at every support point and at the observed one, oriented so that larger is
        more extreme (the probability test's is -log f0).
    """

    test: str
    statistic: float
    p_value: float
    mid_p_value: float
    df: int
    note: str = ""
    more: np.ndarray | None = field(default=None, repr=False, compare=False)
    tie: np.ndarray | None = field(default=None, repr=False, compare=False)
    values: np.ndarray | None = field(default=None, repr=False, compare=False)
    observed_value: float = field(default=np.nan, repr=False, compare=False)


@dataclass(frozen=True)
class ColumnEstimate:
    """Estimate, limits and tail probabilities of one interest column, on the coded scale.

    Attributes
    ----------
    estimate : float
        The conditional MLE, or the median unbiased estimate when the CMLE does not exist
        (``kind`` says which); NaN when the slice is degenerate.
    kind : str
        ``"cmle"``, ``"median_unbiased"`` or ``"none"`` (degenerate slice).
    cmle, median_unbiased : float
        Both estimates (``cmle`` is +-inf when the observed value is at an edge of the support).
    ci_lower, ci_upper : float
        Exact limits at the requested level (``-inf`` / ``+inf`` at an edge).
    p_lower, p_upper : float
        ``P(T <= t)`` and ``P(T >= t)`` under the null.
    mid_p_lower, mid_p_upper : float
        The same with half the probability of ``T = t``.
    p_two_sided, mid_p_two_sided : float
        Twice the smaller tail, capped at 1.
    n_points : int
        Support points of the slice.
    at_edge : str
        ``""``, ``"lower"`` or ``"upper"``: where the observed value sits.
    note : str
    """

    estimate: float
    kind: str
    cmle: float
    median_unbiased: float
    ci_lower: float
    ci_upper: float
    p_lower: float
    p_upper: float
    mid_p_lower: float
    mid_p_upper: float
    p_two_sided: float
    mid_p_two_sided: float
    n_points: int
    at_edge: str
    note: str = ""


# -- one column ---------------------------------------------------------------------------------

class _Slice:
    """A one-column distribution standardised for root finding."""

    def __init__(self, dist: ConditionalDistribution):
        if dist.n_columns != 1:
            raise ValueError("a one-column distribution is needed")
        self.t = int(dist.observed[0])
        # Points of zero weight (a Monte Carlo distribution keeps the observed value even when it
        # was never drawn) take no part in the support's range.
        keep = np.isfinite(dist.log_weights) | np.all(dist.support == dist.observed, axis=1)
        support = dist.support[keep, 0]
        self.lw = dist.log_weights[keep]
        p0 = np.exp(self.lw - logsumexp(self.lw))
        mu = p0 @ support
        sd = float(np.sqrt(max(p0 @ (support - mu) ** 2, 0.0)))
        self.sd = sd if sd > 0 else 1.0
        self.u = (support - self.t) / self.sd          # observed point at u = 0
        self.ge = support >= self.t
        self.le = support <= self.t
        self.eq = support == self.t
        live = support[np.isfinite(self.lw)]
        self.t_min, self.t_max = int(live.min()), int(live.max())
        self.n_live = int(live.shape[0])

    def log_norm(self, b: float) -> float:
        return float(logsumexp(self.lw + b * self.u))

    def log_tail(self, b: float, mask: np.ndarray) -> float:
        if not mask.any():
            return -np.inf
        return float(logsumexp(self.lw[mask] + b * self.u[mask])) - self.log_norm(b)

    def tails(self, b: float = 0.0) -> tuple[float, float, float]:
        """P(T <= t), P(T >= t), P(T = t) under tilt b (standardised scale)."""
        return (np.exp(self.log_tail(b, self.le)), np.exp(self.log_tail(b, self.ge)),
                np.exp(self.log_tail(b, self.eq)))

    def mean_var(self, b: float) -> tuple[float, float]:
        lp = self.lw + b * self.u
        p = np.exp(lp - logsumexp(lp))
        m = p @ self.u
        return float(m), float(p @ (self.u - m) ** 2)

    def solve_tail(self, mask: np.ndarray, target: float, increasing: bool) -> float:
        """Tilt b (standardised) with P_b(mask) = target; the tail is monotone in b."""
        log_target = np.log(target)

        def g(b):
            return self.log_tail(b, mask) - log_target

        direction = 1.0 if increasing else -1.0
        g0 = g(0.0)
        if g0 == 0.0:
            return 0.0
        # Walk from 0 towards the side where g changes sign, doubling the step.
        step = direction if g0 < 0 else -direction
        a, b = 0.0, step
        while np.sign(g(b)) == np.sign(g0):
            a, b = b, 2 * b
            if abs(b) > _BETA_CAP:
                return np.inf * np.sign(step)
        lo, hi = (a, b) if a < b else (b, a)
        return brentq(g, lo, hi, xtol=1e-12, rtol=1e-12, maxiter=200)

    def cmle(self) -> float:
        """Safeguarded Newton on the score E_b[u] = 0 (u = 0 at the observed value)."""
        lo, hi = -1.0, 1.0
        while self.mean_var(lo)[0] > 0:
            lo *= 2
        while self.mean_var(hi)[0] < 0:
            hi *= 2
        b = 0.0
        for _ in range(200):
            m, v = self.mean_var(b)
            if abs(m) < 1e-13:
                break
            if m > 0:
                hi = b
            else:
                lo = b
            step = b - m / v if v > 0 else np.nan
            b = step if lo < step < hi else 0.5 * (lo + hi)
            if hi - lo < 1e-14 * max(1.0, abs(b)):
                break
        return b


def column_inference(dist: ConditionalDistribution, alpha: float = 0.05) -> ColumnEstimate:
    """Estimates, exact limits and tail p-values for a one-column (slice) distribution.

    The conditional MLE solves ``E_b[T] = t`` (safeguarded Newton). When ``t`` is at an edge of
    the support the CMLE is infinite and the median unbiased estimate (Hirji, Tsiatis & Mehta
    1989) is reported instead: the b with ``P_b(T >= t) = 1/2`` and the b with
    ``P_b(T <= t) = 1/2``, averaged when both exist. Exact limits invert the one-sided tests:
    ``P_L(T >= t) = alpha / 2`` and ``P_U(T <= t) = alpha / 2``, infinite at an edge.

    Parameters
    ----------
    dist : ConditionalDistribution
        One column (use :meth:`ConditionalDistribution.condition` to slice a joint one).
    alpha : float
        One minus the confidence level.

    Returns
    -------
    ColumnEstimate
        On the coded scale of ``dist`` (multiply by ``dist.scales`` for per-unit values).
    """
    s = _Slice(dist)
    n = s.n_live
    if n == 1:
        return ColumnEstimate(np.nan, "none", np.nan, np.nan, -np.inf, np.inf, 1.0, 1.0, 0.5, 0.5,
                              1.0, 1.0, 1, "both",
                              "the statistic has a single possible value given the nuisance "
                              "statistics: no inference is possible for this term")
    p_le, p_ge, p_eq = s.tails()
    mid_le, mid_ge = p_le - 0.5 * p_eq, p_ge - 0.5 * p_eq
    p2 = min(1.0, 2 * min(p_le, p_ge))
    mid2 = min(1.0, 2 * min(mid_le, mid_ge))
    at_lower, at_upper = s.t <= s.t_min, s.t >= s.t_max
    edge = "lower" if at_lower else "upper" if at_upper else ""

    # Median unbiased: b1 from the upper tail, b2 from the lower tail.
    b1 = -np.inf if at_lower else s.solve_tail(s.ge, 0.5, increasing=True)
    b2 = np.inf if at_upper else s.solve_tail(s.le, 0.5, increasing=False)
    if at_lower:
        mue = b2
    elif at_upper:
        mue = b1
    else:
        mue = 0.5 * (b1 + b2)
    cmle = -np.inf if at_lower else np.inf if at_upper else s.cmle()
    lower = -np.inf if at_lower else s.solve_tail(s.ge, alpha / 2, increasing=True)
    upper = np.inf if at_upper else s.solve_tail(s.le, alpha / 2, increasing=False)
    kind = "cmle" if not edge else "median_unbiased"
    estimate = cmle if not edge else mue
    note = ("" if not edge else
            f"observed value at the {edge} edge of its support: the conditional MLE is infinite, "
            "the median unbiased estimate is reported")
    true_edge = (dist.support_min if at_lower else dist.support_max) if edge else None
    if true_edge is not None and dist.n_columns == 1 and int(true_edge[0]) != s.t:
        note = (f"observed value at the {edge} edge of the values drawn but not of the exact "
                "support: estimates from these draws are unreliable; draw more, or sample a "
                "tilted distribution")

    def unscale(b):
        return b / s.sd

    return ColumnEstimate(unscale(estimate), kind, unscale(cmle), unscale(mue), unscale(lower),
                          unscale(upper), p_le, p_ge, mid_le, mid_ge, p2, mid2, n, edge, note)


# -- joint tests ----------------------------------------------------------------------------------

def _standardise(dist: ConditionalDistribution):
    lw = dist.log_weights
    p0 = np.exp(lw - logsumexp(lw))
    T = dist.support.astype(float)
    mu = p0 @ T
    sd = np.sqrt(np.maximum(p0 @ (T - mu) ** 2, 0.0))
    sd[sd == 0] = 1.0
    return (T - mu) / sd, (dist.observed - mu) / sd, lw, p0, sd


def _masks(stat: np.ndarray, obs: float, larger_is_extreme: bool = True):
    """Points strictly more extreme than `obs`, and points tied with it (relative TIE_RTOL)."""
    tol = TIE_RTOL * max(abs(obs), 1e-300)
    with np.errstate(invalid="ignore"):
        tie = np.abs(stat - obs) <= tol
        more = (stat > obs + tol) if larger_is_extreme else (stat < obs - tol)
    return more, tie


def _result(name: str, statistic: float, more, tie, p0, q: int, values, observed_value,
            note: str = "") -> TestResult:
    p_more, p_tie = float(p0[more].sum()), float(p0[tie].sum())
    return TestResult(name, statistic, min(1.0, p_more + p_tie), min(1.0, p_more + 0.5 * p_tie),
                      q, note, more, tie, np.asarray(values, float), float(observed_value))


def _sup_loglik(targets: np.ndarray, T: np.ndarray, lw: np.ndarray,
                start: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``S(u) = sup_b [b . u - log sum_v c(v) exp(b . v)]`` for each target u (rows).

    Damped Newton on the concave objective, optionally warm-started at `start`. At a boundary
    point of the support's hull the supremum is a limit at infinite b, which damped Newton
    approaches geometrically; the cap keeps b finite, leaving an error of about
    exp(-_BETA_CAP * gap), gap being how far the next support point lies behind the target along
    the maximising direction (standardised units). Hull vertices, where the limit is known
    exactly, are therefore set apart by the callers (`_hull_vertices`).

    Returns
    -------
    values : (n_targets,) float
    betas : (n_targets, q) float, the maximisers found
    """
    n_t, q = targets.shape
    values = np.empty(n_t)
    betas = np.empty((n_t, q))
    chunk = max(1, min(n_t, 2_000_000 // max(T.shape[0], 1)))

    def value(Bm, U):
        return np.einsum("ij,ij->i", Bm, U) - logsumexp(Bm @ T.T + lw, axis=1)

    for first in range(0, n_t, chunk):
        U_all = targets[first:first + chunk]
        B = np.zeros_like(U_all) if start is None else start[first:first + chunk].copy()
        f = value(B, U_all)
        active = np.arange(U_all.shape[0])
        for _ in range(100):
            if active.size == 0:
                break
            U, Ba, fa = U_all[active], B[active], f[active]
            lp = Ba @ T.T + lw
            lp -= logsumexp(lp, axis=1, keepdims=True)
            P = np.exp(lp)
            mean = P @ T
            grad = U - mean
            moving = np.max(np.abs(grad), axis=1) >= 1e-10
            cov = np.einsum("kn,ni,nj->kij", P, T, T, optimize=True)
            cov -= mean[:, :, None] * mean[:, None, :]
            cov += 1e-12 * np.eye(q)
            step = np.linalg.solve(cov, grad[:, :, None])[:, :, 0]
            t_step = np.ones(active.size)
            B_new, f_new = Ba, fa
            pending = moving.copy()
            for _ in range(30):
                if not pending.any():
                    break
                trial = Ba + t_step[:, None] * step
                norm = np.abs(trial).max(axis=1)
                trial = np.where((norm > _BETA_CAP)[:, None],
                                 trial * (_BETA_CAP / np.maximum(norm, 1e-300))[:, None], trial)
                f_trial = np.where(pending, value(trial, U), fa)
                ok = pending & (f_trial >= fa - 1e-14)
                B_new = np.where(ok[:, None], trial, B_new)
                f_new = np.where(ok, f_trial, f_new)
                pending &= ~ok
                t_step = np.where(pending, 0.5 * t_step, t_step)
            B[active], f[active] = B_new, f_new
            # Stop rows that converged, or whose value no longer moves (a supremum at infinity).
            gain = f_new - fa
            moving &= gain > 1e-13 * (1.0 + np.abs(fa))
            active = active[moving]
        values[first:first + chunk] = f
        betas[first:first + chunk] = B
    return values, betas


def _directions(q: int) -> np.ndarray:
    """Unit vectors spread over the sphere in q dimensions (deterministic)."""
    if q == 1:
        return np.array([[1.0], [-1.0]])
    if q == 2:
        angle = np.linspace(0.0, 2 * np.pi, 97)[:-1]
        return np.column_stack([np.cos(angle), np.sin(angle)])
    n = 64 * q * q
    rng = np.random.default_rng(0)          # fixed: the result must not depend on a seed
    d = rng.standard_normal((n, q))
    return d / np.linalg.norm(d, axis=1, keepdims=True)


def _level_set(Tz: np.ndarray, lw: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Points on the boundary of ``L = {u : S(u) <= level}``, with the tilts that reach them.

    Traced in the space of tilts: along a ray ``b = r d`` the tilted mean ``mu(b)`` moves away from
    the null mean and ``S(mu(b)) = b . mu(b) - K(b)`` (convex duality) grows with r, so a bisection
    on r finds where it crosses `level` using tilted moments only. Rays whose value stays below
    `level` end near a face of the support's hull, which then bounds L. Directions are spread
    evenly after whitening by the null covariance.
    """
    q = Tz.shape[1]
    p0 = np.exp(lw - logsumexp(lw))
    cov = (Tz * p0[:, None]).T @ Tz
    inv_root = np.linalg.inv(np.linalg.cholesky(cov + 1e-12 * np.eye(q)))
    rays = _directions(q) @ inv_root
    rays /= np.linalg.norm(rays, axis=1, keepdims=True)

    def at(r):
        B = r[:, None] * rays
        lp = B @ Tz.T + lw
        k = logsumexp(lp, axis=1)
        mean = np.exp(lp - k[:, None]) @ Tz
        return np.einsum("ij,ij->i", B, mean) - k, mean

    lo = np.zeros(rays.shape[0])
    hi = np.full(rays.shape[0], _BETA_CAP)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        val, _ = at(mid)
        below = val <= level
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    _, points = at(lo)
    return points, lo[:, None] * rays


def _hull_vertices(Tz: np.ndarray) -> np.ndarray:
    """Indices of the support points that are vertices of the support's convex hull.

    At a vertex u the tilted distributions pile up on u as b grows along the vertex's normal cone,
    so ``sup_b log f_b(u) = 0`` exactly and ``S(u) = -log c(u)``: a maximisation would only
    approach this limit, and vertices of equal weight must tie exactly.
    """
    if Tz.shape[1] == 1:
        return np.unique([int(Tz[:, 0].argmin()), int(Tz[:, 0].argmax())])
    from scipy.spatial import ConvexHull, QhullError

    try:
        return np.asarray(ConvexHull(Tz).vertices, dtype=np.int64)
    except (QhullError, ValueError):      # a flat support: no full-dimensional hull
        return np.zeros(0, dtype=np.int64)


def _lr_statistics(Tz: np.ndarray, lw: np.ndarray, obs: int,
                   vertices: np.ndarray | None = None) -> np.ndarray:
    """Per support point, a value ordered against the observed one as ``S(u)`` is (`_sup_loglik`).

    Small supports get ``S(u)`` at every point. On larger ones the observed value's level set
    ``L = {u : S(u) <= S(t)}`` (convex, as S is) is traced by `_level_set`, and then

    - a point outside a supporting half-space of L is more extreme: ``S(u) >= b . u - K(b)``
      with b the maximising tilt at a boundary point, the value given;
    - a point strictly inside the convex hull of the boundary points is inside L: less extreme;
    - every other point (near the boundary: potential ties) gets its exact ``S(u)``.
    The p-value only needs this order, so it stays exact while few points need a maximisation.
    """
    n, q = Tz.shape
    vertices = np.zeros(0, dtype=np.int64) if vertices is None else vertices
    if n <= _LR_DIRECT_POINTS or q > _LR_MAX_BOUNDED_COLUMNS:
        out = _sup_loglik(Tz, Tz, lw)[0]
        out[vertices] = -lw[vertices]
        return out
    s_obs, b_obs = _sup_loglik(Tz[[obs]], Tz, lw)
    s_obs = float(s_obs[0])
    if obs in set(vertices.tolist()):
        s_obs = float(-lw[obs])
    tol = TIE_RTOL * max(abs(s_obs + logsumexp(lw)), 1e-300)
    points, betas = _level_set(Tz, lw, s_obs)
    betas = np.vstack([betas, b_obs])
    k = logsumexp(betas @ Tz.T + lw, axis=1)
    lower = (Tz @ betas.T - k).max(axis=1)
    out = np.full(n, s_obs - 1.0)
    more = lower > s_obs + tol
    out[more] = lower[more]
    # Strictly inside the hull of the boundary points, shrunk towards the centre for safety.
    inner = points * (1.0 - 1e-6)
    if q == 1:
        inside = (Tz[:, 0] > inner.min()) & (Tz[:, 0] < inner.max())
    else:
        from scipy.spatial import ConvexHull, QhullError

        try:
            eq = ConvexHull(inner).equations
            inside = np.all(Tz @ eq[:, :-1].T + eq[:, -1] < 0, axis=1)
        except (QhullError, ValueError):
            inside = np.zeros(n, dtype=bool)
    open_ = ~(more | inside)
    open_[obs] = False
    idx = np.flatnonzero(open_)
    if idx.size:
        out[idx] = _sup_loglik(Tz[idx], Tz, lw)[0]
    out[vertices] = -lw[vertices]
    out[obs] = s_obs
    return out


def joint_tests(dist: ConditionalDistribution,
                tests=("score", "probability", "likelihood_ratio")) -> list[TestResult]:
    """Score, probability and likelihood-ratio tests of beta = 0 for all columns of `dist`.

    - Score: ``Q(u) = (u - mu)' Sigma^-1 (u - mu)`` with the null mean and covariance of T;
      ``p = P0(Q(T) >= Q(t))`` from the conditional distribution itself (not a chi-square).
    - Probability: ``p = P0(f0(T) <= f0(t))``; the statistic is ``f0(t)``.
    - Likelihood ratio: ``G(u) = 2 (sup_b log f_b(u) - log f0(u))``, ``p = P0(G(T) >= G(t))``.

    Ties within relative tolerance :data:`TIE_RTOL` count as "at least as extreme"; mid-p-values
    (Lancaster 1961) count half of them. `tests` selects which to compute.
    """
    q = dist.n_columns
    if dist.n_points == 1:
        note = ("the statistic has a single possible value given the nuisance statistics: "
                "no test is possible")
        # Every outcome ties with the observed one: p = 1 and Lancaster's mid-p = 1/2.
        return [TestResult(name, np.nan, 1.0, 0.5, q, note) for name in tests]
    Tz, tz, lw, p0, _ = _standardise(dist)
    log_p0 = lw - logsumexp(lw)
    obs = dist.observed_index
    results = []

    # Score test. A singular covariance (a column fixed by the others) is handled by pseudo-inverse.
    # Exact moments, when an engine supplies them, replace those of the (sampled) distribution.
    if dist.null_mean is not None and dist.null_cov is not None:
        T = dist.support.astype(float)
        Tc, tc = T - dist.null_mean, dist.observed - dist.null_mean
        cov = np.asarray(dist.null_cov, float)
    else:
        Tc, tc = Tz, tz
        cov = (Tz * p0[:, None]).T @ Tz
    inv = np.linalg.pinv(cov, rcond=1e-10, hermitian=True)
    Q = np.einsum("ni,ij,nj->n", Tc, inv, Tc)
    q_obs = float(tc @ inv @ tc)
    results.append(_result("score", q_obs, *_masks(Q, q_obs), p0, q, Q, q_obs))

    # Probability test: small probability is extreme; compared on the log scale, where the
    # tolerance is absolute (a relative tolerance on the probabilities).
    lp_obs = float(log_p0[obs]) if obs is not None else -np.inf
    with np.errstate(invalid="ignore"):
        more = log_p0 < lp_obs - TIE_RTOL
        tie = np.abs(log_p0 - lp_obs) <= TIE_RTOL
    results.append(_result("probability", float(np.exp(lp_obs)), more, tie, p0, q, -log_p0,
                           -lp_obs))

    results = [r for r in results if r.test in tests]
    if "likelihood_ratio" not in tests:
        return results

    # Likelihood-ratio test.
    live = np.isfinite(lw)
    vertices = np.flatnonzero(live)[_hull_vertices(Tz[live])]
    G = 2.0 * (_lr_statistics(Tz, lw, obs, vertices) + logsumexp(lw))
    G = np.maximum(G, 0.0)
    g_obs = float(G[obs]) if obs is not None else np.nan
    results.append(_result("likelihood_ratio", g_obs, *_masks(G, g_obs), p0, q, G, g_obs))
    return results


# -- joint estimate -----------------------------------------------------------------------------

def cmle_exists(dist: ConditionalDistribution) -> bool:
    """Whether the observed statistic is interior to the convex hull of the support.

    A linear programme looks for a direction d with ``d . (u - t) <= 0`` at every support point u
    and strict somewhere: such a d exists exactly when t is on the hull's boundary, where the
    conditional likelihood keeps increasing along d (the conditional analogue of separation,
    Albert & Anderson 1984).
    """
    D = (dist.support - dist.observed).astype(float)
    if dist.n_points < 2:
        return False
    if dist.n_columns == 1:
        return bool(D.min() < 0 < D.max())
    q = dist.n_columns
    res = linprog(c=D.sum(axis=0), A_ub=D, b_ub=np.zeros(D.shape[0]), bounds=[(-1, 1)] * q,
                  method="highs")
    if res.status != 0:
        return False
    return bool(-res.fun <= 1e-9 * max(1.0, np.abs(D).max()))


def joint_cmle(dist: ConditionalDistribution) -> np.ndarray | None:
    """Joint conditional MLE of all columns (coded scale), or None when it does not exist.

    Newton's method with step halving on the concave conditional log-likelihood
    ``b . t - log sum_u c(u) exp(b . u)``.
    """
    if not cmle_exists(dist):
        return None
    Tz, tz, lw, _, sd = _standardise(dist)
    b = np.zeros(dist.n_columns)

    def loglik(bb):
        return float(bb @ tz - logsumexp(lw + Tz @ bb))

    f = loglik(b)
    for _ in range(200):
        lp = lw + Tz @ b
        p = np.exp(lp - logsumexp(lp))
        mean = p @ Tz
        grad = tz - mean
        if np.max(np.abs(grad)) < 1e-12:
            break
        cov = (Tz * p[:, None]).T @ Tz - np.outer(mean, mean)
        step = np.linalg.solve(cov, grad)
        t_step = 1.0
        while t_step > 1e-10:
            f_new = loglik(b + t_step * step)
            if f_new >= f - 1e-15:
                break
            t_step *= 0.5
        b, f = b + t_step * step, f_new
    return b / sd
