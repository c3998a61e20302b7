"""Tests of mcexact.html_report: the HTML page holds the result's numbers, exactly, and nothing
from outside.

Sources of the expected values: every number is checked against the `FitResult` it was rendered
from (its ``tests`` and ``estimates`` frames, ``design``, ``method`` and ``asymptotic`` fields,
the API the page documents), its shown text against ``mcexact.report.format_number`` and the text
report, and the page's structure with the standard library's ``html.parser``, ``base64`` and the
PNG file signature (PNG specification, section 5.2). Data are the package's invented demo, with
its columns renamed to awkward names for the escaping checks.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import math
import os
import re
import struct
import sys
from html.parser import HTMLParser

import pytest

import mcexact
from mcexact import DataError, html_report
from mcexact.demo import DEMOS
from mcexact.fit import CAUTION
from mcexact.report import format_number

pytest.importorskip("matplotlib")

FORMULA = DEMOS["small"][1]
OPTIONS = DEMOS["small"][2]
N_DRAWS = 400
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


# -- a small parser of the page -------------------------------------------------------------------

class Page(HTMLParser):
    """Tables (id -> rows of {data-col: (text, data-value)}, in order), key/value tables, images,
    figure notes, every start tag with its attributes, and the visible text."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.tables: dict[str, list[dict]] = {}
        self.kv: dict[str, dict] = {}
        self.images: list[dict] = []
        self.figures: list[tuple[str, str, str]] = []      # (part, kind, "img" or "note")
        self.notes: list[tuple[dict, str]] = []
        self.text: list[str] = []
        self._table = self._row = self._cell = self._note = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "table":
            self._table = a.get("id")
            self.tables[self._table] = []
            self.kv[self._table] = {}
        elif tag == "tr" and self._table is not None and ("data-row" in a or "data-key" in a):
            self._row = {"_key": a.get("data-key")}
            self.tables[self._table].append(self._row)
        elif tag == "td" and self._row is not None:
            self._cell = [a.get("data-col"), a.get("data-value"), ""]
        elif tag == "img":
            self.images.append(a)
        if "data-kind" in a:
            self.figures.append((a.get("data-part"), a["data-kind"],
                                 "note" if tag == "p" else "img"))
            if tag == "p":
                self._note = [a, ""]

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            col, value, text = self._cell
            self._row[col] = (text, value)
            if self._row["_key"] is not None:
                self.kv[self._table][self._row["_key"]] = (text, value)
            self._cell = None
        elif tag == "tr":
            self._row = None
        elif tag == "table":
            self._table = None
        elif tag == "p" and self._note is not None:
            self.notes.append(tuple(self._note))
            self._note = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell[2] += data
        if self._note is not None:
            self._note[1] += data

    @property
    def visible(self) -> str:
        return " ".join(" ".join(self.text).split())


def assert_number_cell(cell, expected, where):
    """The cell shows `expected` as format_number does and carries it exactly in data-value."""
    text, value = cell
    assert value is not None, f"{where}: no data-value"
    got = float(value)
    if math.isnan(float(expected)):
        assert math.isnan(got) and value == "nan", where
    else:
        assert got == float(expected), f"{where}: data-value {value} != {expected!r}"
    assert text == format_number(expected), f"{where}: shows {text!r}"


def check_frame(page: Page, table_id: str, frame, columns):
    rows = page.tables[table_id]
    assert len(rows) == len(frame), table_id
    for i in range(len(frame)):
        for col in columns:
            assert_number_cell(rows[i][col], frame[col].iat[i], f"{table_id}[{i}].{col}")


