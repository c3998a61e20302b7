"""Tests of mcexact.plots: the figures hold the numbers they are meant to show.

Checks read the artists of each figure (line data, bar heights, mesh arrays, labels), never
pixels. Expected values come from formulas written out here with numpy (relative frequencies of
the draws, the pmf of a slice by the formula ``P(T = t) = c(t) exp(beta t) / sum_u c(u) exp(beta
u)``, the sample autocorrelation as a direct sum), from small hand-made distributions whose answer
can be read off, or, where a figure is documented to agree with another function of mcexact
(``mcse_of_indicator``, the probability test), from that function. All data are invented or the
package's invented demo.
"""

from __future__ import annotations

import os
import subprocess
import sys
import types

import dataclasses

import numpy as np

import mcexact
import pytest

matplotlib = pytest.importorskip("matplotlib")
matplotlib.use("Agg")

from matplotlib.collections import LineCollection, QuadMesh  # noqa: E402
from matplotlib.container import BarContainer, ErrorbarContainer  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

import mcexact  # noqa: E402
from mcexact import ConditionalDistribution, DataError, Design, exact_distribution  # noqa: E402
from mcexact import plots  # noqa: E402
from mcexact.inference import joint_tests  # noqa: E402
from mcexact.montecarlo import (SamplerOptions, draw_mcmc, mcse_of_indicator,  # noqa: E402
                                spawn_seeds)

FORMULA = "elevation ~ dose_mg + age"


# -- fixtures -------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def demo_design() -> Design:
    return Design.from_formula(mcexact.load_demo("small"), FORMULA, strata="site")


@pytest.fixture(scope="module")
def exact_joint(demo_design) -> ConditionalDistribution:
    return exact_distribution(demo_design)


@pytest.fixture(scope="module")
def mcmc_joint(demo_design) -> ConditionalDistribution:
    options = SamplerOptions(n_draws=4000, n_chains=4)
    return draw_mcmc(demo_design, options, spawn_seeds(1, 4)).to_distribution()


@pytest.fixture(scope="module")
def age_design() -> Design:
    return Design.from_formula(mcexact.load_demo("small"), FORMULA, interest="age",
                               strata="site")


@pytest.fixture(scope="module")
def mcmc_age(age_design) -> ConditionalDistribution:
    options = SamplerOptions(n_draws=4000, n_chains=4)
    return draw_mcmc(age_design, options, spawn_seeds(2, 4)).to_distribution()


def toy_draws(iid: bool, scale: float = 1.0) -> ConditionalDistribution:
    """Invented one-column Monte Carlo distribution: two chains of unequal length (7 and 5)."""
    chains = (np.array([0, 1, 1, 2, 3, 2, 1]), np.array([3, 3, 2, 0, 1]))
    counts = np.bincount(np.concatenate(chains), minlength=4)
    return ConditionalDistribution(
        support=np.array([[0], [4], [8], [12]]), log_weights=np.log(counts / counts.sum()),
        observed=[8], names=["x"], scales=[scale], chain_index=chains, iid=iid)


def lines_by_gid(ax, gid):
    return [line for line in ax.lines if line.get_gid() == gid]


def fig_legend_texts(ax):
    """Texts of the figure legend (below the axes) of the figure holding `ax`."""
    (legend,) = ax.figure.legends
    return legend.get_texts()


def one_line(ax, gid):
    found = lines_by_gid(ax, gid)
    assert len(found) == 1, f"expected one line with gid {gid!r}, found {len(found)}"
    return found[0]


def bars_of(ax) -> dict:
    """x centre -> height of every bar in the axes' bar containers."""
    out = {}
    for container in ax.containers:
        if isinstance(container, BarContainer):
            for rect in container:
                out[round(rect.get_x() + rect.get_width() / 2, 9)] = rect.get_height()
    return out


def container(ax, label_start: str) -> BarContainer:
    found = [c for c in ax.containers
             if isinstance(c, BarContainer) and c.get_label().startswith(label_start)]
    assert len(found) == 1
    return found[0]


def bar_centres(c: BarContainer) -> np.ndarray:
    return np.array([r.get_x() + r.get_width() / 2 for r in c])


# -- matplotlib is optional -----------------------------------------------------------------------

