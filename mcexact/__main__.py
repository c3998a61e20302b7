"""The ``mcexact`` command line.

Subcommands: ``analyse`` (alias ``analyze``) fits a model to a CSV or Parquet file, ``plan``
sizes the networks and says which engine would run, ``check`` reopens a saved run (and can add
draws to it), ``validate`` compares a Monte Carlo engine with exact enumeration, and ``demo`` runs
the whole job on shipped, invented data. Run ``mcexact --help`` or ``mcexact COMMAND --help``.

Errors are one line ``mcexact: error: ...`` on standard error, with the exit codes of
:data:`EXIT_CODES`; the entry point is :func:`main`.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import textwrap
import warnings
from typing import Callable, Iterator, Sequence

import numpy as np
import pandas as pd

from mcexact._cli_io import check_output_paths, read_table, write_text_atomic
from mcexact._exceptions import BudgetExceeded, DataError, FileFormatError, McexactError
from mcexact._json import plain

__all__ = ["main", "build_parser", "DEFAULT_DEMO", "EXIT_CODES"]

#: The demo that ``mcexact demo`` runs without a name.
DEFAULT_DEMO = "sparse"

EXIT_OK = 0
EXIT_NOT_QUOTABLE = 1
EXIT_USAGE = 2
EXIT_TOO_LARGE = 3
EXIT_FILE = 4
EXIT_INTERNAL = 5
EXIT_INTERRUPTED = 130

#: Exit code -> meaning, as the top-level help lists them.
EXIT_CODES = {
    EXIT_OK: "success",
    EXIT_NOT_QUOTABLE: "results computed but not all quotable (check), or validation failed "
                       "(validate)",
    EXIT_USAGE: "bad input data or options",
    EXIT_TOO_LARGE: "problem too large for the node budget or memory",
    EXIT_FILE: "file problem: a missing, unreadable, foreign or damaged file, or an output that "
               "cannot be written",
    EXIT_INTERNAL: "internal error (a bug in mcexact: please report it with the command used)",
    EXIT_INTERRUPTED: "interrupted by Ctrl-C (results drawn so far are still written)",
}


# ------------------------------------------------------------------------------ option types

def _option_type(convert: Callable[[str], object], what: str, ok: Callable[[object], bool],
                 rule: str) -> Callable[[str], object]:
    """An argparse type: `convert` the text (else "expected `what`"), then check `ok` (else
    `rule`)."""
    def parse(text: str):
        try:
            value = convert(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what}, got {text!r}") from None
        if not ok(value):
            raise argparse.ArgumentTypeError(f"{rule}, got {text!r}")
        return value
    return parse


def _integer(low: int) -> Callable[[str], int]:
    return _option_type(int, "an integer", lambda v: v >= low, f"must be an integer >= {low}")


_positive_float = _option_type(float, "a number", lambda v: bool(np.isfinite(v) and v > 0),
                               "must be a positive number")
_jobs = _option_type(int, "an integer", lambda v: v != 0,
                     "must be a positive number of jobs, or negative to count back from all "
                     "cores (-1: all)")
_alpha = _option_type(float, "a number", lambda v: 0 < v < 1,
                      "must lie strictly between 0 and 1")


# ------------------------------------------------------------------------------ parser

_FORMATTER = argparse.RawDescriptionHelpFormatter

# Width of wrapped text lines, as in the text report.
_WIDTH = 96


def _wrapped(text: str) -> str:
    """A help description as paragraphs that fit a terminal (the formatter keeps line breaks,
    which the examples need)."""
    return textwrap.fill(text, width=79, break_on_hyphens=False)


def _examples(*lines: str) -> str:
    head = "example:" if len(lines) == 1 else "examples:"
    return head + "\n" + "\n".join("  " + line for line in lines)


def _fit_defaults() -> dict:
    """fit()'s default keyword values, for the help texts."""
    import inspect

    from mcexact.fit import fit

    return {k: v.default for k, v in inspect.signature(fit).parameters.items()}


