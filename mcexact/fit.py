"""The public entry point :func:`fit` and its result object.

`fit` turns data and a formula into a :class:`~mcexact.design.Design`, computes the conditional
distribution of each effect (the other interest terms conditioned on at their observed values) and
the joint distribution of all interest terms, and runs the tests, estimates and limits of
:mod:`mcexact.inference` on them, beside the ordinary logistic fit of :mod:`mcexact.asymptotic`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from mcexact._exceptions import BudgetExceeded, DataError
from mcexact.asymptotic import AsymptoticComparison, asymptotic_fit
from mcexact.design import Design
from mcexact.distribution import ConditionalDistribution
from mcexact.exact import exact_distribution, plan
from mcexact.inference import column_inference, joint_cmle, joint_tests

__all__ = ["fit", "FitResult", "METHODS", "CAUTION"]

#: Engines `fit` accepts. Monte Carlo engines join this set when they exist.
METHODS = ("auto", "enumerate")

CAUTION = (
    "Exact conditional results can be conservative, and conditioning on many nuisance terms "
    "loses information. Monte Carlo values, where used, are estimates with the Monte Carlo error "
    "shown. These results support, and do not replace, the study protocol, a qualified "
    "statistician and applicable regulatory guidance.")

_TEST_COLUMNS = ["effect", "test", "statistic", "p_value", "mid_p_value", "df", "n_points", "note"]
_ESTIMATE_COLUMNS = ["term", "effect", "estimate", "kind", "ci_lower", "ci_upper", "odds_ratio",
                     "or_ci_lower", "or_ci_upper", "p_value", "mid_p_value", "p_lower", "p_upper",
                     "cmle", "median_unbiased", "observed", "n_points", "note"]


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
                               else {k: _plain(v) for k, v in self.joint_estimate.items()}),
            "asymptotic": None if self.asymptotic is None else _plain(self.asymptotic.to_dict()),
            "notes": list(self.notes),
            "caution": CAUTION,
        }
        return _plain(out)

    def to_json(self, **kwargs) -> str:
        return json.dumps(self.to_dict(), **kwargs)


def _plain(value):
    """Numpy scalars to Python, non-finite floats to strings, recursively."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
    return value


def _records(frame: pd.DataFrame) -> list:
    return [_plain(r) for r in frame.to_dict(orient="records")]


def _check_options(method, alpha):
    if method not in METHODS:
        raise DataError(f"method must be one of {', '.join(map(repr, METHODS))}; got {method!r}")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float, np.floating)) \
            or not 0 < float(alpha) < 1:
        raise DataError(f"alpha must be a number strictly between 0 and 1; got {alpha!r}")


def _exact(design: Design, max_nodes, what: str):
    """Plan, then enumerate; returns (distribution or None, plan, note)."""
    p = plan(design, max_nodes=max_nodes)
    if not p.fits_nuisance or not p.fits_full:
        return None, p, f"{what}: {p.reason}"
    try:
        return exact_distribution(design, max_nodes=max_nodes, plan_result=p), p, ""
    except BudgetExceeded as exc:
        return None, p, f"{what}: {exc}"


def fit(data, formula: str | None = None, *, interest=None, strata: str | None = None,
        trials: str | None = None, method: str = "auto", alpha: float = 0.05,
        max_nodes: int | None = None, decimals: int = 6, asymptotic: bool = True) -> FitResult:
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
    method : {"auto", "enumerate"}
        Engine. Both enumerate exactly with the network algorithm today; "auto" will fall back
        to Monte Carlo engines when the network is too large.
    alpha : float
        Confidence limits are at level ``1 - alpha``.
    max_nodes : int, optional
        Node budget of the network algorithm (default ``mcexact.DEFAULT_MAX_NODES``).
    decimals : int
        Most decimals a covariate may have before it is rejected (it is scaled to integers).
    asymptotic : bool
        Also fit the ordinary logistic model for comparison.

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

    notes = list(design.notes)
    effects = dict(design.effects)
    names = list(design.interest_names)
    scales = np.asarray(design.interest_scales, float)
    test_rows, estimate_rows = [], []
    effect_dists, plans = {}, {}
    for effect, cols in effects.items():
        sub = design if len(effects) == 1 else design.with_interest([effect])
        dist, p, note = _exact(sub, max_nodes, f"effect {effect!r}")
        plans[effect] = p.to_dict()
        if dist is None:
            raise BudgetExceeded(
                f"mcexact: the exact network for {note}; Monte Carlo engines are needed",
                what="full", reached=int(p.full_peak_estimate or p.nuisance_reached or 0),
                limit=p.max_nodes)
        effect_dists[effect] = dist
        for t in joint_tests(dist):
            test_rows.append({"effect": effect, "test": t.test, "statistic": t.statistic,
                              "p_value": t.p_value, "mid_p_value": t.mid_p_value, "df": t.df,
                              "n_points": dist.n_points, "note": t.note})
        for k, c in enumerate(cols):
            others = [j for j in range(len(cols)) if j != k]
            piece = dist.condition(others) if others else dist
            e = column_inference(piece, alpha)
            s = scales[c]
            estimate_rows.append({
                "term": names[c], "effect": effect, "estimate": e.estimate * s, "kind": e.kind,
                "ci_lower": e.ci_lower * s, "ci_upper": e.ci_upper * s,
                "odds_ratio": np.exp(e.estimate * s), "or_ci_lower": np.exp(e.ci_lower * s),
                "or_ci_upper": np.exp(e.ci_upper * s), "p_value": e.p_two_sided,
                "mid_p_value": e.mid_p_two_sided, "p_lower": e.p_lower, "p_upper": e.p_upper,
                "cmle": e.cmle * s, "median_unbiased": e.median_unbiased * s,
                "observed": int(piece.observed[0]), "n_points": e.n_points, "note": e.note})

    # Joint distribution of all interest columns.
    joint_estimate = None
    if len(effects) == 1:
        joint = next(iter(effect_dists.values()))
        plans["joint"] = next(iter(plans.values()))
    else:
        joint, p, note = _exact(design, max_nodes, "joint test")
        plans["joint"] = p.to_dict()
        if joint is None:
            notes.append(f"the joint test was not computed: {note}")
    if joint is not None:
        for t in joint_tests(joint):
            test_rows.append({"effect": "joint", "test": t.test, "statistic": t.statistic,
                              "p_value": t.p_value, "mid_p_value": t.mid_p_value, "df": t.df,
                              "n_points": joint.n_points, "note": t.note})
        b = joint_cmle(joint)
        if b is None:
            notes.append("the joint conditional MLE does not exist: the observed statistics lie "
                         "on the boundary of their support's convex hull")
        else:
            joint_estimate = pd.Series(b * scales, index=names, name="joint_cmle")

    tests = pd.DataFrame(test_rows, columns=_TEST_COLUMNS)
    estimates = pd.DataFrame(estimate_rows, columns=_ESTIMATE_COLUMNS)
    method_info = {
        "engine": "exact",
        "description": "exact enumeration by the network algorithm (Hirji, Mehta & Patel 1987)",
        "requested": method,
        "reason": ("every network fits the node budget" if method == "auto"
                   else "enumeration requested"),
        "plans": plans,
    }
    comparison = asymptotic_fit(design) if asymptotic else None
    return FitResult(design, tests, estimates, joint_estimate, joint, effect_dists, method_info,
                     comparison, alpha, notes)
