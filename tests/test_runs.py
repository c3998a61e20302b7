"""Saved runs: reopening, extending (identical to one uninterrupted run), interruption and atomic
writes (a run killed while writing leaves the earlier file intact).

Reference for "identical": a fresh `mcexact.fit` of the total length with the same seed, which
does not go through any saving or continuing code.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import zipfile

import numpy as np
import pandas as pd
import pytest

import mcexact
from mcexact import montecarlo as mc
from mcexact._exceptions import DataError, FileFormatError


def _small(kind: str) -> mcexact.Design:
    """Small invented designs for each engine path."""
    rng = np.random.default_rng(42)
    if kind == "strata":            # matched sets: swap moves for the chains
        strata = np.repeat(np.arange(8), 4)
        z = rng.integers(0, 4, 32)
        y = np.zeros(32, int)
        for h in range(8):
            y[4 * h + rng.integers(0, 4)] = 1
        return mcexact.Design.from_arrays(y, z, strata=strata)
    if kind == "nuisance":          # an integer nuisance column: block moves for the chains
        n = 30
        w = rng.integers(0, 3, n)
        z = rng.integers(0, 4, n)
        y = (rng.random(n) < 0.35).astype(int)
        return mcexact.Design.from_arrays(y, z, w)
    if kind == "two":               # two interest columns: two effects and the joint test
        n = 30
        z = np.column_stack([rng.integers(0, 3, n), rng.integers(0, 2, n)])
        y = (rng.random(n) < 0.4).astype(int)
        return mcexact.Design.from_arrays(y, z)
    raise ValueError(kind)


FAST = dict(asymptotic=False, n_chains=2, n_warmup=50, thin=2)


def _same(a: mcexact.FitResult, b: mcexact.FitResult) -> None:
    pd.testing.assert_frame_equal(a.tests, b.tests)
    pd.testing.assert_frame_equal(a.estimates, b.estimates)
    if a.joint_estimate is None:
        assert b.joint_estimate is None
    else:
        pd.testing.assert_series_equal(a.joint_estimate, b.joint_estimate)


@pytest.mark.parametrize("kind,method", [("strata", "direct"), ("strata", "mcmc"),
                                         ("nuisance", "mcmc"), ("two", "direct"),
                                         ("two", "mcmc")])
def test_saved_run_extended_equals_one_uninterrupted_run(tmp_path, kind, method):
    design = _small(kind)
    first = mcexact.fit(design, method=method, n_draws=300, rng=11, **FAST)
    path = first.save(tmp_path / "run.mcx")
    reopened = mcexact.load_run(path)
    _same(first, reopened)
    extended = reopened.extend(500)
    whole = mcexact.fit(design, method=method, n_draws=800, rng=11, **FAST)
    _same(extended, whole)
    assert extended.method["options"]["n_draws"] == 800
    for part, info in whole.method["parts"].items():
        assert extended.method["parts"][part]["n_draws"] == info["n_draws"]
    # In memory, without the file, and in two steps: the same numbers again.
    _same(first.extend(200).extend(300), whole)


def test_reopened_run_keeps_tables_distributions_and_settings(tmp_path):
    design = _small("two")
    result = mcexact.fit(design, method="direct", n_draws=400, rng=3, alpha=0.1, n_chains=2,
                         n_warmup=50, thin=2)
    back = mcexact.load_run(result.save(tmp_path / "r.mcx"))
    _same(result, back)
    assert back.alpha == 0.1
    assert back.notes == result.notes
    assert back.interrupted is False
    assert back.method["rng"] == result.method["rng"]
    assert set(back.effect_distributions) == set(result.effect_distributions)
    for name, dist in result.effect_distributions.items():
        other = back.effect_distributions[name]
        np.testing.assert_array_equal(dist.support, other.support)
        np.testing.assert_array_equal(dist.log_weights, other.log_weights)
        for a, b in zip(dist.chain_index, other.chain_index):
            np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(result.distribution.support, back.distribution.support)
    # The asymptotic comparison is recomputed from the design: the same fit.
    assert back.asymptotic is not None
    assert json.dumps(back.asymptotic.to_dict(), default=str) == json.dumps(
        result.asymptotic.to_dict(), default=str)
    # The design is rebuilt from the file exactly.
    for name in ("events", "trials", "stratum", "interest", "nuisance"):
        np.testing.assert_array_equal(getattr(back.design, name), getattr(result.design, name))
    assert back.design.effects == result.design.effects
    assert back.to_json() == result.to_json()


def test_exact_run_reopens_but_cannot_be_extended(tmp_path):
    result = mcexact.fit(_small("strata"), asymptotic=False)
    assert result.method["engines"] == ["exact"]
    back = mcexact.load_run(result.save(tmp_path / "exact.mcx"))
    _same(result, back)
    np.testing.assert_array_equal(back.distribution.log_weights, result.distribution.log_weights)
    with pytest.raises(DataError, match="every part of this analysis is exact"):
        back.extend(100)


@pytest.mark.parametrize("bad", [-1, 1.5, True, "10"])
def test_extend_rejects_bad_draw_counts(bad):
    result = mcexact.fit(_small("strata"), method="direct", n_draws=100, rng=1, **FAST)
    with pytest.raises(DataError, match="n_draws"):
        result.extend(bad)


def test_extend_to_a_target_says_why_it_stopped():
    result = mcexact.fit(_small("strata"), method="direct", n_draws=200, rng=5, **FAST)
    more = result.extend(0, target_mcse=0.02, max_draws=20_000)
    info = more.method["parts"]["z0"]
    assert info["n_draws"] > 200
    assert ("target Monte Carlo error" in info["stopped"]
            or "draw limit" in info["stopped"])
    if "target" in info["stopped"]:
        score = more.tests.set_index("test").loc["score"]
        assert score["mcse"] <= 0.02


def test_result_without_a_run_cannot_be_saved_or_extended(tmp_path):
    import dataclasses

    result = mcexact.fit(_small("strata"), method="direct", n_draws=100, rng=1, **FAST)
    bare = dataclasses.replace(result, _run={})
    with pytest.raises(FileFormatError, match="no run"):
        bare.save(tmp_path / "x.mcx")
    with pytest.raises(DataError, match="no run"):
        bare.extend(10)


# -- interruption -----------------------------------------------------------------------------

def _interrupt_on_call(monkeypatch, n: int):
    """Make the n-th sampling round (PartSampler.run call) raise KeyboardInterrupt, as Ctrl-C."""
    calls = {"n": 0}
    original = mc.PartSampler.run

    def run(self, n_draws):
        calls["n"] += 1
        if calls["n"] == n:
            raise KeyboardInterrupt
        return original(self, n_draws)

    monkeypatch.setattr(mc.PartSampler, "run", run)
    return calls


def test_interrupted_run_keeps_its_draws_and_extends_exactly(tmp_path, monkeypatch):
    design = _small("strata")
    _interrupt_on_call(monkeypatch, 3)         # rounds of 100: two rounds done
    part = mcexact.fit(design, method="mcmc", n_draws=1000, rng=9, **FAST)
    monkeypatch.undo()
    assert part.interrupted
    info = part.method["parts"]["z0"]
    assert info["stopped"] == "interrupted by the user"
    assert info["n_draws"] == 200
    assert any("interrupted" in note for note in part.notes)
    assert part.to_dict()["interrupted"] is True
    back = mcexact.load_run(part.save(tmp_path / "int.mcx"))
    assert back.interrupted
    _same(back, part)
    _same(back.extend(300), mcexact.fit(design, method="mcmc", n_draws=500, rng=9, **FAST))


def test_interruption_skips_later_parts_and_extension_computes_them(monkeypatch):
    design = _small("two")
    _interrupt_on_call(monkeypatch, 2)         # during the first effect's second round
    part = mcexact.fit(design, method="direct", n_draws=500, rng=4, **FAST)
    monkeypatch.undo()
    assert part.interrupted
    assert set(part.tests["effect"]) == {"z0"}
    assert part.method["parts"]["z1"]["engine"] == "direct"
    assert "z1" not in part.effect_distributions
    assert any("'z1' was not computed" in note for note in part.notes)
    # The estimates were not refined by tilted sampling after the interruption.
    assert not part.estimates["note"].str.contains("refined by sampling").any()
    done = part.extend(200)
    assert not done.interrupted
    assert set(done.tests["effect"]) == {"z0", "z1", "joint"}
    assert done.method["parts"]["z0"]["n_draws"] == 50 + 200
    assert done.method["parts"]["z1"]["n_draws"] == 200


def test_interruption_before_any_draw_keeps_nothing_and_says_so(monkeypatch):
    _interrupt_on_call(monkeypatch, 1)
    part = mcexact.fit(_small("strata"), method="direct", n_draws=500, rng=4, **FAST)
    monkeypatch.undo()
    assert part.interrupted
    assert part.tests.empty and part.estimates.empty
    done = part.extend(300)
    _same(done, mcexact.fit(_small("strata"), method="direct", n_draws=300, rng=4, **FAST))


# -- damaged and foreign files ----------------------------------------------------------------

def _saved(tmp_path) -> str:
    result = mcexact.fit(_small("strata"), method="direct", n_draws=200, rng=2, **FAST)
    return str(result.save(tmp_path / "good.mcx"))


def test_load_errors_name_the_problem(tmp_path):
    good = _saved(tmp_path)
    with pytest.raises(FileFormatError, match="no saved run"):
        mcexact.load_run(tmp_path / "missing.mcx")
    text = tmp_path / "text.mcx"
    text.write_text("not a run")
    with pytest.raises(FileFormatError, match="not a saved mcexact run"):
        mcexact.load_run(text)
    truncated = tmp_path / "cut.mcx"
    truncated.write_bytes(open(good, "rb").read()[:-200])
    with pytest.raises(FileFormatError):
        mcexact.load_run(truncated)
    other = tmp_path / "other.npz"
    np.savez(other, x=np.arange(3))
    with pytest.raises(FileFormatError, match="no header"):
        mcexact.load_run(other)
    dist = tmp_path / "dist.npz"
    mcexact.fit(_small("strata"), asymptotic=False).distribution.save(dist)
    with pytest.raises(FileFormatError, match="not a saved mcexact run"):
        mcexact.load_run(dist)


def _rewrite_header(src: str, dst, change) -> None:
    with np.load(src, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    header = json.loads(str(arrays.pop("header")))
    change(header, arrays)
    with open(dst, "wb") as fh:
        np.savez(fh, header=np.array(json.dumps(header)), **arrays)


def test_wrong_version_and_inconsistent_content_are_rejected(tmp_path):
    good = _saved(tmp_path)
    newer = tmp_path / "newer.mcx"
    _rewrite_header(good, newer, lambda h, a: h.update(version=99))
    with pytest.raises(FileFormatError, match="version 99"):
        mcexact.load_run(newer)
    broken = tmp_path / "broken.mcx"

    def drop_array(h, a):
        del a[h["design"]["events"]]
    _rewrite_header(good, broken, drop_array)
    with pytest.raises(FileFormatError, match="damaged"):
        mcexact.load_run(broken)
    lost = tmp_path / "lost.mcx"
    _rewrite_header(good, lost, lambda h, a: h.pop("seeds"))
    with pytest.raises(FileFormatError, match="damaged"):
        mcexact.load_run(lost)


def test_version_1_run_of_block_chains_extends_with_the_draws_own_moments(tmp_path, monkeypatch):
    """A version-1 saved run (before block chains recorded Rao-Blackwellized moments) still loads;
    extending it keeps the null moments its draws give, so it equals one uninterrupted run made
    with the records switched off (montecarlo._RB_MOMENTS)."""
    from mcexact import runs

    design = _small("nuisance")
    first = mcexact.fit(design, method="mcmc", n_draws=300, rng=11, **FAST)
    path = first.save(tmp_path / "v2.mcx")
    old = tmp_path / "v1.mcx"

    def as_version_1(header, arrays):
        header["version"] = 1
        for part in header["parts"].values():
            for name in part.get("sample", {}).pop("moment_draws", []):
                del arrays[name]
    _rewrite_header(path, old, as_version_1)
    assert runs.FILE_VERSION == 2 and 1 in runs.READABLE_VERSIONS
    with np.load(path, allow_pickle=False) as archive:
        assert any("moments" in k for k in archive.files)
    reopened = mcexact.load_run(old)
    samples = [rec["sample"] for rec in reopened._run["parts"].values()]
    assert samples and all(s.moment_draws is None for s in samples)
    assert all(s.moment_draws is not None
               for s in (rec["sample"] for rec in mcexact.load_run(path)._run["parts"].values()))
    monkeypatch.setattr(mc, "_RB_MOMENTS", False)
    whole = mcexact.fit(design, method="mcmc", n_draws=800, rng=11, **FAST)
    _same(reopened.extend(500), whole)
    monkeypatch.setattr(mc, "_RB_MOMENTS", True)
    # The version-2 file extends with the records, as a fresh run does.
    _same(mcexact.load_run(path).extend(500),
          mcexact.fit(design, method="mcmc", n_draws=800, rng=11, **FAST))


def test_failed_write_leaves_the_earlier_file_and_no_temporary(tmp_path, monkeypatch):
    good = _saved(tmp_path)
    before = open(good, "rb").read()
    result = mcexact.fit(_small("strata"), method="direct", n_draws=300, rng=8, **FAST)

    def broken_savez(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(np, "savez", broken_savez)
    with pytest.raises(OSError, match="disk full"):
        result.save(good)
    monkeypatch.undo()
    assert open(good, "rb").read() == before
    assert sorted(os.listdir(tmp_path)) == ["good.mcx"]


_WRITER = r"""
import os, sys, time, numpy as np, mcexact
design = mcexact.Design.from_arrays(np.r_[np.ones(30, int), np.zeros(90, int)],
                                    np.arange(120) % 7)
