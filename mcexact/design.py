"""The integer problem behind exact conditional logistic regression.

A :class:`Design` turns user data (a data frame and a formula, or plain arrays) into what the
enumerator needs: binomial groups ``(events, trials)``, a stratum index, and integer-coded
interest (``z``) and nuisance (``w``) columns.  The model for collapsed group ``i`` is::

    y_i ~ Bin(m_i, p_i),   logit p_i = alpha_{h(i)} + w_i' gamma + z_i' beta

where ``alpha`` is one intercept per stratum (a single intercept without strata).  Exact
inference on ``beta`` conditions on the nuisance sufficient statistics ``W'y`` and, when the model
has an intercept or strata, on the number of events in each stratum.

Building a design, in order:

1. validate every used column (missing, non-numeric and infinite values, counts);
2. code each covariate column as integers by the smallest power of ten that makes it integral;
3. collapse rows with identical stratum and covariates into binomial groups;
4. drop strata that hold only events or only non-events (they carry no information once the
   stratum total is conditioned on);
5. drop nuisance columns that are linear combinations of the strata (or intercept) and earlier
   nuisance columns, and reject interest columns that are constant or collinear.

Both constructors, :meth:`Design.from_formula` and :meth:`Design.from_arrays`, gather raw columns
and hand them to one private builder, so validation and coding are the same on both paths.
"""

from __future__ import annotations

import dataclasses
import numbers
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from mcexact._exceptions import DataError

__all__ = ["Design"]

#: Bound on ``sum_i trials_i * |coded value_i|`` for every integer-coded column, and on the total
#: number of trials.  Every partial sum the enumerator can form then fits in an int64 and is
#: exactly representable as a float64 (whose integers are exact up to 2**53).
MAX_ABS_SUM = 2**52

# Relative tolerance for deciding that ``x * 10**k`` is an integer.
_INTEGRAL_RTOL = 1e-9

# Tolerance on the residual norm of a unit-norm column projected on other columns, below which
# the column counts as a linear combination of them.  Columns are integers, so true dependencies
# leave residuals near machine precision, far below this.
_RANK_TOL = 1e-9

_INTERCEPT_NAMES = frozenset({"1", "intercept", "Intercept"})

_ANSI_ESCAPE = re.compile(r"\x1b\[[0-9;]*m")