def test_package_imports_and_plots_fail_cleanly_without_matplotlib(tmp_path):
    # Blocking the import (None in sys.modules) stands in for an environment without matplotlib.
    code = (
        "import sys; sys.modules['matplotlib'] = None\n"
        "import mcexact, mcexact.plots\n"
        "d = mcexact.ConditionalDistribution(support=[[0], [1]], log_weights=[0.0, 0.0],\n"
        "    observed=[1], names=['x'], scales=[1.0])\n"
        "try:\n"
        "    mcexact.plots.plot_null_distribution(d)\n"
        "except mcexact.DataError as exc:\n"
        "    print('DataError:', exc)\n"
    )
    # Run outside the source tree: `python -c` puts the working folder first on sys.path, and
    # the repository root holds the package's source without its compiled kernels.
    # The child imports the same mcexact as this test run (installed, or built in place).
    env = {**os.environ, "PYTHONPATH": os.path.dirname(os.path.dirname(mcexact.__file__))}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, cwd=tmp_path, env=env)
    assert out.returncode == 0, out.stderr
    assert "DataError:" in out.stdout and "matplotlib" in out.stdout


def test_every_function_rejects_what_is_not_a_distribution():
    for f in (plots.plot_trace, plots.plot_autocorrelation, plots.plot_null_distribution,
              plots.plot_joint):
        with pytest.raises(DataError, match="ConditionalDistribution"):
            f(np.zeros((3, 1)))
    with pytest.raises(DataError, match="ConditionalDistribution"):
        plots.plot_running_pvalue(np.zeros(3), [True], [False])


# -- trace ----------------------------------------------------------------------------------------

def test_trace_lines_are_the_decoded_draws_in_user_units():
    dist = toy_draws(iid=False, scale=4.0)
    fig = plots.plot_trace(dist, "x")
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    chains = [line for line in ax.lines if line.get_label().startswith("chain")]
    assert [line.get_label() for line in chains] == ["chain 1", "chain 2"]
    # Support 0, 4, 8, 12 on the coded scale with scale 4 is 0, 1, 2, 3 in the user's units:
    # the values are then the chain indices themselves.
    for line, idx in zip(chains, dist.chain_index):
        np.testing.assert_array_equal(line.get_xdata(), np.arange(1, idx.shape[0] + 1))
        np.testing.assert_array_equal(line.get_ydata(), idx.astype(float))
    observed = one_line(ax, "observed")
    np.testing.assert_array_equal(observed.get_ydata(), [2.0, 2.0])        # 8 / 4
    assert "x" in ax.get_title()
    assert ax.get_xlabel() and "x" in ax.get_ylabel()


def test_trace_of_markov_chains_on_the_demo(mcmc_joint):
    fig = plots.plot_trace(mcmc_joint, column=1)
    ax = fig.axes[0]
    chains = [line for line in ax.lines if line.get_label().startswith("chain")]
    assert len(chains) == 4
    for line, idx in zip(chains, mcmc_joint.chain_index):
        np.testing.assert_array_equal(line.get_ydata(), mcmc_joint.support[idx, 1])
    np.testing.assert_array_equal(one_line(ax, "observed").get_ydata(),
                                  [mcmc_joint.observed[1]] * 2)
    assert "age" in ax.get_title() and "age" in ax.get_ylabel()


def test_trace_errors(exact_joint, mcmc_joint):
    with pytest.raises(DataError, match="exact"):
        plots.plot_trace(exact_joint)
    for bad in (2, -1, "weight_kg", True, 1.0):
        with pytest.raises(DataError, match="column"):
            plots.plot_trace(mcmc_joint, bad)


# -- running p-value ------------------------------------------------------------------------------

def round_robin_by_hand(series):
    """Draw 1 of each chain, then draw 2 of each, ...: a plain loop, obviously right."""
    out = []
    for k in range(max(len(s) for s in series)):
        for s in series:
            if k < len(s):
                out.append(s[k])
    return np.array(out, dtype=float)


