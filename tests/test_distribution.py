"""Tests of mcexact.distribution: tilted moments, slices, export and the file format.

Reference values come from brute-force counts (``tests/_reference.py``, exact Python integers)
pushed through the textbook formulas of METHODS.md section 1 written out with numpy here:
``P(T = t) = c(s, t) exp(beta . t) / sum_u c(s, u) exp(beta . u)``.  All data are invented.
"""

from __future__ import annotations

import json
import math
import os

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mcexact import ConditionalDistribution, DataError, Design, FileFormatError, exact_distribution

from _reference import grouped_counts

# Invented data: 11 binary rows, one nuisance score, two interest columns (one negative).
Y = [1, 0, 1, 1, 0, 0, 1, 0, 1, 0, 1]
Z = np.array([[0, 2], [1, -1], [2, 0], [1, 1], [0, -1], [2, 2],
              [1, 0], [0, 1], [2, -1], [1, 2], [0, 0]])
W = [0, 1, 1, 2, 0, 2, 1, 0, 2, 1, 0]


@pytest.fixture(scope="module")
def design() -> Design:
    return Design.from_arrays(Y, Z, W, interest_names=["a", "b"], nuisance_names=["w"])


@pytest.fixture(scope="module")
def dist(design) -> ConditionalDistribution:
    return exact_distribution(design)


@pytest.fixture(scope="module")
def reference(design) -> dict:
    """Brute-force counts c(s, t) over the design's groups (tests/_reference.py)."""
    return grouped_counts(design.events, design.trials, design.stratum, design.interest,
                          design.nuisance, design.fix_stratum_totals)


def reference_arrays(reference: dict):
    support = np.array(sorted(reference), dtype=np.int64)
    log_counts = np.array([math.log(reference[tuple(t)]) for t in support])
    return support, log_counts


def tilted(support, log_counts, beta):
    """pmf, mean and covariance under the tilt beta, straight from the formulas (numpy)."""
    log_w = log_counts + support @ np.asarray(beta, float)
    w = np.exp(log_w - log_w.max())
    p = w / w.sum()
    mean = p @ support
    centred = support - mean
    cov = np.einsum("i,ij,ik->jk", p, centred, centred)
    return p, mean, cov


def test_support_and_counts_match_brute_force(dist, reference):
    support, log_counts = reference_arrays(reference)
    np.testing.assert_array_equal(dist.support, support)
    np.testing.assert_allclose(dist.log_weights, log_counts, rtol=0, atol=1e-10)
    assert dist.n_points == len(reference)
    # log_total = log of the number of response vectors in the fiber (sum of the counts).
    assert dist.log_total == pytest.approx(math.log(sum(reference.values())), abs=1e-10)
    assert dist.names == ("a", "b")
    assert dist.support[dist.observed_index].tolist() == (Z.T @ Y).tolist()


@pytest.mark.parametrize("beta", [None, [0.0, 0.0], [0.7, -0.3], [-2.0, 1.5], [4.0, 4.0]])
def test_pmf_mean_cov_under_a_tilt(dist, reference, beta):
    support, log_counts = reference_arrays(reference)
    p, mean, cov = tilted(support, log_counts, [0.0, 0.0] if beta is None else beta)
    np.testing.assert_allclose(dist.pmf(beta), p, rtol=1e-10, atol=1e-300)
    np.testing.assert_allclose(dist.log_pmf(beta), np.log(p), rtol=0, atol=1e-10)
    np.testing.assert_allclose(dist.mean(beta), mean, rtol=1e-10)
    np.testing.assert_allclose(dist.cov(beta), cov, rtol=1e-9, atol=1e-12)
    assert dist.pmf(beta).sum() == pytest.approx(1.0, abs=1e-12)