@dataclass(frozen=True, eq=False, repr=False)
class Design:
    """Integer-coded data for exact conditional logistic regression.

    Build one with :meth:`from_formula` or :meth:`from_arrays`.  Arrays are read-only.

    Attributes
    ----------
    events : ndarray of int64, shape (G,)
        Events in each collapsed group.
    trials : ndarray of int64, shape (G,)
        Trials in each collapsed group (at least 1).
    stratum : ndarray of int64, shape (G,)
        Stratum index ``0..H-1`` of each group; groups are sorted by stratum.  All zeros when
        there are no strata.
    interest : ndarray of int64, shape (G, q)
        Integer-coded interest columns, ``q >= 1``.
    nuisance : ndarray of int64, shape (G, p)
        Integer-coded nuisance columns, ``p >= 0``.  Never holds the intercept nor stratum
        indicators: those are represented by `fix_stratum_totals`.
    fix_stratum_totals : bool
        Whether the number of events in each stratum is conditioned on.  True when the model has
        an intercept or strata (without strata the whole data is one stratum); False only for a
        model without intercept and without strata.
    interest_names, nuisance_names : tuple of str
        Column names (as formulaic names them, e.g. ``"dose"``, ``"C(breed)[T.b]"``).
    interest_scales, nuisance_scales : ndarray of float64
        Factor ``10**k`` of each column: integer column = original column * factor.
    effects : dict of str to tuple of int
        Effect name -> indices of its interest columns, in column order.  An effect is one
        interest term of the formula (a categorical term is one effect made of all its dummy
        columns); with plain arrays each interest column is its own effect.
    stratum_labels : tuple
        Original stratum labels of the strata kept, in index order.  Without strata it is
        ``(None,)``: a single unlabelled stratum, so that ``len(stratum_labels)`` is always the
        number of strata.
    response_name : str
        Name of the response (event) column.
    formula : str or None
        The formula, when built by :meth:`from_formula`.
    strata_name, trials_name : str or None
        Names of the strata and trials columns, if any.
    n_rows : int
        Number of input rows.  Rows are never dropped for bad values (those raise); the groups
        represent ``n_rows - n_dropped_rows`` rows.
    n_dropped_strata : int
        Strata dropped because all their rows are events or all are non-events (only when
        `fix_stratum_totals`).
    n_dropped_rows : int
        Input rows in the dropped strata.
    notes : tuple of str
        Human-readable notes on what was done to the data (scaling, collapsing, dropping).
    """

    events: np.ndarray
    trials: np.ndarray
    stratum: np.ndarray
    interest: np.ndarray
    nuisance: np.ndarray
    fix_stratum_totals: bool
    interest_names: tuple[str, ...]
    nuisance_names: tuple[str, ...]
    interest_scales: np.ndarray
    nuisance_scales: np.ndarray
    effects: dict[str, tuple[int, ...]]
    stratum_labels: tuple
    response_name: str
    formula: str | None = None
    strata_name: str | None = None
    trials_name: str | None = None
    n_rows: int = 0
    n_dropped_strata: int = 0
    n_dropped_rows: int = 0
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        # Normalise dtypes, make arrays read-only and check that shapes agree.
        for name, dtype in [("events", np.int64), ("trials", np.int64), ("stratum", np.int64),
                            ("interest", np.int64), ("nuisance", np.int64),
                            ("interest_scales", np.float64), ("nuisance_scales", np.float64)]:
            array = np.array(getattr(self, name), dtype=dtype)
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        n_groups = self.events.shape[0]
        if (self.events.ndim != 1 or self.trials.shape != (n_groups,)
                or self.stratum.shape != (n_groups,)
                or self.interest.ndim != 2 or self.interest.shape[0] != n_groups
                or self.nuisance.ndim != 2 or self.nuisance.shape[0] != n_groups):
            raise ValueError("Design arrays have inconsistent shapes")
        if (len(self.interest_names) != self.interest.shape[1]
                or self.interest_scales.shape != (self.interest.shape[1],)
                or len(self.nuisance_names) != self.nuisance.shape[1]
                or self.nuisance_scales.shape != (self.nuisance.shape[1],)):
            raise ValueError("Design column names or scales do not match the columns")
        object.__setattr__(self, "interest_names", tuple(self.interest_names))
        object.__setattr__(self, "nuisance_names", tuple(self.nuisance_names))
        object.__setattr__(self, "stratum_labels", tuple(self.stratum_labels))
        object.__setattr__(self, "notes", tuple(self.notes))
        effects = {name: tuple(int(j) for j in cols) for name, cols in self.effects.items()}
        object.__setattr__(self, "effects", effects)

    # ------------------------------------------------------------------ derived quantities

    @property
    def n_groups(self) -> int:
        """Number of collapsed binomial groups, G."""
        return int(self.events.shape[0])

    @property
    def n_strata(self) -> int:
        """Number of strata kept, H (1 without strata)."""
        return len(self.stratum_labels)

    @property
    def observed_interest(self) -> np.ndarray:
        """Observed interest statistic ``interest.T @ events`` (int64, shape (q,))."""
        return self.interest.T @ self.events

    @property
    def observed_nuisance(self) -> np.ndarray:
        """Observed nuisance statistic ``nuisance.T @ events`` (int64, shape (p,))."""
        return self.nuisance.T @ self.events

    @property
    def stratum_events(self) -> np.ndarray:
        """Events in each stratum (int64, shape (H,))."""
        return _sum_by(self.stratum, self.events, self.n_strata)

    @property
    def stratum_trials(self) -> np.ndarray:
        """Trials in each stratum (int64, shape (H,))."""
        return _sum_by(self.stratum, self.trials, self.n_strata)

    def __repr__(self) -> str:
        return (f"Design(n_groups={self.n_groups}, n_strata={self.n_strata}, "
                f"interest={self.interest_names}, nuisance={self.nuisance_names}, "
                f"fix_stratum_totals={self.fix_stratum_totals})")

    # ------------------------------------------------------------------ derived designs

    def with_interest(self, effects: str | Sequence[str]) -> Design:
        """Keep only some effects as interest; condition on the others as nuisance.

        Parameters
        ----------
        effects : str or sequence of str
            Names of effects (keys of :attr:`effects`) to keep as interest.

        Returns
        -------
        Design
            A design whose interest columns are those of the named effects (in their order in
            this design) and whose nuisance columns are this design's nuisance columns followed
            by the other interest columns, names and scales kept.

        Raises
        ------
        DataError
            If an effect is unknown, listed twice, or none is given.
        """
        wanted = [effects] if isinstance(effects, str) else list(effects)
        if not wanted:
            raise DataError("with_interest needs at least one effect")
        for name in wanted:
            if name not in self.effects:
                raise DataError(f"unknown effect {name!r}; effects are {_quoted(self.effects)}",
                                column=str(name))
        if len(set(wanted)) != len(wanted):
            raise DataError(f"an effect is listed twice in {wanted!r}")
        kept_effects = [name for name in self.effects if name in wanted]
        keep = [j for name in kept_effects for j in self.effects[name]]
        move = [j for j in range(self.interest.shape[1]) if j not in keep]
        new_index = {old: new for new, old in enumerate(keep)}
        note = (f"interest restricted to {_quoted(kept_effects)}; "
                f"{len(move)} other interest column(s) conditioned on as nuisance")
        return dataclasses.replace(
            self,
            interest=self.interest[:, keep],
            nuisance=np.hstack([self.nuisance, self.interest[:, move]]),
            interest_names=tuple(self.interest_names[j] for j in keep),
            nuisance_names=self.nuisance_names + tuple(self.interest_names[j] for j in move),
            interest_scales=self.interest_scales[keep],
            nuisance_scales=np.concatenate([self.nuisance_scales, self.interest_scales[move]]),
            effects={name: tuple(new_index[j] for j in self.effects[name])
                     for name in kept_effects},
            notes=self.notes + (note,),
        )

    def to_frame(self) -> pd.DataFrame:
        """The collapsed groups as a data frame, covariates in their original units.

        Returns
        -------
        pandas.DataFrame
            One row per group: the stratum label (when there are strata), events, trials, then
            the interest and nuisance columns divided by their scales.
        """
        columns: dict[str, object] = {}
        if self.strata_name is not None:
            columns[self.strata_name] = [self.stratum_labels[h] for h in self.stratum]
        columns[self.response_name] = self.events
        columns[self.trials_name or "trials"] = self.trials
        for names, values, scales in [(self.interest_names, self.interest, self.interest_scales),
                                      (self.nuisance_names, self.nuisance, self.nuisance_scales)]:
            for j, name in enumerate(names):
                columns[name] = values[:, j] / scales[j]
        return pd.DataFrame(columns)

    # ------------------------------------------------------------------ constructors

    @classmethod
    def from_formula(cls, data: pd.DataFrame, formula: str, *,
                     interest: str | Sequence[str] | None = None, strata: str | None = None,
                     trials: str | None = None, decimals: int = 6) -> Design:
        """Build a design from a data frame and a Wilkinson formula.

        Parameters
        ----------
        data : pandas.DataFrame
            One row per observation (or per binomial group, with `trials`).
        formula : str
            A formula parsed by formulaic, e.g. ``"events ~ dose + C(breed) + weight"``.  The
            left side names the response: 0/1 (or bool) without `trials`, event counts with it.
        interest : str or sequence of str, optional
            Terms of interest, written as in the formula (e.g. ``["dose", "C(breed)"]``).
            Default: every term but the intercept.  The other terms are nuisance.
        strata : str, optional
            Column of stratum (matched set) labels.  Each stratum gets its own intercept, which
            is conditioned away; the formula's intercept is then absorbed.
        trials : str, optional
            Column of trial counts (each at least 1) for grouped binomial data.
        decimals : int, default 6
            Largest power of ten by which a covariate may be scaled to make it integral.

        Returns
        -------
        Design

        Raises
        ------
        DataError
            For any problem with the data or the model specification; the message names the
            column and, where useful, the first offending row.

        Notes
        -----
        The formula may use formulaic's transforms (``C``, ``center``, ...), ``np`` and Python
        built-ins; other names must be columns of `data` (names from the caller's scope are not
        looked up).  String columns are categorical, as formulaic makes them; a column mixing
        numbers and strings is rejected as a likely data-entry error.  Rows with missing values
        are never dropped silently: they raise.  A row with zero trials raises too.
        """
        _check_decimals(decimals)
        if not isinstance(data, pd.DataFrame):
            raise DataError(f"data must be a pandas DataFrame, not {type(data).__name__}")
        if not isinstance(formula, str):
            raise DataError(f"formula must be a string, not {type(formula).__name__}")
        parsed = _parse_formula(formula)
        response_term = _response_term(parsed, formula)
        for role, column in [("strata", strata), ("trials", trials)]:
            if column is not None and not isinstance(column, str):
                raise DataError(f"{role} must be the name of a column of data, "
                                f"not {type(column).__name__}")
            _check_column_present(data, column, f"{role} column")
        variables = _value_variables(parsed)
        for name in sorted(variables):
            _check_column_present(data, name, "column named in the formula")
        if len(data) == 0:
            raise DataError("the data have no rows")
        checked = _check_raw_columns(data, variables, strata, trials)

        matrices = _materialize(parsed, data)
        spec = matrices.rhs.model_spec
        # Stateful transforms (e.g. center(x)) hide their variables from the parsed formula; the
        # materialised spec lists every data column used, so check the ones not yet seen.
        _check_raw_columns(data, set(spec.variables_by_source.get("data", set())) - checked,
                           strata, trials)

        response_name, response = _formula_response(matrices, data, response_term)
        interest_cols, nuisance_cols, effects, has_intercept = _formula_columns(matrices, interest)
        return _build(_Inputs(
            labels=data.index, response=response, response_name=response_name,
            trials=None if trials is None else data[trials], trials_name=trials,
            strata=None if strata is None else data[strata], strata_name=strata,
            interest=interest_cols, nuisance=nuisance_cols, effects=effects,
            intercept=has_intercept, formula=formula, decimals=decimals))

    @classmethod
    def from_arrays(cls, y, interest, nuisance=None, *, trials=None, strata=None,
                    intercept: bool = True, interest_names: Sequence[str] | None = None,
                    nuisance_names: Sequence[str] | None = None, decimals: int = 6) -> Design:
        """Build a design from plain arrays.

        Parameters
        ----------
        y : array_like, shape (n,)
            Response: 0/1 (or bool) without `trials`, event counts with it.
        interest : array_like, shape (n,) or (n, q)
            Interest columns; a 1-D array is one column.  Each column is its own effect.
        nuisance : array_like, shape (n,) or (n, p), optional
            Nuisance columns, without the intercept.
        trials : array_like, shape (n,), optional
            Trial counts (each at least 1) for grouped binomial data.
        strata : array_like, shape (n,), optional
            Stratum labels.
        intercept : bool, default True
            Whether the model has an intercept (absorbed by `strata` when given).
        interest_names, nuisance_names : sequence of str, optional
            Column names; default ``"z0", "z1", ...`` and ``"w0", "w1", ...``.
        decimals : int, default 6
            Largest power of ten by which a column may be scaled to make it integral.

        Returns
        -------
        Design

        Raises
        ------
        DataError
            For any problem with the data; the message names the column and, where useful, the
            first offending row (rows are labelled by position).
        """
        _check_decimals(decimals)
        y = np.asarray(y)
        if y.ndim != 1:
            raise DataError(f"y must be one-dimensional, got shape {y.shape}", column="y")
        n = y.shape[0]
        interest_cols = _array_columns(interest, "interest", interest_names, "z", n)
        if not interest_cols:
            raise DataError("interest has no columns; at least one is needed", column="interest")
        nuisance_cols = [] if nuisance is None else _array_columns(nuisance, "nuisance",
                                                                   nuisance_names, "w", n)
        names = [name for name, _ in interest_cols + nuisance_cols]
        duplicated = sorted({name for name in names if names.count(name) > 1})
        if duplicated:
            raise DataError(f"column names must be unique; repeated: {duplicated}",
                            column=duplicated[0])
        extras = {}
        for role, values in [("trials", trials), ("strata", strata)]:
            if values is not None:
                values = np.asarray(values)
                if values.shape != (n,):
                    raise DataError(f"{role} must have shape ({n},) like y, got {values.shape}",
                                    column=role)
            extras[role] = values
        return _build(_Inputs(
            labels=pd.RangeIndex(n), response=y, response_name="y",
            trials=extras["trials"], trials_name=None if trials is None else "trials",
            strata=extras["strata"], strata_name=None if strata is None else "strata",
            interest=interest_cols, nuisance=nuisance_cols,
            effects={name: (j,) for j, (name, _) in enumerate(interest_cols)},
            intercept=bool(intercept), formula=None, decimals=decimals))


