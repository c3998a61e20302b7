"""Tests of mcexact.design: validation, integer coding, collapsing and reduction of designs.

All data are invented for these tests.  Reference values are computed in the tests from first
principles (direct sums over the input rows, pandas groupby, exact fractions), never taken from
the code under test.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from mcexact._exceptions import DataError, McexactError
from mcexact.design import Design


@pytest.fixture
def frame() -> pd.DataFrame:
    """Twelve invented animals: a 0/1 outcome, a dose, a breed, a weight and a farm."""
    return pd.DataFrame(
        {
            "sick": [0, 1, 0, 1, 1, 0, 1, 0, 0, 1, 1, 0],
            "dose": [0, 1, 2, 0, 1, 2, 0, 1, 2, 0, 1, 2],
            "breed": list("abcabcabcaab"),
            "weight": [1.5, 0.25, 2.0, 1.5, 0.25, 2.0, 1.0, 3.5, 2.0, 1.0, 0.25, 4.0],
            "farm": ["f1", "f1", "f1", "f2", "f2", "f2", "f3", "f3", "f3", "f4", "f4", "f4"],
        },
        index=[f"animal{i}" for i in range(12)],
    )


@pytest.fixture
def binomial() -> pd.DataFrame:
    """Invented grouped data: events out of n at four doses in two labs."""
    return pd.DataFrame(
        {
            "dead": [0, 1, 3, 4, 1, 1, 2, 5],
            "n": [5, 5, 5, 5, 4, 4, 4, 6],
            "dose": [0, 1, 2, 3, 0, 1, 2, 3],
            "lab": ["L1"] * 4 + ["L2"] * 4,
        }
    )


def assert_data_error(excinfo: pytest.ExceptionInfo, column: str) -> None:
    """The error is a DataError whose message and `column` name the offending column."""
    assert isinstance(excinfo.value, DataError)
    assert isinstance(excinfo.value, McexactError)
    assert column in str(excinfo.value)
    assert excinfo.value.column == column


# ============================================================================ integer coding


def test_quarter_and_half_values_get_scale_100(frame):
    design = Design.from_formula(frame, "sick ~ dose + weight", interest="weight")
    # weight holds 0.25 and 1.5: 0.25 needs 10**2, so the whole column is scaled by 100.
    assert design.interest_scales.tolist() == [100.0]
    assert design.nuisance_scales.tolist() == [1.0]
    expected = sorted(set((frame["weight"] * 100).astype(int)))
    assert sorted(set(design.interest[:, 0].tolist())) == expected
    assert "column 'weight' scaled by 10**2 to make it integral" in design.notes


@pytest.mark.parametrize(
    ("values", "scale"),
    [([0, 1, 2, 3], 1.0), ([0.5, 1.0, 1.5, 0.0], 10.0), ([-0.125, 1.0, 2.0, 0.0], 1000.0),
     ([0.1, 0.2, 0.3, 0.7], 10.0)],
)
def test_scale_is_smallest_power_of_ten(values, scale):
    y = np.array([0, 1, 1, 0])
    design = Design.from_arrays(y, np.array(values))
    assert design.interest_scales.tolist() == [scale]
    # Reference: the coded values are the original values times the scale, rounded.
    assert sorted(design.interest[:, 0].tolist()) == sorted(round(v * scale) for v in values)


def test_not_integral_within_decimals_names_column_and_row(frame):
    frame.loc["animal7", "weight"] = 3.14159
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight", decimals=3)
    assert_data_error(excinfo, "weight")
    assert excinfo.value.row == "animal7"
    assert "animal7" in str(excinfo.value) and "decimals" in str(excinfo.value)


def test_more_decimals_allowed_makes_column_integral(frame):
    frame.loc["animal7", "weight"] = 3.14159
    design = Design.from_formula(frame, "sick ~ dose + weight", decimals=5)
    assert design.interest_scales[1] == 1e5


def test_overflow_bound():
    y = np.array([0, 1, 1, 0])
    # 2**52 = 4.5e15; these integral values times one trial each sum to 6e15.
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays(y, np.array([1e15, 2e15, 3e15, 0.0]), interest_names=["big"])
    assert_data_error(excinfo, "big")
    assert "2**52" in str(excinfo.value)


def test_overflow_bound_counts_trials():
    y = np.array([0, 1, 1, 0])
    x = np.array([1e14, 2e14, 3e14, 0.0])  # sum 6e14 is fine with one trial each
    Design.from_arrays(y, x)
    with pytest.raises(DataError) as excinfo:  # but not with ten trials each: 6e15 > 2**52
        Design.from_arrays(y, x, trials=np.full(4, 10), interest_names=["big"])
    assert_data_error(excinfo, "big")


# ============================================================================ collapsing


def test_collapse_matches_groupby(frame):
    design = Design.from_formula(frame, "sick ~ dose + breed")
    # Reference: pandas groupby over the covariate pattern.
    groups = frame.groupby(["dose", "breed"]).agg(events=("sick", "sum"), trials=("sick", "size"))
    assert design.n_groups == len(groups)
    got = {}
    names = design.interest_names
    for g in range(design.n_groups):
        row = dict(zip(names, design.interest[g].tolist()))
        breed = "b" if row["breed[T.b]"] else "c" if row["breed[T.c]"] else "a"
        got[(row["dose"], breed)] = (int(design.events[g]), int(design.trials[g]))
    expected = {key: (int(r.events), int(r.trials)) for key, r in groups.iterrows()}
    assert got == expected
    assert f"12 rows collapsed into {len(groups)} groups with identical stratum and covariates" \
        in design.notes


def test_collapse_keeps_strata_apart(binomial):
    doubled = pd.concat([binomial, binomial], ignore_index=True)
    design = Design.from_formula(doubled, "dead ~ dose", trials="n", strata="lab")
    # Reference: each (lab, dose) pair appears twice, so events and trials double.
    reference = doubled.groupby(["lab", "dose"])[["dead", "n"]].sum()
    assert design.n_groups == len(reference) == 8
    assert design.events.tolist() == reference["dead"].tolist()
    assert design.trials.tolist() == reference["n"].tolist()
    assert design.stratum.tolist() == [0, 0, 0, 0, 1, 1, 1, 1]
    assert design.stratum_labels == ("L1", "L2")


def test_binomial_equals_expanded_bernoulli(binomial):
    # Reference: expand each binomial row into `dead` ones and `n - dead` zeros.
    rows = []
    for r in binomial.itertuples():
        rows += [{"dead": 1, "dose": r.dose, "lab": r.lab}] * r.dead
        rows += [{"dead": 0, "dose": r.dose, "lab": r.lab}] * (r.n - r.dead)
    expanded = pd.DataFrame(rows)
    grouped = Design.from_formula(binomial, "dead ~ dose", trials="n", strata="lab")
    bernoulli = Design.from_formula(expanded, "dead ~ dose", strata="lab")
    for name in ["events", "trials", "stratum", "interest", "nuisance"]:
        np.testing.assert_array_equal(getattr(grouped, name), getattr(bernoulli, name))
    assert bernoulli.n_rows == binomial["n"].sum() and grouped.n_rows == len(binomial)


def test_groups_sorted_by_stratum():
    strata = np.array([3, 1, 2, 1, 3, 2, 1, 2])
    y = np.array([0, 1, 1, 0, 1, 0, 1, 0])
    x = np.array([1, 2, 3, 4, 5, 6, 7, 8])
    design = Design.from_arrays(y, x, strata=strata)
    assert np.all(np.diff(design.stratum) >= 0)
    assert design.stratum_labels == (1, 2, 3)
    # Reference: events per stratum counted directly from the rows.
    assert design.stratum_events.tolist() == [2, 1, 1]
    assert design.stratum_trials.tolist() == [3, 3, 2]


# ============================================================================ strata


def test_uninformative_strata_are_dropped_and_counted():
    # Invented matched sets: s2 is all events, s4 all non-events, s1 and s3 mixed.
    data = pd.DataFrame({
        "case": [1, 0, 0, 1, 1, 1, 0, 1, 0, 0, 0, 0],
        "smoker": [1, 0, 1, 1, 0, 1, 0, 1, 1, 0, 1, 0],
        "pair": ["s1", "s1", "s1", "s2", "s2", "s2", "s3", "s3", "s3", "s4", "s4", "s4"],
    })
    design = Design.from_formula(data, "case ~ smoker", strata="pair")
    assert design.n_dropped_strata == 2
    assert design.n_dropped_rows == 6
    assert design.n_rows == 12
    assert design.stratum_labels == ("s1", "s3")
    assert design.trials.sum() == 6
    assert "2 strata dropped: all events or all non-events (6 rows)" in design.notes
    assert design.fix_stratum_totals
    assert "intercept absorbed by the strata 'pair'" in design.notes


def test_no_strata_conventions(frame):
    design = Design.from_formula(frame, "sick ~ dose")
    assert design.stratum_labels == (None,)
    assert design.n_strata == 1
    assert design.strata_name is None and design.trials_name is None
    assert design.fix_stratum_totals
    assert design.stratum_events.tolist() == [frame["sick"].sum()]
    assert design.stratum_trials.tolist() == [len(frame)]
    assert np.all(design.stratum == 0)
    assert design.nuisance.shape == (design.n_groups, 0)


def test_no_intercept_no_strata_does_not_fix_totals(frame):
    design = Design.from_formula(frame, "sick ~ 0 + dose")
    assert not design.fix_stratum_totals
    assert design.nuisance_names == ()


def test_nuisance_constant_within_strata_is_dropped(frame):
    frame["farm_size"] = frame["farm"].map({"f1": 10, "f2": 20, "f3": 10, "f4": 30})
    design = Design.from_formula(frame, "sick ~ dose + farm_size", interest="dose", strata="farm")
    assert design.nuisance_names == ()
    assert design.nuisance.shape == (design.n_groups, 0)
    assert ("nuisance column 'farm_size' dropped: constant within every stratum "
            "(absorbed by the strata)") in design.notes


def test_nuisance_dependent_on_earlier_nuisance_is_dropped(frame):
    design = Design.from_formula(frame, "sick ~ dose + weight + I(2 * weight + 1)",
                                 interest="dose")
    assert design.nuisance_names == ("weight",)
    assert any("'I(2 * weight + 1)' dropped: a linear combination" in n for n in design.notes)


def test_nuisance_of_strata_indicators_is_dropped(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(farm)", interest="dose", strata="farm")
    assert design.nuisance_names == ()
    assert sum("dropped: constant within every stratum" in n for n in design.notes) == 3


# ============================================================================ effects


def test_categorical_interest_is_one_effect(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(breed) + weight",
                                 interest=["C(breed)", "dose"])
    # Effects follow the order of the formula's terms.
    assert design.effects == {"dose": (0,), "C(breed)": (1, 2)}
    assert design.interest_names == ("dose", "C(breed)[T.b]", "C(breed)[T.c]")
    assert design.nuisance_names == ("weight",)
    # Reference: the dummy columns are the indicators of breeds b and c, row by row.
    observed_b = int(((frame["breed"] == "b") & (frame["sick"] == 1)).sum())
    observed_c = int(((frame["breed"] == "c") & (frame["sick"] == 1)).sum())
    assert design.observed_interest[1:].tolist() == [observed_b, observed_c]


def test_default_interest_is_every_term_but_intercept(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(breed)")
    assert list(design.effects) == ["dose", "C(breed)"]
    assert design.nuisance_names == ()


def test_interest_term_spelling_is_normalised(frame):
    design = Design.from_formula(frame, "sick ~ dose + dose:weight", interest="weight:dose")
    assert list(design.effects) == ["dose:weight"]
    design = Design.from_formula(frame, "sick ~ dose + C(breed)", interest="C( breed )")
    assert list(design.effects) == ["C(breed)"]


def test_arrays_each_column_is_an_effect():
    y = np.array([0, 1, 1, 0, 1, 0])
    z = np.array([[0, 1], [1, 3], [2, 2], [0, 0], [1, 1], [2, 5]])
    design = Design.from_arrays(y, z, interest_names=["a", "b"])
    assert design.effects == {"a": (0,), "b": (1,)}
    default = Design.from_arrays(y, z)
    assert default.interest_names == ("z0", "z1")


def test_with_interest(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(breed) + weight",
                                 interest=["dose", "C(breed)", "weight"])
    sub = design.with_interest(["C(breed)"])
    assert sub.interest_names == ("C(breed)[T.b]", "C(breed)[T.c]")
    assert sub.effects == {"C(breed)": (0, 1)}
    assert sub.nuisance_names == ("dose", "weight")
    assert sub.nuisance_scales.tolist() == [1.0, 100.0]
    np.testing.assert_array_equal(sub.interest, design.interest[:, 1:3])
    np.testing.assert_array_equal(sub.nuisance, design.interest[:, [0, 3]])
    np.testing.assert_array_equal(sub.events, design.events)
    # The observed statistics are moved, not changed.
    assert sub.observed_interest.tolist() == design.observed_interest[1:3].tolist()
    assert sub.observed_nuisance.tolist() == design.observed_interest[[0, 3]].tolist()
    assert design.with_interest("weight").effects == {"weight": (0,)}
    assert design.interest.shape[1] == 4  # the original is unchanged


def test_with_interest_keeps_existing_nuisance_first(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(breed) + weight",
                                 interest=["dose", "C(breed)"])
    sub = design.with_interest("dose")
    assert sub.nuisance_names == ("weight", "C(breed)[T.b]", "C(breed)[T.c]")
    np.testing.assert_array_equal(sub.nuisance[:, 0], design.nuisance[:, 0])
    np.testing.assert_array_equal(sub.nuisance[:, 1:], design.interest[:, 1:])
    assert sub.nuisance_scales.tolist() == [100.0, 1.0, 1.0]


def test_with_interest_unknown_effect(frame):
    design = Design.from_formula(frame, "sick ~ dose + C(breed)")
    with pytest.raises(DataError) as excinfo:
        design.with_interest(["breed"])
    assert_data_error(excinfo, "breed")
    with pytest.raises(DataError):
        design.with_interest([])


# ============================================================================ observed statistics


def test_observed_statistics_equal_direct_sums(frame):
    design = Design.from_formula(frame, "sick ~ dose + weight + C(breed)",
                                 interest=["weight", "C(breed)"])
    # Reference: Z'y and W'y over the uncollapsed rows, times each column's scale.
    y = frame["sick"].to_numpy()
    assert design.observed_interest[0] == round((frame["weight"] * y).sum() * 100)
    assert design.observed_interest[1] == ((frame["breed"] == "b") * y).sum()
    assert design.observed_nuisance.tolist() == [(frame["dose"] * y).sum()]
    assert design.observed_interest.dtype == np.int64


def test_observed_statistics_after_dropping_strata(binomial):
    binomial.loc[binomial["lab"] == "L2", "dead"] = 0  # lab L2 becomes uninformative
    design = Design.from_formula(binomial, "dead ~ dose", trials="n", strata="lab")
    kept = binomial[binomial["lab"] == "L1"]
    assert design.observed_interest.tolist() == [(kept["dose"] * kept["dead"]).sum()]
    assert design.n_dropped_strata == 1 and design.n_dropped_rows == 4


def test_formula_and_arrays_agree(frame):
    from_formula = Design.from_formula(frame, "sick ~ weight + dose", interest="weight",
                                       strata="farm")
    from_arrays = Design.from_arrays(frame["sick"].to_numpy(), frame["weight"].to_numpy(),
                                     frame["dose"].to_numpy(), strata=frame["farm"].to_numpy(),
                                     interest_names=["weight"], nuisance_names=["dose"])
    for name in ["events", "trials", "stratum", "interest", "nuisance", "interest_scales",
                 "nuisance_scales"]:
        np.testing.assert_array_equal(getattr(from_formula, name), getattr(from_arrays, name))
    for name in ["fix_stratum_totals", "interest_names", "nuisance_names", "effects",
                 "stratum_labels", "n_rows", "n_dropped_strata", "n_dropped_rows"]:
        assert getattr(from_formula, name) == getattr(from_arrays, name)
    assert [n.replace("'farm'", "'strata'") for n in from_formula.notes] == list(from_arrays.notes)


def test_arrays_are_read_only(frame):
    design = Design.from_formula(frame, "sick ~ dose")
    with pytest.raises(ValueError):
        design.events[0] = 5
    with pytest.raises(AttributeError):
        design.events = np.zeros(3)


def test_bool_response_is_accepted(frame):
    as_bool = frame.assign(sick=frame["sick"].astype(bool))
    a = Design.from_formula(as_bool, "sick ~ dose")
    b = Design.from_formula(frame, "sick ~ dose")
    np.testing.assert_array_equal(a.events, b.events)


def test_response_expression_is_used(frame):
    frame["score"] = [0, 3, 1, 4, 5, 0, 2, 1, 0, 6, 3, 1]
    design = Design.from_formula(frame, "I(score > 1) ~ dose")
    assert design.response_name == "I(score > 1)"
    assert design.events.sum() == (frame["score"] > 1).sum()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_observed_interest_property(data):
    n = data.draw(st.integers(2, 12), label="n")
    quarters = data.draw(st.lists(st.integers(-8, 8), min_size=n, max_size=n), label="x*4")
    y = data.draw(st.lists(st.integers(0, 1), min_size=n, max_size=n), label="y")
    use_strata = data.draw(st.booleans(), label="strata")
    strata = data.draw(st.lists(st.sampled_from("abc"), min_size=n, max_size=n), label="s")
    x = [Fraction(q, 4) for q in quarters]
    frame = pd.DataFrame({"y": y, "x": [float(v) for v in x], "s": strata})
    # Reference, by first principles: informative strata hold both outcomes; the scale is the
    # smallest power of ten clearing every denominator of the exact fractions.
    groups = frame.groupby("s") if use_strata else [("all", frame)]
    kept = [g for _, g in groups if 0 < g["y"].sum() < len(g)]
    assume(0 < sum(y) < n and kept)
    assume(any(g["x"].nunique() > 1 for g in kept))
    kept_rows = pd.concat(kept).index
    scale = next(10**k for k in range(4) if all((v * 10**k).denominator == 1 for v in x))
    design = Design.from_formula(frame, "y ~ x", strata="s" if use_strata else None)
    expected = sum(x[i] * y[i] for i in kept_rows) * scale
    assert design.interest_scales.tolist() == [scale]
    assert design.observed_interest.tolist() == [int(expected)]
    assert design.trials.sum() == len(kept_rows)


# ============================================================================ errors: values


def test_missing_covariate(frame):
    frame.loc["animal3", "weight"] = np.nan
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight")
    assert_data_error(excinfo, "weight")
    assert excinfo.value.row == "animal3"


def test_missing_in_hidden_transform_variable(frame):
    # center() hides its argument from the parsed formula; the check must still see it.
    frame.loc["animal5", "weight"] = np.nan
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + center(weight)")
    assert_data_error(excinfo, "weight")
    assert excinfo.value.row == "animal5"


def test_missing_categorical(frame):
    frame["breed"] = frame["breed"].astype(object)
    frame.loc["animal2", "breed"] = None
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + C(breed)")
    assert_data_error(excinfo, "breed")


def test_missing_response(frame):
    frame["sick"] = frame["sick"].astype(object)
    frame.loc["animal4", "sick"] = None
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose")
    assert_data_error(excinfo, "sick")
    assert excinfo.value.row == "animal4"


def test_missing_trials(binomial):
    binomial.loc[2, "n"] = np.nan
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, "n")
    assert excinfo.value.row == 2


def test_missing_strata(frame):
    frame.loc["animal9", "farm"] = None
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose", strata="farm")
    assert_data_error(excinfo, "farm")
    assert excinfo.value.row == "animal9"


def test_missing_in_arrays():
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], [1.0, np.nan, 2.0, 3.0], interest_names=["dose"])
    assert_data_error(excinfo, "dose")
    assert excinfo.value.row == 1


def test_mixed_numbers_and_strings_in_response(frame):
    frame["sick"] = pd.Series([0, 1, 0, 1, "yes", 0, 1, 0, 0, 1, 1, 0], index=frame.index,
                              dtype=object)
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose")
    assert_data_error(excinfo, "sick")
    assert excinfo.value.row == "animal4"


def test_mixed_numbers_and_strings_in_trials(binomial):
    binomial["n"] = pd.Series([5, 5, "five", 5, 4, 4, 4, 6], dtype=object)
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, "n")
    assert excinfo.value.row == 2


def test_mixed_numbers_and_strings_in_covariate(frame):
    frame["weight"] = frame["weight"].astype(object)
    frame.loc["animal6", "weight"] = "n/a"
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight")
    assert_data_error(excinfo, "weight")


def test_string_response(frame):
    frame["sick"] = np.where(frame["sick"] == 1, "yes", "no")
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose")
    assert_data_error(excinfo, "sick")
    assert "non-numeric" in str(excinfo.value)


def test_non_numeric_array_column():
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], np.array([1, 2, "x", 4], dtype=object),
                           interest_names=["dose"])
    assert_data_error(excinfo, "dose")
    assert excinfo.value.row == 2


def test_infinite_value(frame):
    frame.loc["animal1", "weight"] = np.inf
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight")
    assert_data_error(excinfo, "weight")
    assert excinfo.value.row == "animal1"


def test_infinite_value_from_transform(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ np.log(dose)")
    assert_data_error(excinfo, "np.log(dose)")


def test_response_outside_zero_one(frame):
    frame.loc["animal8", "sick"] = 2
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose")
    assert_data_error(excinfo, "sick")
    assert excinfo.value.row == "animal8"
    assert "trials" in str(excinfo.value)


def test_events_exceed_trials(binomial):
    binomial.loc[3, "dead"] = 6
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, "dead")
    assert excinfo.value.row == 3


@pytest.mark.parametrize(("column", "value", "problem"),
                         [("dead", -1, "negative"), ("dead", 1.5, "non-integer"),
                          ("n", -2, "negative"), ("n", 4.5, "non-integer")])
def test_bad_counts(binomial, column, value, problem):
    binomial[column] = binomial[column].astype(float)
    binomial.loc[1, column] = value
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, column)
    assert problem in str(excinfo.value)
    assert excinfo.value.row == 1


def test_zero_trials_is_an_error(binomial):
    binomial.loc[5, ["dead", "n"]] = 0
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, "n")
    assert excinfo.value.row == 5


# ============================================================================ errors: specification


def test_unknown_formula_column(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + height")
    assert_data_error(excinfo, "height")


def test_unknown_response_column(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "dead ~ dose")
    assert_data_error(excinfo, "dead")


@pytest.mark.parametrize("role", ["strata", "trials"])
def test_unknown_strata_or_trials_column(frame, role):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose", **{role: "litter"})
    assert_data_error(excinfo, "litter")


def test_interest_not_in_formula(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight", interest=["breed"])
    assert_data_error(excinfo, "breed")


@pytest.mark.parametrize("name", ["1", "Intercept"])
def test_interest_is_intercept(frame, name):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose", interest=[name])
    assert_data_error(excinfo, name)
    assert "intercept" in str(excinfo.value)


def test_formula_with_only_intercept(frame):
    with pytest.raises(DataError, match="nothing to test"):
        Design.from_formula(frame, "sick ~ 1")


def test_interest_constant(frame):
    frame["one_dose"] = 3
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ one_dose + dose", interest="one_dose")
    assert_data_error(excinfo, "one_dose")
    assert "constant" in str(excinfo.value)


def test_interest_constant_without_intercept(frame):
    frame["one_dose"] = 3
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ 0 + one_dose")
    assert_data_error(excinfo, "one_dose")


def test_interest_constant_within_strata(frame):
    frame["farm_size"] = frame["farm"].map({"f1": 10, "f2": 20, "f3": 10, "f4": 30})
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ farm_size + dose", interest="farm_size",
                            strata="farm")
    assert_data_error(excinfo, "farm_size")
    assert "stratum" in str(excinfo.value)


def test_interest_collinear_with_nuisance_and_intercept(frame):
    frame["dose_mg"] = 2 * frame["dose"] + 5
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose_mg + dose", interest="dose_mg")
    assert_data_error(excinfo, "dose_mg")
    assert "linear combination" in str(excinfo.value)


def test_interest_collinear_with_nuisance_and_strata(frame):
    # total = dose + a farm-level constant: a combination of the nuisance dose and the strata.
    frame["total"] = frame["dose"] + frame["farm"].map({"f1": 1, "f2": 7, "f3": 2, "f4": 0})
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ total + dose", interest="total", strata="farm")
    assert_data_error(excinfo, "total")
    assert "strata" in str(excinfo.value)


def test_interest_collinear_among_themselves(frame):
    frame["both"] = frame["dose"] + 4 * frame["weight"]
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + weight + both")
    assert_data_error(excinfo, "both")
    assert "'dose', 'weight'" in str(excinfo.value)


def test_no_events(frame):
    frame["sick"] = 0
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose")
    assert_data_error(excinfo, "sick")
    assert "no events" in str(excinfo.value)


def test_no_non_events(binomial):
    binomial["dead"] = binomial["n"]
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(binomial, "dead ~ dose", trials="n")
    assert_data_error(excinfo, "dead")
    assert "no non-events" in str(excinfo.value)


def test_empty_data(frame):
    with pytest.raises(DataError, match="no rows"):
        Design.from_formula(frame.iloc[:0], "sick ~ dose")
    with pytest.raises(DataError, match="no rows"):
        Design.from_arrays(np.array([], dtype=int), np.array([]))


def test_every_stratum_uninformative(frame):
    frame["sick"] = frame["farm"].map({"f1": 1, "f2": 0, "f3": 1, "f4": 0})
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose", strata="farm")
    assert_data_error(excinfo, "farm")
    assert "every stratum" in str(excinfo.value)


def test_formula_without_response(frame):
    with pytest.raises(DataError, match="no response"):
        Design.from_formula(frame, "~ dose")


def test_response_not_single_column(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick + dose ~ weight")
    assert_data_error(excinfo, "sick + dose")


def test_response_expression_with_several_columns(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "C(breed) ~ dose")
    assert_data_error(excinfo, "C(breed)")
    assert "single column" in str(excinfo.value)


def test_formula_syntax_error_is_wrapped(frame):
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ (dose")
    assert "sick ~ (dose" in str(excinfo.value)
    assert excinfo.value.__cause__ is not None  # formulaic's own error is kept as the cause


def test_formula_evaluation_error_is_wrapped(frame):
    with pytest.raises(DataError, match="formulaic could not build"):
        Design.from_formula(frame, "sick ~ dose + np.no_such_function(weight)")


def test_multi_part_formula(frame):
    with pytest.raises(DataError, match="right-hand"):
        Design.from_formula(frame, "sick ~ dose | weight")


def test_local_names_are_not_looked_up(frame):
    # 'data' is a local variable inside the constructor; it must not leak into the formula.
    with pytest.raises(DataError) as excinfo:
        Design.from_formula(frame, "sick ~ dose + data")
    assert_data_error(excinfo, "data")


@pytest.mark.parametrize("decimals", [-1, 1.5, True])
def test_bad_decimals(frame, decimals):
    with pytest.raises(DataError, match="decimals"):
        Design.from_formula(frame, "sick ~ dose", decimals=decimals)


def test_array_shape_mismatch():
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], [1, 2, 3])
    assert_data_error(excinfo, "interest")
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], [1, 2, 3, 4], strata=[1, 2])
    assert_data_error(excinfo, "strata")
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], [1, 2, 3, 4], interest_names=["a", "b"])
    assert_data_error(excinfo, "interest")


def test_duplicate_array_names():
    with pytest.raises(DataError) as excinfo:
        Design.from_arrays([0, 1, 1, 0], [1, 2, 3, 4], [0, 1, 0, 0], interest_names=["a"],
                           nuisance_names=["a"])
    assert_data_error(excinfo, "a")


def test_builtin_functions_are_not_columns(frame):
    # abs is called, not read as a column; the check for unknown columns must allow it.
    design = Design.from_formula(frame.assign(dose=frame["dose"] - 1), "sick ~ abs(dose)")
    assert design.interest_names == ("abs(dose)",)
    assert sorted(set(design.interest[:, 0].tolist())) == [0, 1]
