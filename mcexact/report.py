"""Plain-text report of a :class:`~mcexact.fit.FitResult`."""

from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd

__all__ = ["text_report", "format_number"]

_WIDTH = 96


def format_number(x, digits: int = 4) -> str:
    """Compact number: significant digits, ``inf`` spelled out, missing as ``-``."""
    if x is None or (isinstance(x, float) and np.isnan(x)):
        return "-"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}"
    x = float(x)
    if np.isinf(x):
        return "+inf" if x > 0 else "-inf"
    if x != 0 and (abs(x) < 1e-4 or abs(x) >= 1e6):
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}g}"


def _table(frame: pd.DataFrame, columns: dict) -> str:
    """Render selected columns of `frame` under new headings, numbers formatted."""
    shown = pd.DataFrame({head: [format_number(v) if not isinstance(v, str) else v
                                 for v in frame[col]] for col, head in columns.items()})
    return textwrap.indent(shown.to_string(index=False), "  ")


def _wrap(text: str, indent: str = "  ") -> str:
    return textwrap.fill(text, width=_WIDTH, initial_indent=indent, subsequent_indent=indent)


def _short_verdict(verdict: str) -> str:
    """The verdict's first words, for a table column (the full text is listed below it)."""
    for head in ("quotable", "more draws needed", "not converged", "not quotable",
                 "no Monte Carlo error"):
        if verdict.startswith(head):
            return head
    return verdict


def _verdicts(tests: pd.DataFrame, estimates: pd.DataFrame) -> list:
    """Lines of the verdict table of the Monte Carlo rows, with the reasons of the rows that are
    not quotable."""
    def whole(x) -> str:
        return f"{int(round(float(x))):,}" if x is not None and np.isfinite(float(x)) else "-"

    rows = []
    for _, r in tests[tests["engine"] != "exact"].iterrows():
        rows.append({"what": f"{r['effect']} {r['test']}", "p": r["p_value"], "mcse": r["mcse"],
                     "ess": whole(r["ess"]), "rhat": r["rhat"], "need": whole(r["draws_needed"]),
                     "verdict": r["verdict"], "note": r["note"]})
    for _, r in estimates[estimates["engine"] != "exact"].iterrows():
        rows.append({"what": f"{r['term']} two-sided p", "p": r["p_value"],
                     "mcse": r["mcse_p_value"], "ess": whole(r["ess"]), "rhat": r["rhat"],
                     "need": whole(r["draws_needed"]), "verdict": r["verdict"], "note": ""})
    if not rows:
        return []
    frame = pd.DataFrame(rows)
    frame["short"] = [_short_verdict(v) for v in frame["verdict"]]
    out = [_table(frame, {"what": "p-value of", "p": "p", "mcse": "MC error", "ess": "ESS",
                          "rhat": "R-hat", "need": "draws needed", "short": "verdict"})]
    for _, r in frame.iterrows():
        if r["verdict"] and r["verdict"] != "quotable":
            why = f" ({r['note']})" if r["note"] else ""
            out.append(_wrap(f"{r['what']}: {r['verdict']}{why}"))
    out.append(_wrap("quotable: the Monte Carlo error meets the target (or, without one, p +/- "
                     "2.576 MC errors lies on one side of alpha) and, for Markov chains, R-hat <= "
                     "1.01, ESS >= 400 and the chains agree; draws needed: total draws that would "
                     "reach that precision."))
    return out