def test_running_pvalue_of_independent_draws():
    dist = toy_draws(iid=True)
    # "At least as extreme" = values 2 and 3 (rows 2, 3): row 3 more extreme, row 2 tied.
    more = np.array([False, False, False, True])
    tie = np.array([False, False, True, False])
    fig = plots.plot_running_pvalue(dist, more, tie, exact=0.4)
    ax = fig.axes[0]
    indicator = (more | tie).astype(float)
    pooled = round_robin_by_hand([indicator[idx] for idx in dist.chain_index])
    n = np.arange(1, pooled.shape[0] + 1)
    expected = np.cumsum(pooled) / n
    line = one_line(ax, "pooled")
    np.testing.assert_array_equal(line.get_xdata(), n)
    np.testing.assert_allclose(line.get_ydata(), expected, rtol=0, atol=1e-15)
    # The documented band: the Agresti & Coull (1998) variance p~(1 - p~)/(n + 4) with
    # p~ = (n p + 2)/(n + 4) (hand formula), clipped to [0, 1].
    shrunk = (n * expected + 2) / (n + 4)
    half = 2 * np.sqrt(shrunk * (1 - shrunk) / (n + 4))
    np.testing.assert_allclose(one_line(ax, "mcse-upper").get_ydata(),
                               np.minimum(expected + half, 1), atol=1e-15)
    np.testing.assert_allclose(one_line(ax, "mcse-lower").get_ydata(),
                               np.maximum(expected - half, 0), atol=1e-15)
    # Last point by hand: chain 1 draws rows 2 or 3 three times (2, 3, 2), chain 2 three times
    # (3, 3, 2), so p = 6/12.
    assert line.get_ydata()[-1] == pytest.approx(6 / 12)
    np.testing.assert_array_equal(one_line(ax, "exact").get_ydata(), [0.4, 0.4])
    # Chain curves: each chain's own running mean, at the pooled positions of its draws.
    chain2 = [ln for ln in ax.lines if ln.get_label() == "chain 2"][0]
    np.testing.assert_array_equal(chain2.get_xdata(), [2, 4, 6, 8, 10])
    np.testing.assert_allclose(chain2.get_ydata(), np.cumsum([1, 1, 1, 0, 0]) / np.arange(1, 6))
    assert "binomial" in " ".join(t.get_text() for t in fig_legend_texts(ax))
    assert "x" in ax.get_title() and "p-value" in ax.get_ylabel() and ax.get_xlabel()


def test_running_mid_p_counts_ties_as_half():
    dist = toy_draws(iid=True)
    more = np.array([False, False, False, True])
    tie = np.array([False, False, True, False])
    ax = plots.plot_running_pvalue(dist, more, tie, mid_p=True).axes[0]
    # Row 3 drawn 3 times (1 + 2), row 2 drawn 3 times (2 + 1), in 12 draws: (3 + 3 / 2) / 12.
    assert one_line(ax, "pooled").get_ydata()[-1] == pytest.approx(4.5 / 12)
    assert "mid-p" in ax.get_ylabel()


def test_running_pvalue_of_markov_chains_agrees_with_the_package(exact_joint, mcmc_joint):
    exact_score = joint_tests(exact_joint, ("score",))[0]
    mc_score = joint_tests(mcmc_joint, ("score",))[0]
    fig = plots.plot_running_pvalue(mcmc_joint, mc_score.more, mc_score.tie,
                                    exact=exact_score.p_value)
    ax = fig.axes[0]
    indicator = (mc_score.more | mc_score.tie).astype(float)
    pooled = round_robin_by_hand([indicator[idx] for idx in mcmc_joint.chain_index])
    line = one_line(ax, "pooled")
    x = np.asarray(line.get_xdata())
    assert x[-1] == mcmc_joint.n_draws
    np.testing.assert_allclose(line.get_ydata(), np.cumsum(pooled)[x - 1] / x, atol=1e-15)
    # The last point is the Monte Carlo p-value of all draws, and the band's half-width there
    # is 2 MCSE by mcse_of_indicator (the docstring's promise).
    assert line.get_ydata()[-1] == pytest.approx(mc_score.p_value, abs=1e-15)
    upper = one_line(ax, "mcse-upper").get_ydata()[-1]
    assert upper - line.get_ydata()[-1] == pytest.approx(
        2 * mcse_of_indicator(mcmc_joint, indicator), rel=1e-12)
    np.testing.assert_array_equal(one_line(ax, "exact").get_ydata(), [exact_score.p_value] * 2)
    assert "batch means" in " ".join(t.get_text() for t in fig_legend_texts(ax))
    assert "dose_mg" in ax.get_title() and "age" in ax.get_title()


def test_running_pvalue_errors(exact_joint, mcmc_joint):
    more = np.zeros(mcmc_joint.n_points, dtype=bool)
    with pytest.raises(DataError, match="exact"):
        plots.plot_running_pvalue(exact_joint, np.zeros(exact_joint.n_points, bool),
                                  np.zeros(exact_joint.n_points, bool))
    with pytest.raises(DataError, match="one entry per support point"):
        plots.plot_running_pvalue(mcmc_joint, more[:-1], more)
    with pytest.raises(DataError, match="between 0 and 1"):
        plots.plot_running_pvalue(mcmc_joint, more, more, exact=1.5)
    with pytest.raises(DataError, match="overlap"):
        plots.plot_running_pvalue(mcmc_joint, ~more, ~more)


# -- autocorrelation ------------------------------------------------------------------------------

