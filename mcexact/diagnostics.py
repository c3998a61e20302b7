"""Convergence and Monte Carlo error diagnostics for sampled statistics.

Every function takes draws shaped ``(chain, draw)``: a 2-D array, a 1-D array (one chain), or a
list of 1-D chains. Chains of unequal length are truncated to the shortest (their first draws are
kept), so that every estimator sees a rectangular array.

- :func:`autocorrelation`: per-chain autocorrelation by FFT.
- :func:`ess`: multi-chain effective sample size (Geyer 1992; Vehtari et al. 2021), on raw values
  (``"mean"``, ``"identity"``), on rank-normalised split chains (``"bulk"``) or on the 5% and 95%
  quantile indicators (``"tail"``).
- :func:`rhat`: rank-normalised split R-hat (Vehtari et al. 2021).
- :func:`mcse_mean`: Monte Carlo standard error of a mean, by batch means (Flegal & Jones 2010),
  lugsail batch means (Vats & Flegal 2022) or from the effective sample size.
- :func:`mcse_proportion`: the same for a Monte Carlo p-value, i.e. the mean of an indicator.
- :func:`draws_needed`: draws needed for a target standard error of a proportion.
- :func:`chain_agreement`: a homogeneity test of the per-chain estimates of a proportion, to flag
  chains that disagree (for example a reducible chain stuck in part of the support).

Conventions shared with other diagnostics libraries are noted where they matter: a constant series
has no defined effective sample size here (NaN), and fewer than 4 draws per chain give NaN with a
:class:`RuntimeWarning` rather than an exception.

References
----------
.. [1] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
   473-483.
.. [2] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
   Rank-normalization, folding, and localization: an improved R-hat for assessing convergence of
   MCMC (with discussion). *Bayesian Analysis* 16(2), 667-.
.. [3] Flegal, J. M. & Jones, G. L. (2010). Batch means and spectral variance estimators in
   Markov chain Monte Carlo. *Annals of Statistics* 38(2), 1034-1070.
.. [4] Vats, D. & Flegal, J. M. (2022). Lugsail lag windows for estimating time-average
   covariance matrices. *Biometrika* 109(3), 735-750.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft as sp_fft
from scipy import stats

from mcexact._exceptions import DataError

__all__ = [
    "ChainAgreementResult",
    "autocorrelation",
    "chain_agreement",
    "draws_needed",
    "ess",
    "mcse_mean",
    "mcse_proportion",
    "rhat",
]

# Fewer draws per chain than this give NaN and a RuntimeWarning: split chains then hold at least
# two draws each, the least for which a within-chain variance exists.
MIN_DRAWS = 4

# Quantiles whose indicators define the tail ESS (Vehtari et al. 2021, section 4.3).
TAIL_PROBS = (0.05, 0.95)

ESS_METHODS = ("mean", "identity", "bulk", "tail")
RHAT_METHODS = ("rank", "bulk", "folded")
MCSE_METHODS = ("batch", "lugsail", "ess")


# ------------------------------------------------------------------------------------- input

def _as_chains(x: ArrayLike, name: str) -> np.ndarray:
    """Coerce draws to a C-contiguous float64 array shaped (chain, draw)."""
    if (isinstance(x, (list, tuple)) and len(x) > 0
            and all(np.ndim(chain) == 1 for chain in x)):
        # A list of chains, possibly of unequal lengths: keep the first draws of each.
        try:
            chains = [np.asarray(chain, dtype=np.float64) for chain in x]
        except (TypeError, ValueError) as exc:
            raise DataError(f"{name} must hold real numbers: {exc}") from None
        shortest = min(chain.shape[0] for chain in chains)
        arr = np.stack([chain[:shortest] for chain in chains])
    else:
        try:
            arr = np.asarray(x, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise DataError(f"{name} must be an array of real numbers shaped (chain, draw): "
                            f"{exc}") from None
    if arr.ndim == 1:
        arr = arr[np.newaxis, :]
    if arr.ndim != 2:
        raise DataError(f"{name} must be 1-D (one chain) or 2-D (chain, draw); "
                        f"got shape {arr.shape}")
    if arr.size == 0:
        raise DataError(f"{name} holds no draws (shape {arr.shape})")
    if not np.all(np.isfinite(arr)):
        raise DataError(f"{name} contains NaN or infinite values")
    return np.ascontiguousarray(arr)


def _as_indicator(x: ArrayLike, name: str) -> np.ndarray:
    arr = _as_chains(x, name)
    if np.any(arr < 0.0) or np.any(arr > 1.0):
        raise DataError(f"{name} must lie in [0, 1] (0/1 indicators, 0.5 for a mid-p tie)")
    return arr


def _check_method(method: str, allowed: tuple[str, ...]) -> str:
    if method not in allowed:
        raise DataError(f"method must be one of {allowed}; got {method!r}")
    return method


def _too_short(arr: np.ndarray, what: str) -> bool:
    """Warn and return True when chains are too short for `what`."""
    if arr.shape[1] < MIN_DRAWS:
        warnings.warn(f"{what} needs at least {MIN_DRAWS} draws per chain; got "
                      f"{arr.shape[1]}; returning NaN", RuntimeWarning, stacklevel=3)
        return True
    return False


def _is_constant(arr: np.ndarray) -> bool:
    return not np.ptp(arr) > 0.0


# ------------------------------------------------------------------------------------ cores

def _autocovariance(x: np.ndarray) -> np.ndarray:
    """Autocovariances gamma_{c,t} = n^-1 sum_s (x_s - xbar)(x_{s+t} - xbar), t = 0..n-1.

    The divisor n (not n - t) keeps the sequence positive definite (Geyer 1992). Zero padding to
    at least 2n - 1 points turns the FFT's circular correlation into the linear one.
    """
    n = x.shape[1]
    centred = x - x.mean(axis=1, keepdims=True)
    size = sp_fft.next_fast_len(2 * n, real=True)
    spectrum = np.fft.rfft(centred, n=size, axis=1)
    power = spectrum.real ** 2 + spectrum.imag ** 2
    return np.fft.irfft(power, n=size, axis=1)[:, :n] / n


def _split(x: np.ndarray) -> np.ndarray:
    """Halve every chain, dropping the middle draw of an odd-length chain (Vehtari et al. 2021)."""
    half = x.shape[1] // 2
    return np.concatenate([x[:, :half], x[:, x.shape[1] - half:]], axis=0)


def _rank_normalise(x: np.ndarray) -> np.ndarray:
    """Normal scores of the joint ranks, ties given their average rank.

    z = Phi^{-1}((r - 3/8) / (S + 1/4)) with S the number of draws: Blom's offsets, as used by
    Vehtari et al. (2021). Average ranks matter here: mcexact's statistics are integers with many
    ties, and tied draws must share one score.
    """
    ranks = stats.rankdata(x, method="average", axis=None).reshape(x.shape)
    return stats.norm.ppf((ranks - 0.375) / (x.size + 0.25))


def _ess_core(x: np.ndarray) -> float:
    """Effective sample size of the mean of a non-constant (chain, draw) array, >= 2 draws.

    Combined autocorrelation (Vehtari et al. 2021, eq. 10): with W the mean within-chain variance
    (divisor n - 1), var+ = (n - 1)/n W + var(chain means), and gamma_t the chain autocovariances
    averaged over chains,

        rho_t = 1 - (W - gamma_t) / var+,     rho_0 = 1,

    so that disagreement between chains (large var+) lowers the ESS. Then Geyer's (1992) initial
    positive sequence on the pair sums P_j = rho_{2j} + rho_{2j+1}, stopped before the first
    P_j <= 0, made non-increasing (initial monotone sequence), and

        tau = -1 + 2 sum_{j < J} P_j + rho_{2J}^+,     ESS = S / tau.

    Two details follow the reference implementation that accompanies Vehtari et al. (2021), so
    that the values agree with other libraries (tests compare with arviz_stats 0.8.0): the even
    lag rho_{2J} opening the first discarded pair enters once when positive (it is kept when its
    pair was still non-negative, which happens only where the pair scan runs out of lags at
    J = ceil((n - 4) / 2)), and tau is bounded below by 1 / log10(S), which caps the ESS of
    antithetic chains at S log10(S).
    """
    n_chain, n = x.shape
    total = n_chain * n
    acov = _autocovariance(x).mean(axis=0)
    within = acov[0] * n / (n - 1.0)
    var_plus = acov[0]
    if n_chain > 1:
        var_plus += np.var(x.mean(axis=1), ddof=1)
    rho = 1.0 - (within - acov) / var_plus
    rho[0] = 1.0

    # Pair j >= 1 is scanned only while 2j - 1 < n - 3 (the reference implementation's loop
    # bound), i.e. j <= ceil((n - 4) / 2).
    last_pair = max(0, -(-(n - 4) // 2))
    pairs = rho[0:2 * last_pair + 2:2] + rho[1:2 * last_pair + 2:2]
    non_positive = np.flatnonzero(pairs <= 0.0)
    stop = min(int(non_positive[0]), last_pair) if non_positive.size else last_pair
    kept = np.minimum.accumulate(pairs[:stop])
    if stop == 0:
        tail = 1.0
    else:
        even = rho[2 * stop]
        tail = even if (even > 0.0 or pairs[stop] >= 0.0) else 0.0
    tau = -1.0 + 2.0 * float(np.sum(kept)) + float(tail)
    tau = max(tau, 1.0 / math.log10(total))
    return total / tau


def _rhat_core(x: np.ndarray) -> float:
    """Classic R-hat of a (chain, draw) array: sqrt(((n - 1)/n W + B/n) / W).

    B/n is the variance of the chain means (divisor m - 1) and W the mean within-chain variance
    (divisor n - 1). NaN when every draw is equal, infinity when each chain is constant but the
    chains differ.
    """
    n = x.shape[1]
    within = float(np.mean(np.var(x, axis=1, ddof=1)))
    between = float(np.var(x.mean(axis=1), ddof=1))
    if within == 0.0:
        return math.nan if between == 0.0 else math.inf
    return math.sqrt(((n - 1.0) / n * within + between) / within)


# ----------------------------------------------------------------------------------- public

def autocorrelation(x: ArrayLike, max_lag: int | None = None) -> np.ndarray:
    """Autocorrelation of every chain, computed by FFT.

    Parameters
    ----------
    x : array_like
        Draws shaped ``(chain, draw)``; a 1-D array is one chain; a list of chains of unequal
        lengths is truncated to the shortest.
    max_lag : int, optional
        Largest lag returned, ``0 <= max_lag < n_draws``; default ``n_draws - 1``.

    Returns
    -------
    numpy.ndarray
        Shape ``(chain, max_lag + 1)``: ``rho[c, t] = gamma_{c,t} / gamma_{c,0}`` with the
        autocovariance ``gamma_{c,t} = n^{-1} sum_s (x_s - xbar)(x_{s+t} - xbar)`` (divisor
        ``n``, which keeps the sequence positive definite; Geyer 1992). A constant chain gives
        a row of NaN.

    Raises
    ------
    DataError
        If `x` is not 1-D or 2-D, is empty or not finite, or `max_lag` is out of range.

    References
    ----------
    .. [1] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.

    Examples
    --------
    >>> import numpy as np
    >>> from mcexact.diagnostics import autocorrelation
    >>> autocorrelation([1.0, 2.0, 3.0, 4.0])
    array([[ 1.  ,  0.25, -0.3 , -0.45]])
    """
    arr = _as_chains(x, "x")
    n = arr.shape[1]
    if max_lag is None:
        max_lag = n - 1
    if isinstance(max_lag, bool) or not isinstance(max_lag, (int, np.integer)) \
            or not 0 <= max_lag < n:
        raise DataError(f"max_lag must be an integer in [0, {n - 1}]; got {max_lag!r}")
    acov = _autocovariance(arr)[:, :max_lag + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = acov / acov[:, :1]
    rho[acov[:, 0] == 0.0] = np.nan
    return rho


def ess(x: ArrayLike, method: Literal["mean", "identity", "bulk", "tail"] = "mean") -> float:
    """Effective sample size of draws from one or more chains.

    Parameters
    ----------
    x : array_like
        Draws shaped ``(chain, draw)``; a 1-D array is one chain; a list of chains of unequal
        lengths is truncated to the shortest.
    method : {"mean", "identity", "bulk", "tail"}
        - ``"mean"``: raw values, every chain split in half (the middle draw of an odd-length
          chain is dropped), so that drift within a chain lowers the ESS: the ESS for the mean.
        - ``"identity"``: raw values, chains as given.
        - ``"bulk"``: rank-normalised split chains (average ranks for ties; Blom offsets), the
          ESS for the centre of the distribution whatever its tails.
        - ``"tail"``: the smaller ESS of the indicators ``x <= q05`` and ``x <= q95`` (split
          chains), with ``q`` the 5% and 95% sample quantiles of all draws (linear interpolation,
          Hyndman & Fan type 7).

    Returns
    -------
    float
        The effective sample size ``S / tau`` (``S`` draws in the chains used), which may exceed
        ``S`` for antithetic chains (bounded by ``S log10 S``). NaN when the series (after
        splitting) is constant: its autocorrelation is undefined. Other libraries return ``S``
        there (arviz_stats 0.8.0 does); NaN keeps "no information about mixing" apart from "as
        good as independent". In ``"tail"``, an indicator that is constant although the draws
        are not (ties at the maximum make ``x <= q95`` always true) counts as ``S`` draws: that
        tail then carries no uncertainty. NaN with a :class:`RuntimeWarning` when there are
        fewer than 4 draws per chain.

    Raises
    ------
    DataError
        If `x` is not 1-D or 2-D, is empty or not finite, or `method` is unknown.

    Notes
    -----
    With ``m`` chains of ``n`` draws, ``W`` the mean within-chain variance and ``var+`` the
    pooled variance (within plus between chains), the combined autocorrelation is
    ``rho_t = 1 - (W - gamma_t) / var+`` with ``gamma_t`` the chain autocovariances averaged over
    chains (Vehtari et al. 2021, eq. 10). The integrated autocorrelation time
    ``tau = -1 + 2 sum_j P_j`` sums the pair sums ``P_j = rho_{2j} + rho_{2j+1}`` up to the
    first non-positive one (Geyer's initial positive sequence), forced non-increasing (initial
    monotone sequence; Geyer 1992). Two conventions of the reference implementation of Vehtari
    et al. (2021) are kept so that results agree with other libraries: the even lag opening the
    first discarded pair enters once when positive, and ``tau >= 1 / log10(S)``.

    References
    ----------
    .. [1] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.
    .. [2] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
       Rank-normalization, folding, and localization: an improved R-hat for assessing
       convergence of MCMC (with discussion). *Bayesian Analysis* 16(2), 667-.

    Examples
    --------
    >>> import numpy as np
    >>> from mcexact.diagnostics import ess
    >>> rng = np.random.default_rng(0)
    >>> draws = rng.normal(size=(4, 1000))
    >>> 3500 < ess(draws) < 4500      # independent draws: about 4000
    True
    """
    method = _check_method(method, ESS_METHODS)
    arr = _as_chains(x, "x")
    if _too_short(arr, "ess"):
        return math.nan
    if _is_constant(arr):
        return math.nan
    if method == "identity":
        return _ess_core(arr)
    if method == "mean":
        split = _split(arr)
        return math.nan if _is_constant(split) else _ess_core(split)
    if method == "bulk":
        split = _split(arr)
        return math.nan if _is_constant(split) else _ess_core(_rank_normalise(split))
    values = []
    for q in np.quantile(arr, TAIL_PROBS):
        indicator = _split((arr <= q).astype(np.float64))
        values.append(float(indicator.size) if _is_constant(indicator) else _ess_core(indicator))
    return min(values)


def rhat(x: ArrayLike, method: Literal["rank", "bulk", "folded"] = "rank") -> float:
    """Rank-normalised split R-hat (potential scale reduction factor).

    Parameters
    ----------
    x : array_like
        Draws shaped ``(chain, draw)``; a 1-D array is one chain (its two halves are compared);
        a list of chains of unequal lengths is truncated to the shortest.
    method : {"rank", "bulk", "folded"}
        ``"bulk"``: R-hat of the rank-normalised split chains (sensitive to chains with
        different locations). ``"folded"``: the same on the folded draws ``|x - median|``
        (sensitive to chains with different spread). ``"rank"`` (default): the larger of the
        two, as recommended by Vehtari et al. (2021).

    Returns
    -------
    float
        R-hat, near 1 when the chains agree; values above 1.01 call for more or better chains.
        NaN when every draw is equal; infinity when each split chain is constant but they
        differ. For ``"rank"``, a folded series that is constant (a 0/1 series split evenly,
        whose median is 0.5) is skipped and the bulk value returned. NaN with a
        :class:`RuntimeWarning` when there are fewer than 4 draws per chain.

    Raises
    ------
    DataError
        If `x` is not 1-D or 2-D, is empty or not finite, or `method` is unknown.

    Notes
    -----
    Chains are split in half (the middle draw of an odd-length chain is dropped), so one chain
    gives two; other libraries (arviz_stats 0.8.0) return NaN for a single chain instead. All
    split draws are ranked jointly, ties getting their average rank, and mapped to normal scores
    ``z = Phi^{-1}((r - 3/8) / (S + 1/4))``. With ``n`` draws per split chain, ``W`` the mean
    within-chain variance and ``B/n`` the variance of the chain means of ``z``,
    ``R = sqrt(((n - 1)/n W + B/n) / W)``. The folded version ranks ``|x - median(x)|``, the
    median taken over the split draws.

    References
    ----------
    .. [1] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
       Rank-normalization, folding, and localization: an improved R-hat for assessing
       convergence of MCMC (with discussion). *Bayesian Analysis* 16(2), 667-.

    Examples
    --------
    >>> import numpy as np
    >>> from mcexact.diagnostics import rhat
    >>> rng = np.random.default_rng(0)
    >>> draws = rng.normal(size=(4, 1000))
    >>> rhat(draws) < 1.01
    True
    >>> draws[0] += 1.0               # one chain elsewhere
    >>> rhat(draws) > 1.05
    True
    """
    method = _check_method(method, RHAT_METHODS)
    arr = _as_chains(x, "x")
    if _too_short(arr, "rhat"):
        return math.nan
    split = _split(arr)
    if _is_constant(split):
        return math.nan
    bulk = _rhat_core(_rank_normalise(split)) if method != "folded" else math.nan
    if method == "bulk":
        return bulk
    folded_draws = np.abs(split - np.median(split))
    folded = math.nan if _is_constant(folded_draws) else _rhat_core(_rank_normalise(folded_draws))
    if method == "folded":
        return folded
    return bulk if math.isnan(folded) else max(bulk, folded)


def mcse_mean(x: ArrayLike, method: Literal["batch", "lugsail", "ess"] = "batch") -> float:
    """Monte Carlo standard error of the mean of all draws.

    Parameters
    ----------
    x : array_like
        Draws shaped ``(chain, draw)``; a 1-D array is one chain; a list of chains of unequal
        lengths is truncated to the shortest.
    method : {"batch", "lugsail", "ess"}
        ``"batch"`` (default): batch means (Flegal & Jones 2010). Every chain of ``n`` draws is
        cut into ``a = n // b`` batches of ``b = floor(sqrt(n))`` draws (the last ``n - a b``
        draws of a chain join no batch); with ``Y_k`` the ``K = m a`` batch means of all chains
        and ``Ybar`` their mean, ``sigma^2_b = b / (K - 1) sum_k (Y_k - Ybar)^2`` and
        ``MCSE = sigma_b / sqrt(N)``, ``N`` the number of draws. Pooling the batches of all
        chains around one grand mean lets disagreement between chains inflate the error.
        ``"lugsail"``: lugsail batch means (Vats & Flegal 2022, r = 3, c = 1/2),
        ``sigma^2 = 2 sigma^2_b - sigma^2_{b'}`` with ``b' = max(1, b // 3)``. Batch means
        underestimate the variance by about a multiple of ``1 / b`` when the autocorrelation is
        long against the batch; the short batches' larger bias, subtracted, offsets it. When
        the difference is not positive (short or nearly independent series), ``sigma^2_b``.
        ``"ess"``: ``sd / sqrt(ess(x, method="mean"))`` with ``sd`` the standard deviation of
        all draws (divisor ``N - 1``).

    Returns
    -------
    float
        The MCSE. For independent draws all methods approach ``sd / sqrt(N)``. A constant
        series gives 0 (no spread; for a p-value indicator use :func:`mcse_proportion`, which
        never returns 0). NaN with a :class:`RuntimeWarning` when there are fewer than 4 draws
        per chain.

    Raises
    ------
    DataError
        If `x` is not 1-D or 2-D, is empty or not finite, or `method` is unknown.

    References
    ----------
    .. [1] Flegal, J. M. & Jones, G. L. (2010). Batch means and spectral variance estimators in
       Markov chain Monte Carlo. *Annals of Statistics* 38(2), 1034-1070.
    .. [2] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.
    .. [3] Vats, D. & Flegal, J. M. (2022). Lugsail lag windows for estimating time-average
       covariance matrices. *Biometrika* 109(3), 735-750.

    Examples
    --------
    >>> import numpy as np
    >>> from mcexact.diagnostics import mcse_mean
    >>> rng = np.random.default_rng(0)
    >>> draws = rng.normal(size=(4, 2500))   # sd 1, N = 10000: sd / sqrt(N) = 0.01
    >>> 0.009 < mcse_mean(draws) < 0.011
    True
    """
    method = _check_method(method, MCSE_METHODS)
    arr = _as_chains(x, "x")
    if _too_short(arr, "mcse_mean"):
        return math.nan
    if _is_constant(arr):
        return 0.0
    total = arr.size
    if method == "ess":
        return float(np.std(arr, ddof=1)) / math.sqrt(ess(arr, method="mean"))
    size = math.isqrt(arr.shape[1])
    sigma2 = _batch_variance(arr, size)
    if method == "lugsail":
        lugsail = 2.0 * sigma2 - _batch_variance(arr, max(1, size // 3))
        if lugsail > 0.0:
            sigma2 = lugsail
    return math.sqrt(sigma2 / total)


def _batch_variance(arr: np.ndarray, size: int) -> float:
    """Batch-means estimate ``b / (K - 1) sum_k (Y_k - Ybar)^2`` of the asymptotic variance, from
    the ``K`` batches of `size` draws of all chains (a chain's last ``n % size`` draws left out)."""
    n_batches = arr.shape[1] // size
    batch_means = arr[:, :n_batches * size].reshape(arr.shape[0] * n_batches, size).mean(axis=1)
    return size * float(np.var(batch_means, ddof=1))


def mcse_proportion(indicator: ArrayLike, iid: bool = False) -> float:
    """Monte Carlo standard error of a proportion estimated by the mean of an indicator.

    Parameters
    ----------
    indicator : array_like
        Values in [0, 1] shaped ``(chain, draw)``: ``1{stat >= observed}`` per draw, or 0.5 for
        a tie in a mid-p-value. A 1-D array is one chain; a list of chains of unequal lengths is
        truncated to the shortest.
    iid : bool
        True for independent draws (the direct sampler): ``sqrt(p (1 - p) / N)``, the binomial
        value, an upper bound for any [0, 1] indicator. False (default) for Markov chains:
        ``sqrt(v / ESS)`` with ``v`` the variance of the indicator (divisor ``N - 1``) and
        ``ESS = ess(indicator, method="mean")`` (Geyer 1992; Vehtari et al. 2021).

    Returns
    -------
    float
        The MCSE. The variance is floored at one draw's resolution,
        ``1/(N + 2) (1 - 1/(N + 2))``, so that an estimate of 0 or 1 never gets zero error. A
        constant indicator has no ESS of its own; the floor is then divided by ``N``, the
        independent-draws value, which is optimistic for a slowly mixing chain (check
        :func:`chain_agreement`). NaN with a :class:`RuntimeWarning` for Markov chains with
        fewer than 4 draws per chain.

    Raises
    ------
    DataError
        If `indicator` is not 1-D or 2-D, is empty or not finite, or has values outside [0, 1].

    References
    ----------
    .. [1] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.
    .. [2] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
       Rank-normalization, folding, and localization: an improved R-hat for assessing
       convergence of MCMC (with discussion). *Bayesian Analysis* 16(2), 667-.

    Examples
    --------
    >>> from mcexact.diagnostics import mcse_proportion
    >>> round(mcse_proportion([0, 0, 0, 1] * 25, iid=True), 6)    # sqrt(0.25 * 0.75 / 100)
    0.043301
    """
    arr = _as_indicator(indicator, "indicator")
    total = arr.size
    resolution = 1.0 / (total + 2.0)
    floor = resolution * (1.0 - resolution)
    if iid:
        p = float(arr.mean())
        return math.sqrt(max(p * (1.0 - p), floor) / total)
    if _too_short(arr, "mcse_proportion"):
        return math.nan
    if _is_constant(arr):
        return math.sqrt(floor / total)
    effective = ess(arr, method="mean")
    if math.isnan(effective):
        # constant once split (the only varying draw was the dropped middle one)
        effective = float(total)
    return math.sqrt(max(float(np.var(arr, ddof=1)), floor) / effective)


def draws_needed(p: float, target_mcse: float, ess_per_draw: float = 1.0) -> int:
    """Draws needed so that the MCSE of a proportion near `p` is at most `target_mcse`.

    Parameters
    ----------
    p : float
        The proportion (p-value) expected, in [0, 1].
    target_mcse : float
        The standard error wanted, > 0. For a confidence half-width ``h`` at level ``1 - alpha``
        pass ``h / z_{1 - alpha/2}``.
    ess_per_draw : float
        Effective draws per draw, ``ESS / N = 1 / tau`` (1 for independent draws).

    Returns
    -------
    int
        The smallest ``N >= 1`` with ``sqrt(p (1 - p) / (N ess_per_draw)) <= target_mcse``,
        i.e. ``ceil(p (1 - p) / (target_mcse^2 ess_per_draw))`` (METHODS section 6.1). A
        relative allowance of 1e-12 keeps the float rounding of an exact integer from adding a
        draw.

    Raises
    ------
    DataError
        If an argument is out of range.

    Examples
    --------
    >>> from mcexact.diagnostics import draws_needed
    >>> draws_needed(0.05, 0.005)
    1900
    >>> draws_needed(0.05, 0.005, ess_per_draw=0.25)
    7600
    """
    if not 0.0 <= p <= 1.0:
        raise DataError(f"p must lie in [0, 1]; got {p!r}")
    if not (math.isfinite(target_mcse) and target_mcse > 0.0):
        raise DataError(f"target_mcse must be positive and finite; got {target_mcse!r}")
    if not (math.isfinite(ess_per_draw) and ess_per_draw > 0.0):
        raise DataError(f"ess_per_draw must be positive and finite; got {ess_per_draw!r}")
    exact = p * (1.0 - p) / (target_mcse ** 2 * ess_per_draw)
    return max(1, math.ceil(exact * (1.0 - 1e-12)))


@dataclass(frozen=True)
class ChainAgreementResult:
    """Between-chain homogeneity check of a proportion (see :func:`chain_agreement`).

    Attributes
    ----------
    estimates : numpy.ndarray
        Per-chain proportion (mean of the indicator).
    ess : numpy.ndarray
        Per-chain effective sample size used as the chain's weight.
    pooled : float
        ESS-weighted mean of the per-chain estimates.
    z_scores : numpy.ndarray
        Per-chain standardised deviation ``(estimate - pooled) sqrt(ess / v)``; the chain with
        the largest ``|z|`` disagrees most.
    statistic : float
        ``sum(z_scores ** 2)``, approximately chi-square with ``df`` degrees of freedom when
        the chains agree.
    df : int
        Number of chains minus one.
    pvalue : float
        Upper tail probability of `statistic` under chi-square with `df` degrees of freedom.
    """

    estimates: np.ndarray
    ess: np.ndarray
    pooled: float
    z_scores: np.ndarray
    statistic: float
    df: int
    pvalue: float


def chain_agreement(indicators: ArrayLike) -> ChainAgreementResult:
    """Test whether several chains estimate the same proportion.

    A chain of a reducible sampler (for example a block-move chain that never leaves one part of
    the support) can look converged on its own while estimating another p-value than its
    neighbours; comparing the chains' estimates, each weighted by its own effective sample size,
    flags it.

    Parameters
    ----------
    indicators : array_like
        Values in [0, 1] shaped ``(chain, draw)`` with at least 2 chains (``1{stat >= observed}``
        per draw, 0.5 for a mid-p tie). A list of chains of unequal lengths is truncated to the
        shortest.

    Returns
    -------
    ChainAgreementResult
        Per-chain estimates, weights, z-scores, the statistic and its p-value; a small p-value
        (say below 0.01) means the chains disagree by more than their Monte Carlo error allows.
        With fewer than 4 draws per chain the statistic and p-value are NaN (with a
        :class:`RuntimeWarning`).

    Raises
    ------
    DataError
        If `indicators` has fewer than 2 chains, is empty or not finite, or has values outside
        [0, 1].

    Notes
    -----
    With ``m`` chains, chain estimates ``p_c``, per-chain effective sample sizes ``E_c``
    (Geyer's initial monotone sequence on the chain alone, ``ess(chain, method="identity")``)
    and ``v`` the variance of all draws pooled (divisor ``N - 1``, floored at
    ``1/(N + 2) (1 - 1/(N + 2))`` as in :func:`mcse_proportion`): if the chains share one
    stationary distribution, ``p_c`` is approximately normal with variance ``v / E_c``, so with
    the weighted mean ``pbar = sum E_c p_c / sum E_c``

        X^2 = sum_c E_c (p_c - pbar)^2 / v  ~  chi-square(m - 1),

    the Pearson homogeneity statistic of a 2 x m table with effective counts in place of draws.
    A chain whose indicator is constant has no ESS of its own (zero variance); it is given the
    median ``E_c / n`` of the other chains times ``n`` (``n`` when no chain has one). The
    approximation needs tens of effective draws per chain and ``pbar E_c`` not too small; the
    ESS estimates are themselves noisy, so treat the p-value as a flag, not an exact level.

    References
    ----------
    .. [1] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. *Statistical Science* 7,
       473-483.

    Examples
    --------
    >>> import numpy as np
    >>> from mcexact.diagnostics import chain_agreement
    >>> rng = np.random.default_rng(1)
    >>> ind = (rng.random((4, 2000)) < 0.3).astype(float)
    >>> ind[3] = rng.random(2000) < 0.1     # one chain stuck where the p-value is smaller
    >>> res = chain_agreement(ind)
    >>> res.pvalue < 1e-6, int(np.argmax(np.abs(res.z_scores)))
    (True, 3)
    """
    arr = _as_indicator(indicators, "indicators")
    n_chain, n = arr.shape
    if n_chain < 2:
        raise DataError(f"indicators must hold at least 2 chains; got {n_chain}")
    estimates = arr.mean(axis=1)
    df = n_chain - 1
    if _too_short(arr, "chain_agreement"):
        nan_chains = np.full(n_chain, np.nan)
        return ChainAgreementResult(estimates, nan_chains, math.nan, nan_chains.copy(),
                                    math.nan, df, math.nan)
    per_chain = np.array([math.nan if _is_constant(arr[c:c + 1]) else _ess_core(arr[c:c + 1])
                          for c in range(n_chain)])
    known = np.isfinite(per_chain)
    per_chain[~known] = (float(np.median(per_chain[known] / n)) * n) if known.any() else float(n)
    total = arr.size
    resolution = 1.0 / (total + 2.0)
    variance = max(float(np.var(arr, ddof=1)), resolution * (1.0 - resolution))
    pooled = float(np.sum(per_chain * estimates) / np.sum(per_chain))
    z_scores = (estimates - pooled) * np.sqrt(per_chain / variance)
    statistic = float(np.sum(z_scores ** 2))
    return ChainAgreementResult(estimates=estimates, ess=per_chain, pooled=pooled,
                                z_scores=z_scores, statistic=statistic, df=df,
                                pvalue=float(stats.chi2.sf(statistic, df)))
