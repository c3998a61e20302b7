"""Speed and memory of the network enumerator, ``mcexact.exact_distribution``.

Run ``python benchmarks/bench_network.py`` (about 5 minutes on 2 cores) or add ``--quick``
(under a minute).  Three tables:

1. **Enumeration vs brute force.**  Binary designs of 16-22 rows.  Brute force enumerates all
   ``2**n`` response vectors with NumPy: the sufficient statistics of every vector are the sum of
   a low-bits part and a high-bits part, each a matrix product of a 0/1 bit matrix with the
   covariate matrix, and the vectors with the observed nuisance statistics are tallied by their
   interest statistic.  Both must give the same counts ``c(s, t)``.
2. **Enumeration vs a pure-Python dict recursion.**  The textbook recursion over the design's
   binomial groups: a dict ``{(u, v): count}`` updated group by group, equal partial sums merged,
   pruned only by per-column bounds on what the remaining groups can add.  Results must agree to
   a relative 1e-9.  The project's goal is a geometric-mean speed-up of at least 100x.
3. **Largest design within the default budget.**  A family of growing designs is run, each size
   in a fresh subprocess (so its peak resident memory is its own), until ``plan(...).fits_full``
   is False or the next run is predicted to exceed a time limit.  Reports nodes, seconds, peak
   memory and bytes per full-network node at the peak, for the dense layout and, on a family with
   sparse interest sums, for the hashed layout.

Timings are ratios measured side by side in one run on a shared, noisy machine: each timing is the
best of a few repeats, ratios are summarised by their geometric mean, and nothing here passes or
fails on absolute time.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

# Benchmark this checkout (its in-place build), not whatever mcexact may be installed.
_ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(_ROOT))

import mcexact  # noqa: E402
from _designs import (RawDesign, binary_design, grouped_design, growth_design,  # noqa: E402
                      sparse_interest_design, stratified_design)

# Relative agreement required between the enumerator and the pure-Python recursion; the
# enumerator works in log space in float64, so its counts carry a relative error near 1e-13.
_RTOL = 1e-9

_GOAL_RATIO = 100.0

# Families of table 3, by name (the worker subprocess rebuilds its design from the name).
_FAMILIES = {"growth": growth_design, "sparse": sparse_interest_design}


# ---------------------------------------------------------------------------------------- timing

def best_time(fn, repeats: int, max_seconds: float):
    """Best wall time of up to `repeats` calls of `fn`, stopping once `max_seconds` are spent.

    Returns ``(best_seconds, result_of_last_call, calls_made)``.
    """
    best, spent, result = math.inf, 0.0, None
    for calls in range(1, repeats + 1):
        t0 = time.perf_counter()
        result = fn()
        dt = time.perf_counter() - t0
        best, spent = min(best, dt), spent + dt
        if spent >= max_seconds:
            break
    return best, result, calls


def geometric_mean(values) -> float:
    values = list(values)
    return math.exp(sum(math.log(v) for v in values) / len(values))


# ------------------------------------------------------------------------------ the references

def brute_force_counts(raw: RawDesign, low_bits: int = 10, block_bits: int = 18) -> dict[int, int]:
    """``c(s, t)`` by enumerating all ``2**n`` 0/1 response vectors of a binary design.

    Model: intercept, the nuisance columns, the interest column (one).  Split each vector into its
    first ``L`` rows and the rest: the statistics of vector ``hi * 2**L + lo`` are
    ``stats_low[lo] + stats_high[hi]``, each table a product of a 0/1 bit matrix with the
    covariate matrix, computed once.  The nuisance statistics (events, W'y) are packed into one
    integer key, so every vector costs one int32 addition and one comparison; the interest
    statistic is formed for the matching vectors only and tallied.  (L = 10 and blocks of 2**18
    vectors were the fastest settings on the development machine.)
    """
    n = raw.n_rows
    if raw.trials is not None or raw.strata is not None:
        raise ValueError("brute force handles binary designs without strata only")
    nuisance = np.asarray(raw.nuisance, dtype=np.int64).reshape(n, -1)
    covariates = np.column_stack([np.ones(n, dtype=np.int64), nuisance,
                                  np.asarray(raw.interest, dtype=np.int64)])
    if covariates.min() < 0:
        raise ValueError("brute force packs non-negative covariates only")
    radix = covariates.sum(axis=0) + 1                      # every partial sum is below this
    pack = np.concatenate([[1], np.cumprod(radix[:-2])])    # mixed radix over (events, W'y)
    if int(np.prod(radix[:-1])) >= 2 ** 31:
        raise ValueError("nuisance statistics too wide to pack into int32")
    observed = covariates.T @ raw.y
    observed_key = int(observed[:-1] @ pack)
    low = min(n, low_bits)

    def bit_matrix(width):
        return (np.arange(2 ** width)[:, None] >> np.arange(width)) & 1

    stats_low = bit_matrix(low) @ covariates[:low]
    stats_high = bit_matrix(n - low) @ covariates[low:]
    key_low = (stats_low[:, :-1] @ pack).astype(np.int32)
    key_high = (stats_high[:, :-1] @ pack).astype(np.int32)
    t_low, t_high = stats_low[:, -1], stats_high[:, -1]
    tally = np.zeros(int(radix[-1]), dtype=np.int64)
    block = max(1, 2 ** block_bits // 2 ** low)
    for start in range(0, key_high.shape[0], block):
        hit_high, hit_low = np.nonzero(key_low[None, :] + key_high[start:start + block, None]
                                       == observed_key)
        tally += np.bincount(t_high[start + hit_high] + t_low[hit_low], minlength=tally.shape[0])
    return {int(t): int(c) for t, c in enumerate(tally) if c}


def dict_recursion_counts(design: mcexact.Design) -> dict[tuple, float]:
    """``c(s, t)`` by the textbook forward recursion in pure Python (floats), group by group.

    A node is ``(u, v)``: ``u`` holds the events so far in the current stratum (when stratum
    totals are fixed) followed by the nuisance partial sums, ``v`` the interest partial sums.
    Arc ``y`` of group ``k`` has weight ``C(m_k, y)``.  A new node is dropped when the groups
    still to come cannot bring ``u`` to its target, by per-column lower and upper bounds
    (``sum m_i min(0, w_ij)`` and ``sum m_i max(0, w_ij)`` over the remaining groups).  At the end
    of a stratum its event count must equal the observed one and is reset to zero.
    """
    trials = design.trials.tolist()
    stratum = design.stratum.tolist()
    nuisance = design.nuisance.tolist()
    interest = design.interest.tolist()
    fixed = design.fix_stratum_totals
    target_w = design.observed_nuisance.tolist()
    target_c = design.stratum_events.tolist()
    n_groups, p = len(trials), len(target_w)

    # rest_lo[k][j], rest_hi[k][j]: what groups k.. can add to nuisance column j.
    rest_lo = [[0] * p for _ in range(n_groups + 1)]
    rest_hi = [[0] * p for _ in range(n_groups + 1)]
    # rest_in_stratum[k]: trials of groups k.. in the stratum of group k - 1.
    rest_in_stratum = [0] * (n_groups + 1)
    for k in range(n_groups - 1, -1, -1):
        for j in range(p):
            step = trials[k] * nuisance[k][j]
            rest_lo[k][j] = rest_lo[k + 1][j] + min(0, step)
            rest_hi[k][j] = rest_hi[k + 1][j] + max(0, step)
    for k in range(n_groups - 1, -1, -1):
        same = k + 1 < n_groups and stratum[k + 1] == stratum[k]
        rest_in_stratum[k + 1] = rest_in_stratum[k + 2] + trials[k + 1] if same else 0
    rest_in_stratum[0] = 0

    n_u = p + (1 if fixed else 0)
    nodes = {((0,) * n_u, (0,) * len(interest[0])): 1.0}
    for k in range(n_groups):
        m, h = trials[k], stratum[k]
        end_of_stratum = k + 1 == n_groups or stratum[k + 1] != h
        lo, hi = rest_lo[k + 1], rest_hi[k + 1]
        arcs = []
        for y in range(m + 1):
            du = ((y,) if fixed else ()) + tuple(y * w for w in nuisance[k])
            arcs.append((du, tuple(y * z for z in interest[k]), float(math.comb(m, y))))
        new = defaultdict(float)
        for (u, v), count in nodes.items():
            for du, dv, weight in arcs:
                u2 = tuple(a + b for a, b in zip(u, du))
                if fixed:
                    c = u2[0]
                    if c > target_c[h] or c + rest_in_stratum[k + 1] < target_c[h]:
                        continue
                    w2 = u2[1:]
                else:
                    w2 = u2
                if any(not (lo[j] <= target_w[j] - w2[j] <= hi[j]) for j in range(p)):
                    continue
                if fixed and end_of_stratum:
                    u2 = (0,) + w2
                new[(u2, tuple(a + b for a, b in zip(v, dv)))] += count * weight
        nodes = new
    return {v: count for (u, v), count in nodes.items()}


def enumerator_counts(design: mcexact.Design) -> dict[tuple, float]:
    """``log c(s, t)`` from mcexact, keyed like the references."""
    dist = mcexact.exact_distribution(design)
    return {tuple(int(x) for x in t): float(lw) for t, lw in zip(dist.support, dist.log_weights)}


def max_log_difference(log_counts: dict, counts: dict) -> float:
    """Largest ``|log c_mcexact - log c_reference|``, after checking the supports are equal."""
    if set(log_counts) != set(counts):
        raise AssertionError(f"supports differ: {sorted(set(log_counts) ^ set(counts))[:5]} ...")
    return max(abs(log_counts[t] - math.log(counts[t])) for t in counts)


# ---------------------------------------------------------------------------------- formatting

def _header(quick: bool) -> None:
    print("mcexact network benchmarks" + (" (--quick)" if quick else ""))
    print("  compared: mcexact.exact_distribution (Cython network enumerator) against brute")
    print("  force over all 2^n response vectors (NumPy) and against a pure-Python dict recursion")
    print(f"  machine: {platform.machine()}, os.cpu_count()={os.cpu_count()}, "
          f"load average {os.getloadavg()[0]:.2f}; Python {platform.python_version()}, "
          f"numpy {np.__version__}, mcexact {mcexact.__version__}")
    print(f"  date: {time.strftime('%Y-%m-%d %H:%M:%S')}; times are the best of a few repeats, "
          "ratios = reference time / mcexact time")
    print()


def _seconds(t: float) -> str:
    if t < 1e-3:
        return f"{t * 1e6:7.0f} us"
    if t < 1.0:
        return f"{t * 1e3:7.1f} ms"
    return f"{t:7.2f} s "


def _ratio(r: float) -> str:
    return f"{r:.2f}x" if r < 10 else f"{r:.0f}x"


# -------------------------------------------------------------------------------------- tables

def table_brute_force(sizes) -> None:
    print("Table 1. Enumeration vs brute force (binary; intercept, nuisance 0..4, interest 0..4; "
          "n/3 events)")
    print(f"  {'design':<14}{'2^n':>10}{'support':>9}{'brute force':>14}{'mcexact':>13}"
          f"{'ratio':>10}{'max |dlog c|':>14}")
    ratios = []
    for n in sizes:
        raw = binary_design(n)
        design = raw.design()
        t_brute, counts, _ = best_time(lambda: brute_force_counts(raw), 3, 5.0)
        t_mc, log_counts, _ = best_time(lambda: enumerator_counts(design), 7, 1.0)
        diff = max_log_difference(log_counts, {(t,): c for t, c in counts.items()})
        assert diff < _RTOL, f"{raw.label}: counts differ (|d log c| = {diff:.2e})"
        ratios.append(t_brute / t_mc)
        print(f"  {raw.label:<14}{2 ** n:>10,}{len(counts):>9}{_seconds(t_brute):>14}"
              f"{_seconds(t_mc):>13}{_ratio(ratios[-1]):>10}{diff:>14.1e}")
    print(f"  geometric mean ratio: {_ratio(geometric_mean(ratios))}; all counts equal (asserted)")
    print()


def table_dict_recursion(raws) -> None:
    print("Table 2. Enumeration vs a pure-Python dict recursion over the same binomial groups")
    print(f"  {'design':<22}{'rows':>6}{'groups':>7}{'support':>9}{'Python dict':>14}"
          f"{'mcexact':>13}{'ratio':>10}{'max |dlog c|':>14}")
    ratios = []
    for raw in raws:
        design = raw.design()
        t_py, counts, _ = best_time(lambda: dict_recursion_counts(design), 3, 3.0)
        t_mc, log_counts, _ = best_time(lambda: enumerator_counts(design), 7, 1.0)
        diff = max_log_difference(log_counts, counts)
        assert diff < _RTOL, f"{raw.label}: counts differ (|d log c| = {diff:.2e})"
        ratios.append(t_py / t_mc)
        print(f"  {raw.label:<22}{raw.n_rows:>6}{design.n_groups:>7}{len(counts):>9}"
              f"{_seconds(t_py):>14}{_seconds(t_mc):>13}{_ratio(ratios[-1]):>10}{diff:>14.1e}")
    gm = geometric_mean(ratios)
    verdict = "met" if gm >= _GOAL_RATIO else "NOT met"
    print(f"  geometric mean ratio: {_ratio(gm)}; goal >= {_GOAL_RATIO:.0f}x: {verdict} "
          f"(information only); all results equal to rtol {_RTOL:g} (asserted)")
    print()


def _status_kb(field: str) -> int:
    """A memory field of ``/proc/self/status`` (Linux), in KiB."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise OSError(f"{field} not in /proc/self/status")


def _reset_peak_rss() -> bool:
    """Reset this process's peak RSS (VmHWM) to its current RSS (Linux >= 4.0)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _worker(family: str, n: int) -> None:
    """One run of table 3 in a fresh process; prints one JSON line.

    Peak memory is read from VmHWM, the high-water mark of this process's own address space.
    ``getrusage(...).ru_maxrss`` is not used: after ``exec`` it keeps the peak of the process that
    spawned it (Python spawns with vfork), so the child would report the parent's size.
    """
    design = _FAMILIES[family](n).design()
    rss_start = _status_kb("VmRSS")
    t0 = time.perf_counter()
    planned = mcexact.plan(design)
    t_plan = time.perf_counter() - t0
    peak_plan = _status_kb("VmHWM")
    rss_plan = _status_kb("VmRSS")
    reset = _reset_peak_rss()
    t0 = time.perf_counter()
    dist = mcexact.exact_distribution(design, plan_result=planned)
    t_full = time.perf_counter() - t0
    peak_full = _status_kb("VmHWM")
    print(json.dumps({
        "n": n, "groups": design.n_groups, "events": int(design.events.sum()),
        "plan_seconds": t_plan, "full_seconds": t_full, "peak_reset": reset,
        "rss_start_kb": rss_start, "rss_plan_kb": rss_plan, "peak_plan_kb": peak_plan,
        "peak_full_kb": peak_full, "peak_kb": max(peak_plan, peak_full),
        "box_peak": planned.full_peak_estimate, "support": dist.n_points,
        **{k: dist.info[k] for k in (
            "nuisance_nodes", "nuisance_arcs", "full_nodes", "full_peak", "layout")}}))


def _run_worker(family: str, n: int, timeout: float) -> dict:
    """Run one size in a fresh interpreter; ``{"error": ...}`` if it failed or timed out."""
    cmd = [sys.executable, str(Path(__file__).resolve()), "--worker", family, str(n)]
    try:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return {"error": f"run timed out after {timeout:.0f} s"}
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no output"])[-1]
        return {"error": f"run failed: {last}"}
    return json.loads(done.stdout.strip().splitlines()[-1])


def _next_size(n: int, growth: float, step: int) -> int:
    return max(n + step, int(round(n * growth / step)) * step)


# Exponent of the power law n**e used to predict the time of the next run from a single previous
# run (families without a usable plan estimate); later predictions fit e to the last two runs.
_DEFAULT_EXPONENT = 6.0


def _predicted_seconds(runs, planned, n: int, from_plan: bool) -> float | None:
    """Predicted time of a run of size `n`, from the runs so far (None before the first)."""
    if not runs:
        return None
    last = runs[-1]
    if from_plan:
        return last["full_seconds"] * planned.full_total_estimate / last["box_total"]
    exponent = _DEFAULT_EXPONENT
    if len(runs) >= 2:
        before = runs[-2]
        exponent = (math.log(last["full_seconds"] / before["full_seconds"])
                    / math.log(last["n"] / before["n"]))
    return last["full_seconds"] * (n / last["n"]) ** exponent


def _run_size(family: str, n: int, planned, time_limit: float) -> dict:
    run = _run_worker(family, n, timeout=2 * time_limit + 30)
    if "error" not in run:
        run["box_total"] = planned.full_total_estimate
    return run


def grow_family(family: str, start: int, growth: float, step: int, time_limit: float, *,
                stop_on_plan: bool):
    """Run growing sizes until the next run is predicted to exceed the limit (or fails).

    With `stop_on_plan`, growth also stops when ``plan(...).fits_full`` is False, and the time of
    the next run is predicted from the last one by the ratio of the planned full network sizes
    (sum over stages of the box of interest values at each nuisance node), which the work follows
    closely when the boxes are full (the dense layout).  Without it (sparse interest sums, whose
    boxes are mostly empty) the prediction is a power law in n through the last two runs.

    Returns ``(runs, stop_reason, first_n_not_run, its_plan)``.
    """
    runs, n = [], start
    while True:
        planned = mcexact.plan(_FAMILIES[family](n).design())
        if stop_on_plan and not planned.fits_full:
            return runs, "plan(...).fits_full is False", n, planned
        predicted = _predicted_seconds(runs, planned, n, stop_on_plan)
        if predicted is not None and predicted > time_limit:
            return runs, f"predicted {predicted:.0f} s > limit {time_limit:.0f} s", n, planned
        run = _run_size(family, n, planned, time_limit)
        if "error" in run:
            return runs, run["error"], n, planned
        runs.append(run)
        n = _next_size(n, growth, step)


def largest_fitting_size(family: str, fits: int, fails: int, resolution: int) -> int:
    """Bisect on n (plans only) for the largest size whose full network fits the default budget."""
    while fails - fits > resolution:
        mid = (fits + fails) // 2
        if mcexact.plan(_FAMILIES[family](mid).design()).fits_full:
            fits = mid
        else:
            fails = mid
    return fits


def _print_runs(runs) -> None:
    print(f"  {'n':>6}{'groups':>7}{'nuisance':>11}{'full peak':>12}{'full total':>14}"
          f"{'layout':>8}{'seconds':>9}{'peak RSS':>10}{'full pass':>11}{'B/node':>8}")
    for r in runs:
        full_mb = (r["peak_full_kb"] - r["rss_plan_kb"]) / 1024
        per_node = (r["peak_full_kb"] - r["rss_plan_kb"]) * 1024 / r["full_peak"]
        print(f"  {r['n']:>6}{r['groups']:>7}{r['nuisance_nodes']:>11,}{r['full_peak']:>12,}"
              f"{r['full_nodes']:>14,}{r['layout']:>8}{r['full_seconds']:>9.2f}"
              f"{r['peak_kb'] / 1024:>8.0f}MB{full_mb:>9.0f}MB{per_node:>8.1f}")


def _report_memory(run: dict) -> None:
    extra_kb = run["peak_full_kb"] - run["rss_plan_kb"]
    per_node = extra_kb * 1024 / run["full_peak"]
    per_slot = extra_kb * 1024 / run["box_peak"]
    print(f"  largest run: n={run['n']} ({run['groups']} groups, {run['events']} events): "
          f"nuisance {run['nuisance_nodes']:,} nodes / {run['nuisance_arcs']:,} arcs, "
          f"full peak {run['full_peak']:,}, full total {run['full_nodes']:,} nodes")
    mb = {k: run[k] / 1024 for k in ("peak_kb", "rss_start_kb", "rss_plan_kb")}
    print(f"    plan {run['plan_seconds']:.2f} s + full pass {run['full_seconds']:.2f} s; peak RSS"
          f" "
          f"{mb['peak_kb']:.0f} MB (after import and design {mb['rss_start_kb']:.0f} MB, "
          f"after plan {mb['rss_plan_kb']:.0f} MB)")
    if not run["peak_reset"] and run["peak_full_kb"] <= run["peak_plan_kb"]:
        print("    (peak RSS could not be reset after plan() and the full pass did not raise it: "
              "B/node is a lower bound)")
    if run["layout"] == "dense":
        print(f"    full pass: {per_node:.1f} bytes per live node at the peak stage, "
              f"{per_slot:.1f} bytes per dense slot ({run['box_peak']:,.0f} slots); the code's "
              "model is 8 bytes per slot per stage array")
    else:
        print(f"    full pass: {per_node:.1f} bytes per hashed node at the peak stage; the code's "
              "model (mcexact/exact.py) is about 90")


def table_largest(quick: bool) -> None:
    limit = 8.0 if quick else 120.0
    budget = mcexact.DEFAULT_MAX_NODES
    print(f"Table 3. Largest design within the default budget ({budget:,} nodes per stage), "
          f"time limit {limit:.0f} s per run, one fresh subprocess per size, one run each")
    print("  family: binary rows, intercept + nuisance 0..9 + interest 0..9, events with p = 0.2;")
    print("  peak RSS = VmHWM of the subprocess; 'full pass' = its peak during exact_distribution "
          "minus RSS after plan();")
    print("  B/node = 'full pass' bytes over the full peak (live nodes of the largest stage)")
    runs, reason, n_stop, planned = grow_family("growth", 100, 1.3, 50, limit, stop_on_plan=True)
    stopped_on_plan = not planned.fits_full
    peak_text = ("" if planned.full_peak_estimate is None
                 else f" (planned full peak {planned.full_peak_estimate:,.0f} nodes)")
    notes = [f"  growth stopped at n={n_stop}: {reason}{peak_text}"]
    if runs and stopped_on_plan:
        # The last size run may be well below the budget: bisect on plans for the largest size
        # that fits, and run it too if the time limit allows.
        largest = largest_fitting_size("growth", runs[-1]["n"], n_stop, 10)
        if largest > runs[-1]["n"]:
            p = mcexact.plan(growth_design(largest).design())
            predicted = _predicted_seconds(runs, p, largest, True)
            if predicted <= limit:
                run = _run_size("growth", largest, p, limit)
                if "error" in run:
                    notes.append(f"  largest fitting size n={largest}: {run['error']}")
                else:
                    runs.append(run)
                    notes.append(f"  then ran n={largest}, the largest size whose plan fits "
                                 "(bisection on plans, to within 10 rows)")
            else:
                notes.append(f"  largest size whose plan fits: n={largest}, not run (predicted "
                             f"{predicted:.0f} s > limit {limit:.0f} s)")
    _print_runs(runs)
    print("\n".join(notes))
    if runs and not quick and not stopped_on_plan:
        fits, fails = runs[-1]["n"], n_stop   # stopped on time: where does the plan stop fitting?
        while mcexact.plan(growth_design(fails).design()).fits_full:
            fits, fails = fails, _next_size(fails, 1.3, 50)
        largest = largest_fitting_size("growth", fits, fails, 10)
        p = mcexact.plan(growth_design(largest).design())
        print(f"  largest n with plan(...).fits_full (plans only, within 10 rows): n={largest}, "
              f"planned full peak {p.full_peak_estimate:,.0f}, planned full total "
              f"{p.full_total_estimate:,.0f} nodes")
    if runs:
        _report_memory(runs[-1])
    print()

    sparse_limit = 5.0 if quick else 90.0
    print("Table 3b. Hashed layout: as table 3 but the interest column is a + 100000 b")
    print("  (a in 0..9, b in 0/1). The interest boxes are mostly empty, so the enumerator hashes")
    print("  its nodes and the plan's box estimate is far too pessimistic: runs go on regardless")
    print(f"  of fits_full; time limit {sparse_limit:.0f} s per run")
    runs, reason, n_stop, _ = grow_family("sparse", 100, 1.4, 20, sparse_limit, stop_on_plan=False)
    _print_runs(runs)
    print(f"  stopped at n={n_stop}: {reason}")
    if runs:
        _report_memory(runs[-1])
    print()


# ---------------------------------------------------------------------------------------- main

def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, about a minute")
    parser.add_argument("--worker", nargs=2, metavar=("FAMILY", "N"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        _worker(args.worker[0], int(args.worker[1]))
        return
    quick = args.quick
    _header(quick)
    table_brute_force([16, 18, 20] if quick else [16, 18, 20, 22])
    binary = [16, 18, 20, 22, 30, 40] + ([] if quick else [60, 80])
    others = ([grouped_design(12, 6), stratified_design(8, 5)] if quick
              else [grouped_design(20, 8), stratified_design(15, 6)])
    table_dict_recursion([binary_design(n) for n in binary] + others)
    table_largest(quick)


if __name__ == "__main__":
    main()