# ====================================================================== shared builder


@dataclass
class _Inputs:
    """Raw, unvalidated columns gathered by a constructor for :func:`_build`."""

    labels: pd.Index
    response: object
    response_name: str
    trials: object | None
    trials_name: str | None
    strata: object | None
    strata_name: str | None
    interest: list[tuple[str, object]]
    nuisance: list[tuple[str, object]]
    effects: dict[str, tuple[int, ...]]
    intercept: bool
    formula: str | None
    decimals: int


def _build(inputs: _Inputs) -> Design:
    """Validate, integer-code, collapse and reduce the raw columns into a :class:`Design`."""
    labels = inputs.labels
    n_rows = len(labels)
    if n_rows == 0:
        raise DataError("the data have no rows")
    notes: list[str] = []
    events, trials = _response_and_trials(inputs)
    fix_totals = inputs.intercept or inputs.strata is not None
    if inputs.strata is not None:
        row_stratum, stratum_labels = _stratum_codes(inputs.strata, inputs.strata_name, labels)
        if inputs.intercept:
            notes.append(f"intercept absorbed by the strata {inputs.strata_name!r}")
    else:
        row_stratum, stratum_labels = np.zeros(n_rows, dtype=np.int64), (None,)

    interest, interest_scales = _code_columns(inputs.interest, labels, trials, inputs.decimals,
                                              notes)
    nuisance, nuisance_scales = _code_columns(inputs.nuisance, labels, trials, inputs.decimals,
                                              notes)
    if events.sum() == 0:
        raise DataError(f"the response {inputs.response_name!r} has no events",
                        column=inputs.response_name)
    if events.sum() == trials.sum():
        raise DataError(f"the response {inputs.response_name!r} has no non-events",
                        column=inputs.response_name)

    groups = _collapse(row_stratum, nuisance, interest, events, trials)
    if groups.n < n_rows:
        notes.append(f"{n_rows} rows collapsed into {groups.n} groups with identical "
                     "stratum and covariates")
    n_dropped_strata = n_dropped_rows = 0
    if fix_totals:
        groups, stratum_labels, n_dropped_strata, n_dropped_rows = _drop_uninformative_strata(
            groups, stratum_labels, inputs.strata_name, notes)
    stratum, nuisance, interest = groups.stratum, groups.nuisance, groups.interest

    absorbed_by = ("the strata" if inputs.strata is not None
                   else "the intercept" if inputs.intercept else None)
    nuisance_names = [name for name, _ in inputs.nuisance]
    kept = _independent_nuisance(nuisance, stratum, len(stratum_labels), fix_totals,
                                 nuisance_names, absorbed_by, notes)
    nuisance, nuisance_scales = nuisance[:, kept], nuisance_scales[kept]
    nuisance_names = [nuisance_names[j] for j in kept]
    interest_names = [name for name, _ in inputs.interest]
    _check_interest_rank(interest, nuisance, stratum, len(stratum_labels), fix_totals,
                         interest_names, nuisance_names, absorbed_by)

    return Design(
        events=groups.events, trials=groups.trials, stratum=stratum, interest=interest,
        nuisance=nuisance, fix_stratum_totals=fix_totals,
        interest_names=tuple(interest_names), nuisance_names=tuple(nuisance_names),
        interest_scales=interest_scales, nuisance_scales=nuisance_scales,
        effects=dict(inputs.effects), stratum_labels=tuple(stratum_labels),
        response_name=inputs.response_name, formula=inputs.formula,
        strata_name=inputs.strata_name, trials_name=inputs.trials_name, n_rows=n_rows,
        n_dropped_strata=n_dropped_strata, n_dropped_rows=n_dropped_rows, notes=tuple(notes))