def check_self_contained(text: str, page: Page):
    assert text.startswith("<!DOCTYPE html>")
    for needle in ("http://", "https://", "url(", "@import", "//fonts"):
        assert needle not in text, needle
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        href = attrs.get("href")
        assert href is None or href.startswith("#"), href
        if "src" in attrs:
            assert tag == "img", tag
    for img in page.images:
        prefix = "data:image/png;base64,"
        assert img["src"].startswith(prefix)
        png = base64.b64decode(img["src"][len(prefix):], validate=True)
        assert png[:8] == PNG_SIGNATURE
        width, height = struct.unpack(">II", png[16:24])       # IHDR chunk
        assert png[12:16] == b"IHDR" and width > 100 and height > 100


# -- results (module scope: each is fitted once) --------------------------------------------------

@pytest.fixture(scope="module")
def demo():
    return mcexact.load_demo("small")


@pytest.fixture(scope="module")
def exact_result(demo):
    return mcexact.fit(demo, FORMULA, **OPTIONS, rng=1)


@pytest.fixture(scope="module")
def exact_page(exact_result):
    text = html_report.render_html(exact_result)
    return text, Page(text)


@pytest.fixture(scope="module")
def direct_result(demo):
    return mcexact.fit(demo, FORMULA, strata="site", interest="dose_mg", method="direct",
                       rng=1, n_draws=N_DRAWS)


@pytest.fixture(scope="module")
def mcmc_result(demo):
    return mcexact.fit(demo, FORMULA, **OPTIONS, method="mcmc", rng=1, n_draws=N_DRAWS)


@pytest.fixture(scope="module")
def mc_pages(direct_result, mcmc_result):
    out = {}
    for name, result in (("direct", direct_result), ("mcmc", mcmc_result)):
        text = html_report.render_html(result)
        out[name] = (result, text, Page(text))
    return out


# -- exact results --------------------------------------------------------------------------------

def test_exact_tables_hold_the_api_numbers(exact_result, exact_page):
    text, page = exact_page
    check_self_contained(text, page)
    check_frame(page, "tests", exact_result.tests,
                ["statistic", "p_value", "mid_p_value", "mcse", "mcse_mid_p", "df", "n_points"])
    check_frame(page, "estimates", exact_result.estimates,
                ["estimate", "ci_lower", "ci_upper", "odds_ratio", "or_ci_lower", "or_ci_upper",
                 "mcse", "mcse_ci_lower", "mcse_ci_upper"])
    check_frame(page, "tails", exact_result.estimates,
                ["p_lower", "p_upper", "p_value", "mid_p_value", "mcse_p_value", "cmle",
                 "median_unbiased", "observed"])
    for i, row in enumerate(page.tables["tests"]):
        assert row["effect"][0] == exact_result.tests["effect"].iat[i]
        assert row["test"][0] == exact_result.tests["test"].iat[i]
        assert row["engine"][0] == "exact"
        assert row["verdict"][0] == ""                    # exact rows have no verdict
    # The same shown numbers as the text report (both use format_number).
    summary = exact_result.summary()
    for row in page.tables["tests"] + page.tables["estimates"]:
        for col in ("p_value", "mid_p_value", "estimate", "ci_lower", "ci_upper"):
            if col in row:
                assert row[col][0] in summary, (col, row[col][0])
    joint = page.tables["joint"]
    assert [r["term"][0] for r in joint] == list(exact_result.joint_estimate.index)
    for r, value in zip(joint, exact_result.joint_estimate):
        assert_number_cell(r["joint_cmle"], value, "joint")
        assert_number_cell(r["odds_ratio"], math.exp(value), "joint OR")
    kinds = {r["kind"][0] for r in page.tables["estimates"]}
    assert kinds <= {"conditional MLE", "median unbiased", "none"}


