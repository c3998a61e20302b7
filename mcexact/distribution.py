"""The conditional distribution of the interest statistics, exact or estimated.

:class:`ConditionalDistribution` is the interface between the engines (exact enumeration now,
Monte Carlo samplers later) and inference: support points, log weights, the observed statistic,
and the scaling back to the user's covariates. Everything downstream is written against it.

File format (``save``/``load``): a NumPy ``.npz`` archive holding the arrays ``support`` (int64,
n x q), ``log_weights`` (float64, n), ``observed`` (int64, q), ``scales`` (float64, q) and
``header``, a UTF-8 JSON string with ``format`` = ``"mcexact.distribution"``, ``version`` = 1,
``names`` (list of q strings) and ``info`` (a JSON object). Writes go to a temporary file in the
same folder that is renamed over the target, so an interrupted save never leaves a half-written
file in its place.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from mcexact._exceptions import DataError, FileFormatError
from mcexact._files import atomic_open
from mcexact._json import plain

__all__ = ["ConditionalDistribution"]

FILE_FORMAT = "mcexact.distribution"
FILE_VERSION = 1


@dataclass(frozen=True)
class ConditionalDistribution:
    """Distribution of T = Z'y given the nuisance statistics, on the support points it can take.

    Attributes
    ----------
    support : ndarray of int64, shape (n, q)
        Distinct values of the interest statistics, on the integer scale of the coded covariates
        (the original covariate times ``scales``), sorted lexicographically.
    log_weights : ndarray of float64, shape (n,)
        ``log c(s, t)``: the log of the weighted number of response vectors (binomial coefficients
        for grouped data) with nuisance statistics s and interest statistics t. Under the tilt
        beta, ``P(T = t) = c(s, t) exp(beta . t) / sum_u c(s, u) exp(beta . u)``.
    observed : ndarray of int64, shape (q,)
        The observed statistic.
    names : tuple of str
        One name per interest column.
    scales : ndarray of float64, shape (q,)
        Factor of the coded covariate per original unit: a coefficient beta on the coded scale is
        ``beta * scales`` per original unit.
    info : dict
        How the distribution was computed (method, network sizes, time, ...).
    chain_index : tuple of ndarray or None
        For a Monte Carlo distribution: per chain, the support row of every draw, in order (so
        Monte Carlo errors can be computed); None for an exact distribution. Its weights are then
        log relative frequencies (plus the log total count when the engine knows it), and a
        support point of weight zero (log weight -inf) may stand for the observed value.
    iid : bool
        Whether the draws are independent (direct sampling) rather than Markov chains.
    support_min, support_max : ndarray or None
        Exact range of each statistic when an engine knows it beyond the points drawn.
    null_mean, null_cov : ndarray or None
        Null mean and covariance of T when an engine knows them or estimates them better than
        the draws' own moments (used by the score test in place of the moments of the weights):
        exact for the network and for swap chains, Rao-Blackwellized for block chains.
    moment_draws : tuple of ndarray or None
        Block chains: per chain and draw, the Rao-Blackwellized moment records behind
        null_mean and null_cov (see :func:`mcexact.montecarlo.moments_of_draws`), so that a
        batch of the draws can estimate its own.
    """

    support: np.ndarray
    log_weights: np.ndarray
    observed: np.ndarray
    names: tuple
    scales: np.ndarray
    info: dict = field(default_factory=dict)
    chain_index: tuple | None = None
    iid: bool = True
    support_min: np.ndarray | None = None
    support_max: np.ndarray | None = None
    null_mean: np.ndarray | None = None
    null_cov: np.ndarray | None = None
    moment_draws: tuple | None = None

    def __post_init__(self):
        support = np.asarray(self.support, dtype=np.int64)
        if support.ndim == 1:
            support = support[:, None]
        log_weights = np.asarray(self.log_weights, dtype=np.float64).reshape(-1)
        observed = np.asarray(self.observed, dtype=np.int64).reshape(-1)
        scales = np.asarray(self.scales, dtype=np.float64).reshape(-1)
        names = tuple(str(n) for n in self.names)
        q = support.shape[1]
        if support.shape[0] != log_weights.shape[0]:
            raise DataError("support and log_weights differ in length")
        if observed.shape[0] != q or scales.shape[0] != q or len(names) != q:
            raise DataError("observed, scales and names must have one entry per support column")
        if support.shape[0] == 0:
            raise DataError("a conditional distribution needs at least one support point")
        object.__setattr__(self, "support", support)
        object.__setattr__(self, "log_weights", log_weights)
        object.__setattr__(self, "observed", observed)
        object.__setattr__(self, "scales", scales)
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "info", dict(self.info))
        if self.chain_index is not None:
            object.__setattr__(self, "chain_index", tuple(
                np.asarray(c, dtype=np.int64).reshape(-1) for c in self.chain_index))
        for name in ("support_min", "support_max"):
            v = getattr(self, name)
            if v is not None:
                object.__setattr__(self, name, np.asarray(v, dtype=np.int64).reshape(-1))

    @property
    def is_monte_carlo(self) -> bool:
        """Whether the distribution was estimated from draws."""
        return self.chain_index is not None

    @property
    def n_draws(self) -> int:
        """Number of draws behind a Monte Carlo distribution (0 when exact)."""
        return 0 if self.chain_index is None else int(sum(c.shape[0] for c in self.chain_index))

    # -- basic shape -------------------------------------------------------------------------
    @property
    def n_points(self) -> int:
        """Number of support points."""
        return int(self.support.shape[0])

    @property
    def n_columns(self) -> int:
        """Number of interest columns q."""
        return int(self.support.shape[1])

    @property
    def log_total(self) -> float:
        """``log sum_t c(s, t)``: the log weighted number of response vectors given S."""
        return float(logsumexp(self.log_weights))

    @property
    def observed_index(self) -> int | None:
        """Row of ``support`` equal to the observed statistic (None if it is not a support point)."""
        hit = np.flatnonzero(np.all(self.support == self.observed, axis=1))
        return int(hit[0]) if hit.size else None

    def _beta(self, beta) -> np.ndarray:
        if beta is None:
            return np.zeros(self.n_columns)
        b = np.asarray(beta, dtype=np.float64).reshape(-1)
        if b.shape[0] != self.n_columns:
            raise DataError(f"beta needs {self.n_columns} entries (one per interest column), "
                            f"got {b.shape[0]}")
        if not np.all(np.isfinite(b)):
            raise DataError("beta must be finite")
        return b

    # -- tilted moments ----------------------------------------------------------------------
    def log_pmf(self, beta=None) -> np.ndarray:
        """Log probabilities of the support points under the tilt ``beta`` (coded scale)."""
        with np.errstate(over="ignore", invalid="ignore"):
            lw = self.log_weights + self.support @ self._beta(beta)
        if np.any(np.isnan(lw) | (lw == np.inf)):
            raise DataError("beta is too large: the tilted weights overflow")
        return lw - logsumexp(lw)

    def pmf(self, beta=None) -> np.ndarray:
        """Probabilities of the support points under the tilt ``beta`` (default 0, the null).

        ``beta`` is on the coded scale of ``support`` (divide a per-unit coefficient by ``scales``).
        """
        return np.exp(self.log_pmf(beta))

    def mean(self, beta=None) -> np.ndarray:
        """Mean of T under the tilt ``beta``."""
        return self.pmf(beta) @ self.support

    def cov(self, beta=None) -> np.ndarray:
        """Covariance matrix of T under the tilt ``beta``."""
        p = self.pmf(beta)
        centred = self.support - p @ self.support
        return (centred * p[:, None]).T @ centred

    # -- slices ------------------------------------------------------------------------------
    def _columns(self, columns) -> list[int]:
        out = []
        for c in columns:
            if isinstance(c, (int, np.integer)) and not isinstance(c, bool):
                if not 0 <= c < self.n_columns:
                    raise DataError(f"column index {c} out of range 0..{self.n_columns - 1}")
                out.append(int(c))
            elif c in self.names:
                out.append(self.names.index(c))
            else:
                raise DataError(f"unknown interest column {c!r}; columns are {list(self.names)}")
        return out

    def condition(self, fixed: Sequence | Mapping) -> "ConditionalDistribution":
        """The distribution of the other columns given some columns at fixed values.

        Parameters
        ----------
        fixed : sequence of column names/indices, or mapping name/index -> value
            Columns to condition on; a sequence fixes them at their observed values (the slice
            used for inference on the remaining columns).

        Returns
        -------
        ConditionalDistribution
            Over the remaining columns, with ``info["conditioned_on"]`` recording the fixed values.
        """
        if isinstance(fixed, Mapping):
            cols = self._columns(list(fixed))
            values = []
            for name, v in fixed.items():
                if isinstance(v, bool) or not float(v).is_integer():
                    raise DataError(f"the value for {name!r} must be an integer statistic "
                                    f"(support points are integers), got {v!r}")
                values.append(int(v))
        else:
            cols = self._columns(list(fixed))
            values = [int(self.observed[c]) for c in cols]
        if len(set(cols)) != len(cols):
            raise DataError("a column is named twice in `fixed`")
        keep = [j for j in range(self.n_columns) if j not in cols]
        if not keep:
            raise DataError("conditioning on every column leaves nothing to describe")
        mask = np.all(self.support[:, cols] == np.asarray(values, dtype=np.int64), axis=1)
        if not mask.any():
            raise DataError(f"no support point has {dict(zip([self.names[c] for c in cols], values))}")
        info = dict(self.info)
        info["conditioned_on"] = {self.names[c]: v for c, v in zip(cols, values)}
        chain_index = None
        if self.chain_index is not None:
            # Keep the draws that fall on the slice, renumbered to the slice's rows.
            new_row = np.full(self.n_points, -1, dtype=np.int64)
            new_row[mask] = np.arange(int(mask.sum()))
            chain_index = tuple(new_row[c][new_row[c] >= 0] for c in self.chain_index)
        return ConditionalDistribution(
            support=self.support[mask][:, keep], log_weights=self.log_weights[mask],
            observed=self.observed[keep], names=tuple(self.names[j] for j in keep),
            scales=self.scales[keep], info=info, chain_index=chain_index, iid=self.iid)

    # -- export ------------------------------------------------------------------------------
    def to_frame(self, beta=None) -> pd.DataFrame:
        """One row per support point: the statistics, ``log_count`` and ``probability`` (tilt beta).

        Also flags the observed point in ``observed``.
        """
        frame = pd.DataFrame(self.support, columns=list(self.names))
        frame["log_count"] = self.log_weights
        frame["probability"] = self.pmf(beta)
        frame["observed"] = np.all(self.support == self.observed, axis=1)
        return frame

    def save(self, path: str | os.PathLike) -> None:
        """Write the distribution to `path` (``.npz``; format in the module docstring), atomically."""
        path = os.fspath(path)
        header = json.dumps({"format": FILE_FORMAT, "version": FILE_VERSION,
                             "names": list(self.names), "info": plain(self.info)})
        with atomic_open(path) as fh:
            np.savez(fh, support=self.support, log_weights=self.log_weights,
                     observed=self.observed, scales=self.scales, header=np.array(header))

    @classmethod
    def load(cls, path: str | os.PathLike) -> "ConditionalDistribution":
        """Read a distribution written by :meth:`save`."""
        name = repr(os.fspath(path))
        try:
            data = np.load(path, allow_pickle=False)
        except FileNotFoundError:
            raise
        except Exception as exc:       # numpy raises many kinds for a foreign or damaged file
            raise FileFormatError(f"{name} is not a saved mcexact distribution ({exc})") from exc
        if not isinstance(data, np.lib.npyio.NpzFile):
            raise FileFormatError(f"{name} is not a saved mcexact distribution (not an archive)")
        try:
            with data:
                header = json.loads(str(data["header"]))
                arrays = {k: data[k] for k in ("support", "log_weights", "observed", "scales")}
        except Exception as exc:
            raise FileFormatError(f"{name} is not a saved mcexact distribution ({exc})") from exc
        if not isinstance(header, dict):
            raise FileFormatError(f"{name} is not a saved mcexact distribution (bad header)")
        if header.get("format") != FILE_FORMAT:
            raise FileFormatError(f"{name} is not a saved mcexact distribution")
        if header.get("version") != FILE_VERSION:
            raise FileFormatError(f"{name} has format version "
                                  f"{header.get('version')!r}; this mcexact reads version "
                                  f"{FILE_VERSION}")
        try:
            return cls(names=tuple(header["names"]), info=header.get("info", {}), **arrays)
        except (DataError, KeyError, TypeError, ValueError) as exc:
            raise FileFormatError(f"{name} is damaged: {exc}") from exc
