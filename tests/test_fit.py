"""Tests of mcexact.fit: the public entry point and its result object.

References, named beside each expected value: brute-force counts from ``tests/_reference.py``
(every 0/1 response vector, exact Python integers) turned into tail probabilities and a CMLE by
the few lines of ``scipy.optimize.brentq`` below; the identity between a covariate and the same
covariate doubled (hand derivation in the comment); the joint distribution of all interest terms
sliced at the observed values (METHODS.md section 1: per-parameter inference conditions on the
other interest statistics).  All data are invented (from seeded numpy generators), except the
package's own invented demo data.
"""

from __future__ import annotations

import json
import math
import re
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq
from scipy.special import logsumexp

import mcexact
from mcexact import DataError, Design
from mcexact.fit import CAUTION

from _reference import binary_counts

TEST_COLUMNS = ["effect", "test", "statistic", "p_value", "mid_p_value", "df", "n_points", "note"]
ESTIMATE_COLUMNS = ["term", "effect", "estimate", "kind", "ci_lower", "ci_upper", "odds_ratio",
                    "or_ci_lower", "or_ci_upper", "p_value", "mid_p_value", "p_lower", "p_upper",
                    "cmle", "median_unbiased", "observed", "n_points", "note"]


def invented_frame(seed: int = 11, n: int = 13) -> pd.DataFrame:
    """Binary response, a dose in 0.5 steps, a three-level group and an integer age."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "y": rng.integers(0, 2, n),
        "dose": rng.integers(0, 7, n) * 0.5,
        "grp": rng.choice(["a", "b", "c"], n),
        "age": rng.integers(20, 26, n),
    })
    frame["dose2"] = (frame["dose"] * 2).astype(int)
    return frame


FORMULA = "y ~ dose + C(grp) + age"


@pytest.fixture(scope="module")
def frame():
    return invented_frame()


@pytest.fixture(scope="module")
def result(frame):
    return mcexact.fit(frame, FORMULA, interest=["dose", "C(grp)"])


# ============================================================================ brute-force reference


def reference_counts(frame: pd.DataFrame, interest: list, nuisance: list) -> dict:
    """binary_counts (all 2**n responses, intercept) with integer covariates from the frame."""
    z = np.column_stack([column(frame, c) for c in interest])
    w = np.column_stack([column(frame, c) for c in nuisance])
    return binary_counts(frame["y"].tolist(), z, w)


def column(frame, name):
    if name.startswith("grp="):
        return (frame["grp"] == name[4:]).astype(int).to_numpy()
    return frame[name].astype(int).to_numpy()


def slice_counts(counts: dict, keep: int, observed: tuple) -> dict:
    """Counts of column `keep` with the other columns at their observed values."""
    out = {}
    for t, c in counts.items():
        if all(t[j] == observed[j] for j in range(len(t)) if j != keep):
            out[t[keep]] = out.get(t[keep], 0) + c
    return out


def tails(counts: dict, t: int):
    """P(T <= t), P(T >= t) as Fractions of the brute-force counts."""
    total = sum(counts.values())
    return (Fraction(sum(c for u, c in counts.items() if u <= t), total),
            Fraction(sum(c for u, c in counts.items() if u >= t), total))


def cmle(counts: dict, t: int) -> float:
    """Root of E_b[T] = t by scipy.optimize.brentq (METHODS.md 5.3), on the counts' scale."""
    u = np.array(sorted(counts), dtype=float)
    lc = np.array([math.log(counts[k]) for k in sorted(counts)])

    def score(b):
        lp = lc + b * (u - t)
        return float(np.exp(lp - logsumexp(lp)) @ u) - t

    return brentq(score, -20, 20, xtol=1e-14)


# ============================================================================ frames