result = mcexact.fit(design, method="direct", n_draws=40_000, n_chains=2, rng=1,
                     asymptotic=False, tilted=False)
path = sys.argv[1]
result.save(path)
print("ready", flush=True)


class SlowFile:
    # A slow disk: every write of the archive takes a while, so a kill lands mid-write.
    def __init__(self, fh):
        self.fh = fh

    def write(self, data):
        time.sleep(0.002)
        return self.fh.write(data)

    def __getattr__(self, name):
        return getattr(self.fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return self.fh.__exit__(*exc)


real_fdopen = os.fdopen
os.fdopen = lambda *a, **k: SlowFile(real_fdopen(*a, **k))
while True:
    print("start", flush=True)
    result.save(path)
    print("done", flush=True)
"""


def test_run_killed_while_writing_leaves_a_complete_file(tmp_path):
    """Kill a process that keeps rewriting a saved run (on a simulated slow disk) at random
    moments: the file at the target path must always open and hold the complete run."""
    path = tmp_path / "big.mcx"
    rng = np.random.default_rng(0)
    mid_write = 0
    for attempt in range(3):
        # Started in tmp_path: `python -c` puts the working folder first on sys.path, and the
        # repository root holds the uncompiled source; the child imports the same mcexact as
        # this test run (installed, or built in place).
        env = {**os.environ, "PYTHONPATH": os.path.dirname(os.path.dirname(mcexact.__file__))}
        proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(path)], cwd=tmp_path,
                                env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True)
        try:
            assert proc.stdout.readline().strip() == "ready", proc.stderr.read()
            assert proc.stdout.readline().strip() == "start"
            time.sleep(float(rng.uniform(0.02, 0.3)))
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
        lines = ["start"] + proc.stdout.read().split()
        mid_write += lines[-1] == "start"
        back = mcexact.load_run(path)
        assert back.method["parts"]["z0"]["n_draws"] == 40_000
        assert back.effect_distributions["z0"].n_draws == 40_000
    assert mid_write >= 1, "no kill landed while a file was being written"
    leftovers = [f for f in os.listdir(tmp_path) if f != "big.mcx"]
    # A killed writer can leave its hidden temporary file behind, never a damaged target.
    assert all(f.startswith(".big.mcx.") and f.endswith(".tmp") for f in leftovers)


def test_estimate_whose_observed_value_was_never_drawn_is_not_quotable():
    """A far-tail observation that no draw reached: the Monte Carlo estimate looks infinite (the
    observed value seems to sit at an edge), while exact enumeration gives a finite one. The
    verdict must not call it quotable."""
    z = np.arange(40) % 10
    y = (z >= 8).astype(int)                      # events only at the two highest doses
    y[3] = 1
    design = mcexact.Design.from_arrays(y, z)
    exact = mcexact.fit(design, asymptotic=False)
    assert np.isfinite(exact.estimates.loc[0, "estimate"])
    mc_fit = mcexact.fit(design, method="mcmc", n_draws=200, rng=1, tilted=False, **FAST)
    dist = mc_fit.effect_distributions["z0"]
    drawn = sum(int(np.count_nonzero(c == dist.observed_index)) for c in dist.chain_index)
    assert drawn == 0, "the design no longer puts the observed value out of reach"
    row = mc_fit.estimates.loc[0]
    assert row["verdict"].startswith("not quotable: the observed statistic was never drawn")
    # With tilting (the default) the chains are first tilted to the observed value.
    tilted = mcexact.fit(design, method="mcmc", n_draws=200, rng=1, **FAST).estimates.loc[0]
    assert "never drawn under the null" in tilted["note"]
    assert np.isfinite(tilted["estimate"]) and tilted["kind"] == "cmle"


def test_chains_that_never_move_are_not_called_converged():
    """Nuisance values 1, 2, 4, 8, ... make W'y fix y itself: no block move can change the
    response, so the chains sit at the data. They agree with each other trivially; the verdict
    must say they are not evidence of convergence."""
    w = 2 ** np.arange(12)
    z = np.arange(12) % 3
    y = (np.arange(12) % 2).astype(int)
    design = mcexact.Design.from_arrays(y, z, w)
    result = mcexact.fit(design, method="mcmc", n_draws=200, rng=1, **FAST)
    assert result.method["parts"]["z0"]["changed_share"] == 0
    for frame in (result.tests, result.estimates):
        assert frame["verdict"].str.startswith("not converged: no move").all()
