"""Self-contained HTML report of a :class:`~mcexact.fit.FitResult`.

:func:`render_html` builds one HTML5 document with everything inline: a small stylesheet, the
tables of the analysis and, optionally, the diagnostic figures of :mod:`mcexact.plots` as base64
PNG images drawn by matplotlib's Agg renderer. The page needs no network and no other file, so it
can be archived, mailed or printed as it is. :func:`write_html` writes it atomically.

Numbers are shown as :func:`mcexact.report.format_number` shows them in the text report, and every
table cell that shows a number carries the full-precision value in a ``data-value`` attribute
(``repr`` of the float; ``inf``, ``-inf`` and ``nan`` spelled out), with the name of the result's
column in ``data-col``, so that scripts can check the page against the API exactly.

Tables (by ``id``): ``data`` (data summary), ``terms`` (interest terms), ``engines`` (engine per
part of the analysis), ``options`` (the run's settings), ``tests``, ``estimates``, ``tails``
(one-sided tails and two-sided p-values per term), ``joint`` (joint conditional MLE),
``asymptotic`` and ``asymptotic-tests`` (the ordinary logistic fit), ``asymptotic-checks``
(separation and sparseness).

Examples
--------
>>> import mcexact
>>> from mcexact.html_report import render_html
>>> result = mcexact.fit(mcexact.load_demo("small"), "elevation ~ dose_mg + age",
...                      strata="site", interest="dose_mg")
>>> page = render_html(result, plots=False)
>>> page.startswith("<!DOCTYPE html>")
True
>>> 'id="estimates"' in page
True
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import os
import pathlib
import sys
import warnings
from typing import Callable, Iterable

import numpy as np
import pandas as pd

from mcexact._files import write_text_atomic
from mcexact._exceptions import DataError
from mcexact.report import format_number

__all__ = ["render_html", "write_html", "write_text_atomically"]

# Resolution of the embedded figures (pixels per inch): the figures of mcexact.plots are 7-8
# inches wide, so about 800 pixels, sharp on screen and on paper at the page's width.
_DPI = 100

# Trace and autocorrelation figures are drawn for at most this many columns of one part.
_MAX_FIGURE_COLUMNS = 4

_TEST_COLUMNS = [
    ("effect", "effect"), ("test", "test"), ("statistic", "statistic"), ("p_value", "p-value"),
    ("mid_p_value", "mid-p"), ("mcse", "MCSE (p)"), ("mcse_mid_p", "MCSE (mid-p)"),
    ("df", "df"), ("n_points", "support points"), ("engine", "engine"), ("n_draws", "draws"),
    ("ess", "ESS"), ("rhat", "R-hat"), ("verdict", "verdict"), ("draws_needed", "draws needed"),
    ("note", "note")]
_ESTIMATE_COLUMNS = [
    ("term", "term"), ("effect", "effect"), ("kind", "kind"), ("estimate", "estimate"),
    ("mcse", "MCSE"), ("ci_lower", "lower"), ("mcse_ci_lower", "MCSE (lower)"),
    ("ci_upper", "upper"), ("mcse_ci_upper", "MCSE (upper)"), ("odds_ratio", "odds ratio"),
    ("or_ci_lower", "OR lower"), ("or_ci_upper", "OR upper"), ("engine", "engine"),
    ("verdict", "verdict")]
_TAIL_COLUMNS = [
    ("term", "term"), ("observed", "observed T (coded)"), ("p_lower", "P(T \u2264 t)"),
    ("p_upper", "P(T \u2265 t)"), ("p_value", "two-sided p (doubled)"),
    ("mid_p_value", "two-sided mid-p"), ("mcse_p_value", "MCSE (p)"), ("cmle", "CMLE"),
    ("median_unbiased", "median unbiased"), ("n_points", "support points"),
    ("n_draws", "draws"), ("ess", "ESS"), ("rhat", "R-hat"), ("draws_needed", "draws needed")]
_ASYMPTOTIC_COLUMNS = [
    ("term", "term"), ("estimate", "estimate"), ("std_error", "std. error"),
    ("odds_ratio", "odds ratio"), ("wald_p_value", "Wald p"), ("finite", "finite estimate")]
_ASYMPTOTIC_TEST_COLUMNS = [
    ("effect", "effect"), ("df", "df"), ("wald_p_value", "Wald p"), ("lr_p_value", "LR p"),
    ("score_p_value", "score p")]
_KIND_LABELS = {"cmle": "conditional MLE", "median_unbiased": "median unbiased",
                "none": "none"}

_STYLE = """
:root { --ink: #1f2933; --muted: #52606d; --line: #d9e2ec; --band: #f5f7fa; --accent: #0b5394;
        --ok: #1e6b3a; --ok-bg: #e3f4e8; --warn: #8a4b00; --warn-bg: #fdf0dc; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
             sans-serif; }