def autocorrelation_by_sum(x, max_lag):
    """r_k = sum_i d_i d_{i+k} / sum_i d_i^2, d = x - mean (the divisor-n estimator)."""
    d = np.asarray(x, float) - np.mean(x)
    lagged = [np.sum(d[:d.shape[0] - k] * d[k:]) for k in range(max_lag + 1)]
    return np.array(lagged) / np.sum(d * d)


@pytest.fixture
def no_diagnostics(monkeypatch):
    """Make ``mcexact.diagnostics`` unimportable, so the module's own estimator is used."""
    monkeypatch.setitem(sys.modules, "mcexact.diagnostics", None)


def test_autocorrelation_matches_the_direct_sum(mcmc_joint, no_diagnostics):
    fig = plots.plot_autocorrelation(mcmc_joint, "dose_mg", max_lag=30)
    ax = fig.axes[0]
    chains = [line for line in ax.lines if line.get_label().startswith("chain")]
    assert len(chains) == 4
    for line, idx in zip(chains, mcmc_joint.chain_index):
        np.testing.assert_array_equal(line.get_xdata(), np.arange(31))
        np.testing.assert_allclose(line.get_ydata(),
                                   autocorrelation_by_sum(mcmc_joint.support[idx, 0], 30),
                                   atol=1e-12)
    assert "dose_mg" in ax.get_title() and ax.get_xlabel() and ax.get_ylabel()


def test_autocorrelation_of_an_alternating_chain(no_diagnostics):
    # x = 0, 1, 0, 1, ... (n = 10): deviations +-1/2 alternate, so r_k = (-1)^k (n - k) / n.
    chain = np.tile([0, 1], 5)
    dist = ConditionalDistribution(support=[[0], [1]], log_weights=np.log([0.5, 0.5]),
                                   observed=[1], names=["x"], scales=[1.0],
                                   chain_index=(chain,), iid=False)
    line = plots.plot_autocorrelation(dist, max_lag=12).axes[0].lines
    line = [ln for ln in line if ln.get_label() == "chain 1"][0]
    k = np.arange(10)
    np.testing.assert_allclose(line.get_ydata()[:10], (-1.0) ** k * (10 - k) / 10, atol=1e-12)
    # Lags 10, 11, 12 do not exist in a chain of 10 draws.
    assert np.all(np.isnan(line.get_ydata()[10:]))


def test_autocorrelation_of_a_constant_chain_is_undefined(no_diagnostics):
    dist = ConditionalDistribution(support=[[0], [1]], log_weights=np.log([0.5, 0.5]),
                                   observed=[1], names=["x"], scales=[1.0],
                                   chain_index=(np.array([0, 1, 0, 1, 1, 0]), np.ones(6, int)),
                                   iid=False)
    ax = plots.plot_autocorrelation(dist, max_lag=3).axes[0]
    chain2 = [ln for ln in ax.lines if ln.get_label() == "chain 2"][0]
    assert np.all(np.isnan(chain2.get_ydata()))
    assert any("chain 2" in t.get_text() for t in ax.texts)


def test_autocorrelation_uses_the_diagnostics_module_when_present(monkeypatch, mcmc_joint):
    seen = {}

    def fake_autocorrelation(x, max_lag):
        seen["shape"] = np.shape(x)
        return np.full((np.shape(x)[0], max_lag + 1), 0.25)

    module = types.ModuleType("mcexact.diagnostics")
    module.autocorrelation = fake_autocorrelation
    monkeypatch.setitem(sys.modules, "mcexact.diagnostics", module)
    ax = plots.plot_autocorrelation(mcmc_joint, 0, max_lag=5).axes[0]
    assert seen["shape"] == (4, 1000)
    for line in (ln for ln in ax.lines if ln.get_label().startswith("chain")):
        np.testing.assert_array_equal(line.get_ydata(), np.full(6, 0.25))
    # Chains of unequal length do not fit a (chain, draw) array: the module's own estimator runs.
    seen.clear()
    ragged = toy_draws(iid=False)
    ax = plots.plot_autocorrelation(ragged, max_lag=3).axes[0]
    assert not seen
    first = [ln for ln in ax.lines if ln.get_label() == "chain 1"][0]
    np.testing.assert_allclose(first.get_ydata(),
                               autocorrelation_by_sum(ragged.support[ragged.chain_index[0], 0], 3))