def test_data_and_engine_sections_match_the_design(exact_result, exact_page):
    _, page = exact_page
    d = exact_result.design
    kv = page.kv["data"]
    for key, expected in (("n_rows", d.n_rows), ("n_groups", d.n_groups),
                          ("n_strata", d.n_strata), ("events", int(d.events.sum())),
                          ("trials", int(d.trials.sum())),
                          ("n_dropped_strata", d.n_dropped_strata),
                          ("n_dropped_rows", d.n_dropped_rows), ("alpha", exact_result.alpha)):
        assert_number_cell(kv[key], expected, key)
    assert kv["formula"][0] == d.formula and kv["strata_name"][0] == d.strata_name
    assert [r["effect"][0] for r in page.tables["terms"]] == list(d.effects)
    for note in d.notes:
        assert note in page.visible
    engines = page.tables["engines"]
    parts = exact_result.method["parts"]
    assert [r["part"][0] for r in engines] == list(parts)
    for r in engines:
        info = parts[r["part"][0]]
        assert r["engine"][0] == info["engine"] and r["reason"][0] == info["reason"]
        assert_number_cell(r["nuisance_nodes"], info["plan"]["nuisance_nodes"], "nodes")
        assert float(r["full_peak_estimate"][1]) == info["plan"]["full_peak_estimate"]
    assert "rng=1)" in page.visible


def test_asymptotic_comparison_is_shown(exact_result, exact_page):
    _, page = exact_page
    a = exact_result.asymptotic
    check_frame(page, "asymptotic", a.coefficients,
                ["estimate", "std_error", "odds_ratio", "wald_p_value"])
    check_frame(page, "asymptotic-tests", a.tests,
                ["df", "wald_p_value", "lr_p_value", "score_p_value"])
    checks = page.kv["asymptotic-checks"]
    assert checks["separation"][0] == a.separation.status
    assert_number_cell(checks["share_small_expected"], a.share_small_expected, "share")
    assert checks["sparse"][0] == format_number(bool(a.sparse))
    for note in a.notes:
        assert note in page.visible


def test_exact_figures_and_cautions(exact_result, exact_page):
    text, page = exact_page
    # Exact parts: no Monte Carlo figures; one null distribution per single-column effect and the
    # 2-D view of the two interest columns.
    assert sorted(page.figures) == sorted([("dose_mg", "null-distribution", "img"),
                                           ("age", "null-distribution", "img"),
                                           ("joint", "joint", "img")])
    assert len(page.images) == 3
    visible = page.visible
    assert " ".join(CAUTION.split()) in visible
    assert "Monte Carlo values" in visible and "are estimates" in visible
    assert "qualified statistician" in visible and "study protocol" in visible
    assert "applicable guidance" in visible
    assert "enumerated exactly" in visible            # the reading paragraph, exact variant


def test_header_version_time_and_contents(exact_page):
    text, page = exact_page
    assert f'<span id="version">{mcexact.__version__}</span>' in text
    stamp = re.search(r'<time id="created">([^<]+) UTC</time>', text).group(1)
    created = dt.datetime.strptime(stamp, "%Y-%m-%d %H:%M:%S").replace(tzinfo=dt.timezone.utc)
    assert abs((dt.datetime.now(dt.timezone.utc) - created).days) < 1
    ids = {a.get("id") for _, a in page.tags}
    for _, a in page.tags:
        if a.get("href"):
            assert a["href"][1:] in ids, a["href"]         # every contents link has a target
    assert {"tests", "estimates", "tails", "engines", "data", "options"} <= set(page.tables)


# -- Monte Carlo results --------------------------------------------------------------------------

@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_monte_carlo_tables_hold_the_api_numbers(mc_pages, engine):
    result, text, page = mc_pages[engine]
    check_self_contained(text, page)
    check_frame(page, "tests", result.tests,
                ["statistic", "p_value", "mid_p_value", "mcse", "mcse_mid_p", "n_draws", "ess",
                 "rhat", "draws_needed"])
    check_frame(page, "estimates", result.estimates,
                ["estimate", "mcse", "ci_lower", "mcse_ci_lower", "ci_upper", "mcse_ci_upper",
                 "odds_ratio", "or_ci_lower", "or_ci_upper"])
    check_frame(page, "tails", result.estimates,
                ["p_lower", "p_upper", "p_value", "mid_p_value", "mcse_p_value", "ess", "rhat",
                 "draws_needed"])
    for i, row in enumerate(page.tables["tests"]):
        assert row["verdict"][0] == result.tests["verdict"].iat[i]
        assert row["engine"][0] == engine
    assert any(result.tests["mcse"] > 0)                  # the run really is Monte Carlo
    for r in page.tables["engines"]:
        info = result.method["parts"][r["part"][0]]
        assert r["engine"][0] == engine
        assert_number_cell(r["n_draws"], info["n_draws"], "draws")
        assert_number_cell(r["seconds"], info["seconds"], "seconds")
        assert r["stopped"][0] == info["stopped"]
    assert "Some parts of this analysis were sampled" in page.visible
    assert '"seed": 1' in page.visible and "rng=1)" in page.visible


