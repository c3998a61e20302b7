"""Tests of the invented demo data sets (mcexact.demo) and of the generator of the sparse one.

References, named beside each check: the columns and figures that ``mcexact.demo``'s docstring
states (recounted from the data with pandas); the shipped CSV's bytes (against a fresh run of
``benchmarks/make_demo_data.py``); the engines the docstring names (against ``mcexact.plan``);
Monte Carlo p-values and estimates on a few centres (against the package's exact engine, within
4 Monte Carlo standard errors). The data are the package's own invented demo data.
"""

from __future__ import annotations

import re
import subprocess
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import mcexact
from mcexact import BudgetExceeded, Design, demo

GENERATOR = Path(__file__).resolve().parents[1] / "benchmarks" / "make_demo_data.py"

# Column name -> kind, as the module docstring of mcexact.demo describes them.
COLUMNS = {
    "small": {"patient": "text", "site": "text", "dose_mg": "int", "age": "int",
              "weight_kg": "float", "elevation": "int"},
    "sparse": {"child": "text", "centre": "text", "age": "int", "dose_mg_kg": "float",
               "comed": "int", "rash": "int"},
}
KIND_CHECKS = {"text": pd.api.types.is_string_dtype, "int": pd.api.types.is_integer_dtype,
               "float": pd.api.types.is_float_dtype}


def documented_engines(name: str) -> dict:
    """Part -> engine from the docstring's list ``- part = engine (...)`` for demo `name`."""
    text = demo.__doc__.split(f"``{name}``:", 1)[1]
    return dict(re.findall(r"^- (\w+) = (exact|direct|mcmc)\b", text, flags=re.M))


def number(pattern: str) -> int:
    """The integer that `pattern`'s group matches in the docstring (commas allowed)."""
    match = re.search(pattern, " ".join(demo.__doc__.split()))
    assert match, f"the demo docstring no longer says {pattern!r}"
    return int(match.group(1).replace(",", ""))


def engine_of(p) -> str:
    """The engine method="auto" picks for a plan (mcexact.fit's rule, as documented)."""
    return "exact" if p.fits_full else "direct" if p.fits_nuisance else "mcmc"


def part_designs(name: str, data: pd.DataFrame | None = None) -> dict:
    """Part name -> the design of that part of demo `name` (on `data`, default all of it)."""
    _, formula, options = demo.DEMOS[name]
    data = demo.load_demo(name) if data is None else data
    design = Design.from_formula(data, formula, strata=options["strata"],
                                 interest=options["interest"])
    parts = {effect: design.with_interest([effect]) for effect in design.effects}
    parts["joint"] = design
    return parts


@pytest.fixture(scope="module")
def sparse():
    return demo.load_demo("sparse")


@pytest.mark.parametrize("name", ["small", "sparse"])
def test_demos_load_with_the_documented_columns_and_dtypes(name):
    frame = demo.load_demo(name)
    assert list(frame.columns) == list(COLUMNS[name])
    for column, kind in COLUMNS[name].items():
        assert KIND_CHECKS[kind](frame[column]), f"{name}.{column} is {frame[column].dtype}"
        assert column in demo.__doc__
    assert not frame.isna().any().any()
    assert resources.files("mcexact").joinpath("data", demo.DEMOS[name][0]).is_file()
    formula = demo.DEMOS[name][1]
    used = set(re.findall(r"\w+", formula))
    assert used <= set(frame.columns)


def test_small_demo_figures_match_the_docstring():
    frame = demo.load_demo("small")
    assert len(frame) == number(r"(\d+) patients")
    assert frame["elevation"].sum() == number(r"\((\d+) events")
    assert frame.loc[frame["dose_mg"] == frame["dose_mg"].min(), "elevation"].sum() == 0


def test_sparse_demo_figures_match_the_docstring(sparse):
    # Each figure the docstring states, recounted with pandas.
    per_centre = sparse.groupby("centre")["rash"].sum()
    assert len(sparse) == number(r"([\d,]+) children at")
    assert sparse["centre"].nunique() == number(r"children at (\d+) centres")
    assert sparse["rash"].sum() == number(r"of whom (\d+) had")
    assert sparse["comed"].sum() == number(r"(\d+) children were co-medicated")
    assert sparse.loc[sparse["comed"] == 1, "rash"].sum() == number(r"co-medicated, (\d+) of")
    assert (per_centre == 0).sum() == number(r"(\d+) centres saw no rash")
    assert per_centre[per_centre > 0].min() == number(r"others between (\d+) and")
    assert per_centre.max() == number(r"others between \d+ and (\d+)")
    assert sorted(sparse["centre"].unique()) == [f"H{i:02d}" for i in range(1, 31)]
    assert sparse["age"].between(1, 17).all()
    table = [1.2, 2.5, 3.8, 5.0, 6.2, 7.5, 8.8, 10.0]
    assert set(sparse["dose_mg_kg"]) <= set(table)
    for value in table:
        assert f"{value:.1f}" in demo.__doc__
    assert set(sparse["comed"]) == {0, 1} and set(sparse["rash"]) == {0, 1}
    assert sparse["child"].is_unique


