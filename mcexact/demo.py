"""Invented demonstration data shipped with mcexact.

``small``: a three-site dose-escalation study of an invented anti-inflammatory compound, 48
patients, outcome a grade-2-or-worse liver-enzyme elevation within 28 days (7 events, none at the
lowest dose). Columns: ``patient, site, dose_mg, age, weight_kg, elevation``. The data were
simulated for this package and describe no real study.
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
}


def load_demo(name: str = "small") -> pd.DataFrame:
    """The demo data set `name` as a data frame (see the module docstring)."""
    if name not in DEMOS:
        raise DataError(f"unknown demo {name!r}; demos are {', '.join(DEMOS)}")
    with resources.files("mcexact").joinpath("data", DEMOS[name][0]).open("r") as fh:
        return pd.read_csv(fh)