def test_frames_have_the_documented_columns(result):
    assert set(TEST_COLUMNS) <= set(result.tests.columns)
    assert set(ESTIMATE_COLUMNS) <= set(result.estimates.columns)
    assert set(result.tests["test"]) == {"score", "probability", "likelihood_ratio"}
    assert list(result.estimates["term"]) == ["dose", "C(grp)[T.b]", "C(grp)[T.c]"]
    # Joint rows are present: the joint test of all interest terms (1 + 2 columns).
    joint = result.tests[result.tests["effect"] == "joint"]
    assert sorted(joint["test"]) == ["likelihood_ratio", "probability", "score"]
    assert set(joint["df"]) == {3}
    assert set(joint["n_points"]) == {result.distribution.n_points}


def test_categorical_interest_term_is_one_effect(result):
    tests = result.tests[result.tests["effect"] == "C(grp)"]
    assert len(tests) == 3 and set(tests["df"]) == {2}          # two dummies, one effect
    rows = result.estimates[result.estimates["effect"] == "C(grp)"]
    assert list(rows["term"]) == ["C(grp)[T.b]", "C(grp)[T.c]"]
    assert result.effect_distributions["C(grp)"].n_columns == 2
    assert set(result.effect_distributions) == {"dose", "C(grp)"}


def test_categorical_effect_tests_equal_brute_force(frame, result):
    # Probability test of C(grp) given intercept, age and dose: exact counts of (T_b, T_c).
    counts = reference_counts(frame, ["grp=b", "grp=c"], ["dose2", "age"])
    obs = (int(column(frame, "grp=b") @ frame["y"]), int(column(frame, "grp=c") @ frame["y"]))
    total = sum(counts.values())
    p = Fraction(sum(c for c in counts.values() if c <= counts[obs]), total)
    row = result.tests[(result.tests["effect"] == "C(grp)")
                       & (result.tests["test"] == "probability")].iloc[0]
    assert row["p_value"] == pytest.approx(float(p), rel=1e-12)
    assert row["n_points"] == len(counts)


def test_estimates_are_per_original_unit(frame, result):
    # dose moves in 0.5 steps; dose2 = 2 dose.  logit p = b dose = (b / 2) dose2, so the
    # coefficient per unit of dose is twice the one per unit of dose2 (limits and both
    # estimates too), the odds ratio per unit of dose is the square of dose2's, and the tests are
    # the same (T differs by a constant factor).
    doubled = mcexact.fit(frame, "y ~ dose2 + C(grp) + age", interest=["dose2", "C(grp)"])
    a = result.estimates.iloc[0]
    b = doubled.estimates.iloc[0]
    assert a["term"] == "dose" and b["term"] == "dose2"
    for key in ("estimate", "ci_lower", "ci_upper", "cmle", "median_unbiased"):
        assert a[key] == pytest.approx(2 * b[key], rel=1e-8), key
    for key in ("odds_ratio", "or_ci_lower", "or_ci_upper"):
        assert a[key] == pytest.approx(b[key] ** 2, rel=1e-8), key
    for key in ("p_value", "mid_p_value", "p_lower", "p_upper"):
        assert a[key] == pytest.approx(b[key], rel=1e-10), key
    assert result.joint_estimate is not None      # seed chosen so that the joint CMLE exists
    np.testing.assert_allclose(result.joint_estimate.iloc[0], 2 * doubled.joint_estimate.iloc[0],
                               rtol=1e-7)
    np.testing.assert_allclose(result.joint_estimate.iloc[1:], doubled.joint_estimate.iloc[1:],
                               rtol=1e-7)
    # Independent reference: brute-force counts of T = dose2'y given intercept, age and the
    # group dummies; b solves E_b[T] = t on the dose2 scale, so per unit of dose it is 2 b.
    counts = reference_counts(frame, ["dose2", "grp=b", "grp=c"], ["age"])
    obs = tuple(int(column(frame, c) @ frame["y"]) for c in ["dose2", "grp=b", "grp=c"])
    dose_counts = slice_counts(counts, 0, obs)
    le, ge = tails(dose_counts, obs[0])
    assert a["p_lower"] == pytest.approx(float(le), rel=1e-12)
    assert a["p_upper"] == pytest.approx(float(ge), rel=1e-12)
    assert a["kind"] == "cmle"
    assert a["estimate"] == pytest.approx(2 * cmle(dose_counts, obs[0]), rel=1e-7)
    assert a["odds_ratio"] == pytest.approx(math.exp(2 * cmle(dose_counts, obs[0])), rel=1e-7)


