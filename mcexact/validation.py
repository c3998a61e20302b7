"""Monte Carlo answers checked against exact ones, on designs small enough to enumerate.

:func:`validate` fits the same model twice, by exact enumeration and by a Monte Carlo engine, and
reports for every p-value, estimate and limit ``z = (Monte Carlo value - exact value) / MCSE``,
together with how much of the exact support the draws visited. A Monte Carlo standard error that
is honest gives z-values like draws from a standard normal; a chain that cannot reach part of the
support (block moves are not guaranteed to connect it) shows up as low coverage and large z.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from mcexact._exceptions import DataError
from mcexact.design import Design

__all__ = ["ValidationReport", "validate", "coverage_row", "MISSED_MASS_SDS", "Z_LIMIT"]

#: |z| above this flags a disagreement; about 6e-5 two-sided for a normal z, so a run of many
#: comparisons rarely flags one by chance.
Z_LIMIT = 4.0

#: Support coverage is flagged when the exact null probability of the support points no draw
#: visited exceeds what independent draws would leave unvisited by more than this many standard
#: deviations. For Markov chains the expectation is taken for a fifth of the draws (as if they
#: were five times autocorrelated), so only a sampler that cannot reach part of the support
#: (block moves need not connect it) is flagged. Our rule, not a published one.
MISSED_MASS_SDS = 5.0
#: Draws of a chain counted as this many independent ones for the expectation above.
CHAIN_DRAW_SHARE = 0.2

_TEST_VALUES = ("p_value", "mid_p_value")
_ESTIMATE_VALUES = (("estimate", "mcse"), ("ci_lower", "mcse_ci_lower"),
                    ("ci_upper", "mcse_ci_upper"), ("p_value", "mcse_p_value"))


@dataclass(frozen=True)
class ValidationReport:
    """Result of :func:`validate`.

    Attributes
    ----------
    comparisons : pandas.DataFrame
        One row per compared value: ``part, item, quantity, exact, monte_carlo, mcse, z,
        flagged`` (``flagged``: ``|z| > Z_LIMIT``; NaN z where the Monte Carlo error is missing
        or zero, or a value is infinite).
    coverage : pandas.DataFrame
        One row per part: ``part, engine, n_draws, exact_points, visited_points,
        point_coverage, mass_coverage`` (share of exact support points drawn at least once, and
        their exact null probability).
    engine : str
    exact, monte_carlo : FitResult
    """

    comparisons: pd.DataFrame
    coverage: pd.DataFrame
    engine: str
    exact: object
    monte_carlo: object

    @property
    def passed(self) -> bool:
        """No comparison flagged and no support-coverage problem flagged."""
        flagged_cover = ("flagged" in self.coverage.columns
                         and bool(self.coverage["flagged"].any()))
        return not bool(self.comparisons["flagged"].any()) and not flagged_cover

    def summary(self) -> str:
        z = self.comparisons["z"].to_numpy(float)
        finite = z[np.isfinite(z)]
        lines = [f"Monte Carlo ({self.engine}) against exact enumeration",
                 f"  {len(self.comparisons)} values compared, {finite.size} with a usable "
                 f"Monte Carlo error; mean z {np.mean(finite) if finite.size else np.nan:+.2f}, "
                 f"largest |z| {np.max(np.abs(finite)) if finite.size else np.nan:.2f}, "
                 f"{int(self.comparisons['flagged'].sum())} beyond {Z_LIMIT:g}"]
        for _, row in self.coverage.iterrows():
            lines.append(f"  {row['part']}: {row['n_draws']:,} draws visited "
                         f"{row['visited_points']:,} of {row['exact_points']:,} support points "
                         f"({row['point_coverage']:.1%}), {row['mass_coverage']:.4%} of the "
                         "null probability"
                         + (f"; FLAGGED: the points never visited hold {row['missed_mass']:.4g} "
                            f"of it, where about {row['expected_missed_mass']:.2g} was expected "
                            "(the sampler may not reach them)"
                            if row.get("flagged", False) else ""))
        flagged = self.comparisons[self.comparisons["flagged"]]
        for _, row in flagged.iterrows():
            lines.append(f"  flagged: {row['part']} {row['item']} {row['quantity']}: exact "
                         f"{row['exact']:.6g}, Monte Carlo {row['monte_carlo']:.6g} +/- "
                         f"{row['mcse']:.3g} (z = {row['z']:+.2f})")
        lines.append("  verdict: " + ("agreement within the Monte Carlo error" if self.passed
                                      else "DISAGREEMENT: do not trust this engine's results "
                                           "on this design without further checks"))
        return "\n".join(lines)


def coverage_row(part: str, ex, md) -> dict:
    """Support coverage of the Monte Carlo distribution `md` against the exact `ex`.

    Besides the points and null probability visited: the probability of the points never
    visited (``missed_mass``), what N independent draws would leave unvisited on average,
    ``sum_i p_i (1 - p_i)^N`` (``expected_missed_mass``, with N the draws, or
    ``CHAIN_DRAW_SHARE`` of them for chains), and ``flagged`` when the missed mass exceeds that by
    more than ``MISSED_MASS_SDS`` standard deviations (``sum_i p_i^2 q_i (1 - q_i)``, q_i =
    (1 - p_i)^N, the variance of a sum of independent misses; the misses are in fact slightly
    negatively dependent, which only makes the rule more conservative).
    """
    drawn = np.concatenate(md.chain_index) if md.chain_index is not None else np.arange(0)
    visited = {tuple(row) for row in md.support[np.unique(drawn)]}
    hit = np.array([tuple(row) in visited for row in ex.support])
    pmf = ex.pmf()
    mass = float(pmf[hit].sum())
    n_eff = md.n_draws * (1.0 if md.iid else CHAIN_DRAW_SHARE)
    q = np.exp(n_eff * np.log1p(-np.minimum(pmf, 1 - 1e-16)))
    expected = float(pmf @ q)
    sd = float(np.sqrt(np.sum(pmf ** 2 * q * (1 - q))))
    missed = max(0.0, 1.0 - mass)
    return {"part": part, "engine": md.info.get("method"), "n_draws": md.n_draws,
            "exact_points": ex.n_points, "visited_points": int(hit.sum()),
            "point_coverage": float(hit.mean()), "mass_coverage": mass,
            "missed_mass": missed, "expected_missed_mass": expected,
            "flagged": bool(missed > expected + MISSED_MASS_SDS * sd + 1e-9)}


def _z(mc: float, exact: float, mcse: float) -> float:
    if not (np.isfinite(mc) and np.isfinite(exact) and np.isfinite(mcse)) or mcse <= 0:
        return np.nan
    return float((mc - exact) / mcse)


def validate(data, formula: str | None = None, *, method: str = "direct", interest=None,
             strata: str | None = None, trials: str | None = None, max_nodes: int | None = None,
             **sampling) -> ValidationReport:
    """Compare a Monte Carlo engine with exact enumeration on the same design.

    Parameters
    ----------
    data, formula, interest, strata, trials, max_nodes
        As for :func:`mcexact.fit` (`data` may be a Design). The design must be small enough to
        enumerate exactly.
    method : {"direct", "mcmc"}
        The Monte Carlo engine to check.
    **sampling
        Monte Carlo options of :func:`mcexact.fit` (``n_draws``, ``n_chains``, ``rng``, ...).

    Returns
    -------
    ValidationReport
    """
    from mcexact.fit import fit

    if method not in ("direct", "mcmc"):
        raise DataError(f"method must be 'direct' or 'mcmc' for validation, got {method!r}")
    if isinstance(data, Design):
        design = data
    else:
        design = Design.from_formula(data, formula, interest=interest, strata=strata,
                                     trials=trials)
    exact = fit(design, method="enumerate", max_nodes=max_nodes, asymptotic=False)
    mc = fit(design, method=method, max_nodes=max_nodes, asymptotic=False, **sampling)

    rows = []
    for (_, e), (_, m) in zip(exact.tests.iterrows(), mc.tests.iterrows()):
        for q in _TEST_VALUES:
            err = m["mcse"] if q == "p_value" else m["mcse_mid_p"]
            z = _z(m[q], e[q], err)
            rows.append({"part": e["effect"], "item": e["test"], "quantity": q, "exact": e[q],
                         "monte_carlo": m[q], "mcse": err, "z": z})
    for (_, e), (_, m) in zip(exact.estimates.iterrows(), mc.estimates.iterrows()):
        for q, err_col in _ESTIMATE_VALUES:
            z = _z(m[q], e[q], m[err_col])
            rows.append({"part": e["effect"], "item": e["term"], "quantity": q, "exact": e[q],
                         "monte_carlo": m[q], "mcse": m[err_col], "z": z})
    comparisons = pd.DataFrame(rows)
    comparisons["flagged"] = np.abs(comparisons["z"].to_numpy(float)) > Z_LIMIT

    cover = []
    parts = list(exact.effect_distributions.items())
    if exact.distribution is not None and len(exact.effect_distributions) > 1:
        parts.append(("joint", exact.distribution))
    for part, ex in parts:
        md = mc.distribution if part == "joint" else mc.effect_distributions[part]
        if md is None:
            continue
        cover.append(coverage_row(part, ex, md))
    return ValidationReport(comparisons, pd.DataFrame(cover), method, exact, mc)