def _add_data_options(p: argparse.ArgumentParser) -> None:
    from mcexact.exact import DEFAULT_MAX_NODES

    p.add_argument("data", metavar="DATA", help="data file: .csv, or .parquet (needs pyarrow)")
    g = p.add_argument_group("model")
    g.add_argument("--formula", required=True,
                   help="model formula, response on the left, e.g. 'y ~ dose + C(site) + age'")
    g.add_argument("--interest", metavar="TERM", action="append",
                   help="term of interest (repeat for several; default: every term); the other "
                        "terms are nuisance and conditioned on")
    g.add_argument("--strata", metavar="COL", help="column of strata or matched sets")
    g.add_argument("--trials", metavar="COL",
                   help="column of trials per row (grouped data; the response counts events)")
    g.add_argument("--max-nodes", type=_integer(1), metavar="N",
                   help=f"node budget of the network algorithm (default: "
                        f"{DEFAULT_MAX_NODES:,})")


def _add_sampling_options(p: argparse.ArgumentParser) -> None:
    from mcexact.fit import METHODS

    d = _fit_defaults()
    g = p.add_argument_group("engine and Monte Carlo sampling")
    g.add_argument("--method", choices=METHODS, default=d["method"],
                   help="engine: auto enumerates exactly where the network fits the budget, "
                        "draws independently (direct) where only the nuisance network fits, "
                        f"and runs Markov chains (mcmc) otherwise (default: {d['method']})")
    g.add_argument("--draws", type=_integer(1), metavar="N",
                   help=f"draws per part of the analysis (default: {d['n_draws']:,})")
    g.add_argument("--chains", type=_integer(1), metavar="N",
                   help=f"chains (default: {d['n_chains']})")
    g.add_argument("--warmup", type=_integer(0), metavar="N",
                   help=f"Markov chain moves discarded at the start (default: "
                        f"{d['n_warmup']:,})")
    g.add_argument("--thin", type=_integer(1), metavar="N",
                   help=f"Markov chain moves between recorded draws (default: {d['thin']})")
    g.add_argument("--block-size", type=_integer(2), metavar="N",
                   help="groups redrawn by one block move (default: chosen from the design)")
    _add_seed_option(g)
    g.add_argument("--target-mcse", type=_positive_float, metavar="X",
                   help="sample in rounds until every Monte Carlo p-value's standard error is "
                        "at most X")
    g.add_argument("--time-budget", type=_positive_float, metavar="SECONDS",
                   help="sample in rounds for at most this long per part")
    g.add_argument("--max-draws", type=_integer(1), metavar="N",
                   help="most draws per part when sampling in rounds (default: 50 x --draws)")
    g.add_argument("--no-tilting", action="store_true",
                   help="do not refine far-tail estimates and limits by tilted sampling")


def _add_seed_option(g) -> None:
    g.add_argument("--seed", type=_integer(0), metavar="INT",
                   help="seed of the random numbers, for a reproducible run (without it, fresh "
                        "entropy is drawn, printed and recorded in the JSON and saved run)")


def _add_jobs_option(g) -> None:
    g.add_argument("--jobs", type=_jobs, metavar="N", default=-1,
                   help="chains run at once (default -1: all cores)")


def _add_cluster_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("parallel runs (the numbers do not depend on these)")
    _add_jobs_option(g)
    g.add_argument("--backend", metavar="NAME",
                   help="joblib backend for the chains, e.g. loky or dask (default: threads)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a dask scheduler, e.g. tcp://HOST:8786, to run the "
                        "chains on its cluster (implies --backend dask; needs "
                        "pip install 'mcexact[cluster]')")