@pytest.mark.parametrize("engine", ["direct", "mcmc"])
def test_monte_carlo_figures(mc_pages, engine):
    result, _, page = mc_pages[engine]
    expected = []
    for part, dist in result.effect_distributions.items():
        expected += [(part, "trace", "img"), (part, "running-pvalue", "img"),
                     (part, "autocorrelation", "img"), (part, "null-distribution", "img")]
    if len(result.design.effects) > 1:
        q = result.distribution.n_columns
        expected += [("joint", "trace", "img")] * q + [("joint", "running-pvalue", "img")]
        expected += [("joint", "autocorrelation", "img")] * q + [("joint", "joint", "img")]
    assert sorted(page.figures) == sorted(expected)
    assert len(page.images) == len(expected)
    assert page.notes == []


# -- escaping -------------------------------------------------------------------------------------

AWKWARD_TERM = 'dose<1> & "x"'
AWKWARD_STRATA = "site <A&B> 'q'"
AWKWARD_NOTE = "check <b>bold</b> & \"quoted\" 'single' </table>"
AWKWARD_TITLE = "<script>alert(1)</script> & co"


@pytest.fixture(scope="module")
def awkward_page(demo):
    data = demo.rename(columns={"dose_mg": AWKWARD_TERM, "site": AWKWARD_STRATA})
    result = mcexact.fit(data, f"elevation ~ `{AWKWARD_TERM}` + age", strata=AWKWARD_STRATA,
                         interest=AWKWARD_TERM, asymptotic=False)
    result.notes.append(AWKWARD_NOTE)
    text = html_report.render_html(result, title=AWKWARD_TITLE)
    return result, text, Page(text)


def test_user_strings_are_escaped(awkward_page):
    result, text, page = awkward_page
    check_self_contained(text, page)
    assert {tag for tag, _ in page.tags}.isdisjoint({"script", "b"})
    for raw in (AWKWARD_TERM, AWKWARD_STRATA, AWKWARD_NOTE, AWKWARD_TITLE):
        assert raw not in text
        assert html.escape(raw, quote=True) in text
    # Read back, the strings are the user's own.
    assert page.tables["terms"][0]["effect"][0] == AWKWARD_TERM
    assert page.kv["data"]["strata_name"][0] == AWKWARD_STRATA
    assert page.tables["tests"][0]["effect"][0] == AWKWARD_TERM
    assert AWKWARD_NOTE in page.visible
    assert f"<h1>{html.escape(AWKWARD_TITLE)}</h1>" in text
    assert f"<title>{html.escape(AWKWARD_TITLE)}</title>" in text
    # The figures of the awkward column were drawn, and their alt texts escaped.
    assert (AWKWARD_TERM, "null-distribution", "img") in page.figures
    assert all(AWKWARD_TERM in img["alt"] for img in page.images)
    # The tables still hold the numbers.
    check_frame(page, "tests", result.tests, ["p_value", "mid_p_value", "mcse"])


def test_without_asymptotic_comparison(awkward_page):
    result, _, page = awkward_page
    assert result.asymptotic is None
    assert "asymptotic" not in page.tables and "asymptotic-tests" not in page.tables
    assert "asymptotic=False" in page.visible
    check_frame(page, "estimates", result.estimates, ["estimate", "ci_lower", "ci_upper"])