# ============================================================================ report and export


def numbers_in(text: str) -> list:
    return [float(x.replace(",", "")) for x in re.findall(r"-?\d[\d,]*\.?\d*(?:e[-+]?\d+)?",
                                                         text)]


def test_summary_names_terms_caution_and_numbers(result):
    text = result.summary()
    for term in ("dose", "C(grp)[T.b]", "C(grp)[T.c]", "age"):
        assert term in text
    assert "Caution" in text
    # The caution text, whatever the line wrapping.
    assert " ".join(CAUTION.split()) in " ".join(text.split())
    # One p-value, format-insensitive: the joint probability test's line shows a number equal
    # to the frame's value at 3 significant digits or better.
    p = result.tests[(result.tests["effect"] == "joint")
                     & (result.tests["test"] == "probability")]["p_value"].iloc[0]
    lines = [line for line in text.splitlines()
             if re.search(r"\bjoint\b", line) and "probability" in line]
    assert lines, "no joint probability-test line in the summary"
    assert any(abs(x - p) <= 5e-4 * p for line in lines for x in numbers_in(line))
    # Same for the dose estimate.
    est = result.estimates.iloc[0]["estimate"]
    lines = [line for line in text.splitlines() if line.strip().startswith("dose ")]
    assert any(abs(x - est) <= 5e-4 * abs(est) for line in lines for x in numbers_in(line))


def plain(value):
    """The frames' value as to_dict documents it: infinities as "inf" / "-inf"."""
    value = float(value)
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return value


def same(record_value, frame_value) -> bool:
    expected = plain(frame_value)
    if isinstance(expected, str):
        return record_value == expected
    return record_value == pytest.approx(expected, rel=1e-12)


def test_to_dict_is_json_and_equals_the_frames(result):
    d = result.to_dict()
    back = json.loads(json.dumps(d, allow_nan=False))
    assert back == d
    for record, (_, row) in zip(d["estimates"], result.estimates.iterrows()):
        assert record["term"] == row["term"]
        for key in ("estimate", "ci_lower", "ci_upper", "odds_ratio", "or_ci_upper", "p_value",
                    "p_upper", "cmle", "median_unbiased"):
            assert same(record[key], row[key]), key
    for record, (_, row) in zip(d["tests"], result.tests.iterrows()):
        assert (record["effect"], record["test"]) == (row["effect"], row["test"])
        assert same(record["p_value"], row["p_value"])
        assert same(record["statistic"], row["statistic"])
    assert len(d["estimates"]) == len(result.estimates) and len(d["tests"]) == len(result.tests)
    assert d["joint_estimate"] == pytest.approx(result.joint_estimate.to_dict(), rel=1e-12)
    assert json.loads(result.to_json()) == d


def test_to_dict_spells_infinite_limits():
    # Invented: every exposed row is an event, so T is at the top of its support: the upper
    # limit and the CMLE are +inf (METHODS.md 5.4).
    frame = pd.DataFrame({"y": [1, 1, 1, 0, 1, 0, 0, 0, 1, 0],
                          "x": [1, 1, 1, 0, 0, 0, 0, 0, 0, 0]})
    result = mcexact.fit(frame, "y ~ x")
    row = result.estimates.iloc[0]
    assert row["kind"] == "median_unbiased" and row["ci_upper"] == np.inf
    d = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    assert d["estimates"][0]["ci_upper"] == "inf"
    assert d["estimates"][0]["cmle"] == "inf"
    assert d["estimates"][0]["or_ci_upper"] == "inf"
    assert d["estimates"][0]["ci_lower"] == pytest.approx(row["ci_lower"], rel=1e-12)