@dataclass
class _Groups:
    """Collapsed binomial groups, sorted by stratum; `rows` counts the input rows of each."""

    stratum: np.ndarray
    nuisance: np.ndarray
    interest: np.ndarray
    events: np.ndarray
    trials: np.ndarray
    rows: np.ndarray

    @property
    def n(self) -> int:
        return int(self.events.shape[0])

    def subset(self, keep: np.ndarray) -> _Groups:
        return _Groups(*(getattr(self, f.name)[keep] for f in dataclasses.fields(self)))


def _collapse(stratum: np.ndarray, nuisance: np.ndarray, interest: np.ndarray,
              events: np.ndarray, trials: np.ndarray) -> _Groups:
    """Merge rows with identical (stratum, nuisance, interest) into binomial groups.

    ``np.unique`` sorts the keys lexicographically, so the groups come out sorted by stratum.
    """
    keys = np.column_stack([stratum, nuisance, interest])
    unique_keys, group_of_row = np.unique(keys, axis=0, return_inverse=True)
    group_of_row = group_of_row.reshape(-1)
    n_groups, p = unique_keys.shape[0], nuisance.shape[1]
    return _Groups(stratum=unique_keys[:, 0], nuisance=unique_keys[:, 1:1 + p],
                   interest=unique_keys[:, 1 + p:],
                   events=_sum_by(group_of_row, events, n_groups),
                   trials=_sum_by(group_of_row, trials, n_groups),
                   rows=np.bincount(group_of_row, minlength=n_groups))


