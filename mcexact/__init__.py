"""mcexact: exact and Monte Carlo conditional inference for logistic regression.

For small, sparse or separated binary data, where ordinary logistic regression misleads, mcexact
computes the distribution of the sufficient statistics of the terms of interest given those of the
nuisance terms: exactly by the network algorithm where that is feasible.
"""

from mcexact._exceptions import BudgetExceeded, DataError, FileFormatError, McexactError
from mcexact.design import Design
from mcexact.distribution import ConditionalDistribution
from mcexact.exact import DEFAULT_MAX_NODES, Plan, exact_distribution, plan
from mcexact.fit import FitResult, fit
from mcexact.demo import load_demo
from mcexact.runs import load_run, save_run
from mcexact.validation import ValidationReport, validate

__version__ = "0.1.0.dev0"

__all__ = [
    "BudgetExceeded",
    "ConditionalDistribution",
    "DEFAULT_MAX_NODES",
    "DataError",
    "Design",
    "FileFormatError",
    "McexactError",
    "Plan",
    "exact_distribution",
    "fit",
    "FitResult",
    "load_demo",
    "load_run",
    "save_run",
    "validate",
    "ValidationReport",
    "plan",
]