def test_autocorrelation_through_the_diagnostics_module(mcmc_joint):
    pytest.importorskip("mcexact.diagnostics")
    # max_lag beyond the 1000 draws per chain: lags 1000..1004 are left out (NaN).
    ax = plots.plot_autocorrelation(mcmc_joint, "age", max_lag=1004).axes[0]
    chains = [line for line in ax.lines if line.get_label().startswith("chain")]
    for line, idx in zip(chains, mcmc_joint.chain_index):
        y = np.asarray(line.get_ydata())
        np.testing.assert_allclose(y[:1000], autocorrelation_by_sum(mcmc_joint.support[idx, 1],
                                                                    999), atol=1e-12)
        assert np.all(np.isnan(y[1000:]))


def test_autocorrelation_errors(exact_joint, mcmc_joint):
    with pytest.raises(DataError, match="exact"):
        plots.plot_autocorrelation(exact_joint)
    for bad in (0, -3, 2.5, True):
        with pytest.raises(DataError, match="max_lag"):
            plots.plot_autocorrelation(mcmc_joint, max_lag=bad)
    with pytest.raises(DataError, match="column"):
        plots.plot_autocorrelation(mcmc_joint, 7)


# -- null distribution ----------------------------------------------------------------------------

def test_null_distribution_of_a_slice_of_the_exact_joint(exact_joint):
    fig = plots.plot_null_distribution(exact_joint, "age")
    ax = fig.axes[0]
    # The slice dose_mg = observed, normalised, straight from the joint support and weights.
    on_slice = exact_joint.support[:, 0] == exact_joint.observed[0]
    ages = exact_joint.support[on_slice, 1]
    w = np.exp(exact_joint.log_weights[on_slice] - exact_joint.log_weights[on_slice].max())
    pmf = w / w.sum()
    bars = bars_of(ax)
    assert sorted(bars) == sorted(float(a) for a in ages)
    np.testing.assert_allclose([bars[float(a)] for a in ages], pmf, rtol=1e-12)
    t = exact_joint.observed[1]
    observed_bar = container(ax, "observed")
    np.testing.assert_array_equal(bar_centres(observed_bar), [t])
    marker = one_line(ax, "observed")
    np.testing.assert_array_equal(marker.get_xdata(), [t])
    assert marker.get_ydata()[0] == pytest.approx(pmf[ages == t][0])
    # The smaller tail is shaded, and holds exactly the values beyond t on its side.
    upper_smaller = pmf[ages >= t].sum() <= pmf[ages <= t].sum()
    tail = bar_centres(container(ax, "tail"))
    beyond = ages[ages > t] if upper_smaller else ages[ages < t]
    assert sorted(tail) == sorted(beyond.astype(float))
    assert not any(isinstance(c, ErrorbarContainer) for c in ax.containers)
    assert "age" in ax.get_title() and "given dose_mg = 625" in ax.get_title()
    assert "age" in ax.get_xlabel() and "probability" in ax.get_ylabel()


def test_null_distribution_of_a_tilted_exact_column():
    # Invented counts c = 1, 3, 3, 1 on t = 0..3 (a binomial(3) support), coded with scale 2.
    dist = ConditionalDistribution(support=[[0], [2], [4], [6]], log_weights=np.log([1, 3, 3, 1]),
                                   observed=[6], names=["z"], scales=[2.0])
    beta = 0.4
    ax = plots.plot_null_distribution(dist, 0, beta=beta).axes[0]
    w = np.array([1, 3, 3, 1]) * np.exp(beta * np.array([0, 2, 4, 6]))
    bars = bars_of(ax)
    assert sorted(bars) == [0.0, 1.0, 2.0, 3.0]                   # coded / scale
    np.testing.assert_allclose([bars[x] for x in (0.0, 1.0, 2.0, 3.0)], w / w.sum(), rtol=1e-12)
    # Observed at the top edge: the upper tail is the observed point alone, so no tail bars.
    assert not any(c.get_label().startswith("tail") for c in ax.containers)
    assert "beta = 0.4" in ax.get_title()


def test_null_distribution_of_markov_draws_has_binomial_error_bars(mcmc_age, monkeypatch):
    monkeypatch.setattr(plots, "_MAX_ERROR_BARS", mcmc_age.n_points)
    ax = plots.plot_null_distribution(mcmc_age).axes[0]
    counts = np.zeros(mcmc_age.n_points)
    for idx in mcmc_age.chain_index:
        counts += np.bincount(idx, minlength=mcmc_age.n_points)
    freq = counts / counts.sum()
    values = mcmc_age.support[:, 0].astype(float)
    bars = bars_of(ax)
    np.testing.assert_allclose([bars[v] for v in values], freq, rtol=1e-12, atol=1e-15)
    errorbars = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
    assert len(errorbars) == 1
    assert "binomial MCSE" in errorbars[0].get_label()
    half = 2 * np.sqrt(freq * (1 - freq) / mcmc_age.n_draws)
    segments = errorbars[0].lines[2][0].get_segments()
    got = {round(s[0][0], 9): (s[0][1], s[1][1]) for s in segments}
    for v, p, h in zip(values, freq, half):
        assert got[v] == pytest.approx((p - h, p + h), abs=1e-15)
    np.testing.assert_array_equal(one_line(ax, "observed").get_xdata(), mcmc_age.observed)
    assert "estimated" in ax.get_ylabel() and "age" in ax.get_title()