def _drop_uninformative_strata(groups: _Groups, labels: tuple, strata_name: str | None,
                               notes: list[str]) -> tuple[_Groups, tuple, int, int]:
    """Drop strata whose groups are all events or all non-events; renumber the rest.

    Once a stratum's event total is conditioned on, such a stratum has a single possible
    response, so it contributes nothing to the conditional distribution.

    Returns the kept groups, the kept labels, and the numbers of strata and rows dropped.
    """
    totals = _sum_by(groups.stratum, groups.events, len(labels))
    sizes = _sum_by(groups.stratum, groups.trials, len(labels))
    informative = (totals > 0) & (totals < sizes)
    if informative.all():
        return groups, labels, 0, 0
    keep = informative[groups.stratum]
    if not keep.any():
        raise DataError(f"every stratum of {strata_name!r} is uninformative: each has only "
                        "events or only non-events, so no rows are left", column=strata_name)
    n_strata, n_rows = int((~informative).sum()), int(groups.rows[~keep].sum())
    notes.append(f"{n_strata} strata dropped: all events or all non-events ({n_rows} rows)")
    kept = groups.subset(keep)
    kept.stratum = (np.cumsum(informative) - 1)[kept.stratum]
    return kept, tuple(lab for lab, ok in zip(labels, informative) if ok), n_strata, n_rows


# ====================================================================== formula helpers


def _parse_formula(formula: str):
    """Parse `formula` with formulaic, turning its errors into :class:`DataError`."""
    from formulaic import Formula

    try:
        return Formula(formula)
    except Exception as error:  # formulaic's parser errors share no public base we can rely on
        raise DataError(f"could not parse the formula {formula!r}: {_message(error)}") from error


def _value_variables(parsed) -> set[str]:
    """Names the formula reads as values (data columns), leaving out called names like ``abs``."""
    return {str(variable) for variable in parsed.required_variables
            if "value" in {getattr(role, "value", role) for role in variable.roles}}


def _response_term(parsed, formula: str) -> str:
    """Return the response term of a parsed formula, checking the formula's shape."""
    from formulaic.formula import SimpleFormula

    if not hasattr(parsed, "lhs"):
        raise DataError(f"the formula {formula!r} has no response (left-hand side of '~')")
    if not isinstance(parsed.rhs, SimpleFormula):
        raise DataError(f"the formula {formula!r} has several right-hand parts; "
                        "only a single right-hand side is supported")
    terms = [str(term) for term in parsed.lhs]
    if len(terms) != 1:
        raise DataError(f"the response of {formula!r} must be a single column, "
                        f"not the terms {_quoted(terms)}", column=" + ".join(terms))
    return terms[0]


def _materialize(parsed, data: pd.DataFrame):
    """Build the model matrices.

    Rows with missing values are kept (``na_action="ignore"``): the used columns are checked by
    :func:`_check_raw_columns` and :func:`_to_float`, which name the column and row, instead of
    formulaic silently dropping rows.  ``context={}`` keeps formulaic from looking up names in
    this module's frames; its own transforms and ``np`` stay available.
    """
    from formulaic import model_matrix

    try:
        # Bad values produced by user expressions (log of 0, ...) are reported by _to_float.
        with np.errstate(all="ignore"):
            return model_matrix(parsed, data, context={}, na_action="ignore")
    except Exception as error:  # evaluating the formula runs user expressions: anything may raise
        raise DataError(f"formulaic could not build the model matrices for '{parsed}': "
                        f"{_message(error)}") from error


def _formula_response(matrices, data: pd.DataFrame, term: str) -> tuple[str, object]:
    """Name and values of the response.

    A bare column name is read from `data` itself, so that it is validated as given (formulaic
    would turn a column of strings into dummy columns); an expression is taken from formulaic.
    """
    if term in data.columns:
        return term, data[term]
    response = matrices.lhs
    if response.shape[1] != 1:
        raise DataError(f"the response {term!r} must be a single column; it gives "
                        f"{response.shape[1]} columns {list(response.columns)}", column=term)
    return str(response.columns[0]), response.iloc[:, 0]