main { max-width: 1180px; margin: 0 auto; padding: 0 1.5rem 3rem; }
header.page { border-bottom: 3px solid var(--accent); padding: 1.2rem 1.5rem 0.8rem;
              max-width: 1180px; margin: 0 auto; }
header.page h1 { margin: 0 0 0.2rem; font-size: 1.55rem; }
header.page p { margin: 0.1rem 0; color: var(--muted); font-size: 0.9rem; }
h2 { margin: 2.2rem 0 0.6rem; font-size: 1.25rem; border-bottom: 1px solid var(--line);
     padding-bottom: 0.2rem; }
h3 { margin: 1.4rem 0 0.4rem; font-size: 1.05rem; }
nav.toc { background: var(--band); border: 1px solid var(--line); border-radius: 6px;
          padding: 0.6rem 1.2rem; margin-top: 1.2rem; }
nav.toc ol { margin: 0.3rem 0; padding-left: 1.2rem; columns: 2; }
a { color: var(--accent); }
.scroll { overflow-x: auto; }
table { border-collapse: collapse; margin: 0.4rem 0 0.8rem; font-size: 0.86rem; }
th, td { border-bottom: 1px solid var(--line); padding: 0.28rem 0.55rem; text-align: left;
         vertical-align: top; }
thead th { background: var(--band); border-bottom: 2px solid #bcccdc; white-space: nowrap; }
tbody tr:nth-child(even) td { background: #fbfcfd; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { background: transparent; font-weight: 600; white-space: nowrap; }
td.note { color: var(--muted); max-width: 28rem; }
.verdict { border-radius: 4px; padding: 0 0.3rem; }
.verdict.ok { color: var(--ok); background: var(--ok-bg); }
.verdict.warn { color: var(--warn); background: var(--warn-bg); }
code, pre { font-family: ui-monospace, SFMono-Regular, Menlo, Consolas, monospace;
            font-size: 0.84rem; }
pre { background: var(--band); border: 1px solid var(--line); border-radius: 6px;
      padding: 0.6rem 0.8rem; white-space: pre-wrap; word-break: break-word; }
.muted { color: var(--muted); }
figure { margin: 1rem 0; page-break-inside: avoid; break-inside: avoid; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: 0.85rem; margin-top: 0.2rem; }
.figure-note { color: var(--warn); background: var(--warn-bg); border-radius: 6px;
               padding: 0.5rem 0.8rem; }
section.caution { border-left: 4px solid var(--warn); background: var(--warn-bg);
                  padding: 0.2rem 1rem 0.6rem; margin-top: 2rem; }
footer { color: var(--muted); font-size: 0.8rem; border-top: 1px solid var(--line);
         margin-top: 2rem; padding-top: 0.6rem; }
@media print {
  body { font-size: 10.5pt; }
  main, header.page { max-width: none; padding-left: 0; padding-right: 0; }
  nav.toc { display: none; }
  .scroll { overflow: visible; }
  table { font-size: 8pt; }
  h2 { page-break-after: avoid; break-after: avoid; }
  a { color: inherit; text-decoration: none; }
}
"""


# -- small helpers --------------------------------------------------------------------------------

def _esc(value) -> str:
    """Any value as escaped HTML text (quotes too, so it is safe in attributes)."""
    return html.escape(str(value), quote=True)


def _is_number(value) -> bool:
    return (isinstance(value, (int, float, np.integer, np.floating))
            and not isinstance(value, (bool, np.bool_)))


def _data_value(value) -> str:
    """Full-precision text of a number: the int, or ``repr`` of the float (``inf``, ``-inf``,
    ``nan`` as Python spells them), which ``float()`` reads back exactly."""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return repr(float(value))


def _verdict_class(text: str) -> str:
    return "ok" if text == "quotable" else "warn"


def _cell(value, column: str) -> str:
    """One ``<td>``: numbers formatted as in the text report, with ``data-value`` and
    ``data-col``; strings escaped; verdicts marked."""
    col = f' data-col="{_esc(column)}"'
    if value is None or value is pd.NA:
        return f"<td{col}>-</td>"
    if _is_number(value):
        return (f'<td class="num"{col} data-value="{_data_value(value)}">'
                f"{_esc(format_number(value))}</td>")
    if isinstance(value, (bool, np.bool_)):
        return f"<td{col}>{format_number(bool(value))}</td>"
    text = str(value)
    if column == "verdict" and text:
        return f'<td{col}><span class="verdict {_verdict_class(text)}">{_esc(text)}</span></td>'
    if column == "kind":
        return f"<td{col}>{_esc(_KIND_LABELS.get(text, text))}</td>"
    if column == "note":
        return f'<td class="note"{col}>{_esc(text)}</td>'
    return f"<td{col}>{_esc(text)}</td>"


def _frame_table(table_id: str, frame: pd.DataFrame, columns: list, caption: str = "") -> str:
    """A frame's selected columns as a table; each row carries its index in ``data-row``."""
    present = [(c, h) for c, h in columns if c in frame.columns]
    head = "".join(f'<th scope="col" data-col="{_esc(c)}">{_esc(h)}</th>' for c, h in present)
    body = []
    for i in range(len(frame)):
        # Column by column, so every value keeps its column's type (a row would upcast).
        cells = "".join(_cell(frame[c].iat[i], c) for c, _ in present)
        body.append(f'<tr data-row="{i}">{cells}</tr>')
    cap = f"<caption class=\"muted\">{_esc(caption)}</caption>" if caption else ""
    return (f'<div class="scroll"><table id="{_esc(table_id)}">{cap}<thead><tr>{head}</tr>'
            f"</thead><tbody>{''.join(body)}</tbody></table></div>")


def _kv_table(table_id: str, rows: Iterable[tuple]) -> str:
    """A two-column table of (key, label, value) rows; the row's key in ``data-key``."""
    body = "".join(f'<tr data-key="{_esc(key)}"><th scope="row">{_esc(label)}</th>'
                   f"{_cell(value, key)}</tr>" for key, label, value in rows)
    return f'<table class="kv" id="{_esc(table_id)}"><tbody>{body}</tbody></table>'


def _list(items: Iterable[str]) -> str:
    items = [f"<li>{_esc(i)}</li>" for i in items]
    return f"<ul>{''.join(items)}</ul>" if items else ""


def _section(section_id: str, heading: str, body: str, css: str = "") -> str:
    cls = f' class="{css}"' if css else ""
    return f'<section id="sec-{section_id}"{cls}><h2>{_esc(heading)}</h2>{body}</section>'


def _monte_carlo(result) -> bool:
    return any(info.get("engine") in ("direct", "mcmc")
               for info in result.method.get("parts", {}).values())


def _single_effect(result) -> bool:
    return len(result.design.effects) == 1


# -- sections -------------------------------------------------------------------------------------

def _data_section(result) -> str:
    d = result.design
    strata = d.strata_name if d.strata_name else "none"
    rows = [
        ("formula", "formula",
         d.formula if d.formula is not None else "(design built from arrays)"),
        ("response", "response (events)", d.response_name),
        ("trials_name", "trials column", d.trials_name or "none: one trial per row"),
        ("strata_name", "strata column", strata),
        ("n_rows", "rows", int(d.n_rows)),
        ("n_groups", "covariate groups", int(d.n_groups)),
        ("n_strata", "strata analysed", int(d.n_strata)),
        ("events", "events", int(np.sum(d.events))),
        ("trials", "trials", int(np.sum(d.trials))),
        ("n_dropped_strata", "uninformative strata dropped", int(d.n_dropped_strata)),
        ("n_dropped_rows", "rows in dropped strata", int(d.n_dropped_rows)),
        ("alpha", "alpha (limits at level 1 - alpha)", float(result.alpha)),
        ("level", "confidence level", 1.0 - float(result.alpha)),
    ]
    terms = pd.DataFrame([{"effect": effect,
                           "columns": ", ".join(d.interest_names[c] for c in cols),
                           "n_columns": len(cols)} for effect, cols in d.effects.items()])
    nuisance = list(d.nuisance_names)
    if d.strata_name:
        nuisance.append(f"one intercept per stratum of {d.strata_name}")
    elif d.fix_stratum_totals:
        nuisance.append("intercept")
    parts = [_kv_table("data", rows), "<h3>Terms of interest</h3>",
             _frame_table("terms", terms, [("effect", "effect"), ("columns", "columns"),
                                           ("n_columns", "columns (count)")]),
             "<h3>Nuisance terms (conditioned on)</h3>",
             _list(nuisance) if nuisance else "<p>none</p>"]
    if d.notes:
        parts += ["<h3>What was done to the data</h3>", _list(d.notes)]
    return _section("data", "Data", "".join(parts))


def _reproduce_text(result) -> str:
    """How to run the same analysis again, from the recorded options and rng."""
    d, m = result.design, result.method
    rng = m.get("rng") or {}
    if rng.get("kind") == "int":
        rng_text = repr(rng.get("seed"))
    elif rng.get("kind") == "SeedSequence":
        rng_text = (f"numpy.random.SeedSequence(entropy={rng.get('entropy')!r}, "
                    f"spawn_key={tuple(rng.get('spawn_key') or ())!r})")
    else:
        rng_text = (f"<the {rng.get('kind', 'unknown')} passed, in the same state; pass an int "
                    "or a SeedSequence to make runs reproducible from this record>")
    args = ["data" if d.formula is not None else "design"]
    if d.formula is not None:
        args.append(repr(d.formula))
        args.append(f"interest={list(d.effects)!r}")
        if d.strata_name:
            args.append(f"strata={d.strata_name!r}")
        if d.trials_name:
            args.append(f"trials={d.trials_name!r}")
    args += [f"method={m.get('requested')!r}", f"alpha={result.alpha!r}"]
    args += [f"{k}={v!r}" for k, v in (m.get("options") or {}).items() if v is not None]
    args.append(f"rng={rng_text}")
    return "mcexact.fit(" + ",\n            ".join(args) + ")"


def _engine_rows(result) -> pd.DataFrame:
    def count(value):
        # Plan sizes are node counts (estimates may come as whole floats): shown as integers.
        if _is_number(value) and np.isfinite(value) and float(value).is_integer():
            return int(value)
        return value

    rows = []
    parts = result.method.get("parts", {})
    for part, info in parts.items():
        plan = info.get("plan") or {}
        same = part == "joint" and _single_effect(result)
        rows.append({
            "part": part,
            "engine": info.get("engine", ""),
            "reason": ("the single effect's distribution is the joint one" if same
                       else info.get("reason", "")),
            "nuisance_nodes": count(plan.get("nuisance_nodes")),
            "full_peak_estimate": count(plan.get("full_peak_estimate")),
            "full_total_estimate": count(plan.get("full_total_estimate")),
            "plan_seconds": plan.get("seconds"),
            "n_draws": info.get("n_draws"),
            "stopped": info.get("stopped", ""),
            "seconds": info.get("seconds"),
            "move": info.get("move", ""),
            "block_size": count(info.get("block_size")),
            "changed_share": info.get("changed_share"),
            "null_moments": _NULL_MOMENTS.get(info.get("null_moments"), ""),
            "plan_reason": plan.get("reason", ""),
        })
    return pd.DataFrame(rows, columns=["part", "engine", "reason", "nuisance_nodes",
                                       "full_peak_estimate", "full_total_estimate",
                                       "plan_seconds", "n_draws", "stopped", "seconds", "move",
                                       "block_size", "changed_share", "null_moments",
                                       "plan_reason"])


# How the score test's null moments were obtained (a part's "null_moments"), for the reader.
_NULL_MOMENTS = {"exact": "exact",
                 "rao_blackwellized": "estimated (Rao-Blackwellized over every chain move)",
                 "draws": "estimated from the draws"}


def _engines_section(result) -> str:
    m = result.method
    frame = _engine_rows(result).astype(object)
    frame = frame.where(frame.notna(), None)
    columns = [("part", "part"), ("engine", "engine"), ("reason", "why"),
               ("nuisance_nodes", "nuisance network nodes"),
               ("full_peak_estimate", "full network, largest stage (estimate)"),
               ("full_total_estimate", "full network, all stages (estimate)"),
               ("plan_seconds", "planning (s)"), ("n_draws", "draws"),
               ("stopped", "stopped at"), ("seconds", "sampling (s)"),
               ("null_moments", "score test's null moments")]
    if any(frame["move"]):
        columns += [("move", "chain move"), ("block_size", "groups per block move"),
                    ("changed_share", "share of moves that changed the table")]
    columns.append(("plan_reason", "plan"))
    options = [(k, k, v if v is not None else "not set (default)")
               for k, v in (m.get("options") or {}).items()]
    body = [f"<p>Requested engine: <code>{_esc(m.get('requested', ''))}</code>. "
            f"{_esc(m.get('description', ''))}.</p>",
            _frame_table("engines", frame, columns),
            "<h3>Settings of the run</h3>", _kv_table("options", options),
            "<h3>Random numbers: how to reproduce this run</h3>",
            f"<p>Random-number record: <code>{_esc(json.dumps(m.get('rng')))}</code>. "
            "With the same data, the same mcexact version and this call, every Monte Carlo "
            "part draws the same numbers again (whatever the number of parallel jobs):</p>",
            f"<pre>{_esc(_reproduce_text(result))}</pre>"]
    return _section("engines", "Engines: how each part was computed", "".join(body))


def _tests_section(result) -> str:
    body = ["<p>Conditional tests of no effect: p-values from the conditional distribution of "
            "the sufficient statistics given the nuisance statistics (for one effect, the other "
            "interest terms are conditioned on too). Effect <code>joint</code> tests all "
            "interest terms at once.</p>",
            _frame_table("tests", result.tests, _TEST_COLUMNS)]
    return _section("tests", "Tests", "".join(body))


def _estimates_section(result) -> str:
    level = f"{100 * (1 - result.alpha):g}%"
    est = result.estimates
    body = [f"<p>Estimates per original unit of each covariate, with {_esc(level)} confidence "
            "limits (level 1 - alpha) from the conditional distribution, and the odds ratios "
            "with their limits. The kind says which estimate is shown: the conditional maximum "
            "likelihood estimate, or the median unbiased estimate where the observed value "
            "lies at an edge of its support.</p>",
            _frame_table("estimates", est, _ESTIMATE_COLUMNS),
            "<h3>Tails and two-sided p-values per term</h3>",
            _frame_table("tails", est, _TAIL_COLUMNS)]
    notes = [f"{row['term']}: {row['note']}" for _, row in est.iterrows() if row["note"]]
    if notes:
        body += ["<h3>Notes on the estimates</h3>", _list(notes)]
    body.append("<h3 id=\"joint-estimate\">Joint conditional MLE</h3>")
    je = result.joint_estimate
    if je is None:
        body.append("<p>Not available: the joint conditional MLE does not exist or the joint "
                    "distribution was not computed (see the notes).</p>")
    else:
        frame = pd.DataFrame({"term": list(je.index), "joint_cmle": [float(v) for v in je],
                              "odds_ratio": [float(np.exp(v)) for v in je]})
        body.append(_frame_table("joint", frame, [("term", "term"),
                                                  ("joint_cmle", "joint CMLE"),
                                                  ("odds_ratio", "odds ratio")]))
    return _section("estimates", "Estimates and confidence limits", "".join(body))


def _asymptotic_section(result) -> str:
    a = result.asymptotic
    if a is None:
        return _section("asymptotic", "Ordinary logistic regression (comparison)",
                        "<p>Not computed: the analysis was run without the ordinary logistic "
                        "comparison (<code>asymptotic=False</code>).</p>")
    sep = a.separation
    checks = [("separation", "separation check", sep.status),
              ("separated_columns", "columns without a finite estimate",
               ", ".join(sep.columns) if sep.columns else "none"),
              ("n_predicted_rows", "groups predicted perfectly along the separating direction",
               int(sep.n_predicted_rows)),
              ("share_small_expected", "share of expected counts below 5",
               float(a.share_small_expected)),
              ("sparse", "too sparse for large-sample results", bool(a.sparse))]
    body = ["<p>The usual large-sample (unconditional) logistic fit of the same model, for "
            "comparison. Where it disagrees with the conditional results, separation or sparse "
            "data are the usual reasons; its values are then not to be relied on.</p>",
            "<h3>Coefficients</h3>",
            _frame_table("asymptotic", a.coefficients, _ASYMPTOTIC_COLUMNS),
            "<h3>Tests of no effect (Wald, likelihood ratio, score)</h3>",
            _frame_table("asymptotic-tests", a.tests, _ASYMPTOTIC_TEST_COLUMNS),
            "<h3>Separation and sparseness</h3>", _kv_table("asymptotic-checks", checks)]
    if a.notes:
        body.append(_list(a.notes))
    return _section("asymptotic", "Ordinary logistic regression (comparison)", "".join(body))


def _notes_section(result) -> str:
    design_notes = set(result.design.notes)
    notes = [n for n in result.notes if n not in design_notes]
    body = _list(notes) if notes else "<p>No notes beyond those on the data above.</p>"
    return _section("notes", "Notes", body)


def _reading_section(result) -> str:
    from mcexact.fit import _ESS_MIN, _RHAT_LIMIT     # the thresholds the verdicts apply

    lead = ("Some parts of this analysis were sampled, so their values carry Monte Carlo error. "
            if _monte_carlo(result) else
            "Every part of this analysis was enumerated exactly, so its Monte Carlo errors are "
            "zero and the convergence columns are empty. ")
    text = (lead + "The MCSE is the Monte Carlo standard error of a value: another run with "
            "other random numbers would typically land within about two MCSEs of it. A verdict "
            "of \u201cquotable\u201d means the p-value \u00b1 2.576 MCSE lies on one side of "
            "alpha (or the requested target error is met) and, for Markov chains, that R-hat is "
            f"at most {_RHAT_LIMIT:g}, the effective sample size (ESS) is at least {_ESS_MIN} "
            "and the chains agree; "
            "otherwise the verdict names what is missing. R-hat compares the spread within and "
            "between chains (values near 1 are good); ESS is the number of independent draws "
            "the correlated draws are worth; \u201cdraws needed\u201d estimates the total "
            "draws that would reach the precision.")
    return _section("reading", "How to read Monte Carlo errors and verdicts",
                    f"<p>{_esc(text)}</p>")


def _cautions_section() -> str:
    from mcexact.fit import CAUTION

    extra = ["Monte Carlo values (engines direct and mcmc) are estimates: other random numbers "
             "or more draws give somewhat different values, within the errors shown.",
             "Defer to the study protocol, a qualified statistician and applicable guidance; "
             "this report documents a computation and is not a decision."]
    return _section("cautions", "Cautions", f"<p>{_esc(CAUTION)}</p>{_list(extra)}", "caution")


# -- figures --------------------------------------------------------------------------------------

def _agg_canvas():
    """matplotlib's Agg canvas class, or None when matplotlib cannot be imported."""
    try:
        import matplotlib  # noqa: F401
        from matplotlib.backends.backend_agg import FigureCanvasAgg
    except ImportError:
        return None
    return FigureCanvasAgg


def _close(fig) -> None:
    """Release a figure: clear it, and drop it from pyplot if pyplot manages it."""
    try:
        fig.clear()
        pyplot = sys.modules.get("matplotlib.pyplot")
        if pyplot is not None:
            pyplot.close(fig)
    except Exception:    # releasing must never hide the figure's own outcome
        pass


def _png(make: Callable, canvas_cls) -> bytes:
    """Build a figure with `make`, render it to PNG bytes with the Agg canvas, close it."""
    with warnings.catch_warnings():
        # Layout and empty-axis warnings are about looks; a figure that cannot be drawn raises.
        warnings.simplefilter("ignore", UserWarning)
        fig = make()
        try:
            canvas_cls(fig)
            buffer = io.BytesIO()
            fig.savefig(buffer, format="png", dpi=_DPI, metadata={"Software": None})
            return buffer.getvalue()
        finally:
            _close(fig)


def _running_pvalue_maker(dist):
    """A maker of the running score-test p-value figure of `dist`."""
    from mcexact import plots
    from mcexact.inference import joint_tests

    def make():
        (score,) = joint_tests(dist, ("score",))
        if score.more is None:
            raise DataError(score.note or "the score test has no ordering of the support")
        return plots.plot_running_pvalue(dist, score.more, score.tie)

    return make


def _figure_specs(result) -> list:
    """(part, kind, caption, maker) of every figure of the report, in order."""
    from mcexact import plots

    specs = []
    dists = list(result.effect_distributions.items())
    if not _single_effect(result):
        dists.append(("joint", result.distribution))
    for part, dist in dists:
        if dist is None:
            continue
        names = list(dist.names)
        shown = range(min(dist.n_columns, _MAX_FIGURE_COLUMNS))
        if dist.is_monte_carlo:
            kind = "independent draws" if dist.iid else "Markov chains"
            for j in shown:
                specs.append((part, "trace", f"{part}: path of the {names[j]} statistic "
                              f"({kind}); the dashed line is the observed value.",
                              lambda d=dist, j=j: plots.plot_trace(d, j)))
            specs.append((part, "running-pvalue", f"{part}: Monte Carlo score-test p-value as "
                          "draws accumulate, with a band of \u00b12 MCSE (the table's value can "
                          "differ slightly where support points near the observed value count "
                          "half).", _running_pvalue_maker(dist)))
            for j in shown:
                specs.append((part, "autocorrelation", f"{part}: autocorrelation of the "
                              f"{names[j]} statistic within each chain.",
                              lambda d=dist, j=j: plots.plot_autocorrelation(d, j)))
            if dist.n_columns > _MAX_FIGURE_COLUMNS:
                specs.append((part, "omitted", f"{part}: trace and autocorrelation figures of "
                              f"columns beyond the first {_MAX_FIGURE_COLUMNS} are not shown.",
                              None))
        if dist.n_columns == 1 and part != "joint":
            specs.append((part, "null-distribution", f"{part}: conditional null distribution of "
                          f"the {names[0]} statistic, with the observed value and the smaller "
                          "tail marked.", lambda d=dist: plots.plot_null_distribution(d, 0)))
        if dist.n_columns == 2:
            specs.append((part, "joint", f"{part}: joint conditional null distribution of "
                          f"{names[0]} and {names[1]} (log10 probabilities), the observed pair "
                          "starred.", lambda d=dist: plots.plot_joint(d, (0, 1))))
    return specs


def _figure_html(part: str, kind: str, caption: str, maker, canvas_cls) -> str:
    attrs = f'data-part="{_esc(part)}" data-kind="{_esc(kind)}"'
    if maker is None:
        return f'<p class="figure-note" {attrs}>{_esc(caption)}</p>'
    try:
        png = _png(maker, canvas_cls)
    except Exception as exc:     # one figure that cannot be drawn must not sink the report
        message = f"{part}: the {kind} figure could not be drawn ({type(exc).__name__}: {exc})."
        return f'<p class="figure-note" {attrs}>{_esc(message)}</p>'
    data = base64.b64encode(png).decode("ascii")
    return (f"<figure {attrs}><img src=\"data:image/png;base64,{data}\" alt=\"{_esc(caption)}\">"
            f"<figcaption>{_esc(caption)}</figcaption></figure>")


def _figures_section(result, plots: bool) -> str:
    heading = "Diagnostic figures"
    if not plots:
        return _section("figures", heading, "<p>Figures were not requested "
                        "(<code>plots=False</code>).</p>")
    canvas_cls = _agg_canvas()
    if canvas_cls is None:
        return _section("figures", heading, '<p class="figure-note">matplotlib is not '
                        "installed, so this report has no figures (install it with "
                        "<code>pip install matplotlib</code> and render again).</p>")
    try:
        specs = _figure_specs(result)
    except Exception as exc:
        return _section("figures", heading, f'<p class="figure-note">The figures could not be '
                        f"prepared ({_esc(type(exc).__name__)}: {_esc(exc)}).</p>")
    body, current = [], None
    for part, kind, caption, maker in specs:
        if part != current:
            body.append(f"<h3>{_esc(part)}</h3>")
            current = part
        body.append(_figure_html(part, kind, caption, maker, canvas_cls))
    if not body:
        body.append("<p>No figures apply to this result.</p>")
    return _section("figures", heading, "".join(body))


# -- the document ---------------------------------------------------------------------------------

_SECTIONS = [("data", "Data"), ("engines", "Engines"), ("tests", "Tests"),
             ("estimates", "Estimates and confidence limits"),
             ("asymptotic", "Ordinary logistic regression (comparison)"), ("notes", "Notes"),
             ("reading", "How to read Monte Carlo errors and verdicts"),
             ("figures", "Diagnostic figures"), ("cautions", "Cautions")]


def _check_arguments(result, title, plots) -> None:
    from mcexact.fit import FitResult

    if not isinstance(result, FitResult):
        raise DataError(f"result must be a FitResult (from mcexact.fit), got "
                        f"{type(result).__name__}")
    if title is not None and not isinstance(title, str):
        raise DataError(f"title must be a string or None, got {type(title).__name__}")
    if not isinstance(plots, (bool, np.bool_)):
        raise DataError(f"plots must be True or False, got {plots!r}")


def render_html(result, *, title: str | None = None, plots: bool = True) -> str:
    """The report of `result` as one self-contained HTML5 document.

    Parameters
    ----------
    result : FitResult
        What :func:`mcexact.fit` returned.
    title : str, optional
        Heading of the page (default: one naming the formula).
    plots : bool, default True
        Embed the diagnostic figures of :mod:`mcexact.plots` (trace, running p-value and
        autocorrelation of each Monte Carlo part, the null distribution of each single-column
        effect, the joint view of two interest columns) as base64 PNG images. Without
        matplotlib the page says so instead; a figure that cannot be drawn is replaced by a
        short note.

    Returns
    -------
    str
        The document: inline stylesheet, no scripts, no external links, fonts or images.

    Raises
    ------
    DataError
        If `result` is not a FitResult, `title` not a string or `plots` not a bool.
    """
    import mcexact

    _check_arguments(result, title, plots)
    d = result.design
    if title is None:
        title = ("Conditional logistic regression: " + d.formula if d.formula
                 else "Conditional logistic regression")
    created = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    version = mcexact.__version__
    toc = "".join(f'<li><a href="#sec-{sid}">{_esc(label)}</a></li>' for sid, label in _SECTIONS)
    sections = [_data_section(result), _engines_section(result), _tests_section(result),
                _estimates_section(result), _asymptotic_section(result), _notes_section(result),
                _reading_section(result), _figures_section(result, bool(plots)),
                _cautions_section()]
    return "\n".join([
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="mcexact {_esc(version)}">',
        f"<title>{_esc(title)}</title>",
        f"<style>{_STYLE}</style>",
        "</head>",
        "<body>",
        f'<header class="page"><h1>{_esc(title)}</h1>'
        f'<p>mcexact <span id="version">{_esc(version)}</span> \u00b7 created '
        f'<time id="created">{_esc(created)}</time></p></header>',
        "<main>",
        f'<nav class="toc" aria-label="Contents"><strong>Contents</strong><ol>{toc}</ol></nav>',
        *sections,
        f"<footer>Report written by mcexact {_esc(version)} on {_esc(created)}.</footer>",
        "</main>",
        "</body>",
        "</html>",
        "",
    ])


def write_html(result, path, **kw) -> pathlib.Path:
    """Render `result` (keywords as for :func:`render_html`) and write it to `path` atomically.

    The page is rendered first, then written by :func:`write_text_atomically`: an error while
    rendering or writing leaves an existing file at `path` as it was.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    target = _target(path)
    return write_text_atomically(render_html(result, **kw), target)


def _target(path) -> pathlib.Path:
    try:
        return pathlib.Path(os.fspath(path))
    except TypeError as exc:
        raise DataError(f"path must be a file path, got {type(path).__name__}") from exc


def write_text_atomically(text: str, path) -> pathlib.Path:
    """Write `text` (UTF-8) to `path` through a temporary file in the same folder and
    :func:`os.replace`; on any error the temporary file is removed and `path` is untouched."""
    target = _target(path)
    folder = target.resolve().parent
    if not folder.is_dir():
        raise DataError(f"cannot write {str(target)!r}: folder {str(folder)!r} does not exist")
    write_text_atomic(target, text)
    return target