def test_null_distribution_of_many_points_draws_a_band_instead_of_error_bars(mcmc_age,
                                                                             monkeypatch):
    """Beyond _MAX_ERROR_BARS support points the +/- 2 binomial MCSE is one shaded band (gid
    "mcse-band") whose step edges are p +/- 2 sqrt(p (1 - p) / N) of every bar (by hand), and
    no error bars; the bars are as before."""
    monkeypatch.setattr(plots, "_MAX_ERROR_BARS", mcmc_age.n_points - 1)
    fig = plots.plot_null_distribution(mcmc_age)
    ax = fig.axes[0]
    assert not any(isinstance(c, ErrorbarContainer) for c in ax.containers)
    (band,) = [c for c in ax.collections if c.get_gid() == "mcse-band"]
    assert "binomial MCSE" in band.get_label()
    counts = np.zeros(mcmc_age.n_points)
    for idx in mcmc_age.chain_index:
        counts += np.bincount(idx, minlength=mcmc_age.n_points)
    freq = counts / counts.sum()
    half = 2 * np.sqrt(freq * (1 - freq) / mcmc_age.n_draws)
    edges = {round(v, 12) for v in band.get_paths()[0].vertices[:, 1]}
    for p, h in zip(freq, half):
        assert round(p + h, 12) in edges and round(max(p - h, 0.0), 12) in edges
    bars = bars_of(ax)
    values = mcmc_age.support[:, 0].astype(float)
    np.testing.assert_allclose([bars[v] for v in values], freq, rtol=1e-12, atol=1e-15)
    assert "binomial MCSE" in " ".join(t.get_text() for t in fig.legends[0].get_texts())


def test_running_pvalue_fits_its_axis_to_the_late_draws():
    """A p-value near 0.002 from 20,000 independent draws whose first draws are all hits (an
    invented 0/1 series): the early running mean is 1, so the full range would squash the rest.
    The y axis then ends at 1.15 times the largest running value or band edge after the first 10%
    of the draws, and a note says so; a p-value whose early values stay in range keeps the full
    axis and no note."""
    n = 20_000
    draws = np.zeros(n, dtype=np.int64)
    draws[:10] = 1
    draws[5000::500] = 1
    dist = ConditionalDistribution(np.array([[0], [1]]), np.log([0.5, 0.5]), np.array([1]),
                                   ("x",), np.array([1.0]), chain_index=(draws,), iid=True)
    more, tie = np.array([False, False]), np.array([False, True])
    ax = plots.plot_running_pvalue(dist, more, tie).axes[0]
    points = one_line(ax, "pooled").get_xdata()
    late = np.asarray(points) >= 2000
    upper = one_line(ax, "mcse-upper").get_ydata()
    running = one_line(ax, "pooled").get_ydata()
    top = 1.15 * max(np.max(np.asarray(running)[late]), np.max(np.asarray(upper)[late]))
    assert ax.get_ylim() == pytest.approx((0.0, top))
    assert [t for t in ax.texts if t.get_gid() == "clipped-note"]
    steady = np.zeros(n, dtype=np.int64)
    steady[::3] = 1
    even = dataclasses.replace(dist, chain_index=(steady,))
    ax2 = plots.plot_running_pvalue(even, more, tie).axes[0]
    assert not [t for t in ax2.texts if t.get_gid() == "clipped-note"]
    assert ax2.get_ylim()[1] >= np.max(one_line(ax2, "mcse-upper").get_ydata())


def test_null_distribution_errors(exact_joint, mcmc_age, mcmc_joint):
    with pytest.raises(DataError, match="exact distributions only"):
        plots.plot_null_distribution(mcmc_age, beta=0.1)
    with pytest.raises(DataError, match="column"):
        plots.plot_null_distribution(exact_joint, "weight_kg")
    with pytest.raises(DataError, match="one entry per column"):
        plots.plot_null_distribution(exact_joint, 0, beta=[0.1, 0.2, 0.3])
    # The demo chains never drew dose_mg = 625, the observed value (checked first), so the slice
    # age | dose_mg = 625 has no draws.
    assert not any(np.any(mcmc_joint.support[idx, 0] == 625) for idx in mcmc_joint.chain_index)
    with pytest.raises(DataError, match="no draw"):
        plots.plot_null_distribution(mcmc_joint, "age")