def _formula_columns(matrices, interest: str | Sequence[str] | None):
    """Split the right-hand model matrix into interest and nuisance columns by term.

    Returns the interest columns, the nuisance columns (each a list of ``(name, values)``), the
    effects (interest term -> interest column indices) and whether the formula has an intercept.
    """
    rhs = matrices.rhs
    spec = rhs.model_spec
    terms = [term for term in spec.terms if str(term) != "1"]
    interest_terms = _resolve_interest(interest, terms)
    interest_cols: list[tuple[str, np.ndarray]] = []
    nuisance_cols: list[tuple[str, np.ndarray]] = []
    effects: dict[str, tuple[int, ...]] = {}
    for term in terms:
        block = rhs.iloc[:, spec.term_slices[term]]
        columns = [(str(name), block.iloc[:, k].to_numpy())
                   for k, name in enumerate(block.columns)]
        name = str(term)
        if name not in interest_terms:
            nuisance_cols.extend(columns)
            continue
        if not columns:
            raise DataError(f"interest term {name!r} gives no model columns "
                            "(a categorical with a single level?)", column=name)
        effects[name] = tuple(range(len(interest_cols), len(interest_cols) + len(columns)))
        interest_cols.extend(columns)
    has_intercept = len(terms) < len(spec.terms)
    return interest_cols, nuisance_cols, effects, has_intercept


def _resolve_interest(interest: str | Sequence[str] | None, terms: list) -> set[str]:
    """Names (as formulaic prints them) of the interest terms among `terms` (intercept excluded)."""
    names = [str(term) for term in terms]
    if interest is None:
        if not names:
            raise DataError("the formula has no terms besides the intercept: nothing to test")
        return set(names)
    wanted = [interest] if isinstance(interest, str) else list(interest)
    if not wanted:
        raise DataError("interest is empty; name at least one term of the formula")
    resolved: list[str] = []
    for name in wanted:
        term = _match_term(name, terms)
        if term in resolved:
            raise DataError(f"interest term {name!r} is listed twice", column=str(name))
        resolved.append(term)
    return set(resolved)


def _match_term(name: object, terms: list) -> str:
    """The term of the formula that `name` denotes, tolerating spacing and factor order."""
    from formulaic import Formula

    if not isinstance(name, str):
        raise DataError(f"interest terms must be strings, not {type(name).__name__}")
    names = [str(term) for term in terms]
    stripped = name.strip()
    if stripped in _INTERCEPT_NAMES:
        raise DataError(f"interest term {name!r} is the intercept, which cannot be of interest: "
                        "it is a nuisance parameter, conditioned on through the event total",
                        column=name)
    if stripped in names:
        return stripped
    try:
        candidates = [term for term in Formula(stripped) if str(term) != "1"]
    except Exception:  # not parseable as a term: reported as unknown below
        candidates = []
    if len(candidates) == 1 and candidates[0] in terms:
        return names[terms.index(candidates[0])]
    raise DataError(f"interest term {name!r} is not a term of the formula; its terms are "
                    f"{_quoted(names)}", column=name)


def _check_column_present(data: pd.DataFrame, column: str | None, what: str) -> None:
    if column is not None and column not in data.columns:
        raise DataError(f"{what} {column!r} is not in the data", column=column)


def _check_raw_columns(data: pd.DataFrame, names, strata: str | None,
                       trials: str | None) -> set[str]:
    """Check data columns used by the model for missing values and mixed numbers and strings.

    Returns the set of names checked.
    """
    checked: set[str] = set()
    for name in sorted(names) + [strata, trials]:
        if name is None or name in checked or name not in data.columns:
            continue
        values = data[name].to_numpy()
        _check_no_missing(values, name, data.index)
        if values.dtype.kind == "O":
            is_string = np.array([isinstance(v, (str, bytes)) for v in values], dtype=bool)
            if is_string.any() and not is_string.all():
                i = int(np.argmax(is_string))
                raise DataError(
                    f"column {name!r} mixes numbers and strings (first string "
                    f"{_py(values[i])!r} at row {_row(data.index, i)!r}); fix the values, or "
                    "convert the column explicitly (pandas.to_numeric, or .astype(str) for a "
                    "categorical)", column=name, row=_row(data.index, i))
        checked.add(name)
    return checked


# ====================================================================== array helpers


def _array_columns(values, role: str, names: Sequence[str] | None, prefix: str,
                   n: int) -> list[tuple[str, np.ndarray]]:
    """Split a 1-D or 2-D array into named columns."""
    array = np.asarray(values)
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2 or array.shape[0] != n:
        raise DataError(f"{role} must have {n} rows like y, got shape {array.shape}", column=role)
    k = array.shape[1]
    if names is None:
        names = [f"{prefix}{j}" for j in range(k)]
    else:
        names = [names] if isinstance(names, str) else [str(name) for name in names]
        if len(names) != k:
            raise DataError(f"{role} has {k} columns but {len(names)} names were given",
                            column=role)
    return [(names[j], array[:, j]) for j in range(k)]


# ====================================================================== validation and coding


def _check_decimals(decimals: object) -> None:
    if isinstance(decimals, bool) or not isinstance(decimals, numbers.Integral) or decimals < 0:
        raise DataError(f"decimals must be a non-negative integer, not {decimals!r}")


def _check_no_missing(values: np.ndarray, name: str, labels: pd.Index) -> None:
    missing = np.asarray(pd.isna(values), dtype=bool)
    if missing.any():
        i = int(np.argmax(missing))
        raise DataError(f"missing value in column {name!r} at row {_row(labels, i)!r} "
                        f"({int(missing.sum())} missing in all); remove or impute such rows first",
                        column=name, row=_row(labels, i))


