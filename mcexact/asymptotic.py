"""Ordinary (unconditional, large-sample) logistic regression beside the conditional results.

Users need to see where the usual asymptotic answers and the conditional ones disagree, and why:
separation (no finite maximum likelihood estimate) and sparse data are the usual reasons.

- The fit itself is statsmodels' binomial GLM on the design's groups (an intercept, or one
  intercept per stratum, plus the nuisance and interest columns in original units), with Wald,
  likelihood-ratio and score p-values per effect and for all effects jointly.
- Separation is detected by linear programming before any fit is trusted (Albert & Anderson 1984;
  Konis 2007): a direction d with ``x_i . d >= 0`` for every row with events and ``x_i . d <= 0``
  for every row with non-events, not all zero, means the likelihood keeps increasing along d; the
  columns that some such d moves have no finite estimate.
- Sparseness uses a rule of thumb (common practice for chi-square approximations, no single
  source): more than 20% of expected cell counts (events and non-events per group) below 5.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats
from scipy.optimize import linprog

__all__ = ["SeparationReport", "AsymptoticComparison", "detect_separation", "asymptotic_fit"]

# Common practice: the chi-square approximation is doubtful when more than a fifth of the expected
# counts are below five.
SPARSE_EXPECTED = 5.0
SPARSE_SHARE = 0.20

_LP_TOL = 1e-8


@dataclass(frozen=True)
class SeparationReport:
    """Outcome of the separation check.

    Attributes
    ----------
    status : str
        ``"overlap"`` (finite MLE), ``"quasi-complete"`` or ``"complete"`` separation.
    columns : tuple of str
        Columns of the ordinary model with no finite maximum likelihood estimate.
    n_predicted_rows : int
        Groups perfectly predicted along the separating direction found.
    """

    status: str
    columns: tuple
    n_predicted_rows: int

    @property
    def separated(self) -> bool:
        return self.status != "overlap"


def _outcome_rows(X: np.ndarray, events: np.ndarray, trials: np.ndarray):
    """Rows of the LP: events rows need x.d >= 0, non-event rows x.d <= 0 (as -x.d >= 0)."""
    has_event = events > 0
    has_non = events < trials
    A = np.vstack([X[has_event], -X[has_non]])
    return A, has_event & has_non


def detect_separation(X: np.ndarray, events: np.ndarray, trials: np.ndarray,
                      names) -> SeparationReport:
    """Classify the data as overlap, quasi-complete or complete separation by linear programming.

    For each column j two programmes maximise ``+d_j`` and ``-d_j`` over the cone of
    non-decreasing directions ``{d : A d >= 0}`` cut to the box ``[-1, 1]``; a positive optimum
    means column j can move along a direction of non-decreasing likelihood, so its estimate
    diverges (Konis 2007, ch. 4). Complete separation additionally needs a direction that is strict
    on every row, which a programme maximising the smallest margin settles.
    """
    X = np.asarray(X, dtype=float)
    A, both = _outcome_rows(X, events, trials)
    k = X.shape[1]
    bounds = [(-1.0, 1.0)] * k
    flagged = []
    best_d = np.zeros(k)
    for j in range(k):
        for sign in (1.0, -1.0):
            c = np.zeros(k)
            c[j] = -sign
            res = linprog(c, A_ub=-A, b_ub=np.zeros(A.shape[0]), bounds=bounds, method="highs")
            if res.status == 0 and -res.fun > _LP_TOL:
                flagged.append(j)
                best_d = best_d + res.x
                break
    if not flagged:
        return SeparationReport("overlap", (), 0)
    # Complete separation: maximise the least margin s with A d >= s, s <= 1 (impossible when a
    # group has both outcomes, since its two rows force x.d = 0).
    status = "quasi-complete"
    if not both.any():
        c = np.zeros(k + 1)
        c[-1] = -1.0
        A_ub = np.hstack([-A, np.ones((A.shape[0], 1))])
        res = linprog(c, A_ub=A_ub, b_ub=np.zeros(A.shape[0]), bounds=bounds + [(None, 1.0)],
                      method="highs")
        if res.status == 0 and -res.fun > _LP_TOL:
            status = "complete"
    margin = X @ best_d
    predicted = int(np.sum(np.abs(margin) > _LP_TOL))
    return SeparationReport(status, tuple(names[j] for j in sorted(set(flagged))), predicted)


@dataclass(frozen=True)
class AsymptoticComparison:
    """The ordinary logistic fit on the same design.

    Attributes
    ----------
    coefficients : pandas.DataFrame
        One row per interest column: ``term, estimate, std_error, odds_ratio, wald_p_value,
        finite`` (per original unit).
    tests : pandas.DataFrame
        One row per effect and ``"joint"``: ``effect, df, wald_p_value, lr_p_value,
        score_p_value``.
    separation : SeparationReport
    sparse : bool
        Whether the rule of thumb flags the data as too sparse for large-sample results.
    share_small_expected : float
        Share of expected counts below 5.
    notes : tuple of str
    """

    coefficients: pd.DataFrame
    tests: pd.DataFrame
    separation: SeparationReport
    sparse: bool
    share_small_expected: float
    notes: tuple = field(default_factory=tuple)

    def to_dict(self) -> dict:
        return {
            "coefficients": self.coefficients.replace({np.inf: None, -np.inf: None}).astype(object)
            .where(self.coefficients.notna(), None).to_dict(orient="records"),
            "tests": self.tests.astype(object).where(self.tests.notna(), None)
            .to_dict(orient="records"),
            "separation": {"status": self.separation.status,
                           "columns": list(self.separation.columns),
                           "n_predicted_rows": self.separation.n_predicted_rows},
            "sparse": bool(self.sparse),
            "share_small_expected": float(self.share_small_expected),
            "notes": list(self.notes),
        }


def _model_matrix(design):
    """Columns of the ordinary model: intercept or stratum indicators, nuisance, interest."""
    G = design.n_groups
    blocks, names = [], []
    if design.n_strata > 1:
        dummies = np.zeros((G, design.n_strata))
        dummies[np.arange(G), design.stratum] = 1.0
        blocks.append(dummies)
        names += [f"stratum[{label}]" for label in design.stratum_labels]
    elif design.fix_stratum_totals:
        blocks.append(np.ones((G, 1)))
        names.append("Intercept")
    if design.nuisance.shape[1]:
        blocks.append(design.nuisance / np.asarray(design.nuisance_scales, float))
        names += list(design.nuisance_names)
    blocks.append(design.interest / np.asarray(design.interest_scales, float))
    names += list(design.interest_names)
    X = np.hstack(blocks)
    n_base = X.shape[1] - design.interest.shape[1]
    return X, names, n_base


def _glm(endog, X):
    """Binomial GLM fit, warnings silenced: separation is diagnosed separately, by LP."""
    import statsmodels.api as sm

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = sm.GLM(endog, X, family=sm.families.Binomial())
        return model.fit(maxiter=200, tol=1e-10), model


def asymptotic_fit(design) -> AsymptoticComparison:
    """Ordinary logistic regression on `design`, with the separation and sparseness checks.

    Parameters
    ----------
    design : mcexact.Design

    Returns
    -------
    AsymptoticComparison
    """
    X, names, n_base = _model_matrix(design)
    events = np.asarray(design.events)
    trials = np.asarray(design.trials)
    endog = np.column_stack([events, trials - events]).astype(float)
    sep = detect_separation(X, events, trials, names)
    notes = []
    if design.n_strata > 1:
        notes.append("with strata the ordinary fit estimates one intercept per stratum; with few "
                     "rows per stratum its estimates are biased away from zero")
    if sep.separated:
        notes.append(f"{sep.status} separation: no finite maximum likelihood estimate for "
                     + ", ".join(sep.columns) + "; Wald results are not available for them and "
                     "likelihood-ratio values are limits")
    interest_idx = list(range(n_base, X.shape[1]))
    full, _ = _glm(endog, X)
    params = np.asarray(full.params, float)
    bse = np.asarray(full.bse, float)
    infinite = {names.index(c) for c in sep.columns}
    rows = []
    for j in interest_idx:
        finite = j not in infinite
        est = params[j] if finite else np.nan
        se = bse[j] if finite else np.nan
        rows.append({"term": names[j], "estimate": est, "std_error": se,
                     "odds_ratio": np.exp(est) if finite else np.nan,
                     "wald_p_value": float(2 * stats.norm.sf(abs(est / se))) if finite and se > 0
                     else np.nan, "finite": finite})
    coefficients = pd.DataFrame(rows)

    effects = dict(design.effects)
    if len(effects) > 1:
        effects = {**effects, "joint": tuple(range(design.interest.shape[1]))}
    else:
        effects = {**effects, "joint": next(iter(effects.values()))}
    test_rows = []
    cov = np.asarray(full.cov_params(), float)
    for effect, cols in effects.items():
        idx = [n_base + c for c in cols]
        keep = [j for j in range(X.shape[1]) if j not in idx]
        restricted, _ = _glm(endog, X[:, keep])
        df = len(idx)
        lr = max(0.0, 2 * (full.llf - restricted.llf))
        lr_p = float(stats.chi2.sf(lr, df))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                score = restricted.score_test(exog_extra=X[:, idx])
            score_p = float(np.asarray(score[1]).reshape(-1)[0])
        except (np.linalg.LinAlgError, ValueError):
            score_p = np.nan
        if any(j in infinite for j in idx):
            wald_p = np.nan
        else:
            b = params[idx]
            try:
                w = float(b @ np.linalg.solve(cov[np.ix_(idx, idx)], b))
                wald_p = float(stats.chi2.sf(w, df))
            except np.linalg.LinAlgError:
                wald_p = np.nan
        test_rows.append({"effect": effect, "df": df, "wald_p_value": wald_p,
                          "lr_p_value": lr_p, "score_p_value": score_p})
    tests = pd.DataFrame(test_rows)

    # Expected counts under the fitted model (or, with separation, under the nuisance-only model).
    base_fit, _ = _glm(endog, X[:, :n_base]) if (sep.separated and n_base) else (full, None)
    p_hat = np.clip(np.asarray(base_fit.fittedvalues, float).reshape(-1), 0.0, 1.0)
    expected = np.concatenate([trials * p_hat, trials * (1 - p_hat)])
    share = float(np.mean(expected < SPARSE_EXPECTED))
    sparse = share > SPARSE_SHARE
    if sparse:
        notes.append(f"{share:.0%} of expected counts are below {SPARSE_EXPECTED:g} (rule of thumb: "
                     f"over {SPARSE_SHARE:.0%} makes large-sample p-values unreliable)")
    return AsymptoticComparison(coefficients, tests, sep, sparse, share, tuple(notes))
