"""Tests of mcexact.asymptotic: separation check and the ordinary logistic fit beside the exact one.

References, named beside each expected value:

* hand-made model matrices whose separation status follows from the definitions of Albert &
  Anderson (1984) as stated in METHODS.md section 7 (the derivation is in each comment);
* ``statsmodels.api.GLM(endog, X, family=statsmodels.api.families.Binomial()).fit()``
  (statsmodels 0.15), written out here on the model matrix built by hand;
* likelihood-ratio and score statistics computed in this file from those fits with numpy and
  ``scipy.stats.chi2``.

All data are invented (some from seeded numpy generators).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from mcexact import Design
from mcexact.asymptotic import SPARSE_EXPECTED, asymptotic_fit, detect_separation

sm = pytest.importorskip("statsmodels.api")


def binary(X, y):
    X = np.asarray(X, dtype=float)
    y = np.asarray(y)
    return X, y, np.ones(len(y), dtype=int)


# ============================================================================ separation


def test_complete_separation_along_one_covariate():
    # y = 1 exactly when x >= 3: d = (-2.5, 1) gives (2y - 1) x.d > 0 on every row, so the
    # separation is complete (Albert & Anderson); every separating d moves both the intercept and
    # x (d_x = 0 would need d_0 > 0 on events and d_0 < 0 on non-events), so both diverge.
    x = [0, 1, 2, 3, 4, 5]
    report = detect_separation(*binary(np.column_stack([np.ones(6), x]), [0, 0, 0, 1, 1, 1]),
                               ["Intercept", "x"])
    assert report.status == "complete" and report.separated
    assert report.columns == ("Intercept", "x")
    assert report.n_predicted_rows == 6


def test_quasi_complete_separation_with_a_tie_at_the_threshold():
    # Both outcomes at x = 2 force x.d = 0 there (d_0 = -2 d_x); d = (-2, 1) then has
    # (2y - 1) x.d >= 0 everywhere with equality on the two x = 2 rows: quasi-complete, and the
    # other 4 rows are perfectly predicted (hand computation).
    x = [0, 1, 2, 2, 3, 4]
    report = detect_separation(*binary(np.column_stack([np.ones(6), x]), [0, 0, 0, 1, 1, 1]),
                               ["Intercept", "x"])
    assert report.status == "quasi-complete"
    assert report.columns == ("Intercept", "x")
    assert report.n_predicted_rows == 4


def test_quasi_complete_separation_flags_only_the_zero_cell_column():
    # Every x = 1 row is an event (a zero cell), x = 0 rows have both outcomes at every w.  The
    # x = 0 rows force d_0 + w d_w = 0 for w = 0, 1, 2, so d_0 = d_w = 0; d = (0, 1, 0) is
    # non-decreasing (x.d = 1 on the x = 1 events, 0 elsewhere): only x diverges, and the
    # three x = 1 rows are the perfectly predicted ones (hand computation).
    rows = [(1, 0, 1), (1, 2, 1), (1, 1, 1), (0, 0, 0), (0, 1, 1), (0, 2, 0), (0, 0, 1),
            (0, 1, 0), (0, 2, 1)]
    x = [r[0] for r in rows]
    w = [r[1] for r in rows]
    y = [r[2] for r in rows]
    report = detect_separation(*binary(np.column_stack([np.ones(9), w, x]), y),
                               ["Intercept", "w", "x"])
    assert report.status == "quasi-complete"
    assert report.columns == ("x",)
    assert report.n_predicted_rows == 3


def test_overlap():
    # Events and non-events alternate in x: any d with x.d >= 0 on events (x = 1, 3, 5) and
    # <= 0 on non-events (x = 0, 2, 4) has d_0 + x d_x changing sign three times: only d = 0.
    x = [0, 1, 2, 3, 4, 5]
    report = detect_separation(*binary(np.column_stack([np.ones(6), x]), [0, 1, 0, 1, 0, 1]),
                               ["Intercept", "x"])
    assert report.status == "overlap" and not report.separated
    assert report.columns == () and report.n_predicted_rows == 0


def test_grouped_rows_with_both_outcomes_are_never_complete():
    X = np.column_stack([np.ones(6), [0, 1, 2, 3, 4, 5]])
    m = np.full(6, 2)
    # Without a mixed group the same data are completely separated (x >= 3: all events) ...
    assert detect_separation(X, np.array([0, 0, 0, 2, 2, 2]), m, ["1", "x"]).status == "complete"
    # ... one group with 0 < y < m forces x.d = 0 on it: at most quasi-complete.
    report = detect_separation(X, np.array([0, 0, 0, 1, 2, 2]), m, ["1", "x"])
    assert report.status == "quasi-complete"
    assert report.n_predicted_rows == 5          # all but the mixed group (x.d = 0 there)
    # Random grouped data with at least one mixed group (seeded generator): never "complete".
    rng = np.random.default_rng(11)
    for _ in range(30):
        k = int(rng.integers(3, 8))
        Xr = np.column_stack([np.ones(k), rng.integers(0, 4, (k, 2))]).astype(float)
        mr = rng.integers(1, 4, k)
        yr = np.where(Xr[:, 1] >= 2, mr, 0)          # separated on the first covariate ...
        j = int(rng.integers(0, k))
        mr[j] = max(mr[j], 2)
        yr[j] = 1                                     # ... except for one mixed group
        status = detect_separation(Xr, yr, mr, ["1", "a", "b"]).status
        assert status in ("overlap", "quasi-complete")


# ============================================================================ asymptotic fit


def glm(y, trials, X):
    """statsmodels.api.GLM(endog, X, family=Binomial()).fit() on (events, non-events)."""
    endog = np.column_stack([y, np.asarray(trials) - np.asarray(y)]).astype(float)
    return sm.GLM(endog, X, family=sm.families.Binomial()).fit(tol=1e-12, maxiter=200)


def score_statistic(y, trials, X, extra):
    """Rao score statistic for adding the columns `extra`, at the restricted MLE (by hand).

    U = X_e' (y - m p), I = X' diag(m p (1 - p)) X with p the restricted fit, and
    S = U' [I^-1]_ee U, compared with chi-square(len(extra)).
    """
    keep = [j for j in range(X.shape[1]) if j not in extra]
    p = np.asarray(glm(y, trials, X[:, keep]).fittedvalues)
    m = np.asarray(trials, float)
    U = X[:, extra].T @ (np.asarray(y) - m * p)
    info = (X * (m * p * (1 - p))[:, None]).T @ X
    inv = np.linalg.inv(info)[np.ix_(extra, extra)]
    return float(U @ inv @ U)


def invented_data(seed=3, n=60):
    rng = np.random.default_rng(seed)
    x1 = rng.integers(0, 5, n)
    x2 = rng.integers(0, 3, n)
    w = np.round(rng.normal(size=n), 1)       # one decimal: scaled by 10 in the design
    y = rng.binomial(1, 1 / (1 + np.exp(-(-0.5 + 0.4 * x1 - 0.3 * x2 + 0.5 * w))))
    return y, x1, x2, w


def test_asymptotic_fit_equals_a_direct_glm():
    y, x1, x2, w = invented_data()
    design = Design.from_arrays(y, np.column_stack([x1, x2]), w)
    a = asymptotic_fit(design)
    n = len(y)
    X = np.column_stack([np.ones(n), w, x1, x2])       # original units, by hand
    full = glm(y, np.ones(n), X)
    coef = a.coefficients.set_index("term")
    assert list(coef.index) == ["z0", "z1"]
    np.testing.assert_allclose(coef["estimate"], full.params[2:], rtol=1e-6)
    np.testing.assert_allclose(coef["std_error"], full.bse[2:], rtol=1e-5)
    np.testing.assert_allclose(coef["odds_ratio"], np.exp(full.params[2:]), rtol=1e-6)
    # Wald p: 2 * norm.sf(|b / se|) from the statsmodels fit.
    wald = 2 * stats.norm.sf(np.abs(full.params[2:] / full.bse[2:]))
    np.testing.assert_allclose(coef["wald_p_value"], wald, rtol=1e-5)
    assert coef["finite"].all()
    tests = a.tests.set_index("effect")
    assert list(tests.index) == ["z0", "z1", "joint"]
    for effect, extra in [("z0", [2]), ("z1", [3]), ("joint", [2, 3])]:
        keep = [j for j in range(4) if j not in extra]
        restricted = glm(y, np.ones(n), X[:, keep])
        lr = 2 * (full.llf - restricted.llf)             # by hand
        assert tests.loc[effect, "df"] == len(extra)
        assert tests.loc[effect, "lr_p_value"] == pytest.approx(
            stats.chi2.sf(lr, len(extra)), rel=1e-6)
        score = score_statistic(y, np.ones(n), X, extra)
        assert tests.loc[effect, "score_p_value"] == pytest.approx(
            stats.chi2.sf(score, len(extra)), rel=1e-6)
        b = full.params[extra]
        cov = full.cov_params()[np.ix_(extra, extra)]
        wald_stat = float(b @ np.linalg.solve(cov, b))  # multivariate Wald, by hand
        assert tests.loc[effect, "wald_p_value"] == pytest.approx(
            stats.chi2.sf(wald_stat, len(extra)), rel=1e-5)
    assert a.separation.status == "overlap"


def test_asymptotic_fit_with_strata_uses_one_intercept_per_stratum():
    # Invented grouped data in 3 strata; reference GLM on stratum indicators + the covariate.
    stratum = [0, 0, 0, 1, 1, 1, 2, 2, 2, 2]
    x = [0, 1, 2, 0, 1, 2, 0, 1, 2, 3]
    trials = [5, 6, 4, 7, 5, 6, 4, 5, 6, 3]
    y = [1, 2, 3, 2, 1, 4, 0, 2, 3, 2]
    design = Design.from_arrays(y, x, trials=trials, strata=stratum)
    a = asymptotic_fit(design)
    X = np.column_stack([np.equal.outer(stratum, [0, 1, 2]).astype(float), x])
    full = glm(y, trials, X)
    row = a.coefficients.iloc[0]
    assert row["estimate"] == pytest.approx(full.params[3], rel=1e-6)
    assert row["std_error"] == pytest.approx(full.bse[3], rel=1e-5)
    lr = 2 * (full.llf - glm(y, trials, X[:, :3]).llf)
    assert a.tests.set_index("effect").loc["z0", "lr_p_value"] == pytest.approx(
        stats.chi2.sf(lr, 1), rel=1e-6)
    assert any("one intercept per stratum" in note for note in a.notes)


def test_separated_interest_column_is_flagged_with_no_wald_value():
    # The zero-cell data of test_quasi_complete_separation_flags_only_the_zero_cell_column:
    # interest x, nuisance w, intercept.
    rows = [(1, 0, 1), (1, 2, 1), (1, 1, 1), (0, 0, 0), (0, 1, 1), (0, 2, 0), (0, 0, 1),
            (0, 1, 0), (0, 2, 1)]
    x = [r[0] for r in rows]
    w = [r[1] for r in rows]
    y = [r[2] for r in rows]
    a = asymptotic_fit(Design.from_arrays(y, x, w, interest_names=["x"], nuisance_names=["w"]))
    assert a.separation.status == "quasi-complete"
    assert a.separation.columns == ("x",)
    row = a.coefficients.set_index("term").loc["x"]
    assert not row["finite"]
    assert np.isnan(row["estimate"]) and np.isnan(row["wald_p_value"])
    assert np.isnan(a.tests.set_index("effect").loc["x", "wald_p_value"])
    # The likelihood-ratio value is a limit, still a number in [0, 1].
    assert 0 <= a.tests.set_index("effect").loc["x", "lr_p_value"] <= 1
    assert any("separation" in note for note in a.notes)


def test_sparse_flag():
    # Binary rows, collapsed into groups of fewer than 5 trials: every expected count m p and
    # m (1 - p) is at most m < 5, so 100% are small (hand bound).
    y, x1, x2, w = invented_data(seed=5, n=30)
    design = Design.from_arrays(y, x1, w)
    assert design.trials.max() < SPARSE_EXPECTED
    a = asymptotic_fit(design)
    assert a.sparse and a.share_small_expected == pytest.approx(1.0)
    assert any("expected counts" in note for note in a.notes)
    # Invented dense grouped data: 200 trials per group and fitted probabilities between 0.2
    # and 0.8 give expected counts of at least 40 (hand bound): nothing is small.
    x = [0, 1, 2, 3, 4]
    trials = [200] * 5
    y = [45, 70, 95, 118, 150]
    a = asymptotic_fit(Design.from_arrays(y, x, trials=trials))
    fitted = np.asarray(glm(y, trials, np.column_stack([np.ones(5), x])).fittedvalues)
    expected = np.concatenate([200 * fitted, 200 * (1 - fitted)])
    assert expected.min() >= 40
    assert not a.sparse
    assert a.share_small_expected == pytest.approx(np.mean(expected < SPARSE_EXPECTED))
    assert a.share_small_expected == 0.0
