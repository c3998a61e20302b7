"""Figures of conditional distributions and of the Monte Carlo draws behind them.

Every function takes a :class:`~mcexact.distribution.ConditionalDistribution` and returns a
:class:`matplotlib.figure.Figure` built with the object-oriented API; nothing is shown or saved,
and no pyplot state is touched (call ``fig.savefig(...)``, or display the figure in a notebook).
matplotlib is imported only when a function is called, so ``import mcexact`` works without it.

- :func:`plot_trace`: the drawn statistic along each chain.
- :func:`plot_running_pvalue`: a Monte Carlo p-value as draws accumulate, with its error band.
- :func:`plot_autocorrelation`: autocorrelation of the drawn statistic within each chain.
- :func:`plot_null_distribution`: the conditional probabilities of one statistic, with the
  observed value and its tail.
- :func:`plot_joint`: two statistics at once, as a grid of log probabilities.

Statistics are shown in the user's units: a support value on the coded integer scale is divided
by the column's ``scales`` entry, so an axis reads as the sum of the covariate over the events.

Examples
--------
>>> import mcexact
>>> from mcexact.plots import plot_null_distribution
>>> design = mcexact.Design.from_formula(mcexact.load_demo("small"),
...                                      "elevation ~ dose_mg + age", strata="site")
>>> fig = plot_null_distribution(mcexact.exact_distribution(design), "dose_mg")
>>> fig.axes[0].get_xlabel()
'T(dose_mg): sum of dose_mg over the events'
>>> fig.savefig("dose_mg_null.png")  # doctest: +SKIP
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

import numpy as np
from scipy.special import logsumexp

from mcexact._exceptions import DataError
from mcexact.distribution import ConditionalDistribution
from mcexact.inference import TIE_RTOL

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = [
    "plot_trace",
    "plot_running_pvalue",
    "plot_autocorrelation",
    "plot_null_distribution",
    "plot_joint",
]

# Colours of this module (colour-blind-safe choices from the Okabe & Ito 2008 palette).
_CHAIN_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
                  "#000000")
_BAR_COLOUR = "#9DB4C8"
_TAIL_COLOUR = "#D55E00"
_OBSERVED_COLOUR = "#4B0F6B"
_EXACT_COLOUR = "#009E73"

# Curves of running estimates are evaluated at no more than this many draw counts: more points
# than a figure can show, and it keeps the batch-means band cheap for runs of millions of draws.
_MAX_CURVE_POINTS = 2000


# -- shared helpers -------------------------------------------------------------------------------

def _new_figure(figsize: tuple[float, float]) -> Figure:
    """A figure with constrained layout, importing matplotlib only now."""
    try:
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise DataError("mcexact.plots needs matplotlib, which is not installed "
                        "(pip install matplotlib)") from exc
    return Figure(figsize=figsize, layout="constrained")


def _check_distribution(dist) -> ConditionalDistribution:
    if not isinstance(dist, ConditionalDistribution):
        raise DataError(f"dist must be a ConditionalDistribution, got {type(dist).__name__}")
    return dist


def _needs_draws(dist: ConditionalDistribution, what: str) -> None:
    if not dist.is_monte_carlo:
        raise DataError(f"{what} needs a Monte Carlo distribution (one with draws); this "
                        "distribution is exact and has no chains")
    if dist.n_draws == 0:
        raise DataError(f"{what} needs draws, and this distribution has none (a slice that no "
                        "draw fell on?)")


def _column_index(dist: ConditionalDistribution, column, argument: str = "column") -> int:
    """Index of `column` (an index or a name) among the distribution's columns."""
    names = list(dist.names)
    if isinstance(column, (int, np.integer)) and not isinstance(column, (bool, np.bool_)):
        if not 0 <= column < dist.n_columns:
            raise DataError(f"{argument} {int(column)} is out of range: the distribution has "
                            f"columns 0..{dist.n_columns - 1} ({', '.join(names)})")
        return int(column)
    if isinstance(column, str) and column in names:
        return names.index(column)
    raise DataError(f"{argument} {column!r} is not a column of the distribution; columns are "
                    f"{names} (or their indices 0..{dist.n_columns - 1})")


def _in_units(dist: ConditionalDistribution, j: int, coded) -> np.ndarray:
    """Coded integer statistic(s) of column `j` in the user's units (divided by the scale)."""
    return np.asarray(coded, dtype=np.float64) / float(dist.scales[j])


def _statistic_label(dist: ConditionalDistribution, j: int) -> str:
    return f"T({dist.names[j]}): sum of {dist.names[j]} over the events"


def _given_text(dist: ConditionalDistribution, original: ConditionalDistribution) -> str:
    """``"given age = 370"`` for a slice of `original`, or ``""``."""
    fixed = dist.info.get("conditioned_on") or {}
    if not fixed:
        return ""
    parts = []
    for name, value in fixed.items():
        j = list(original.names).index(name) if name in original.names else None
        shown = value if j is None else float(_in_units(original, j, value))
        parts.append(f"{name} = {shown:g}")
    return "given " + ", ".join(parts)