def _to_float(values, name: str, labels: pd.Index) -> np.ndarray:
    """Check a column for missing, non-numeric and infinite values; return it as float64."""
    array = values.to_numpy() if isinstance(values, (pd.Series, pd.Index)) else np.asarray(values)
    _check_no_missing(array, name, labels)
    if array.dtype.kind not in "biuf":
        i = _first_non_number(array)
        raise DataError(f"non-numeric value {_py(array[i])!r} in column {name!r} at row "
                        f"{_row(labels, i)!r}; the column must hold numbers",
                        column=name, row=_row(labels, i))
    result = array.astype(np.float64)
    infinite = ~np.isfinite(result)
    if infinite.any():
        i = int(np.argmax(infinite))
        raise DataError(f"infinite value in column {name!r} at row {_row(labels, i)!r}",
                        column=name, row=_row(labels, i))
    return result


def _first_non_number(array: np.ndarray) -> int:
    """Position of the first entry that is not a real number (0 if every entry looks like one)."""
    for i, value in enumerate(array.tolist()):
        if isinstance(value, (str, bytes)) or not isinstance(value, numbers.Real):
            return i
    return 0


def _counts(values: np.ndarray, name: str, labels: pd.Index, what: str) -> np.ndarray:
    """Check that float `values` are non-negative integers; return them as int64."""
    for bad, problem in [(values < 0, "negative"), (values != np.rint(values), "non-integer")]:
        if bad.any():
            i = int(np.argmax(bad))
            raise DataError(f"{problem} {what} {values[i]:g} in column {name!r} at row "
                            f"{_row(labels, i)!r}", column=name, row=_row(labels, i))
    if values.sum() > MAX_ABS_SUM:
        raise DataError(f"the {what} in column {name!r} sum to more than 2**52", column=name)
    return values.astype(np.int64)


def _response_and_trials(inputs: _Inputs) -> tuple[np.ndarray, np.ndarray]:
    """Validated events and trials per input row (trials are all 1 without a trials column)."""
    labels, name = inputs.labels, inputs.response_name
    y = _to_float(inputs.response, name, labels)
    if inputs.trials is None:
        bad = (y != 0) & (y != 1)
        if bad.any():
            i = int(np.argmax(bad))
            raise DataError(f"the response {name!r} must be 0 or 1 (or bool) without trials; "
                            f"found {y[i]:g} at row {_row(labels, i)!r} (for event counts, "
                            "give the trials column)", column=name, row=_row(labels, i))
        return y.astype(np.int64), np.ones(len(y), dtype=np.int64)
    trials_name = inputs.trials_name
    trials = _counts(_to_float(inputs.trials, trials_name, labels), trials_name, labels,
                     "trial count")
    zero = trials == 0
    if zero.any():
        i = int(np.argmax(zero))
        raise DataError(f"zero trials in column {trials_name!r} at row {_row(labels, i)!r}: "
                        "every row needs at least one trial (remove rows without trials)",
                        column=trials_name, row=_row(labels, i))
    events = _counts(y, name, labels, "event count")
    over = events > trials
    if over.any():
        i = int(np.argmax(over))
        raise DataError(f"more events than trials at row {_row(labels, i)!r}: {name!r} is "
                        f"{events[i]} but {trials_name!r} is {trials[i]}",
                        column=name, row=_row(labels, i))
    return events, trials


def _stratum_codes(values, name: str, labels: pd.Index) -> tuple[np.ndarray, tuple]:
    """Stratum index of each row and the stratum labels, sorted when the labels allow it."""
    array = values.to_numpy() if isinstance(values, (pd.Series, pd.Index)) else np.asarray(values)
    _check_no_missing(array, name, labels)
    try:
        codes, uniques = pd.factorize(array, sort=True)
    except TypeError:  # labels of mixed, unorderable types: keep order of first appearance
        codes, uniques = pd.factorize(array, sort=False)
    return codes.astype(np.int64), tuple(_py(label) for label in uniques)