def text_report(result) -> str:
    """The report printed by ``FitResult.summary()`` and the command line."""
    from mcexact.fit import CAUTION

    d = result.design
    level = f"{100 * (1 - result.alpha):g}%"
    title = "mcexact: conditional logistic regression (exact and Monte Carlo)"
    lines = [title, "=" * len(title)]
    strata = (f"{d.n_strata} strata ({d.strata_name})" if d.strata_name else "no strata")
    lines.append(f"Data       {d.n_rows:,} rows in {d.n_groups:,} covariate groups, {strata}; "
                 f"{d.n_dropped_strata} uninformative strata dropped ({d.n_dropped_rows} rows)")
    total_events = int(np.sum(d.events))
    total_trials = int(np.sum(d.trials))
    lines.append(f"Response   {d.response_name}: {total_events:,} events in {total_trials:,} trials")
    lines.append(f"Interest   {', '.join(d.effects)}")
    nuisance = list(d.nuisance_names)
    if d.strata_name:
        nuisance.append(f"one intercept per stratum of {d.strata_name}")
    elif d.fix_stratum_totals:
        nuisance.append("intercept")
    lines.append(f"Nuisance   {', '.join(nuisance) if nuisance else 'none'}")
    lines.append("Engines    " + result.method["description"])
    for part, info in result.method["parts"].items():
        plan = info.get("plan") or {}
        size = ""
        if plan.get("nuisance_nodes") is not None:
            size = (f"; nuisance network {plan['nuisance_nodes']:,} nodes, full network at most "
                    f"{plan['full_peak_estimate']:,.0f} nodes per stage")
        draws = f", {info['n_draws']:,} draws" if info.get("n_draws") else ""
        lines.append(_wrap(f"{part}: {info['engine']}{draws} ({info['reason']}{size})",
                           indent="           "))
    lines += ["", "Conditional tests of no effect (p-values from the conditional distribution)"]
    monte_carlo = bool((result.tests["engine"] != "exact").any()) if len(result.tests) else False
    columns = {"effect": "effect", "test": "test", "statistic": "statistic", "p_value": "p-value",
               "mid_p_value": "mid-p", "df": "df", "n_points": "support"}
    if monte_carlo:
        columns.update({"mcse": "MC error (p)", "engine": "engine"})
    lines.append(_table(result.tests, columns))
    if monte_carlo:
        lines.append(_wrap("MC error: Monte Carlo standard error of the p-value (0 for exact "
                           "rows); Monte Carlo p-values are estimates."))
        lines += ["", "Monte Carlo verdicts (may each p-value be quoted at the precision asked?)"]
        lines += _verdicts(result.tests, result.estimates)

    lines += ["", f"Estimates per original unit, exact {level} limits"
              + (" (Monte Carlo estimates where the engine is not exact)" if monte_carlo else "")]
    columns = {"term": "term", "estimate": "estimate", "kind": "kind", "ci_lower": "lower",
               "ci_upper": "upper", "odds_ratio": "odds ratio", "or_ci_lower": "OR lower",
               "or_ci_upper": "OR upper"}
    if monte_carlo:
        columns["mcse"] = "MC error"
    lines.append(_table(result.estimates, columns))
    lines.append("")
    lines.append(_table(result.estimates, {
        "term": "term", "observed": "observed T", "p_lower": "P(T<=t)", "p_upper": "P(T>=t)",
        "p_value": "two-sided (doubled)", "mid_p_value": "mid-p two-sided"}))
    for _, row in result.estimates.iterrows():
        if row["note"]:
            lines.append(_wrap(f"{row['term']}: {row['note']}"))
    if result.joint_estimate is not None and len(result.joint_estimate) > 1:
        lines.append("  joint conditional MLE: " + ", ".join(
            f"{k} = {format_number(v)}" for k, v in result.joint_estimate.items()))

    a = result.asymptotic
    if a is not None:
        lines += ["", "Ordinary (large-sample) logistic regression, for comparison"]
        lines.append(_table(a.coefficients, {"term": "term", "estimate": "estimate",
                                             "std_error": "std. error", "odds_ratio": "odds ratio",
                                             "wald_p_value": "Wald p"}))
        lines.append(_table(a.tests, {"effect": "effect", "df": "df", "wald_p_value": "Wald p",
                                      "lr_p_value": "LR p", "score_p_value": "score p"}))
        lines.append(f"  separation check: {a.separation.status}"
                     + (f" (no finite estimate: {', '.join(a.separation.columns)})"
                        if a.separation.separated else ""))
        lines.append(f"  expected counts below 5: {a.share_small_expected:.0%}"
                     + (" - too sparse for large-sample results" if a.sparse else ""))
        for note in a.notes:
            lines.append(_wrap("note: " + note))

    if result.notes:
        lines += ["", "Notes"]
        lines += [_wrap("- " + n) for n in result.notes]
    lines += ["", "Caution", _wrap(CAUTION)]
    return "\n".join(lines)