def _chain_values(dist: ConditionalDistribution, j: int) -> list[np.ndarray]:
    """Per chain, the drawn statistic of column `j` in the user's units, in draw order."""
    return [_in_units(dist, j, dist.support[idx, j]) for idx in dist.chain_index]


def _chain_colour(c: int) -> str:
    return _CHAIN_COLOURS[c % len(_CHAIN_COLOURS)]


def _curve_points(n: int) -> np.ndarray:
    """Draw counts 1..n at which running curves are evaluated (all of them up to the cap)."""
    if n <= _MAX_CURVE_POINTS:
        return np.arange(1, n + 1)
    return np.unique(np.linspace(1, n, _MAX_CURVE_POINTS).round().astype(np.int64))


def _sample_size_text(dist: ConditionalDistribution) -> str:
    n_chains = len(dist.chain_index)
    kind = "independent stream" if dist.iid else "chain"
    return f"{dist.n_draws:,} draws, {n_chains} {kind}{'s' if n_chains != 1 else ''}"


# -- trace ----------------------------------------------------------------------------------------

def plot_trace(dist: ConditionalDistribution, column: int | str = 0) -> Figure:
    """Draw-by-draw path of one statistic along each Monte Carlo chain.

    One step line per chain (the statistic is an integer count, so it moves in jumps) and a
    horizontal line at the observed value. Chains that stay apart, or that never reach the
    observed value's region, point to poor mixing.

    Parameters
    ----------
    dist : ConditionalDistribution
        A Monte Carlo distribution (``dist.chain_index`` not None).
    column : int or str, default 0
        The statistic shown, by index or name.

    Returns
    -------
    matplotlib.figure.Figure
        One axes; line ``c`` holds chain ``c``: x the draw number (1, 2, ... as recorded, after
        warm-up and thinning), y ``dist.support[idx, column] / dist.scales[column]``.

    Raises
    ------
    DataError
        If matplotlib is missing, `dist` is exact or has no draws, or `column` is unknown.
    """
    dist = _check_distribution(dist)
    j = _column_index(dist, column)
    _needs_draws(dist, "a trace plot")
    fig = _new_figure((8.0, 4.0))
    ax = fig.add_subplot()
    for c, values in enumerate(_chain_values(dist, j)):
        ax.plot(np.arange(1, values.shape[0] + 1), values, drawstyle="steps-post",
                linewidth=0.8, alpha=0.85, color=_chain_colour(c), label=f"chain {c + 1}")
    observed = float(_in_units(dist, j, dist.observed[j]))
    ax.axhline(observed, color=_OBSERVED_COLOUR, linestyle="--", linewidth=1.6,
               label=f"observed value {observed:g}", gid="observed")
    ax.set_xlabel("draw number within the chain (as recorded)")
    ax.set_ylabel(_statistic_label(dist, j))
    ax.set_title(f"Path of the {dist.names[j]} statistic along each chain\n"
                 f"({_sample_size_text(dist)})")
    # Below the axes, so that it never hides a path.
    fig.legend(loc="outside lower center", fontsize="small", ncols=5)
    return fig


# -- running p-value ------------------------------------------------------------------------------