# -- joint ----------------------------------------------------------------------------------------

def mesh_of(ax) -> QuadMesh:
    meshes = [c for c in ax.collections if isinstance(c, QuadMesh)]
    assert len(meshes) == 1
    return meshes[0]


def cells_of(mesh, x, y):
    """(row, column) of the mesh cell holding each (x, y), from the mesh's own edges (cells of
    unequal width, and empty cells in wide gaps between values)."""
    coords = mesh.get_coordinates()
    x_edges, y_edges = coords[0, :, 0], coords[:, 0, 1]
    return np.searchsorted(y_edges, y) - 1, np.searchsorted(x_edges, x) - 1


def segment_set(segments):
    return {tuple(sorted((tuple(map(float, a)), tuple(map(float, b))))) for a, b in segments}


def test_joint_of_a_hand_made_grid():
    # Invented support: u in {0, 1, 2} by v in {0, 1, 2, 3}; count 10 at (1, 1) and (1, 2), 1
    # elsewhere (total 30). The observed pair (0, 0) ties with every pair of count 1, so the pairs
    # more probable than it are the two of count 10, whose cells make [0.5, 1.5] x [0.5, 2.5].
    support = np.array([(a, b) for a in range(3) for b in range(4)])
    counts = np.where((support[:, 0] == 1) & np.isin(support[:, 1], (1, 2)), 10.0, 1.0)
    dist = ConditionalDistribution(support=support, log_weights=np.log(counts), observed=[0, 0],
                                   names=["u", "v"], scales=[1.0, 1.0])
    fig = plots.plot_joint(dist)
    ax = fig.axes[0]
    grid = np.log10(np.array([[1, 1, 1], [1, 10, 1], [1, 10, 1], [1, 1, 1]]) / 30.0)
    array = mesh_of(ax).get_array()
    assert array.shape == (4, 3)                                   # rows v, columns u
    np.testing.assert_allclose(np.ma.getdata(array), grid)
    outline = [c for c in ax.collections if c.get_gid() == "outline"]
    assert len(outline) == 1
    expected = segment_set([[(0.5, 0.5), (1.5, 0.5)], [(0.5, 2.5), (1.5, 2.5)],
                            [(0.5, 0.5), (0.5, 1.5)], [(0.5, 1.5), (0.5, 2.5)],
                            [(1.5, 0.5), (1.5, 1.5)], [(1.5, 1.5), (1.5, 2.5)]])
    assert segment_set(outline[0].get_segments()) == expected
    marker = one_line(ax, "observed")
    assert (marker.get_xdata()[0], marker.get_ydata()[0]) == (0.0, 0.0)
    # Outside the outline: 10 pairs of probability 1/30 each.
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert f"= {10 / 30:.4g}" in legend
    assert "u" in ax.get_xlabel() and "v" in ax.get_ylabel()
    assert "u" in ax.get_title() and "v" in ax.get_title()
    assert "log10" in fig.axes[1].get_ylabel()


def test_joint_of_the_exact_demo(exact_joint):
    fig = plots.plot_joint(exact_joint, ("age", "dose_mg"))
    ax = fig.axes[0]
    mesh = mesh_of(ax)
    array = mesh.get_array()
    ages, doses = np.unique(exact_joint.support[:, 1]), np.unique(exact_joint.support[:, 0])
    # Rows y = dose_mg, columns x = age: at least one cell per value (more where gaps are wide).
    assert array.shape[0] >= doses.shape[0] and array.shape[1] >= ages.shape[0]
    rows, cols = cells_of(mesh, exact_joint.support[:, 1] / exact_joint.scales[1],
                          exact_joint.support[:, 0] / exact_joint.scales[0])
    shown = np.ma.getdata(array)[rows, cols]
    np.testing.assert_allclose(shown, exact_joint.log_pmf() / np.log(10), rtol=1e-12)
    assert int(np.ma.count(array)) == exact_joint.n_points          # the rest is blank
    marker = one_line(ax, "observed")
    assert (marker.get_xdata()[0], marker.get_ydata()[0]) == (370.0, 625.0)
    # The probability outside the outline is the probability test's p-value.
    probability_test = joint_tests(exact_joint, ("probability",))[0]
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert f"{probability_test.p_value:.4g}" in legend
    assert [c.get_gid() for c in ax.collections].count("outline") == 1
    assert "age" in ax.get_xlabel() and "dose_mg" in ax.get_ylabel()