def test_generator_reproduces_the_shipped_csv_byte_for_byte(tmp_path):
    out = tmp_path / "again.csv"
    done = subprocess.run([sys.executable, str(GENERATOR), "--out", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    shipped = resources.files("mcexact").joinpath("data", demo.DEMOS["sparse"][0]).read_bytes()
    assert out.read_bytes() == shipped
    assert list(tmp_path.iterdir()) == [out]             # no temporary file left behind


def test_small_demo_is_exact_in_every_part():
    # The docstring: "Every part is enumerated exactly".
    for part, design in part_designs("small").items():
        assert engine_of(mcexact.plan(design)) == "exact", part


def test_sparse_plans_pick_the_documented_engines():
    expected = documented_engines("sparse")
    assert expected == {"dose_mg_kg": "direct", "comed": "mcmc", "joint": "direct"}
    for part, design in part_designs("sparse").items():
        p = mcexact.plan(design)
        assert p.max_nodes == mcexact.DEFAULT_MAX_NODES
        assert engine_of(p) == expected[part], (part, p.reason)
        assert not p.fits_full


@pytest.fixture(scope="module")
def quick_fit(sparse):
    _, formula, options = demo.DEMOS["sparse"]
    # Tilted refinement and the ordinary fit are left out: they change nothing checked here.
    return mcexact.fit(sparse, formula, **{**options, "n_draws": 2000}, rng=20240611,
                       tilted=False, asymptotic=False)


def test_sparse_fit_is_monte_carlo_where_exact_is_unavailable(sparse, quick_fit):
    expected = documented_engines("sparse")
    parts = quick_fit.method["parts"]
    assert {part: info["engine"] for part, info in parts.items()} == expected
    for part, info in parts.items():
        assert info["plan"]["fits_full"] is False, part       # no exact counterpart
        assert info["n_draws"] == 2000
    engines = quick_fit.tests.groupby("effect")["engine"].unique()
    for part, engine in expected.items():
        assert list(engines[part]) == [engine]
    assert (quick_fit.estimates["engine"] != "exact").all()
    score = quick_fit.tests[quick_fit.tests["test"] == "score"]
    assert score["p_value"].between(0, 1).all()
    assert (score["mcse"] > 0).all() and np.isfinite(score["mcse"]).all()
    # Asking for the exact answer under the default budget is refused, naming the budget.
    _, formula, options = demo.DEMOS["sparse"]
    with pytest.raises(BudgetExceeded, match="does not fit"):
        mcexact.fit(sparse, formula, strata=options["strata"], interest=options["interest"],
                    method="enumerate", asymptotic=False)


@pytest.fixture(scope="module")
def few_centres(sparse):
    """The first five centres with a rash: small enough to enumerate every part exactly."""
    per_centre = sparse.groupby("centre")["rash"].sum()
    keep = list(per_centre[per_centre > 0].index[:5])
    return part_designs("sparse", sparse[sparse["centre"].isin(keep)])


def within_four_mcse(exact: pd.DataFrame, mc: pd.DataFrame, columns) -> int:
    """Assert every Monte Carlo value with a finite, positive error lies within 4 errors of the
    exact value; return how many were compared."""
    compared = 0
    for (_, e), (_, m) in zip(exact.iterrows(), mc.iterrows()):
        for value, error in columns:
            if np.isfinite(m[error]) and m[error] > 0 and np.isfinite(e[value]):
                assert abs(m[value] - e[value]) <= 4 * m[error], (value, e[value], m[value],
                                                                   m[error])
                compared += 1
    return compared


@pytest.mark.parametrize("part, engine", [("dose_mg_kg", "direct"), ("comed", "mcmc")])
def test_monte_carlo_agrees_with_exact_on_a_few_centres(few_centres, part, engine):
    design = few_centres[part]
    assert engine_of(mcexact.plan(design)) == "exact"
    _, _, options = demo.DEMOS["sparse"]
    chain_options = {k: options[k] for k in ("thin", "block_size")}
    exact = mcexact.fit(design, method="enumerate", asymptotic=False)
    mc = mcexact.fit(design, method=engine, asymptotic=False, n_draws=20_000, rng=1,
                     **chain_options)
    assert set(mc.tests["engine"]) == {engine}
    tests = within_four_mcse(exact.tests, mc.tests, [("p_value", "mcse"),
                                                     ("mid_p_value", "mcse_mid_p")])
    assert tests >= 2                                   # at least the score test's two values
    assert within_four_mcse(exact.estimates, mc.estimates, [("p_value", "mcse_p_value")]) == 1
    if engine == "direct":
        # Independent draws: the estimate and limits agree too. (The Markov chains' limits are
        # not checked: on these centres their errors were seen to understate the spread.)
        assert within_four_mcse(exact.estimates, mc.estimates,
                                [("estimate", "mcse"), ("ci_lower", "mcse_ci_lower"),
                                 ("ci_upper", "mcse_ci_upper")]) == 3