def test_fit_accepts_a_design(frame, result):
    design = Design.from_formula(frame, FORMULA, interest=["dose", "C(grp)"])
    again = mcexact.fit(design)
    cols = ["estimate", "ci_lower", "ci_upper", "p_value", "p_lower", "p_upper"]
    np.testing.assert_allclose(again.estimates[cols].to_numpy(float),
                               result.estimates[cols].to_numpy(float), rtol=1e-12)
    np.testing.assert_allclose(again.tests["p_value"].to_numpy(float),
                               result.tests["p_value"].to_numpy(float), rtol=1e-12)


@pytest.mark.parametrize("alpha", [0, 1, -1, "x", 1.5, True, None])
def test_bad_alpha_is_a_data_error(frame, alpha):
    with pytest.raises(DataError, match="alpha"):
        mcexact.fit(frame, FORMULA, alpha=alpha)


@pytest.mark.parametrize("method", ["bogus", "", "ENUMERATE", None])
def test_bad_method_is_a_data_error(frame, method):
    with pytest.raises(DataError, match="method"):
        mcexact.fit(frame, FORMULA, method=method)


def test_design_plus_formula_is_a_data_error(frame):
    design = Design.from_formula(frame, FORMULA)
    with pytest.raises(DataError):
        mcexact.fit(design, FORMULA)
    with pytest.raises(DataError):
        mcexact.fit(design, strata="grp")
    with pytest.raises(DataError):
        mcexact.fit(frame)                      # a frame needs a formula


def test_degenerate_effect_gives_p_values_of_one_and_no_nan():
    # Invented (as in test_inference.test_degenerate_slice_after_conditioning): given the two
    # events and T2 = 2, T1 = 2 is forced, so the z1 effect has a single support point.
    frame = pd.DataFrame({"y": [1, 1, 0, 0, 0, 0, 0], "z1": [1, 1, 1, 0, 1, 0, 1],
                          "z2": [1, 1, 1, 0, 0, 0, 0]})
    result = mcexact.fit(frame, "y ~ z1 + z2")
    row = result.estimates.set_index("term").loc["z1"]
    assert row["kind"] == "none" and row["n_points"] == 1
    assert "no inference" in row["note"]
    tests = result.tests[result.tests["effect"] == "z1"]
    assert (tests["p_value"] == 1.0).all() and tests["mid_p_value"].notna().all()
    for key in ("p_value", "mid_p_value", "p_lower", "p_upper"):
        assert row[key] == 1.0 or (key == "mid_p_value" and not np.isnan(row[key]))
    json.dumps(result.to_dict(), allow_nan=False)
    assert "z1" in result.summary()


# ============================================================================ demo


def test_demo_effect_distribution_is_the_joint_slice():
    data = mcexact.load_demo("small")
    result = mcexact.fit(data, "elevation ~ dose_mg + age", strata="site")
    assert list(result.estimates["term"]) == ["dose_mg", "age"]
    assert result.distribution is not None
    # METHODS.md section 1: inference on dose conditions on the age statistic too, so its
    # distribution is the joint distribution's slice at the observed age statistic.
    for effect, other in [("dose_mg", "age"), ("age", "dose_mg")]:
        piece = result.distribution.condition([other])
        own = result.effect_distributions[effect]
        np.testing.assert_array_equal(own.support, piece.support)
        np.testing.assert_array_equal(own.observed, piece.observed)
        # Log counts may differ by a constant only if normalised differently; they are counts.
        np.testing.assert_allclose(own.log_weights, piece.log_weights, rtol=0, atol=1e-10)
    assert (result.tests["effect"] == "joint").sum() == 3
    assert np.all((result.tests["p_value"] > 0) & (result.tests["p_value"] <= 1))