def test_joint_of_markov_draws_that_missed_the_observed_pair(mcmc_joint):
    obs = mcmc_joint.observed_index
    assert sum(np.count_nonzero(idx == obs) for idx in mcmc_joint.chain_index) == 0
    fig = plots.plot_joint(mcmc_joint)
    ax = fig.axes[0]
    counts = np.zeros(mcmc_joint.n_points)
    for idx in mcmc_joint.chain_index:
        counts += np.bincount(idx, minlength=mcmc_joint.n_points)
    drawn = counts > 0
    mesh = mesh_of(ax)
    array = mesh.get_array()
    rows, cols = cells_of(mesh, mcmc_joint.support[drawn, 0] / mcmc_joint.scales[0],
                          mcmc_joint.support[drawn, 1] / mcmc_joint.scales[1])
    np.testing.assert_allclose(np.ma.getdata(array)[rows, cols],
                               np.log10(counts[drawn] / counts.sum()), rtol=1e-12)
    assert int(np.ma.count(array)) == int(drawn.sum())
    assert not [c for c in ax.collections if c.get_gid() == "outline"]
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert "never drawn" in legend
    assert "never drawn" in fig.axes[1].get_ylabel()


def test_joint_of_three_columns_fixes_the_third():
    # Invented support: the third column w in {0, 1}; observed w = 1 keeps the rows with w = 1.
    support = np.array([[0, 0, 0], [1, 0, 0], [0, 0, 1], [1, 0, 1], [0, 1, 1], [1, 1, 1]])
    weights = np.array([5.0, 5.0, 1.0, 2.0, 3.0, 4.0])
    dist = ConditionalDistribution(support=support, log_weights=np.log(weights),
                                   observed=[1, 1, 1], names=["a", "b", "w"],
                                   scales=[1.0, 1.0, 1.0])
    fig = plots.plot_joint(dist, (0, 1))
    grid = np.ma.getdata(mesh_of(fig.axes[0]).get_array())
    # Rows b = 0, 1; columns a = 0, 1; weights 1, 2 / 3, 4 out of 10.
    np.testing.assert_allclose(grid, np.log10(np.array([[1, 2], [3, 4]]) / 10.0))
    assert "given w = 1" in fig.axes[0].get_title()


def test_joint_errors(exact_joint, age_design):
    one_column = exact_distribution(age_design)
    with pytest.raises(DataError, match="at least two statistics"):
        plots.plot_joint(one_column)
    with pytest.raises(DataError, match="two different columns"):
        plots.plot_joint(exact_joint, ("age", 1))
    with pytest.raises(DataError, match="column"):
        plots.plot_joint(exact_joint, (0, 2))
    with pytest.raises(DataError, match="two columns"):
        plots.plot_joint(exact_joint, (0,))


def test_joint_cells_do_not_stretch_over_wide_gaps():
    """x values 0, 1, 2 and 10 (median gap 1): cells [-0.5, 0.5], [0.5, 1.5], [1.5, 2.5], an
    empty cell [2.5, 9.5], then [9.5, 10.5] (by hand); y values 0, 1 are an even grid. The mesh
    has the empty column masked, and the value at x = 10 sits in its own narrow cell."""
    edges, index = plots._cell_edges(np.array([0.0, 1.0, 2.0, 10.0]))
    np.testing.assert_allclose(edges, [-0.5, 0.5, 1.5, 2.5, 9.5, 10.5])
    np.testing.assert_array_equal(index, [0, 1, 2, 4])
    even, even_index = plots._cell_edges(np.array([3.0, 5.0, 7.0]))
    np.testing.assert_allclose(even, [2.0, 4.0, 6.0, 8.0])
    np.testing.assert_array_equal(even_index, [0, 1, 2])
    support = np.array([(a, b) for a in (0, 1, 2, 10) for b in (0, 1)])
    dist = ConditionalDistribution(support=support, log_weights=np.zeros(8), observed=[0, 0],
                                   names=["u", "v"], scales=[1.0, 1.0])
    mesh = mesh_of(plots.plot_joint(dist).axes[0])
    array = mesh.get_array()
    assert array.shape == (2, 5)
    assert np.ma.getmaskarray(array)[:, 3].all() and not np.ma.getmaskarray(array)[:, [0, 4]].any()
    np.testing.assert_allclose(np.ma.getdata(array)[:, 4], np.log10(1 / 8))
    np.testing.assert_allclose(mesh.get_coordinates()[0, :, 0], [-0.5, 0.5, 1.5, 2.5, 9.5, 10.5])