def _code_columns(columns: list[tuple[str, object]], labels: pd.Index, trials: np.ndarray,
                  decimals: int, notes: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Validate and integer-code covariate columns; return the (n, k) codes and their scales."""
    coded = np.zeros((len(labels), len(columns)), dtype=np.int64)
    scales = np.ones(len(columns), dtype=np.float64)
    for j, (name, values) in enumerate(columns):
        coded[:, j], power = _integer_code(_to_float(values, name, labels), name, labels,
                                           trials, decimals)
        scales[j] = 10.0**power
        if power:
            notes.append(f"column {name!r} scaled by 10**{power} to make it integral")
    return coded, scales


def _integer_code(x: np.ndarray, name: str, labels: pd.Index, trials: np.ndarray,
                  decimals: int) -> tuple[np.ndarray, int]:
    """Scale `x` by the smallest ``10**k`` (``k <= decimals``) making it integral."""
    for power in range(decimals + 1):
        scaled = x * 10.0**power
        rounded = np.rint(scaled)
        off = np.abs(scaled - rounded) > _INTEGRAL_RTOL * np.maximum(1.0, np.abs(scaled))
        if not off.any():
            break
    else:
        i = int(np.argmax(off))
        raise DataError(f"column {name!r} is not integral even after scaling by 10**{decimals}: "
                        f"value {_py(x[i])!r} at row {_row(labels, i)!r}; round the column "
                        "(e.g. with numpy.round) or raise decimals",
                        column=name, row=_row(labels, i))
    size = float(np.sum(trials * np.abs(rounded)))
    if size > MAX_ABS_SUM:
        raise DataError(f"column {name!r} is too large once coded as integers (scaled by "
                        f"10**{power}): the sum of |value| * trials is {size:.3g}, above 2**52; "
                        "use coarser units or round it", column=name)
    return rounded.astype(np.int64), power


# ====================================================================== rank checks


def _unit_columns(x: np.ndarray, stratum: np.ndarray, n_strata: int, demean: bool) -> np.ndarray:
    """Columns of `x` (demeaned within strata if asked) divided by their raw norms."""
    x = x.astype(np.float64)
    raw_norm = np.linalg.norm(x, axis=0)
    if demean and x.shape[1]:
        sums = np.zeros((n_strata, x.shape[1]))
        np.add.at(sums, stratum, x)
        x = x - (sums / np.bincount(stratum, minlength=n_strata)[:, None])[stratum]
    return np.divide(x, raw_norm, out=np.zeros_like(x), where=raw_norm > 0)


def _residual_norm(basis: np.ndarray, v: np.ndarray) -> float:
    """Norm of the part of `v` outside the column span of `basis`."""
    if basis.shape[1] == 0:
        return float(np.linalg.norm(v))
    coef, *_ = np.linalg.lstsq(basis, v, rcond=None)
    return float(np.linalg.norm(v - basis @ coef))


def _independent_nuisance(nuisance: np.ndarray, stratum: np.ndarray, n_strata: int, fix: bool,
                          names: list[str], absorbed_by: str | None,
                          notes: list[str]) -> list[int]:
    """Indices of the nuisance columns to keep; note each column dropped and why.

    A column is dropped when it is a linear combination of the strata (or intercept) and the
    nuisance columns kept before it: its sufficient statistic is then fixed by theirs, so
    conditioning on it changes nothing.
    """
    units = _unit_columns(nuisance, stratum, n_strata, fix)
    kept: list[int] = []
    for j, name in enumerate(names):
        if np.linalg.norm(units[:, j]) <= _RANK_TOL:
            reason = ("constant within every stratum (absorbed by the strata)"
                      if absorbed_by == "the strata" else
                      "constant (absorbed by the intercept)" if absorbed_by else
                      "zero in every group")
        elif _residual_norm(units[:, kept], units[:, j]) <= _RANK_TOL:
            reason = "a linear combination of " + _span_phrase([names[k] for k in kept],
                                                                absorbed_by, "nuisance")
        else:
            kept.append(j)
            continue
        notes.append(f"nuisance column {name!r} dropped: {reason}")
    return kept


def _check_interest_rank(interest: np.ndarray, nuisance: np.ndarray, stratum: np.ndarray,
                         n_strata: int, fix: bool, names: list[str], nuisance_names: list[str],
                         absorbed_by: str | None) -> None:
    """Reject interest columns that are constant or linear combinations of other columns."""
    z = _unit_columns(interest, stratum, n_strata, fix)
    w = _unit_columns(nuisance, stratum, n_strata, fix)
    for j, name in enumerate(names):
        if fix:
            constant = np.linalg.norm(z[:, j]) <= _RANK_TOL
        else:
            constant = np.ptp(interest[:, j]) == 0
        if constant:
            if absorbed_by == "the strata":
                why = "constant within every informative stratum, so the strata absorb it"
            elif absorbed_by:
                why = "constant, so it cannot be told apart from the intercept"
            else:
                why = ("constant, so it acts as an intercept; put the intercept in the model "
                       "(it is conditioned on) rather than testing it")
            raise DataError(f"interest column {name!r} is {why}", column=name)
        if _residual_norm(w, z[:, j]) <= _RANK_TOL:
            raise DataError(f"interest column {name!r} is a linear combination of "
                            f"{_span_phrase(nuisance_names, absorbed_by, 'nuisance')}, so its "
                            "effect cannot be separated from theirs", column=name)
        if _residual_norm(np.column_stack([w, z[:, :j]]), z[:, j]) <= _RANK_TOL:
            raise DataError(f"interest column {name!r} is a linear combination of the interest "
                            f"column(s) {_quoted(names[:j])} before it"
                            + (" and the nuisance columns" if nuisance_names else "")
                            + (f" and {absorbed_by}" if absorbed_by else ""), column=name)


def _span_phrase(columns: list[str], absorbed_by: str | None, kind: str) -> str:
    """E.g. "the nuisance columns 'a', 'b' and the strata"."""
    parts = []
    if columns:
        parts.append(f"the {kind} column(s) {_quoted(columns)}")
    if absorbed_by:
        parts.append(absorbed_by)
    return " and ".join(parts) if parts else "nothing"


# ====================================================================== small utilities


def _sum_by(index: np.ndarray, values: np.ndarray, size: int) -> np.ndarray:
    """Exact int64 sums of `values` over each value of `index` in ``0..size-1``."""
    sums = np.zeros(size, dtype=np.int64)
    np.add.at(sums, index, values)
    return sums


def _py(value: object) -> object:
    """A numpy scalar as the Python scalar, for readable messages."""
    return value.item() if isinstance(value, np.generic) else value


def _row(labels: pd.Index, i: int) -> object:
    """Label of row position `i`."""
    return _py(labels[i])


def _quoted(names) -> str:
    return ", ".join(repr(str(name)) for name in names)


def _message(error: Exception) -> str:
    """An exception's message without terminal colour codes."""
    return _ANSI_ESCAPE.sub("", str(error)).strip()