def _round_robin(lengths: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Chain and within-chain position of each pooled draw, taking the chains in turn.

    The pooled order is draw 1 of every chain, then draw 2 of every chain, and so on; a chain
    that has run out is skipped. So every prefix of the pooled series uses all chains evenly.
    """
    chain = np.concatenate([np.full(n, c, dtype=np.int64) for c, n in enumerate(lengths)])
    position = np.concatenate([np.arange(n, dtype=np.int64) for n in lengths])
    order = np.lexsort((chain, position))
    return chain[order], position[order]


def _binomial_mcse(p: np.ndarray, n: np.ndarray) -> np.ndarray:
    """The error :func:`mcexact.montecarlo.mcse_of_indicator` gives a proportion `p` of `n`
    independent draws: the Agresti & Coull (1998) variance with two pseudo-draws at 0 and at 1,
    ``p~ (1 - p~) / (n + 4)``, ``p~ = (n p + 2) / (n + 4)``, so the band stays open at 0 or 1."""
    from mcexact.montecarlo import _PSEUDO_DRAWS

    total = n + 2.0 * _PSEUDO_DRAWS
    shrunk = (n * p + _PSEUDO_DRAWS) / total
    return np.sqrt(shrunk * (1.0 - shrunk) / total)


def _prefix_mcse(dist: ConditionalDistribution, values: np.ndarray,
                 used: np.ndarray) -> np.ndarray:
    """Monte Carlo error of the pooled mean over the first ``used[k, c]`` draws of each chain c:
    :func:`mcexact.montecarlo.mcse_of_indicator` applied to every prefix, so the band's last point
    is the error the results report. Evaluated on at most 60 prefixes (log-spaced) and
    interpolated between them; NaN where a prefix is too short."""
    import dataclasses

    from mcexact.montecarlo import mcse_of_indicator

    n_points = used.shape[0]
    picks = np.unique(np.r_[np.geomspace(1, n_points, 60).astype(int) - 1, n_points - 1])
    at = np.full(picks.shape[0], np.nan)
    for i, k in enumerate(picks):
        prefix = dataclasses.replace(dist, chain_index=tuple(
            idx[:int(used[k, c])] for c, idx in enumerate(dist.chain_index)), iid=False)
        if min(int(x) for x in used[k]) >= 4:
            at[i] = mcse_of_indicator(prefix, values)
    ok = np.isfinite(at)
    out = np.full(n_points, np.nan)
    if ok.any():
        first = picks[ok][0]
        out[first:] = np.interp(np.arange(first, n_points), picks[ok], at[ok])
    return out


def _indicator(dist: ConditionalDistribution, more, tie, mid_p: bool) -> np.ndarray:
    arrays = []
    for name, a in (("more", more), ("tie", tie)):
        a = np.asarray(a)
        if a.shape != (dist.n_points,):
            raise DataError(f"{name} must have one entry per support point ({dist.n_points}), "
                            f"got shape {a.shape}")
        a = a.astype(np.float64)
        if not np.all((a == 0) | (a == 1)):
            raise DataError(f"{name} must hold booleans (or 0/1) per support point")
        arrays.append(a)
    more_f, tie_f = arrays
    if np.any(more_f * tie_f):
        raise DataError("a support point cannot be both more extreme than and tied with the "
                        "observed value (more and tie overlap)")
    return more_f + (0.5 if mid_p else 1.0) * tie_f


def plot_running_pvalue(dist: ConditionalDistribution, more, tie, *, exact: float | None = None,
                        mid_p: bool = False) -> Figure:
    """A Monte Carlo p-value as the draws accumulate, with a band of two standard errors.

    Each draw contributes the indicator ``more[idx] + tie[idx]`` (``+ 0.5 * tie[idx]`` for the
    mid-p-value, Lancaster 1961). The thick curve is the running mean over all chains pooled,
    taking the chains in turn (draw 1 of every chain, then draw 2, ...), so every prefix weighs
    the chains evenly; thin curves are the running means of single chains, placed at the pooled
    positions of their draws. The band is the pooled estimate +/- 2 MCSE, where the MCSE of the
    first n pooled draws is

    - independent draws (``dist.iid``): ``sqrt(p~ (1 - p~) / (n + 4))`` with ``p~ = (n p + 2) /
      (n + 4)``, p the running estimate (two pseudo-draws at 0 and at 1, Agresti & Coull 1998, as
      :func:`mcexact.montecarlo.mcse_of_indicator` does), so the band stays open at 0;
    - Markov chains: the error of :func:`mcexact.montecarlo.mcse_of_indicator` (lugsail batch
      means or the multi-chain effective sample size, the larger, with the same pseudo-draws) on
      each prefix, so the band's last point is two of the MCSEs that function gives for all the
      draws. The band is absent (NaN) until every chain has four draws.

    The band is clipped to [0, 1]. When the first 10% of the draws reach over 4 times higher than
    the rest (a small p-value, whose early band is wide), the y axis is fitted to the rest, and a note (gid
    ``"clipped-note"``) says that the early values run off the top. The legend sits below the
    axes.

    Curves are evaluated at every draw count up to 2000 draws, and at 2000 evenly spaced counts
    beyond. The x axis is logarithmic, so early instability and late drift are both visible.

    Parameters
    ----------
    dist : ConditionalDistribution
        A Monte Carlo distribution.
    more, tie : array of bool, shape (dist.n_points,)
        Per support point: strictly more extreme than observed, tied with it (as in the
        :class:`~mcexact.inference.TestResult` of :func:`mcexact.inference.joint_tests`).
    exact : float, optional
        An exact p-value to draw as a horizontal reference line.
    mid_p : bool, default False
        Count ties as one half (mid-p-value) instead of one.

    Returns
    -------
    matplotlib.figure.Figure
        One axes. The pooled curve has gid ``"pooled"``, the band edges gids ``"mcse-upper"`` and
        ``"mcse-lower"``, the exact line gid ``"exact"``; chain curves are labelled
        ``"chain 1"``, ... (only when there are several chains).

    Raises
    ------
    DataError
        If matplotlib is missing, `dist` is exact, `more`/`tie` do not match the support, or
        `exact` is not a probability.

    References
    ----------
    Flegal, J. M. & Jones, G. L. (2010). Batch means and spectral variance estimators in Markov
    chain Monte Carlo. Annals of Statistics 38, 1034-1070.
    Lancaster, H. O. (1961). Significance tests in discrete distributions. JASA 56, 223-234.
    """
    dist = _check_distribution(dist)
    _needs_draws(dist, "a running p-value plot")
    values = _indicator(dist, more, tie, mid_p)
    if exact is not None:
        if isinstance(exact, bool) or not np.isscalar(exact) or not 0.0 <= float(exact) <= 1.0:
            raise DataError(f"exact must be a p-value between 0 and 1, got {exact!r}")
    series = [values[idx] for idx in dist.chain_index]
    lengths = [s.shape[0] for s in series]
    chain_of, position = _round_robin(lengths)
    starts = np.r_[0, np.cumsum(lengths)[:-1]].astype(np.int64)
    pooled_values = np.concatenate(series)[starts[chain_of] + position]
    n_total = pooled_values.shape[0]
    points = _curve_points(n_total)
    running = np.cumsum(pooled_values)[points - 1] / points

    if dist.iid:
        mcse = _binomial_mcse(running, points.astype(np.float64))
        band_label = "±2 MCSE (binomial, independent draws)"
    else:
        used = np.stack([np.cumsum(chain_of == c)[points - 1] for c in range(len(series))],
                        axis=1)
        mcse = _prefix_mcse(dist, values, used)
        band_label = "±2 MCSE (batch means / effective sample size, per chain)"

    what = "mid-p-value" if mid_p else "p-value"
    fig = _new_figure((8.0, 4.5))
    ax = fig.add_subplot()
    if len(series) > 1:
        for c, s in enumerate(series):
            if s.shape[0] == 0:
                continue
            at = np.flatnonzero(chain_of == c) + 1          # pooled positions of its draws
            keep = _curve_points(s.shape[0]) - 1
            ax.plot(at[keep], np.cumsum(s)[keep] / (keep + 1), linewidth=0.7, alpha=0.7,
                    color=_chain_colour(c), label=f"chain {c + 1}")
    # A p-value lies in [0, 1]; so does its band.
    lower, upper = np.clip(running - 2 * mcse, 0.0, 1.0), np.clip(running + 2 * mcse, 0.0, 1.0)
    ax.fill_between(points, lower, upper, color="0.6", alpha=0.35, linewidth=0,
                    label=band_label)
    ax.plot(points, upper, color="0.35", linewidth=0.6, gid="mcse-upper")
    ax.plot(points, lower, color="0.35", linewidth=0.6, gid="mcse-lower")
    final_mcse = mcse[-1]
    final = (f"{running[-1]:.4g} ± {2 * final_mcse:.2g}" if np.isfinite(final_mcse)
             else f"{running[-1]:.4g}")
    ax.plot(points, running, color="black", linewidth=2.0, gid="pooled",
            label=f"all chains pooled (final {final})")
    if exact is not None:
        ax.axhline(float(exact), color=_EXACT_COLOUR, linestyle="--", linewidth=1.5,
                   gid="exact", label=f"exact {what} {float(exact):.4g}")
    ax.set_xscale("log")
    ax.set_xlim(1, n_total)
    top = _focus_top(points, n_total, running, upper, exact)
    if top is not None:
        ax.set_ylim(0.0, top)
        ax.text(0.99, 0.98, "y axis fitted to the last 90% of the draws; earlier values and band "
                "run off the top", transform=ax.transAxes, ha="right", va="top",
                fontsize="x-small", color="0.25", gid="clipped-note",
                bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "0.8"})
    ax.set_xlabel("draws used, all chains taken in turn (log scale)")
    ax.set_ylabel(f"Monte Carlo {what} estimate")
    ax.set_title(f"Monte Carlo {what} as draws accumulate: test of "
                 f"{', '.join(dist.names)}\n({_sample_size_text(dist)})")
    # Below the axes, so that it never hides the curves.
    fig.legend(loc="outside lower center", fontsize="small", ncols=3)
    return fig


# Share of the draws, counted from the first, whose running values may run off the top of the
# running p-value plot: their band is wide by construction and would squash the rest.
_FOCUS_SKIP = 0.1
# ... when the rest would otherwise use less than this share of the height.
_FOCUS_SQUASH = 0.25


def _focus_top(points, n_total, running, upper, exact) -> float | None:
    """Upper y limit that shows the running p-value and its band over the draws after the first
    10% (and the exact line), with a margin; None unless the full range is over 4 times that."""
    late = points >= max(2, int(np.ceil(_FOCUS_SKIP * n_total)))
    if late.sum() < 2:
        return None
    band = upper[late]
    values = np.r_[running[late], band[np.isfinite(band)],
                   [] if exact is None else [float(exact)]]
    top = min(1.0, 1.15 * float(values.max())) if values.size else None
    finite = upper[np.isfinite(upper)]
    full = max(float(running.max()), float(finite.max()) if finite.size else 0.0)
    if top is None or top <= 0.0 or top >= _FOCUS_SQUASH * full:
        return None
    return top


# -- autocorrelation ------------------------------------------------------------------------------

def _autocorrelation_fft(x: np.ndarray, max_lag: int) -> np.ndarray:
    """``r_k = sum_i (x_i - m)(x_{i+k} - m) / sum_i (x_i - m)^2`` for k = 0..max_lag, by FFT.

    The usual biased estimator (divisor n at every lag, Box & Jenkins); zero padding to at least
    2n - 1 points turns the circular correlation of the FFT into the linear one. Lags at or beyond
    the chain's length, and every lag of a constant chain, are NaN.
    """
    out = np.full(max_lag + 1, np.nan)
    n = x.shape[0]
    if n < 2:
        return out
    centred = x - x.mean()
    size = 1 << int(2 * n - 1).bit_length()
    spectrum = np.fft.rfft(centred, size)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), size)[:min(max_lag + 1, n)]
    # A constant chain leaves only rounding noise at lag 0 (relative to the values' size).
    if acov[0] <= 1e-12 * max(1.0, float(np.max(np.abs(x))) ** 2) * n:
        return out
    out[:acov.shape[0]] = acov / acov[0]
    return out


def _chain_autocorrelations(values: list[np.ndarray], max_lag: int) -> np.ndarray:
    """(chain, lag) autocorrelations for lags 0..max_lag, NaN beyond a chain's length.

    By :func:`mcexact.diagnostics.autocorrelation` when that module can be imported: it takes a
    (chain, draw) array, so only when all chains have the same length (of at least 2), and asked
    for no lag beyond the chains' length. Otherwise (ragged chains after a slice, or no such
    module) this module's FFT estimator, which is the same divisor-n estimator.
    """
    lengths = {v.shape[0] for v in values}
    n = lengths.pop() if len(lengths) == 1 else 0
    if n >= 2:
        try:
            from mcexact.diagnostics import autocorrelation
        except ImportError:
            autocorrelation = None
        if autocorrelation is not None:
            lag = min(max_lag, n - 1)
            result = np.asarray(autocorrelation(np.vstack(values), lag), dtype=np.float64)
            if result.shape == (len(values), lag + 1):
                out = np.full((len(values), max_lag + 1), np.nan)
                out[:, :lag + 1] = result
                return out
    return np.vstack([_autocorrelation_fft(v, max_lag) for v in values])


def plot_autocorrelation(dist: ConditionalDistribution, column: int | str = 0,
                         max_lag: int = 50) -> Figure:
    """Autocorrelation of one drawn statistic within each chain, against the lag.

    Computed by :func:`mcexact.diagnostics.autocorrelation` when that module is available and the
    chains have equal lengths, else here by FFT (the estimator with divisor n at every lag). The
    shaded band ``+/- 2 / sqrt(n)`` (n the shortest chain) is the rough spread of sample
    autocorrelations of independent draws; slow decay beyond it means few effective draws.

    Parameters
    ----------
    dist : ConditionalDistribution
        A Monte Carlo distribution.
    column : int or str, default 0
        The statistic, by index or name.
    max_lag : int, default 50
        Largest lag shown (lags beyond a chain's length are left out).

    Returns
    -------
    matplotlib.figure.Figure
        One axes; the line labelled ``"chain c"`` holds lags 0..max_lag and chain c's
        autocorrelations (NaN for a constant chain, which a note on the axes names).

    Raises
    ------
    DataError
        If matplotlib is missing, `dist` is exact, `column` is unknown or `max_lag` is not a
        positive integer.
    """
    dist = _check_distribution(dist)
    j = _column_index(dist, column)
    _needs_draws(dist, "an autocorrelation plot")
    if isinstance(max_lag, (bool, np.bool_)) or not isinstance(max_lag, (int, np.integer)) \
            or max_lag < 1:
        raise DataError(f"max_lag must be a positive integer, got {max_lag!r}")
    max_lag = int(max_lag)
    values = _chain_values(dist, j)
    acf = _chain_autocorrelations(values, max_lag)
    lags = np.arange(max_lag + 1)
    fig = _new_figure((8.0, 4.0))
    ax = fig.add_subplot()
    shortest = min(v.shape[0] for v in values)
    if shortest > 0:
        half_width = 2.0 / np.sqrt(shortest)
        ax.axhspan(-half_width, half_width, color="0.85", zorder=0,
                   label=f"±2/√n (n = {shortest:,}): typical of independent draws")
    ax.axhline(0.0, color="0.3", linewidth=0.8)
    constant = []
    for c in range(acf.shape[0]):
        if np.all(np.isnan(acf[c])):
            constant.append(c + 1)
        ax.plot(lags, acf[c], marker="o", markersize=2.5, linewidth=1.0,
                color=_chain_colour(c), label=f"chain {c + 1}")
    if constant:
        ax.text(0.98, 0.95, "no variation (autocorrelation undefined) in chain "
                + ", ".join(str(c) for c in constant), transform=ax.transAxes, ha="right",
                va="top", fontsize="small", color=_TAIL_COLOUR)
    ax.set_xlim(-0.5, max_lag + 0.5)
    ax.set_xlabel("lag (recorded draws)")
    ax.set_ylabel("autocorrelation")
    ax.set_title(f"Within-chain autocorrelation of the {dist.names[j]} statistic\n"
                 f"({_sample_size_text(dist)})")
    fig.legend(loc="outside lower center", fontsize="small", ncols=5)
    return fig


# -- one-column null distribution -----------------------------------------------------------------

def _slice(dist: ConditionalDistribution, keep: Sequence[int]) -> ConditionalDistribution:
    """`dist` restricted to the columns `keep`, the others fixed at their observed values."""
    others = [k for k in range(dist.n_columns) if k not in keep]
    piece = dist.condition(others) if others else dist
    if piece.is_monte_carlo and piece.n_draws == 0:
        raise DataError("no draw has the other statistics at their observed values, so this "
                        "slice of the Monte Carlo distribution is empty; draw more")
    if not np.any(np.isfinite(piece.log_weights)):
        raise DataError("every support point of the slice has probability zero")
    return piece


def _tilt_for(dist: ConditionalDistribution, j: int, beta) -> float:
    """The tilt of column `j` from `beta` (a number, or one entry per column of `dist`)."""
    if beta is None:
        return 0.0
    b = np.asarray(beta, dtype=np.float64).reshape(-1)
    if b.shape[0] == 1:
        value = float(b[0])
    elif b.shape[0] == dist.n_columns:
        value = float(b[j])
    else:
        raise DataError(f"beta must be a number or have one entry per column "
                        f"({dist.n_columns}), got {b.shape[0]} entries")
    if not np.isfinite(value):
        raise DataError("beta must be finite")
    return value


# Up to this many support points the null distribution plot draws an error bar on every bar;
# beyond, a band (more bars than this leave a few pixels each).
_MAX_ERROR_BARS = 80


def plot_null_distribution(dist: ConditionalDistribution, column: int | str = 0,
                           beta=None) -> Figure:
    """Bar chart of the conditional distribution of one statistic, observed value and tail marked.

    With several columns, the others are fixed at their observed values
    (:meth:`ConditionalDistribution.condition`), the slice on which this column is tested. One
    bar per support point, at the statistic's value in the user's units; the observed value's bar
    is drawn in its own colour and marked with a diamond, and the smaller one-sided tail beyond
    it (``T >= t`` or ``T <= t``, the one whose doubling gives the two-sided p-value) in another.
    For a Monte Carlo distribution each bar also carries +/- 2 binomial MCSE,
    ``sqrt(p (1 - p) / N)`` with N the draws on the slice (an understatement for correlated
    Markov draws, as the legend says): an error bar per bar up to 80 support points, beyond
    that a shaded band (step-wise over the sorted values), which leaves the bars visible.

    Parameters
    ----------
    dist : ConditionalDistribution
        Exact or Monte Carlo.
    column : int or str, default 0
        The statistic, by index or name.
    beta : float or array, optional
        Tilt on the coded scale (see :meth:`ConditionalDistribution.pmf`): a number for this
        column, or one entry per column of `dist` (only this column's entry matters on the
        slice). Default: the null, beta = 0. Not available for a Monte Carlo distribution, whose
        reweighted frequencies would have no binomial error.

    Returns
    -------
    matplotlib.figure.Figure
        One axes with up to three bar containers labelled ``"other values"``, ``"tail ..."`` and
        ``"observed ..."`` whose bars together have heights ``pmf`` at x = support / scale; the
        observed marker has gid ``"observed"``; the MCSE error bars (or the band, gid
        ``"mcse-band"``) are labelled ``"±2 ..."``. The legend sits below the axes.

    Raises
    ------
    DataError
        If matplotlib is missing, `column` or `beta` is invalid, beta is given for a Monte Carlo
        distribution, or the slice is empty.
    """
    dist = _check_distribution(dist)
    j = _column_index(dist, column)
    b = _tilt_for(dist, j, beta)
    if dist.is_monte_carlo and b != 0.0:
        raise DataError("beta is available for exact distributions only: tilted frequencies of "
                        "Monte Carlo draws have no binomial error to show")
    piece = _slice(dist, [j])
    p = piece.pmf(None if b == 0.0 else [b])
    t_coded = int(piece.observed[0])
    coded = piece.support[:, 0]
    x = _in_units(dist, j, coded)
    t = float(_in_units(dist, j, t_coded))
    p_le, p_ge = float(p[coded <= t_coded].sum()), float(p[coded >= t_coded].sum())
    upper = p_ge <= p_le
    in_tail = (coded >= t_coded) if upper else (coded <= t_coded)
    is_obs = coded == t_coded
    sign = "≥" if upper else "≤"
    tail_p = p_ge if upper else p_le

    distinct = np.unique(x)
    width = 0.8 * (float(np.min(np.diff(distinct))) if distinct.shape[0] > 1 else 1.0)
    if distinct.shape[0] > 1:
        # Closely spaced values over a wide range: bars at least 1/400 of the range wide, so
        # that each stays visible (neighbours may then touch).
        width = max(width, float(distinct[-1] - distinct[0]) / 400.0)
    fig = _new_figure((8.0, 4.5))
    ax = fig.add_subplot()
    groups = (
        (~in_tail, _BAR_COLOUR, "other values", None),
        (in_tail & ~is_obs, _TAIL_COLOUR, f"tail T {sign} {t:g}: probability {tail_p:.4g}", None),
        (is_obs, _OBSERVED_COLOUR, f"observed value t = {t:g}", "//"),
    )
    for mask, colour, label, hatch in groups:
        if mask.any():
            ax.bar(x[mask], p[mask], width=width, color=colour, edgecolor="white",
                   hatch=hatch, linewidth=0.5, label=label)
    if piece.is_monte_carlo:
        n = piece.n_draws
        err = 2.0 * np.sqrt(p * (1.0 - p) / n)
        note = "" if piece.iid else "; too narrow for correlated chain draws"
        if piece.n_points <= _MAX_ERROR_BARS:
            ax.errorbar(x, p, yerr=err, fmt="none", ecolor="0.2", elinewidth=0.8, capsize=2,
                        label=f"±2 binomial MCSE per bar (N = {n:,}{note})")
        else:
            # Hundreds of error bars would hide the bars: a band over the sorted values instead.
            order = np.argsort(x)
            ax.fill_between(x[order], np.maximum(p - err, 0.0)[order], (p + err)[order],
                            step="mid", color="0.5", alpha=0.3, linewidth=0, gid="mcse-band",
                            zorder=0.5,
                            label=f"±2 binomial MCSE of each bar, as a band (N = {n:,}{note})")
    p_obs = float(p[is_obs].sum())
    # A thin line finds the observed value even where its bar is too low to see.
    ax.axvline(t, color=_OBSERVED_COLOUR, linestyle=":", linewidth=1.0, gid="observed-line")
    ax.plot([t], [p_obs], marker="D", markersize=8, linestyle="none", color=_OBSERVED_COLOUR,
            markeredgecolor="white", gid="observed", label="_observed marker")
    ax.text(0.02, 0.97, f"P(T ≤ {t:g}) = {p_le:.4g}\nP(T ≥ {t:g}) = {p_ge:.4g}",
            transform=ax.transAxes, ha="left", va="top", fontsize="small",
            bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "0.7"})
    ax.set_xlabel(_statistic_label(dist, j))
    estimated = "estimated " if piece.is_monte_carlo else ""
    ax.set_ylabel(f"{estimated}conditional probability")
    given = _given_text(piece, dist)
    tilt = f"tilted by beta = {b:g}" if b != 0.0 else "null"
    first = f"Conditional {tilt} distribution of the {dist.names[j]} statistic"
    extra = [s for s in (given, _sample_size_text(piece) if piece.is_monte_carlo else "") if s]
    ax.set_title(first + ("\n(" + "; ".join(extra) + ")" if extra else ""))
    ax.set_ylim(bottom=0.0)
    # Below the axes, so that it never hides a bar.
    fig.legend(loc="outside lower center", ncols=2, fontsize="small")
    return fig


# -- two columns ----------------------------------------------------------------------------------

def _cell_edges(centres: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cells centred on sorted `centres`: edges, and the cell index of each centre.

    A cell reaches half way to each neighbour, but no further from its centre than half the
    median gap between centres; where two neighbours are further apart than the median gap, an
    empty cell fills the space between theirs (so that an isolated value at the edge of the support is not drawn as a
    wide block). On an evenly spaced grid the cells are the plain midpoint cells."""
    c = np.asarray(centres, float)
    if c.shape[0] == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5]), np.array([0])
    gaps = np.diff(c)
    cap = 0.5 * float(np.median(gaps))
    half_left = np.minimum(cap, np.r_[gaps[0], gaps] / 2.0)
    half_right = np.minimum(cap, np.r_[gaps, gaps[-1]] / 2.0)
    edges, index = [c[0] - half_left[0]], []
    for i in range(c.shape[0]):
        index.append(len(edges) - 1)
        edges.append(c[i] + half_right[i])
        if i + 1 < c.shape[0] and c[i] + half_right[i] < c[i + 1] - half_left[i + 1]:
            edges.append(c[i + 1] - half_left[i + 1])          # an empty cell in the gap
    return np.array(edges), np.array(index, dtype=np.int64)