def _add_output_options(p: argparse.ArgumentParser, *,
                        save_help: str = "save the run, to reopen with 'mcexact check' (and "
                                         "add draws)") -> None:
    g = p.add_argument_group("outputs (each written atomically)")
    g.add_argument("--json", metavar="FILE", help="write the results as JSON")
    g.add_argument("--report", metavar="FILE.html", help="write a self-contained HTML report")
    g.add_argument("--save", metavar="FILE", help=save_help)
    g.add_argument("--quiet", action="store_true",
                   help="print nothing but errors (no report, no progress bars)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``mcexact`` command."""
    from mcexact.demo import DEMOS
    from mcexact.validation import Z_LIMIT

    codes = "\n".join(f"  {code:>3}  {text}" for code, text in EXIT_CODES.items())
    parser = argparse.ArgumentParser(
        prog="mcexact", formatter_class=_FORMATTER,
        description=_wrapped("Exact and Monte Carlo conditional logistic regression for small, "
                             "sparse or separated binary data."),
        epilog=_examples("mcexact demo",
                         "mcexact plan trial.csv --formula 'event ~ dose + age' --strata site",
                         "mcexact analyse trial.csv --formula 'event ~ dose + age' --strata site "
                         "--interest dose \\",
                         "    --seed 7 --json out.json --save run.mcx",
                         "mcexact check run.mcx --until-mcse 0.001")
        + "\n\nexit codes:\n" + codes)
    parser.add_argument("--traceback", action="store_true",
                        help="on an internal error, show the Python traceback (for bug reports)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser(
        "analyse", aliases=["analyze"], formatter_class=_FORMATTER,
        help="fit the model to a data file: tests, estimates and limits",
        description=_wrapped("Conditional tests, estimates and confidence limits for the terms "
                             "of interest, exact where the network fits the node budget and "
                             "Monte Carlo otherwise. Prints the text report."),
        epilog=_examples("mcexact analyse trial.csv --formula 'event ~ dose + age' "
                         "--strata site --interest dose \\",
                         "    --seed 7 --json out.json --report out.html --save run.mcx"))
    _add_data_options(p)
    p.add_argument("--alpha", type=_alpha, default=0.05,
                   help="limits at level 1 - ALPHA (default: 0.05)")
    p.add_argument("--no-asymptotic", action="store_true",
                   help="skip the ordinary logistic fit shown for comparison")
    _add_sampling_options(p)
    _add_cluster_options(p)
    _add_output_options(p)
    p.set_defaults(func=_analyse)

    p = sub.add_parser(
        "plan", formatter_class=_FORMATTER,
        help="size the networks and say which engine would run, without sampling",
        description=_wrapped("For each part of the analysis (each effect, and the joint test of "
                             "all terms of interest), the measured nuisance network, the "
                             "estimated full network and the engine that --method auto would "
                             "choose, and why. (If the full network overflows while being "
                             "built, auto falls back to direct sampling.)"),
        epilog=_examples("mcexact plan trial.csv --formula 'event ~ dose + age' --strata site "
                         "--max-nodes 1000000"))
    _add_data_options(p)
    p.add_argument("--json", metavar="FILE", help="write the plan as JSON")
    p.set_defaults(func=_plan)

    p = sub.add_parser(
        "check", formatter_class=_FORMATTER,
        help="reopen a saved run: verdicts of its Monte Carlo p-values; add draws",
        description=_wrapped("Print the verdict of every Monte Carlo p-value of a saved run "
                             "(p-value, Monte Carlo error, ESS, R-hat, verdict, draws needed). "
                             "With --extend or --until-mcse, first add draws to every Monte "
                             "Carlo part, exactly as one longer run would, and write the run "
                             "back. Exits 0 when every Monte Carlo p-value is quotable (or all "
                             "are exact), 1 otherwise."),
        epilog=_examples("mcexact check run.mcx",
                         "mcexact check run.mcx --extend 100000",
                         "mcexact check run.mcx --until-mcse 0.001 --time-budget 600 "
                         "--save run2.mcx"))
    p.add_argument("run", metavar="RUN", help="a run saved by 'mcexact analyse --save'")
    g = p.add_argument_group("adding draws")
    g.add_argument("--extend", type=_integer(1), metavar="N",
                   help="add N draws to every Monte Carlo part")
    g.add_argument("--until-mcse", type=_positive_float, metavar="X",
                   help="add draws in rounds until every Monte Carlo p-value's standard error "
                        "is at most X")
    g.add_argument("--time-budget", type=_positive_float, metavar="SECONDS",
                   help="add draws in rounds for at most this long per part")
    g.add_argument("--max-draws", type=_integer(1), metavar="N",
                   help="most draws per part in all while adding in rounds")
    _add_cluster_options(p)
    _add_output_options(p, save_help="write the run with the added draws here (default: back "
                                     "to RUN, in place)")
    p.set_defaults(func=_check)

    p = sub.add_parser(
        "validate", formatter_class=_FORMATTER,
        help="compare a Monte Carlo engine with exact enumeration on your design",
        description=_wrapped("Fit the model twice, by exact enumeration and by a Monte Carlo "
                             "engine, and compare every p-value, estimate and limit: z = (Monte "
                             "Carlo - exact) / Monte Carlo error, and show how much of the "
                             "exact support the draws visited. Our rule: validation fails, "
                             f"with exit code 1, when any |z| > {Z_LIMIT:g} (about 6e-5 "
                             "two-sided for an honest error) or the report flags another "
                             "problem (it does not pass). The design must be small enough to "
                             "enumerate."),
        epilog=_examples("mcexact validate trial.csv --formula 'event ~ dose + age' "
                         "--strata site --engine mcmc --draws 40000 --seed 3"))
    _add_data_options(p)
    p.add_argument("--engine", choices=("direct", "mcmc"), default="direct",
                   help="the Monte Carlo engine to check (default: direct)")
    p.add_argument("--draws", type=_integer(1), metavar="N",
                   help=f"draws per part (default: {_fit_defaults()['n_draws']:,})")
    _add_seed_option(p)
    p.add_argument("--json", metavar="FILE", help="write the comparisons as JSON")
    p.set_defaults(func=_validate)

    p = sub.add_parser(
        "demo", formatter_class=_FORMATTER,
        help="run the whole job on invented demo data",
        description=_wrapped("Run the analysis of a demo data set shipped with mcexact "
                             f"(invented data; demos: {', '.join(DEMOS)})."),
        epilog=_examples(f"mcexact demo {DEFAULT_DEMO} --json demo.json --report demo.html"))
    p.add_argument("name", nargs="?", default=DEFAULT_DEMO, choices=list(DEMOS), metavar="NAME",
                   help=f"demo data set: {', '.join(DEMOS)} (default: {DEFAULT_DEMO})")
    p.add_argument("--alpha", type=_alpha, default=0.05,
                   help="limits at level 1 - ALPHA (default: 0.05)")
    from mcexact.fit import METHODS

    p.add_argument("--method", choices=METHODS,
                   help="engine (default: the demo's own, else auto)")
    p.add_argument("--draws", type=_integer(1), metavar="N",
                   help="draws per Monte Carlo part (default: the demo's own, else "
                        f"{_fit_defaults()['n_draws']:,})")
    _add_seed_option(p)
    _add_jobs_option(p)
    _add_output_options(p)
    p.set_defaults(func=_demo)
    return parser


# ------------------------------------------------------------------------------ shared steps

def _say(args, *lines: str) -> None:
    """Print to standard output unless --quiet."""
    if not args.quiet:
        for line in lines:
            print(line)


def _progress(args) -> bool:
    return not args.quiet and sys.stderr.isatty()


@contextlib.contextmanager
def _cluster(backend: str | None, scheduler: str | None) -> Iterator[str | None]:
    """The joblib backend to use; with a scheduler address, a dask.distributed client connected
    to it for the duration of the run (joblib's dask backend uses the current client)."""
    from joblib.parallel import BACKENDS

    known = sorted(set(BACKENDS) | {"dask"})
    if backend is not None and backend not in known:
        raise DataError(f"unknown --backend {backend!r}; joblib backends are {', '.join(known)}")
    if scheduler is None:
        if backend == "dask":
            raise DataError("--backend dask needs --scheduler ADDRESS, the dask scheduler to run "
                            "the chains on")
        yield backend
        return
    if backend not in (None, "dask"):
        raise DataError(f"--scheduler needs --backend dask, not --backend {backend}")
    try:
        import distributed
    except ImportError:
        raise DataError("--scheduler needs dask.distributed: pip install 'mcexact[cluster]'") \
            from None
    try:
        client = distributed.Client(scheduler, timeout="20s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise DataError(f"cannot connect to the dask scheduler at {scheduler!r}: "
                        f"{_one_line(str(exc)) or type(exc).__name__}") from None
    try:
        yield "dask"
    finally:
        client.close()


def _fit_options(args) -> dict:
    """fit() keywords from the analyse options (unset ones keep fit's defaults)."""
    pairs = {"method": args.method, "alpha": args.alpha, "max_nodes": args.max_nodes,
             "n_draws": args.draws, "n_chains": args.chains, "n_warmup": args.warmup,
             "thin": args.thin, "block_size": args.block_size, "rng": args.seed,
             "target_mcse": args.target_mcse, "time_budget": args.time_budget,
             "max_draws": args.max_draws, "n_jobs": args.jobs}
    out = {k: v for k, v in pairs.items() if v is not None}
    out["asymptotic"] = not args.no_asymptotic
    out["tilted"] = not args.no_tilting
    return out


def _output_paths(args) -> dict:
    return {"--save": args.save, "--json": args.json, "--report": args.report}


def _write_outputs(result, save: str | None, json_file: str | None,
                   report: str | None) -> list[tuple[str, str]]:
    """Write the requested files (the saved run first: it is the one that cannot be redone
    without sampling again); returns (what, path) of each file written."""
    written = []
    if save:
        result.save(save)
        written.append(("saved run", save))
    if json_file:
        write_text_atomic(json_file, result.to_json(indent=2) + "\n")
        written.append(("JSON", json_file))
    if report:
        result.to_html(report)
        written.append(("HTML report", report))
    return written


def _written_lines(written: list[tuple[str, str]]) -> list[str]:
    return ["written:"] + [f"  {what}: {path}" for what, path in written] if written else []


def _monte_carlo(result) -> bool:
    return any(info.get("engine") in ("direct", "mcmc")
               for info in result.method.get("parts", {}).values())


def _seed_line(result, seed: int | None) -> list[str]:
    """How to repeat a Monte Carlo run started without --seed."""
    rng = result.method.get("rng") or {}
    if seed is not None or not _monte_carlo(result) or rng.get("kind") != "SeedSequence" \
            or rng.get("spawn_key"):
        return []
    return [f"seed: none given; fresh entropy {rng['entropy']} was used (repeat this run "
            f"with --seed {rng['entropy']})"]


def _finish_run(result, args, *, head: Sequence[str] = ()) -> int:
    """Outputs, report and exit code of a finished (or interrupted) fit."""
    written = _write_outputs(result, args.save, args.json, args.report)
    _say(args, *head, result.summary(), "", *_seed_line(result, args.seed),
         *_written_lines(written))
    if result.interrupted:
        _interrupted_notice(result, written)
        return EXIT_INTERRUPTED
    return EXIT_OK


def _interrupted_notice(result, written: list[tuple[str, str]]) -> None:
    draws = sum(int(info.get("n_draws") or 0) for part, info in result.method["parts"].items()
                if part != "joint" or len(result.design.effects) > 1)
    where = ("; written with them: " + ", ".join(path for _, path in written)
             if written else "")
    print(f"mcexact: interrupted: sampling stopped by Ctrl-C after {draws:,} draws; the results "
          f"use the draws made so far{where}", file=sys.stderr)


# ------------------------------------------------------------------------------ analyse, demo

def _analyse(args) -> int:
    from mcexact.fit import fit

    check_output_paths(_output_paths(args))
    data = read_table(args.data)
    with _cluster(args.backend, args.scheduler) as backend:
        result = fit(data, args.formula, interest=args.interest, strata=args.strata,
                     trials=args.trials, backend=backend, progress=_progress(args),
                     **_fit_options(args))
    return _finish_run(result, args)


def _demo(args) -> int:
    from mcexact.demo import DEMOS, load_demo
    from mcexact.fit import fit

    check_output_paths(_output_paths(args))
    file, formula, options = DEMOS[args.name]
    data = load_demo(args.name)
    kw = dict(options)
    given = {"method": args.method, "n_draws": args.draws, "rng": args.seed,
             "n_jobs": args.jobs}
    kw.update({k: v for k, v in given.items() if v is not None})
    head = [f"demo {args.name!r} ({file}, {len(data)} rows): {formula}, "
            + ", ".join(f"{k}={v!r}" for k, v in kw.items() if k != "rng"), ""]
    result = fit(data, formula, alpha=args.alpha, progress=_progress(args), **kw)
    return _finish_run(result, args, head=head)


# ------------------------------------------------------------------------------ plan

def _plan_parts(design, max_nodes) -> dict:
    """Part -> record (terms, engine, reason, plan), split as fit() splits the analysis."""
    from mcexact.exact import plan
    from mcexact.fit import auto_engine

    effects = dict(design.effects)
    parts = {}
    for effect in effects:
        sub = design if len(effects) == 1 else design.with_interest([effect])
        p = plan(sub, max_nodes=max_nodes)
        engine, reason = auto_engine(p)
        parts[effect] = {"terms": [effect], "engine": engine, "reason": reason,
                         "plan": p.to_dict()}
    if len(effects) == 1:
        parts["joint"] = dict(parts[next(iter(effects))], same_as=next(iter(effects)))
    else:
        p = plan(design, max_nodes=max_nodes)
        engine, reason = auto_engine(p)
        parts["joint"] = {"terms": list(effects), "engine": engine, "reason": reason,
                          "plan": p.to_dict()}
    return parts


def _plan_table(parts: dict) -> pd.DataFrame:
    rows = []
    for part, rec in parts.items():
        p = rec["plan"]
        over = p["nuisance_nodes"] is None
        rows.append({
            "part": part, "terms": ", ".join(rec["terms"]),
            "nuisance nodes": (f"over budget ({p['nuisance_reached']:,} reached)" if over
                               else p["nuisance_nodes"]),
            "largest stage": p["nuisance_peak"], "arcs": p["nuisance_arcs"],
            "full: largest stage (est.)": _whole(p["full_peak_estimate"]),
            "full: all nodes (est.)": _whole(p["full_total_estimate"]),
            "auto engine": rec["engine"]})
    return pd.DataFrame(rows)


def _plan(args) -> int:
    from mcexact.design import Design
    from mcexact.exact import DEFAULT_MAX_NODES

    check_output_paths({"--json": args.json})
    data = read_table(args.data)
    design = Design.from_formula(data, args.formula, interest=args.interest, strata=args.strata,
                                 trials=args.trials)
    parts = _plan_parts(design, args.max_nodes)
    budget = args.max_nodes or DEFAULT_MAX_NODES
    if args.json:
        out = {"schema": "mcexact.plan", "schema_version": 1, "formula": design.formula,
               "interest": list(design.effects), "strata": design.strata_name,
               "trials": design.trials_name, "n_rows": design.n_rows,
               "n_groups": design.n_groups, "max_nodes": budget, "parts": parts}
        write_text_atomic(args.json, json.dumps(plain(out), indent=2) + "\n")
    lines = [f"Plan for {design.formula} ({design.n_rows:,} rows in {design.n_groups:,} "
             f"covariate groups; node budget {budget:,} per network)", "",
             _render(_plan_table(parts)), ""]
    for part, rec in parts.items():
        if "same_as" in rec:
            lines.append(f"  joint: the same as effect {rec['same_as']!r} (one effect of "
                         "interest)")
            continue
        lines.append(textwrap.fill(f"{part}: {rec['engine']}, because {rec['reason']} "
                                   f"({rec['plan']['reason']})", width=_WIDTH,
                                   initial_indent="  ", subsequent_indent="    "))
    if args.json:
        lines += ["", f"written: JSON: {args.json}"]
    print("\n".join(lines))
    return EXIT_OK


# ------------------------------------------------------------------------------ check

def _verdict_frames(result) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The tests' and the estimates' p-values with their Monte Carlo verdicts."""
    t = result.tests
    tests = pd.DataFrame({
        "effect": t["effect"], "test": t["test"], "engine": t["engine"], "p-value": t["p_value"],
        "MCSE": t["mcse"], "draws": t["n_draws"], "ESS": _counts(t["ess"]), "R-hat": t["rhat"],
        "draws needed": _counts(t["draws_needed"]), "verdict": _verdicts(t)})
    e = result.estimates
    estimates = pd.DataFrame({
        "term": e["term"], "engine": e["engine"], "two-sided p": e["p_value"],
        "MCSE": e["mcse_p_value"], "draws": e["n_draws"], "ESS": _counts(e["ess"]),
        "R-hat": e["rhat"], "draws needed": _counts(e["draws_needed"]), "verdict": _verdicts(e)})
    return tests, estimates


def _counts(values: pd.Series) -> list:
    return [_whole(v) for v in values.to_numpy(float)]


def _whole(value) -> int | None:
    """A count for display (estimated nodes, ESS, draws needed); None where missing."""
    return int(round(value)) if value is not None and np.isfinite(value) else None


def _verdicts(frame: pd.DataFrame) -> list[str]:
    return ["exact" if engine == "exact" else (verdict or "no verdict")
            for engine, verdict in zip(frame["engine"], frame["verdict"])]


def _all_quotable(result) -> tuple[int, int]:
    """(quotable, all) Monte Carlo p-values of the tests and estimates."""
    verdicts = [v for frame in (result.tests, result.estimates)
                for engine, v in zip(frame["engine"], frame["verdict"]) if engine != "exact"]
    return sum(v == "quotable" for v in verdicts), len(verdicts)


def _check(args) -> int:
    from mcexact import load_run

    extending = any(v is not None for v in (args.extend, args.until_mcse, args.time_budget))
    if not extending and args.max_draws is not None:
        raise DataError("--max-draws limits adding draws: give it with --extend, --until-mcse "
                        "or --time-budget")
    target = (args.save or args.run) if extending else args.save
    check_output_paths({"--save": target, "--json": args.json, "--report": args.report})
    result = load_run(args.run)
    if extending:
        with _cluster(args.backend, args.scheduler) as backend:
            result = result.extend(args.extend, target_mcse=args.until_mcse,
                                   time_budget=args.time_budget, max_draws=args.max_draws,
                                   progress=_progress(args), n_jobs=args.jobs, backend=backend)
    written = _write_outputs(result, target, args.json, args.report)
    quotable, total = _all_quotable(result)
    tests, estimates = _verdict_frames(result)
    if total == 0:
        verdict = "every result is exact: there is no Monte Carlo error to check"
    else:
        verdict = (f"{quotable} of {total} Monte Carlo p-values quotable"
                   + ("" if quotable == total else
                      "; see 'draws needed', and add draws with --extend or --until-mcse"))
    if result.interrupted:
        verdict += ("\nthe run was stopped by Ctrl-C while sampling, so parts may be missing: "
                    "add draws with --extend to complete it")
    _say(args, f"Run {args.run}: {result.design.formula}", "", "Tests", _render(tests), "",
         "Estimates (two-sided p-values of the terms)", _render(estimates), "", verdict,
         *_written_lines(written))
    if result.interrupted and extending:
        _interrupted_notice(result, written)
        return EXIT_INTERRUPTED
    return EXIT_OK if quotable == total and not result.interrupted else EXIT_NOT_QUOTABLE


# ------------------------------------------------------------------------------ validate

def _validate(args) -> int:
    from mcexact.validation import Z_LIMIT, validate

    check_output_paths({"--json": args.json})
    data = read_table(args.data)
    sampling = {k: v for k, v in (("n_draws", args.draws), ("rng", args.seed)) if v is not None}
    report = validate(data, args.formula, method=args.engine, interest=args.interest,
                      strata=args.strata, trials=args.trials, max_nodes=args.max_nodes,
                      **sampling)
    rng = report.monte_carlo.method.get("rng")
    if args.json:
        out = {"schema": "mcexact.validation", "schema_version": 1, "engine": report.engine,
               "z_limit": Z_LIMIT, "passed": report.passed, "rng": rng,
               "comparisons": report.comparisons.to_dict(orient="records"),
               "coverage": report.coverage.to_dict(orient="records")}
        write_text_atomic(args.json, json.dumps(plain(out), indent=2) + "\n")
    table = report.comparisons.rename(columns={"monte_carlo": "Monte Carlo", "mcse": "MCSE"})
    lines = [report.summary(), "", _render(table), ""]
    lines += _seed_line(report.monte_carlo, args.seed)
    if args.json:
        lines.append(f"written: JSON: {args.json}")
    print("\n".join(lines))
    return EXIT_OK if report.passed else EXIT_NOT_QUOTABLE


# ------------------------------------------------------------------------------ rendering

def _render(frame: pd.DataFrame) -> str:
    """A frame as an indented text table, numbers as the text report shows them."""
    from mcexact.report import format_number

    columns = {}
    for col in frame.columns:
        values = list(frame[col])
        if values and all(isinstance(v, str) for v in values):
            # Text left-aligned (pandas right-aligns; padding to one width undoes that).
            width = max(len(str(col)), *(len(v) for v in values))
            columns[str(col).ljust(width)] = [v.ljust(width) for v in values]
        else:
            columns[col] = [v if isinstance(v, str) else format_number(v) for v in values]
    text = pd.DataFrame(columns).to_string(index=False)
    return "\n".join("  " + line.rstrip() for line in text.splitlines())


# ------------------------------------------------------------------------------ errors, main

def _one_line(text: str) -> str:
    """An exception's message on one line, without a leading ``mcexact:``."""
    text = " ".join(part.strip() for part in text.splitlines() if part.strip())
    return text[len("mcexact: "):] if text.startswith("mcexact: ") else text


def _error(message: str, code: int) -> int:
    print(f"mcexact: error: {message}", file=sys.stderr)
    return code


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    print(f"mcexact: warning: {_one_line(str(message))}", file=sys.stderr)


def _run(args) -> int:
    try:
        return args.func(args)
    except BudgetExceeded as exc:
        return _error(_one_line(str(exc)), EXIT_TOO_LARGE)
    except MemoryError as exc:
        return _error(_one_line(str(exc)) or "out of memory; lower --max-nodes or use "
                      "--method direct or mcmc", EXIT_TOO_LARGE)
    except FileFormatError as exc:
        return _error(_one_line(str(exc)), EXIT_FILE)
    except McexactError as exc:
        return _error(_one_line(str(exc)), EXIT_USAGE)
    except BrokenPipeError:
        raise
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        return _error(where + _one_line(exc.strerror or str(exc)), EXIT_FILE)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``mcexact`` command with `argv` (default: the process's arguments); returns the
    exit code (see :data:`EXIT_CODES`)."""
    try:
        parser = build_parser()
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:          # --help, or a usage error (argparse printed it)
            return exc.code if isinstance(exc.code, int) else EXIT_USAGE
        with warnings.catch_warnings():
            if getattr(args, "quiet", False):
                warnings.simplefilter("ignore")
            else:
                warnings.showwarning = _show_warning
            try:
                return _run(args)
            except (KeyboardInterrupt, BrokenPipeError):
                raise
            except Exception as exc:       # a bug: one line, unless --traceback asks for more
                if args.traceback:
                    raise
                return _error(f"internal error: {type(exc).__name__}: {_one_line(str(exc))} "
                              "(run again with 'mcexact --traceback ...' and report it)",
                              EXIT_INTERNAL)
    except KeyboardInterrupt:
        print("mcexact: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:                # e.g. piped into head: the reader has gone
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())   # so that flushing at exit raises nothing more
        return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
