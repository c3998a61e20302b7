"""Invented demonstration data shipped with mcexact.

Both data sets were simulated for this package and describe no real study, medicine, patient or
centre.

``small``: a three-site dose-escalation study of an invented anti-inflammatory compound, 48
patients, outcome a grade-2-or-worse liver-enzyme elevation within 28 days (7 events, none at the
lowest dose). Columns: ``patient, site, dose_mg, age, weight_kg, elevation``. Every part is
enumerated exactly, in well under a second.

``sparse``: a paediatric safety registry of an invented anti-seizure medicine: 1,355 children at
30 centres, of whom 54 had a serious skin reaction (a rash needing hospital care) within 12 weeks
of starting; 98 children were co-medicated, 10 of them with a rash; 7 centres saw no rash at all
and the others between 1 and 7. Made by ``benchmarks/make_demo_data.py`` (fixed seed). Columns:

- ``child``: identifier (text);
- ``centre``: centre code ``H01`` to ``H30`` (text; the strata);
- ``age``: age in whole years at the start, 1 to 17 (integer; the nuisance covariate);
- ``dose_mg_kg``: maintenance dose in mg/kg/day, from the protocol's titration table in steps of
  1.25 mg/kg/day as printed to one decimal: 1.2, 2.5, 3.8, 5.0, 6.2, 7.5, 8.8 or 10.0 (float);
- ``comed``: 1 if the child also took a medicine of an (invented) enzyme-inhibiting class, else 0;
- ``rash``: 1 if the reaction occurred, else 0 (the response).

The analysis (``rash ~ dose_mg_kg + comed + age`` with strata ``centre``) is too large to
enumerate under the default node budget (``mcexact.DEFAULT_MAX_NODES``), and ``method="auto"``
uses, part by part (as ``mcexact.plan`` predicts):

- dose_mg_kg = direct (its nuisance network of age and co-medication fits, about 5.3 million
  nodes, but the full network is estimated at up to 45 million nodes in its largest stage);
- comed = mcmc (with the fine dose among its nuisance terms even the nuisance network is over
  the budget, so Markov chains are run, thinned 50-fold with block moves of 16 groups);
- joint = direct (nuisance network of age alone, about 0.55 million nodes; full network
  estimated at up to 127 million nodes in its largest stage).

The ordinary logistic fit is dubious here (and says so): one intercept per centre estimated from
one to seven events, every expected count below five, and the co-medication effect resting on 10
events; its co-medication p-values come out smaller than the conditional ones. The Markov chains
for ``comed`` trade events between centres through block moves that span two centres, and start
from dispersed points so that chains that do not mix disagree and are flagged; the observed
co-medication count lies far in the upper tail, so read the diagnostics before quoting that part.
"""

from __future__ import annotations

from importlib import resources

import pandas as pd

from mcexact._exceptions import DataError

__all__ = ["load_demo", "DEMOS"]

#: Demo name -> (file, formula, options) of the analysis the demo runs.
DEMOS = {
    "small": ("liver_small.csv", "elevation ~ dose_mg + age", {"strata": "site",
                                                               "interest": ["dose_mg", "age"]}),
    "sparse": ("rash_registry.csv", "rash ~ dose_mg_kg + comed + age",
               {"strata": "centre", "interest": ["dose_mg_kg", "comed"], "n_draws": 10_000,
                "thin": 50, "block_size": 16}),
}


def load_demo(name: str = "small") -> pd.DataFrame:
    """The demo data set `name` as a data frame (see the module docstring)."""
    if name not in DEMOS:
        raise DataError(f"unknown demo {name!r}; demos are {', '.join(DEMOS)}")
    with resources.files("mcexact").joinpath("data", DEMOS[name][0]).open("r") as fh:
        return pd.read_csv(fh)