@settings(max_examples=60, deadline=None, database=None)
@given(st.tuples(st.floats(-6, 6), st.floats(-6, 6)))
def test_tilted_moments_for_random_beta(dist, reference, beta):
    support, log_counts = reference_arrays(reference)
    p, mean, cov = tilted(support, log_counts, beta)
    np.testing.assert_allclose(dist.pmf(beta), p, rtol=1e-9, atol=1e-300)
    np.testing.assert_allclose(dist.mean(beta), mean, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(dist.cov(beta), cov, rtol=1e-7, atol=1e-9)


def test_extreme_tilt_does_not_overflow(dist, reference):
    # exp(800 * t) overflows a double; the tilted pmf must still be finite and concentrate on
    # the points with the largest 800 a + 0 b, i.e. the largest a (formula above in log space).
    beta = [800.0, 0.0]
    p = dist.pmf(beta)
    assert np.all(np.isfinite(p)) and p.sum() == pytest.approx(1.0, abs=1e-12)
    support, log_counts = reference_arrays(reference)
    expected, _, _ = tilted(support, log_counts, beta)
    np.testing.assert_allclose(p, expected, rtol=1e-9, atol=1e-300)
    top = support[:, 0] == support[:, 0].max()
    assert p[top].sum() == pytest.approx(1.0, abs=1e-12)


def test_huge_finite_tilt_gives_a_probability_or_an_error(dist, reference):
    # beta only has to be finite, yet at beta = (1e308, 0) the products beta . t overflow a
    # double.  The answer is (to double precision) the limit as beta_a -> infinity: all mass on
    # the points with the largest a, shared among them in proportion to c(s, t) since
    # beta_b = 0 (formula of METHODS.md section 1).  NaN is not an acceptable answer.
    try:
        p = dist.pmf([1e308, 0.0])
    except DataError:
        return
    assert np.all(np.isfinite(p))
    support, _ = reference_arrays(reference)
    top = support[:, 0] == support[:, 0].max()
    counts = np.array([reference[tuple(t)] for t in support[top]], dtype=float)   # brute force
    np.testing.assert_allclose(p[top], counts / counts.sum(), rtol=1e-12)
    assert np.all(p[~top] == 0.0)


@pytest.mark.parametrize("beta", [[1.0], [1.0, 2.0, 3.0], [np.inf, 0.0], [np.nan, 1.0]])
def test_bad_beta_raises(dist, beta):
    with pytest.raises(DataError):
        dist.pmf(beta)


# ============================================================================ condition


def test_condition_on_observed_value(design, dist, reference):
    a_obs = int(design.observed_interest[0])
    sliced = dist.condition(["a"])
    # Reference: brute-force counts of b restricted to a = a_obs.
    expected = {t[1]: c for t, c in reference.items() if t[0] == a_obs}
    assert sliced.names == ("b",)
    assert sliced.support[:, 0].tolist() == sorted(expected)
    np.testing.assert_allclose(sliced.log_weights,
                               [math.log(expected[t]) for t in sorted(expected)], atol=1e-10)
    assert sliced.observed.tolist() == [int(design.observed_interest[1])]
    assert sliced.info["conditioned_on"] == {"a": a_obs}
    np.testing.assert_allclose(sliced.pmf(), np.array([expected[t] for t in sorted(expected)])
                               / sum(expected.values()), rtol=1e-10)
    # By index, the same slice.
    by_index = dist.condition([0])
    np.testing.assert_array_equal(by_index.support, sliced.support)
    np.testing.assert_array_equal(by_index.log_weights, sliced.log_weights)


def test_condition_equals_conditioning_in_the_design(design, dist):
    # Conditioning on T_a inside the network (a moved to the nuisance columns) must give the
    # same distribution of T_b as slicing the joint one; both against the brute force.
    moved = design.with_interest("b")
    direct = exact_distribution(moved)
    reference = grouped_counts(moved.events, moved.trials, moved.stratum, moved.interest,
                               moved.nuisance, moved.fix_stratum_totals)
    sliced = dist.condition(["a"])
    assert sliced.support[:, 0].tolist() == [t[0] for t in sorted(reference)]
    np.testing.assert_allclose(sliced.log_weights, direct.log_weights, atol=1e-10)
    np.testing.assert_array_equal(sliced.support, direct.support)


def test_condition_on_other_value(dist, reference):
    values = sorted({t[1] for t in reference})
    b_value = values[0]
    sliced = dist.condition({"b": b_value})
    expected = {t[0]: c for t, c in reference.items() if t[1] == b_value}   # brute force
    assert sliced.names == ("a",)
    assert sliced.support[:, 0].tolist() == sorted(expected)
    np.testing.assert_allclose(np.exp(sliced.log_weights),
                               [expected[t] for t in sorted(expected)], rtol=1e-10)
    assert sliced.info["conditioned_on"] == {"b": b_value}


@pytest.mark.parametrize("fixed", [["c"], [5], [0, 0], ["a", "b"], {"a": 10**6}, [True]])
def test_condition_refuses_bad_requests(dist, fixed):
    with pytest.raises(DataError):
        dist.condition(fixed)


def test_condition_refuses_a_non_integer_value(design, dist):
    # Support points are integers, so no point has a = a_obs + 0.5: the request must be refused
    # rather than truncated to a_obs.
    a_obs = int(design.observed_interest[0])
    with pytest.raises(DataError):
        dist.condition({"a": a_obs + 0.5})


# ============================================================================ to_frame


def test_to_frame(dist, reference):
    beta = [0.4, -0.8]
    frame = dist.to_frame(beta)
    assert isinstance(frame, pd.DataFrame)
    assert list(frame.columns) == ["a", "b", "log_count", "probability", "observed"]
    support, log_counts = reference_arrays(reference)
    p, _, _ = tilted(support, log_counts, beta)
    np.testing.assert_array_equal(frame[["a", "b"]].to_numpy(), support)
    np.testing.assert_allclose(frame["log_count"], log_counts, atol=1e-10)
    np.testing.assert_allclose(frame["probability"], p, rtol=1e-10)
    observed = tuple((Z.T @ Y).tolist())
    flagged = frame.loc[frame["observed"], ["a", "b"]].to_numpy()
    assert frame["observed"].dtype == bool
    assert [tuple(r) for r in flagged] == [observed]
    # Without beta the probabilities are the null ones: counts over their sum (brute force).
    null = np.array([reference[tuple(t)] for t in support], dtype=float)
    np.testing.assert_allclose(dist.to_frame()["probability"], null / null.sum(), rtol=1e-10)


# ============================================================================ save / load


def assert_equal_distributions(a: ConditionalDistribution, b: ConditionalDistribution) -> None:
    np.testing.assert_array_equal(a.support, b.support)
    np.testing.assert_array_equal(a.log_weights, b.log_weights)
    np.testing.assert_array_equal(a.observed, b.observed)
    np.testing.assert_array_equal(a.scales, b.scales)
    assert a.names == b.names


def test_save_load_round_trip(dist, tmp_path):
    path = tmp_path / "dist.npz"
    dist.save(path)
    loaded = ConditionalDistribution.load(path)
    assert_equal_distributions(loaded, dist)
    assert loaded.info == json.loads(json.dumps(dist.info))
    assert os.listdir(tmp_path) == ["dist.npz"]          # no temporary file left behind
    # The file follows the documented layout (module docstring of mcexact/distribution.py).
    with np.load(path, allow_pickle=False) as data:
        header = json.loads(str(data["header"]))
    assert header["format"] == "mcexact.distribution" and header["version"] == 1
    assert header["names"] == ["a", "b"]
    # A string path works too, and so does a conditioned distribution (nested info).
    sliced = dist.condition(["a"])
    sliced.save(str(tmp_path / "slice.npz"))
    again = ConditionalDistribution.load(str(tmp_path / "slice.npz"))
    assert_equal_distributions(again, sliced)
    assert again.info["conditioned_on"] == sliced.info["conditioned_on"]


def test_round_trip_keeps_decimal_scales(tmp_path):
    design = Design.from_arrays([1, 0, 1, 0, 1], [0.5, 1.25, 0.0, 2.0, 0.75])
    dist = exact_distribution(design)
    dist.save(tmp_path / "d.npz")
    loaded = ConditionalDistribution.load(tmp_path / "d.npz")
    assert loaded.scales.tolist() == [100.0]               # 1.25 needs 10**2
    assert_equal_distributions(loaded, dist)


def write_archive(path, header, **arrays):
    """Write an .npz by hand in the documented layout, with a chosen header."""
    np.savez(path, header=np.array(json.dumps(header)), **arrays)


def good_arrays(dist):
    return dict(support=dist.support, log_weights=dist.log_weights, observed=dist.observed,
                scales=dist.scales)


def test_hand_written_file_in_the_documented_layout_loads(dist, tmp_path):
    # Independent check of the format: a file written here, not by save(), loads.
    path = tmp_path / "hand.npz"
    write_archive(path, {"format": "mcexact.distribution", "version": 1, "names": ["a", "b"],
                         "info": {"method": "exact"}}, **good_arrays(dist))
    loaded = ConditionalDistribution.load(path)
    assert_equal_distributions(loaded, dist)
    assert loaded.info == {"method": "exact"}


def test_load_of_a_foreign_npz_raises(tmp_path):
    path = tmp_path / "foreign.npz"
    np.savez(path, x=np.arange(4), y=np.ones(3))
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(path)


def test_load_with_wrong_version_raises(dist, tmp_path):
    path = tmp_path / "v2.npz"
    write_archive(path, {"format": "mcexact.distribution", "version": 2, "names": ["a", "b"],
                         "info": {}}, **good_arrays(dist))
    with pytest.raises(FileFormatError, match="version"):
        ConditionalDistribution.load(path)


def test_load_with_wrong_format_name_raises(dist, tmp_path):
    path = tmp_path / "other.npz"
    write_archive(path, {"format": "something.else", "version": 1, "names": ["a", "b"],
                         "info": {}}, **good_arrays(dist))
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(path)


def test_load_with_inconsistent_arrays_raises(dist, tmp_path):
    path = tmp_path / "bad.npz"
    write_archive(path, {"format": "mcexact.distribution", "version": 1, "names": ["a"],
                         "info": {}}, **good_arrays(dist))       # one name for two columns
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(path)


@pytest.mark.parametrize("keep", [0.5, 0.9, 10, 0])
def test_load_of_a_truncated_file_raises(dist, tmp_path, keep):
    path = tmp_path / "full.npz"
    dist.save(path)
    data = path.read_bytes()
    cut = int(len(data) * keep) if isinstance(keep, float) else keep
    damaged = tmp_path / "cut.npz"
    damaged.write_bytes(data[:cut])
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(damaged)


def test_load_of_a_plain_npy_file_raises(tmp_path):
    path = tmp_path / "array.npy"
    np.save(path, np.arange(5))
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(path)


def test_load_of_a_header_that_is_not_an_object_raises(dist, tmp_path):
    path = tmp_path / "list.npz"
    write_archive(path, ["mcexact.distribution", 1], **good_arrays(dist))
    with pytest.raises(FileFormatError):
        ConditionalDistribution.load(path)


def test_load_of_a_missing_file_raises_file_not_found(tmp_path):
    with pytest.raises(FileNotFoundError):
        ConditionalDistribution.load(tmp_path / "absent.npz")


def test_save_is_atomic(dist, design, tmp_path, monkeypatch):
    path = tmp_path / "kept.npz"
    dist.save(path)
    before = path.read_bytes()
    other = dist.condition(["a"])

    def failing_savez(file, *args, **kwargs):
        file.write(b"PK\x03\x04 half a zip archive")      # some bytes reach the disk first
        raise OSError("simulated disk failure in the middle of a write")

    monkeypatch.setattr(np, "savez", failing_savez)
    with pytest.raises(OSError, match="simulated"):
        other.save(path)
    monkeypatch.undo()
    assert path.read_bytes() == before                    # the old file is untouched
    assert os.listdir(tmp_path) == ["kept.npz"]           # and no temporary file is left
    assert_equal_distributions(ConditionalDistribution.load(path), dist)


def test_interrupted_first_save_leaves_nothing(dist, tmp_path, monkeypatch):
    def interrupted(file, *args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(np, "savez", interrupted)
    with pytest.raises(KeyboardInterrupt):
        dist.save(tmp_path / "new.npz")
    monkeypatch.undo()
    assert os.listdir(tmp_path) == []