def _outline(inside: np.ndarray, x_edges: np.ndarray, y_edges: np.ndarray) -> list:
    """Segments of the boundary between cells in and out of `inside` (rows y, columns x)."""
    padded = np.pad(inside, 1, constant_values=False)
    segments = []
    # A vertical edge lies between horizontally adjacent cells that differ.
    rows, cols = np.nonzero(padded[1:-1, 1:] != padded[1:-1, :-1])
    for r, c in zip(rows, cols):
        segments.append([(x_edges[c], y_edges[r]), (x_edges[c], y_edges[r + 1])])
    rows, cols = np.nonzero(padded[1:, 1:-1] != padded[:-1, 1:-1])
    for r, c in zip(rows, cols):
        segments.append([(x_edges[c], y_edges[r]), (x_edges[c + 1], y_edges[r])])
    return segments


def plot_joint(dist: ConditionalDistribution, columns: Sequence[int | str] = (0, 1)) -> Figure:
    """Two statistics at once: a grid of log10 probabilities, the observed pair and its tail.

    Each cell is a pair of values of the two statistics (user's units; cells of unequal width
    where the values are unevenly spaced), coloured by log10 of its conditional probability;
    pairs outside the support (for a Monte Carlo distribution: never drawn) are left blank. A
    star marks the observed pair, and a black outline follows the cell edges around the pairs
    strictly more probable than the observed one: everything outside it is at least as extreme
    by the probability ordering, and its total probability (the probability test's p-value, ties
    within :data:`mcexact.inference.TIE_RTOL` counted as extreme) is given in the legend. When a
    Monte Carlo run never drew the observed pair there is no outline (every drawn pair would be
    inside it) and the legend says so. With more than two columns, the others are fixed at their
    observed values.

    Parameters
    ----------
    dist : ConditionalDistribution
        Exact or Monte Carlo, with at least two columns.
    columns : pair of int or str, default (0, 1)
        The statistics on the x and y axes.

    Returns
    -------
    matplotlib.figure.Figure
        Main axes (first) and colour bar. The main axes holds one QuadMesh whose array is the
        grid of log10 probabilities over its cells (masked where blank): one cell per value of
        each statistic, plus empty cells where two values lie further apart than the median gap
        (see ``_cell_edges``), a LineCollection with gid
        ``"outline"`` and the observed marker with gid ``"observed"``; the legend is the
        figure's.

    Raises
    ------
    DataError
        If matplotlib is missing, `dist` has one column, `columns` is not two distinct columns,
        or the slice is empty.
    """
    dist = _check_distribution(dist)
    if dist.n_columns < 2:
        raise DataError(f"a joint plot needs a distribution of at least two statistics; this "
                        f"one has a single column ({dist.names[0]}): use plot_null_distribution")
    if isinstance(columns, (str, bytes)) or len(columns) != 2:
        raise DataError(f"columns must name two columns, got {columns!r}")
    ix = _column_index(dist, columns[0], "columns[0]")
    iy = _column_index(dist, columns[1], "columns[1]")
    if ix == iy:
        raise DataError(f"columns must be two different columns, got {dist.names[ix]!r} twice")
    piece = _slice(dist, [ix, iy])
    # The slice keeps the two columns in the original order.
    kx, ky = (0, 1) if ix < iy else (1, 0)
    log_p = piece.log_pmf()
    x_vals, x_pos = np.unique(piece.support[:, kx], return_inverse=True)
    y_vals, y_pos = np.unique(piece.support[:, ky], return_inverse=True)
    x_edges, x_cell = _cell_edges(_in_units(dist, ix, x_vals))
    y_edges, y_cell = _cell_edges(_in_units(dist, iy, y_vals))
    x_pos, y_pos = x_cell[x_pos.reshape(-1)], y_cell[y_pos.reshape(-1)]
    grid = np.full((y_edges.shape[0] - 1, x_edges.shape[0] - 1), np.nan)
    with np.errstate(divide="ignore"):
        grid[y_pos, x_pos] = log_p / np.log(10.0)
    grid[~np.isfinite(grid)] = np.nan
    obs_index = piece.observed_index
    lp_obs = float(log_p[obs_index]) if obs_index is not None else -np.inf
    # Same tolerance as the probability test: absolute on the log scale.
    more_probable = np.isfinite(log_p) & (log_p > lp_obs + TIE_RTOL)
    inside = np.zeros(grid.shape, dtype=bool)
    inside[y_pos, x_pos] = more_probable
    extreme_p = float(np.exp(logsumexp(log_p[~more_probable]))) if (~more_probable).any() else 0.0

    fig = _new_figure((7.0, 5.5))
    ax = fig.add_subplot()
    mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(grid), cmap="cividis",
                         shading="flat")
    blank = "never drawn" if piece.is_monte_carlo else "impossible"
    estimated = "estimated " if piece.is_monte_carlo else ""
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(f"log10 {estimated}probability (blank: {blank})")
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    # An observed pair never drawn has estimated probability 0: every drawn pair is more
    # probable, and an outline around each of them would hide the picture.
    observed_unseen = not np.isfinite(lp_obs)
    segments = [] if observed_unseen else _outline(inside, x_edges, y_edges)
    handles = []
    if segments:
        ax.add_collection(LineCollection(segments, colors="black", linewidths=1.6,
                                         gid="outline"))
        handles.append(Line2D([], [], color="black", linewidth=1.6,
                              label="edge of the pairs more probable than observed"))
    tx = float(_in_units(dist, ix, piece.observed[kx]))
    ty = float(_in_units(dist, iy, piece.observed[ky]))
    (marker,) = ax.plot([tx], [ty], marker="*", markersize=15, linestyle="none",
                        color=_TAIL_COLOUR, markeredgecolor="white", gid="observed",
                        label=f"observed ({tx:g}, {ty:g})")
    handles.insert(0, marker)
    summary = (f"P(pair at most as probable as observed) = {extreme_p:.4g}" if not observed_unseen
               else "observed pair never drawn: its estimated probability is 0 (draw more)")
    handles.append(Line2D([], [], linestyle="none", label=summary))
    fig.legend(handles=handles, loc="outside lower center", ncols=2, fontsize="small")
    ax.set_xlim(x_edges[0], x_edges[-1])
    ax.set_ylim(y_edges[0], y_edges[-1])
    ax.set_xlabel(_statistic_label(dist, ix))
    ax.set_ylabel(_statistic_label(dist, iy))
    given = _given_text(piece, dist)
    extra = [s for s in (given, _sample_size_text(piece) if piece.is_monte_carlo else "") if s]
    ax.set_title(f"Joint conditional null distribution of {dist.names[ix]} and "
                 f"{dist.names[iy]}" + ("\n(" + "; ".join(extra) + ")" if extra else ""))
    return fig
