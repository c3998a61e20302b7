"""The JSON Schema of fit results (``mcexact/schemas/fit-1.schema.json``) describes what
``FitResult.to_dict`` writes.

Reference: the ``jsonschema`` package's Draft 2020-12 validator (outside the project), applied to
the documents of exact, direct, Markov chain, multi-effect, degenerate and no-asymptotic fits of
invented data (seeded numpy generators, or the package's own invented demo data), and to broken
copies of them, which it must reject.
"""

from __future__ import annotations

import copy
import json
from importlib import resources

import numpy as np
import pandas as pd
import pytest

jsonschema = pytest.importorskip("jsonschema")

import mcexact  # noqa: E402

SCHEMA_FILE = ("schemas", "fit-1.schema.json")


@pytest.fixture(scope="module")
def schema():
    return json.loads(resources.files("mcexact").joinpath(*SCHEMA_FILE).read_text("utf-8"))


@pytest.fixture(scope="module")
def validator(schema):
    return jsonschema.Draft202012Validator(schema)


def invented_frame(seed: int = 5, n: int = 14) -> pd.DataFrame:
    """Binary response, a dose in 0.5 steps, a three-level group and an integer age."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"y": rng.integers(0, 2, n), "dose": rng.integers(0, 7, n) * 0.5,
                         "grp": rng.choice(["a", "b", "c"], n), "age": rng.integers(20, 26, n)})


def documents():
    """name -> the to_dict() of one kind of result (JSON round trip, as a reader sees it)."""
    small = mcexact.load_demo("small")
    formula, strata = "elevation ~ dose_mg + age", "site"
    # Invented: every exposed row is an event, so T is at the top of its support (infinite CMLE
    # and upper limit) and the ordinary fit meets separation.
    edge = pd.DataFrame({"y": [1, 1, 1, 0, 1, 0, 0, 0, 1, 0], "x": [1, 1, 1, 0, 0, 0, 0, 0, 0, 0]})
    # Invented (as in tests/test_fit.py): given T2 = 2, T1 is forced: a degenerate effect.
    forced = pd.DataFrame({"y": [1, 1, 0, 0, 0, 0, 0], "z1": [1, 1, 1, 0, 1, 0, 1],
                           "z2": [1, 1, 1, 0, 0, 0, 0]})
    fits = {
        "exact": lambda: mcexact.fit(small, formula, strata=strata),
        "direct": lambda: mcexact.fit(small, formula, strata=strata, method="direct",
                                      n_draws=1000, rng=3),
        "mcmc": lambda: mcexact.fit(small, formula, strata=strata, interest="dose_mg",
                                    method="mcmc", n_draws=2000, rng=np.random.SeedSequence(4)),
        "mcmc_rounds": lambda: mcexact.fit(small, formula, strata=strata, interest="age",
                                           method="mcmc", n_draws=400, target_mcse=0.01,
                                           max_draws=800, rng=np.random.default_rng(5),
                                           progress=False),
        "multi_effect": lambda: mcexact.fit(invented_frame(), "y ~ dose + C(grp) + age",
                                            interest=["dose", "C(grp)"]),
        "edge": lambda: mcexact.fit(edge, "y ~ x"),
        "degenerate": lambda: mcexact.fit(forced, "y ~ z1 + z2"),
        "no_asymptotic": lambda: mcexact.fit(small, formula, strata=strata, asymptotic=False),
        "no_rng": lambda: mcexact.fit(small, formula, strata=strata, method="direct",
                                      n_draws=200, asymptotic=False, tilted=False),
    }
    return {name: json.loads(json.dumps(make().to_dict(), allow_nan=False))
            for name, make in fits.items()}


@pytest.fixture(scope="module")
def docs():
    return documents()


def errors(validator, document) -> list:
    return sorted(validator.iter_errors(document), key=lambda e: list(e.absolute_path))


def test_schema_ships_with_the_package_and_is_valid_draft_2020_12(schema):
    assert resources.files("mcexact").joinpath(*SCHEMA_FILE).is_file()
    jsonschema.Draft202012Validator.check_schema(schema)
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert schema["properties"]["schema"]["const"] == "mcexact.fit"
    assert schema["properties"]["schema_version"]["const"] == 1


def test_every_property_is_described(schema):
    missing = []

    def walk(node, where):
        if isinstance(node, dict):
            for name, sub in node.get("properties", {}).items():
                if "description" not in sub and "$ref" not in sub:
                    missing.append(f"{where}/{name}")
                if "$ref" in sub and "description" not in sub:
                    target = schema["$defs"][sub["$ref"].rsplit("/", 1)[1]]
                    if "description" not in target:
                        missing.append(f"{where}/{name}")
            for key, sub in node.items():
                walk(sub, f"{where}/{key}")
        elif isinstance(node, list):
            for i, sub in enumerate(node):
                walk(sub, f"{where}/{i}")

    walk(schema, "#")
    assert missing == []


@pytest.mark.parametrize("name", ["exact", "direct", "mcmc", "mcmc_rounds", "multi_effect",
                                  "edge", "degenerate", "no_asymptotic", "no_rng"])
def test_results_validate(validator, docs, name):
    assert [e.message for e in errors(validator, docs[name])] == []


def test_the_documents_cover_the_special_values(docs):
    """The documents validated above hold what the schema must describe (else the validation
    would prove little): each engine, infinities as strings, NaN as null, no asymptotic part, a
    missing joint estimate, separation, a degenerate estimate and an rng of each kind."""
    engines = {row["engine"] for d in docs.values() for row in d["tests"]}
    assert engines == {"exact", "direct", "mcmc"}
    edge = docs["edge"]["estimates"][0]
    assert edge["ci_upper"] == "inf" and edge["cmle"] == "inf"
    assert docs["exact"]["tests"][0]["ess"] is None
    assert docs["no_asymptotic"]["asymptotic"] is None
    assert docs["edge"]["joint_estimate"] is None
    assert docs["edge"]["asymptotic"]["separation"]["status"] != "overlap"
    assert {r["kind"] for r in docs["degenerate"]["estimates"]} >= {"none"}
    assert len(docs["multi_effect"]["design"]["effects"]["C(grp)"]) == 2
    kinds = {d["method"]["rng"]["kind"] for d in docs.values()}
    assert {"int", "SeedSequence", "Generator"} <= kinds
    assert any(p.get("move") == "block" for p in docs["mcmc"]["method"]["parts"].values())
    assert any("target" in p.get("stopped", "") or "limit" in p.get("stopped", "")
               for p in docs["mcmc_rounds"]["method"]["parts"].values())


def broken(document, change):
    out = copy.deepcopy(document)
    change(out)
    return out


BREAKS = {
    "missing top-level field": lambda d: d.pop("tests"),
    "missing row field": lambda d: d["tests"][0].pop("p_value"),
    "missing design field": lambda d: d["design"].pop("n_strata"),
    "wrong schema_version": lambda d: d.update(schema_version=2),
    "wrong schema name": lambda d: d.update(schema="mcexact.other"),
    "p-value as text": lambda d: d["tests"][0].update(p_value="0.5"),
    "count as float": lambda d: d["design"].update(n_rows=48.5),
    "infinity misspelt": lambda d: d["estimates"][0].update(ci_upper="Infinity"),
    "unknown engine": lambda d: d["tests"][0].update(engine="bootstrap"),
    "unknown test": lambda d: d["tests"][0].update(test="wald"),
    "unknown kind": lambda d: d["estimates"][0].update(kind="mle"),
    "undocumented field": lambda d: d["estimates"][0].update(extra=1),
    "alpha out of range": lambda d: d.update(alpha=1.5),
    "notes not a list": lambda d: d.update(notes="none"),
}


@pytest.mark.parametrize("what", list(BREAKS))
def test_broken_documents_fail(validator, docs, what):
    document = docs["direct"]
    assert errors(validator, document) == []
    assert errors(validator, broken(document, BREAKS[what])) != []