# -- figures: options and failures ----------------------------------------------------------------

def test_plots_false_omits_images(exact_result):
    page = Page(html_report.render_html(exact_result, plots=False))
    assert page.images == [] and page.figures == []
    assert "plots=False" in page.visible
    check_frame(page, "tests", exact_result.tests, ["p_value"])


def test_missing_matplotlib_is_reported(exact_result, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)      # import matplotlib now fails
    text = html_report.render_html(exact_result)
    page = Page(text)
    assert page.images == []
    assert "matplotlib is not installed" in page.visible
    check_frame(page, "estimates", exact_result.estimates, ["estimate", "ci_lower"])


def test_a_failing_figure_leaves_a_note(exact_result, monkeypatch):
    from mcexact import plots

    def broken(*args, **kwargs):
        raise ValueError("degenerate <distribution>")

    monkeypatch.setattr(plots, "plot_null_distribution", broken)
    text = html_report.render_html(exact_result)
    page = Page(text)
    assert sorted(page.figures) == sorted([("dose_mg", "null-distribution", "note"),
                                           ("age", "null-distribution", "note"),
                                           ("joint", "joint", "img")])
    assert len(page.images) == 1
    for attrs, note in page.notes:
        assert "could not be drawn" in note and "degenerate <distribution>" in note
    assert "degenerate <distribution>" not in text             # escaped in the page


# -- writing --------------------------------------------------------------------------------------

def test_to_html_and_write_html(exact_result, tmp_path):
    target = tmp_path / "report.html"
    returned = exact_result.to_html(target, plots=False)
    assert target.read_text(encoding="utf-8") == returned
    page = Page(returned)
    check_frame(page, "tests", exact_result.tests, ["p_value", "mid_p_value"])
    assert exact_result.to_html(plots=False).startswith("<!DOCTYPE html>")
    path = html_report.write_html(exact_result, tmp_path / "other.html", plots=False,
                                  title="Demo")
    assert path == tmp_path / "other.html"
    assert "<title>Demo</title>" in path.read_text(encoding="utf-8")
    assert sorted(os.listdir(tmp_path)) == ["other.html", "report.html"]


def test_atomic_write_keeps_the_old_file(exact_result, tmp_path, monkeypatch):
    target = tmp_path / "report.html"
    target.write_text("previous report", encoding="utf-8")

    def failing_render(*args, **kwargs):
        raise RuntimeError("render failed")

    with monkeypatch.context() as m:
        m.setattr(html_report, "render_html", failing_render)
        with pytest.raises(RuntimeError, match="render failed"):
            html_report.write_html(exact_result, target)
        with pytest.raises(RuntimeError, match="render failed"):
            exact_result.to_html(target)
    assert target.read_text(encoding="utf-8") == "previous report"
    assert os.listdir(tmp_path) == ["report.html"]

    def failing_replace(src, dst):
        raise OSError("disk full")

    with monkeypatch.context() as m:
        m.setattr(html_report.os, "replace", failing_replace)
        with pytest.raises(OSError, match="disk full"):
            html_report.write_html(exact_result, target, plots=False)
    assert target.read_text(encoding="utf-8") == "previous report"
    assert os.listdir(tmp_path) == ["report.html"]           # the temporary file is gone


def test_bad_arguments_raise_data_errors(exact_result, tmp_path):
    with pytest.raises(DataError, match="FitResult"):
        html_report.render_html("not a result")
    with pytest.raises(DataError, match="plots"):
        html_report.render_html(exact_result, plots="yes")
    with pytest.raises(DataError, match="title"):
        html_report.render_html(exact_result, title=3)
    with pytest.raises(DataError, match="does not exist"):
        html_report.write_html(exact_result, tmp_path / "missing" / "r.html", plots=False)
    with pytest.raises(DataError, match="path"):
        html_report.write_html(exact_result, 3.5, plots=False)
