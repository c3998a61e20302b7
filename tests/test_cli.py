"""The ``mcexact`` command line, used as a person would: ``python -m mcexact`` in a child process
on real files in a temporary folder, and ``main([...])`` in this process where a child process adds
nothing but start-up time.

The reference for every number the command writes is the Python API on the same data and options
(``mcexact.fit``, ``mcexact.plan``, ``mcexact.validate``, ``mcexact.load_run``), called here.
The data are an invented bench test: brackets with a zinc coating of 0 to 30 micrometres, half of
them in humid air, in two salt-spray chambers (the strata); outcome ``rusted`` after 500 hours.
"""

from __future__ import annotations

import html.parser
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import mcexact
from mcexact.__main__ import DEFAULT_DEMO, main
from mcexact._json import plain
from mcexact.validation import Z_LIMIT

CSV = """chamber,coat_um,humid,rusted
A,0,0,1
A,0,1,1
A,0,0,0
A,10,1,1
A,10,0,1
A,10,1,1
A,20,0,0
A,20,1,1
A,20,0,0
A,30,1,1
A,30,0,0
A,30,1,0
B,0,0,1
B,0,1,1
B,0,0,0
B,10,1,0
B,10,0,1
B,10,1,0
B,20,0,0
B,20,1,1
B,20,0,1
B,30,1,0
B,30,0,0
B,30,1,0
"""
FORMULA = "rusted ~ coat_um + humid"
MODEL = ["--formula", FORMULA, "--strata", "chamber"]
# A small Monte Carlo run: direct draws, fixed seed.
SAMPLING = ["--method", "direct", "--draws", "2000", "--seed", "11"]
API_SAMPLING = dict(method="direct", n_draws=2000, rng=11)


# ------------------------------------------------------------------------------ helpers

def child_env() -> dict:
    """The environment of a child process that imports the same mcexact as this test (the
    installed one in CI, the in-place build during development)."""
    env = dict(os.environ)
    package_root = str(Path(mcexact.__file__).resolve().parents[1])
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [package_root, env.get("PYTHONPATH")]))
    return env


def cli(*args, cwd: Path, timeout: float = 300) -> subprocess.CompletedProcess:
    """``python -m mcexact ARGS`` in a child process."""
    return subprocess.run([sys.executable, "-m", "mcexact", *map(str, args)], cwd=cwd,
                          env=child_env(), capture_output=True, text=True, timeout=timeout)


def run(capsys, *args) -> tuple[int, str, str]:
    """``main(ARGS)`` in this process: (exit code, standard output, standard error)."""
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def api_json(result) -> dict:
    """The API result as the JSON the command writes."""
    return json.loads(result.to_json())


def assert_one_error_line(err: str, *words: str) -> None:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("mcexact: error: "), err
    assert "Traceback" not in err
    for w in words:
        assert w in lines[0], (w, lines[0])


def same_numbers(a, b) -> bool:
    """Equal, with NaN equal to NaN (JSON null from the writer's conversion)."""
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b


class _Cells(html.parser.HTMLParser):
    """data-value cells per table id: {table: {(row, column): value text}}."""

    def __init__(self):
        super().__init__()
        self.tables, self._table, self._row = {}, None, None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and "id" in a:
            self._table = self.tables.setdefault(a["id"], {})
        elif tag == "tr" and "data-row" in a:
            self._row = int(a["data-row"])
        elif tag == "td" and self._table is not None and "data-value" in a:
            self._table[(self._row, a["data-col"])] = a["data-value"]

    def handle_endtag(self, tag):
        if tag == "table":
            self._table = None


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """The data as a CSV file, and as a Parquet file written by pandas where pyarrow is here."""
    path = tmp_path_factory.mktemp("cli")
    (path / "rust.csv").write_text(CSV)
    try:
        pd.read_csv(path / "rust.csv").to_parquet(path / "rust.parquet", engine="pyarrow")
    except ImportError:
        pass
    return path


@pytest.fixture(scope="module")
def frame(folder) -> pd.DataFrame:
    return pd.read_csv(folder / "rust.csv")


@pytest.fixture(scope="module")
def api(frame):
    """The reference: mcexact.fit with the options of SAMPLING."""
    return mcexact.fit(frame, FORMULA, strata="chamber", **API_SAMPLING)


@pytest.fixture(scope="module")
def analysed(folder):
    """One ``mcexact analyse`` in a child process writing every output."""
    out = folder / "analysed"
    out.mkdir()
    proc = cli("analyse", folder / "rust.csv", *MODEL, *SAMPLING, "--json", "out.json",
               "--save", "run.saved", "--report", "out.html", cwd=out)
    assert proc.returncode == 0, proc.stderr
    return out, proc


# ------------------------------------------------------------------------------ help

@pytest.mark.parametrize("command", ["analyse", "analyze", "plan", "check", "validate", "demo"])
def test_help_of_every_command_shows_an_example(capsys, command):
    code, out, _ = run(capsys, command, "--help")
    assert code == 0
    assert "example" in out and f"mcexact {'analyse' if command == 'analyze' else command} " in out


def test_top_level_help_lists_the_exit_codes(capsys):
    code, out, _ = run(capsys, "--help")
    assert code == 0
    for c in ("0", "1", "2", "3", "4", "130"):
        assert any(line.split()[:1] == [c] for line in out.splitlines()), c


# ------------------------------------------------------------------------------ analyse

def test_analyse_json_and_report_equal_the_api(analysed, api):
    out, proc = analysed
    written = json.loads((out / "out.json").read_text())
    expected = api_json(api)
    assert written["tests"] == expected["tests"]
    assert written["estimates"] == expected["estimates"]
    assert written["method"]["rng"] == {"kind": "int", "seed": 11}
    assert api.summary() in proc.stdout            # the text report on standard output
    assert "out.json" in proc.stdout and "run.saved" in proc.stdout


def test_report_data_values_equal_the_api(analysed, api):
    out, _ = analysed
    cells = _Cells()
    cells.feed((out / "out.html").read_text(encoding="utf-8"))
    for table, frame in (("tests", api.tests), ("estimates", api.estimates)):
        found = cells.tables[table]
        assert len(found) > 3 * len(frame)
        for (row, col), text in found.items():
            assert same_numbers(float(text), float(frame[col].iat[row])), (table, row, col)


def test_parquet_and_csv_give_the_same_numbers(folder, analysed, capsys, tmp_path):
    pytest.importorskip("pyarrow")
    code, _, err = run(capsys, "analyse", folder / "rust.parquet", *MODEL, *SAMPLING, "--json",
                       tmp_path / "pq.json", "--quiet")
    assert code == 0, err
    from_csv = json.loads((analysed[0] / "out.json").read_text())
    from_parquet = json.loads((tmp_path / "pq.json").read_text())
    assert from_parquet["tests"] == from_csv["tests"]
    assert from_parquet["estimates"] == from_csv["estimates"]


def test_parquet_without_pyarrow_says_how_to_install_it(capsys, monkeypatch, tmp_path):
    (tmp_path / "rust.parquet").write_bytes(b"PAR1 not read without pyarrow PAR1")
    monkeypatch.setitem(sys.modules, "pyarrow", None)      # import pyarrow now fails
    code, _, err = run(capsys, "analyse", tmp_path / "rust.parquet", *MODEL)
    assert code == 4
    assert_one_error_line(err, "rust.parquet", "pip install pyarrow")


def test_quiet_prints_nothing_and_seed_reproduces(folder, capsys, tmp_path, api):
    paths = [tmp_path / f"{i}.json" for i in range(3)]
    for path, seed in zip(paths, ["11", "11", "12"]):
        code, out, err = run(capsys, "analyse", folder / "rust.csv", *MODEL, "--method",
                             "direct", "--draws", "2000", "--seed", seed, "--json", path,
                             "--quiet")
        assert (code, out, err) == (0, "", "")
    first, again, other = (json.loads(p.read_text()) for p in paths)
    assert first["tests"] == again["tests"] == api_json(api)["tests"]
    assert [r["p_value"] for r in other["tests"]] != [r["p_value"] for r in first["tests"]]


def test_without_seed_the_entropy_is_recorded_and_repeats_the_run(folder, capsys, tmp_path):
    code, out, _ = run(capsys, "analyse", folder / "rust.csv", *MODEL, "--method", "direct",
                       "--draws", "1000", "--json", tmp_path / "fresh.json")
    assert code == 0
    rng = json.loads((tmp_path / "fresh.json").read_text())["method"]["rng"]
    assert rng["kind"] == "SeedSequence" and rng["spawn_key"] == []
    assert f"--seed {rng['entropy']}" in out
    code, _, _ = run(capsys, "analyse", folder / "rust.csv", *MODEL, "--method", "direct",
                     "--draws", "1000", "--seed", rng["entropy"], "--json",
                     tmp_path / "again.json", "--quiet")
    assert code == 0
    fresh = json.loads((tmp_path / "fresh.json").read_text())
    again = json.loads((tmp_path / "again.json").read_text())
    assert again["tests"] == fresh["tests"] and again["estimates"] == fresh["estimates"]


# ------------------------------------------------------------------------------ check

def test_check_reopens_the_saved_run(analysed, api, capsys, tmp_path):
    out, _ = analysed
    code, text, _ = run(capsys, "check", out / "run.saved", "--json", tmp_path / "check.json")
    reopened = json.loads((tmp_path / "check.json").read_text())
    assert reopened["tests"] == api_json(api)["tests"]
    assert reopened["estimates"] == api_json(api)["estimates"]
    from mcexact.report import format_number

    for _, row in api.tests.iterrows():       # each test's row of the verdict table
        cells = [row["effect"], row["test"], format_number(row["p_value"]),
                 format_number(row["mcse"]), row["verdict"] or "no verdict"]
        assert any(all(c in line for c in cells) for line in text.splitlines()), cells
    mc = [v for f in (api.tests, api.estimates) for e, v in zip(f["engine"], f["verdict"])
          if e != "exact"]
    assert code == (0 if all(v == "quotable" for v in mc) else 1)
    assert code == 1, "the reference run should have p-values that are not quotable yet"


def test_check_exit_code_zero_when_quotable_or_exact(folder, capsys, tmp_path, frame):
    # One effect far from alpha (p near 0.4): its Monte Carlo p-values are quotable at 2,000
    # draws by the API's own verdicts, asserted first.
    api_one = mcexact.fit(frame, FORMULA, strata="chamber", interest="humid", **API_SAMPLING)
    verdicts = list(api_one.tests["verdict"]) + list(api_one.estimates["verdict"])
    assert set(verdicts) == {"quotable"}
    run(capsys, "analyse", folder / "rust.csv", *MODEL, "--interest", "humid", *SAMPLING,
        "--save", tmp_path / "one.saved", "--quiet")
    assert run(capsys, "check", tmp_path / "one.saved")[0] == 0
    run(capsys, "analyse", folder / "rust.csv", *MODEL, "--method", "enumerate", "--save",
        tmp_path / "exact.saved", "--quiet")
    code, text, _ = run(capsys, "check", tmp_path / "exact.saved")
    assert code == 0 and "every result is exact" in text
    code, _, err = run(capsys, "check", tmp_path / "exact.saved", "--extend", "100")
    assert code == 2
    assert_one_error_line(err)


def test_check_extend_equals_one_longer_run(folder, capsys, tmp_path, frame):
    saved = tmp_path / "grow.saved"
    run(capsys, "analyse", folder / "rust.csv", *MODEL, "--method", "direct", "--draws", "1000",
        "--seed", "5", "--save", saved, "--quiet")
    code, out, err = run(capsys, "check", saved, "--extend", "1000", "--quiet")   # in place
    assert (out, err) == ("", "") and code in (0, 1)
    longer = mcexact.fit(frame, FORMULA, strata="chamber", method="direct", n_draws=2000, rng=5)
    grown = mcexact.load_run(saved)
    for frame_name, cols in (("tests", ["p_value", "mid_p_value", "mcse", "n_draws"]),
                             ("estimates", ["p_value", "mcse_p_value", "estimate", "mcse"])):
        got, want = getattr(grown, frame_name), getattr(longer, frame_name)
        for col in cols:
            np.testing.assert_array_equal(got[col].to_numpy(float), want[col].to_numpy(float),
                                          err_msg=f"{frame_name}.{col}")


# ------------------------------------------------------------------------------ plan

@pytest.mark.parametrize("budget", [None, 100])
def test_plan_says_what_fit_then_does(folder, frame, capsys, tmp_path, budget):
    extra = [] if budget is None else ["--max-nodes", str(budget)]
    code, out, _ = run(capsys, "plan", folder / "rust.csv", *MODEL, *extra, "--json",
                       tmp_path / "plan.json")
    assert code == 0
    planned = json.loads((tmp_path / "plan.json").read_text())["parts"]
    fitted = mcexact.fit(frame, FORMULA, strata="chamber", max_nodes=budget, n_draws=400,
                         rng=1, asymptotic=False, tilted=False).method["parts"]
    assert list(planned) == list(fitted)
    for part, rec in planned.items():
        assert (rec["engine"], rec["reason"]) == (fitted[part]["engine"], fitted[part]["reason"])
        want = {k: v for k, v in fitted[part]["plan"].items() if k != "seconds"}
        assert {k: v for k, v in rec["plan"].items() if k != "seconds"} == want
        assert rec["engine"] in out
    if budget is not None:      # the budget sends the parts to the sampling engines
        assert {rec["engine"] for rec in planned.values()} == {"mcmc", "direct"}


# ------------------------------------------------------------------------------ validate

def test_validate_prints_and_writes_the_api_comparison(folder, frame, capsys, tmp_path):
    code, out, _ = run(capsys, "validate", folder / "rust.csv", *MODEL, "--draws", "2000",
                       "--seed", "2", "--json", tmp_path / "v.json")
    report = mcexact.validate(frame, FORMULA, strata="chamber", n_draws=2000, rng=2)
    written = json.loads((tmp_path / "v.json").read_text())
    expected = json.loads(json.dumps(plain(report.comparisons.to_dict(orient="records"))))
    assert written["comparisons"] == expected
    assert written["passed"] == report.passed and code == (0 if report.passed else 1)
    assert report.summary() in out
    _, text, _ = run(capsys, "validate", "--help")
    assert f"|z| > {Z_LIMIT:g}" in " ".join(text.split())   # the rule, stated in the help


def test_validate_exits_1_when_a_comparison_is_flagged(folder, capsys, monkeypatch):
    import mcexact.validation as validation

    real = validation.validate

    def one_flagged(*args, **kw):
        report = real(*args, **kw)
        comparisons = report.comparisons.copy()
        comparisons.loc[0, "z"], comparisons.loc[0, "flagged"] = 9.0, True
        return validation.ValidationReport(comparisons, report.coverage, report.engine,
                                           report.exact, report.monte_carlo)

    monkeypatch.setattr(validation, "validate", one_flagged)
    code, out, _ = run(capsys, "validate", folder / "rust.csv", *MODEL, "--draws", "400",
                       "--seed", "2")
    assert code == 1 and "DISAGREEMENT" in out


# ------------------------------------------------------------------------------ demo

def test_demo_runs_the_shipped_analysis(capsys, tmp_path):
    from mcexact.demo import DEMOS

    code, out, _ = run(capsys, "demo", "small", "--json", tmp_path / "demo.json")
    assert code == 0
    _, formula, options = DEMOS["small"]
    expected = mcexact.fit(mcexact.load_demo("small"), formula, **options)
    written = json.loads((tmp_path / "demo.json").read_text())
    assert written["tests"] == api_json(expected)["tests"]
    assert expected.summary() in out and str(tmp_path / "demo.json") in out


def test_default_demo_is_the_sparse_monte_carlo_one(capsys, tmp_path):
    """`mcexact demo` runs the sparse demo, whose parts need Monte Carlo engines; its JSON equals
    the API's fit with the same seed and draws."""
    from mcexact.demo import DEMOS

    assert DEFAULT_DEMO == "sparse"
    code, out, _ = run(capsys, "demo", "--draws", "400", "--seed", "3", "--json",
                       tmp_path / "demo.json")
    assert code == 0
    _, formula, options = DEMOS["sparse"]
    expected = mcexact.fit(mcexact.load_demo("sparse"), formula, rng=3,
                           **{**options, "n_draws": 400})
    written = json.loads((tmp_path / "demo.json").read_text())
    assert written["tests"] == api_json(expected)["tests"]
    assert written["estimates"] == api_json(expected)["estimates"]
    assert {"direct", "mcmc"} <= set(written["method"]["engines"])


# ------------------------------------------------------------------------------ errors

def test_errors_in_a_child_process_are_one_line(folder, tmp_path):
    proc = cli("analyse", "missing.csv", *MODEL, cwd=tmp_path)
    assert proc.returncode == 4 and proc.stdout == ""
    assert_one_error_line(proc.stderr, "missing.csv")
    proc = cli("analyse", folder / "rust.csv", "--formula", "rusted ~ coat_um +", cwd=tmp_path)
    assert proc.returncode == 2
    assert_one_error_line(proc.stderr, "formula")


@pytest.mark.parametrize("case, code, words", [
    ("missing file", 4, ["nowhere.csv"]),
    ("unknown suffix", 4, ["rust.txt", ".csv"]),
    ("empty file", 4, ["empty.csv", "empty"]),
    ("header only", 4, ["header.csv", "no data rows"]),
    ("parse error", 4, ["ragged.csv", "CSV"]),
    ("bad formula", 2, ["formula"]),
    ("unknown column", 2, ["nope"]),
    ("budget too small", 3, ["budget"]),
    ("corrupt saved run", 4, ["broken.saved"]),
    ("missing saved run", 4, ["gone.saved"]),
    ("output folder missing", 4, ["nofolder"]),
    ("same output twice", 2, ["--json", "--save"]),
    ("scheduler with another backend", 2, ["--backend dask"]),
    ("dask without a scheduler", 2, ["--scheduler"]),
    ("unknown backend", 2, ["nonsense", "loky"]),
    ("max-draws without extending", 2, ["--max-draws"]),
])
def test_exit_code_of_each_error(folder, capsys, tmp_path, case, code, words):
    data = folder / "rust.csv"
    (tmp_path / "rust.txt").write_text(CSV)
    (tmp_path / "empty.csv").write_text("")
    (tmp_path / "header.csv").write_text("chamber,coat_um,humid,rusted\n")
    (tmp_path / "ragged.csv").write_text("chamber,coat_um,humid,rusted\nA,0,0,1\nA,0,0,1,7,7\n")
    (tmp_path / "broken.saved").write_bytes(b"PK\x03\x04 this is not a saved run")
    args = {
        "missing file": ["analyse", tmp_path / "nowhere.csv", *MODEL],
        "unknown suffix": ["analyse", tmp_path / "rust.txt", *MODEL],
        "empty file": ["analyse", tmp_path / "empty.csv", *MODEL],
        "header only": ["analyse", tmp_path / "header.csv", *MODEL],
        "parse error": ["analyse", tmp_path / "ragged.csv", *MODEL],
        "bad formula": ["analyse", data, "--formula", "rusted ~ ~ coat_um"],
        "unknown column": ["analyse", data, "--formula", "rusted ~ nope"],
        "budget too small": ["analyse", data, *MODEL, "--max-nodes", "10", "--method",
                             "enumerate"],
        "corrupt saved run": ["check", tmp_path / "broken.saved"],
        "missing saved run": ["check", tmp_path / "gone.saved"],
        "output folder missing": ["analyse", data, *MODEL, "--json",
                                  tmp_path / "nofolder" / "x.json"],
        "same output twice": ["analyse", data, *MODEL, "--json", tmp_path / "x",
                              "--save", tmp_path / "x"],
        "scheduler with another backend": ["analyse", data, *MODEL, "--backend", "loky",
                                           "--scheduler", "tcp://127.0.0.1:1"],
        "dask without a scheduler": ["analyse", data, *MODEL, "--backend", "dask"],
        "unknown backend": ["analyse", data, *MODEL, "--backend", "nonsense"],
        "max-draws without extending": ["check", tmp_path / "broken.saved", "--max-draws", "9"],
    }[case]
    got, out, err = run(capsys, *args)
    assert got == code
    assert_one_error_line(err, *words)


def test_usage_errors_exit_2(capsys, folder):
    assert run(capsys, "analyse", folder / "rust.csv")[0] == 2            # no --formula
    assert run(capsys, "analyse", folder / "rust.csv", *MODEL, "--draws", "0")[0] == 2
    assert run(capsys, "demo", "no-such-demo")[0] == 2
    assert run(capsys)[0] == 2


def test_ctrl_c_outside_sampling_and_internal_errors(folder, capsys, monkeypatch):
    import mcexact.__main__ as cli_module

    def interrupt(path):
        raise KeyboardInterrupt

    monkeypatch.setattr(cli_module, "read_table", interrupt)
    code, out, err = run(capsys, "analyse", folder / "rust.csv", *MODEL)
    assert (code, out, err.strip()) == (130, "", "mcexact: interrupted")

    def bug(path):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(cli_module, "read_table", bug)
    code, _, err = run(capsys, "analyse", folder / "rust.csv", *MODEL)
    assert code == 5
    assert_one_error_line(err, "internal error", "ZeroDivisionError")


def test_warnings_are_one_line_and_quiet_hides_them(folder, capsys, monkeypatch, tmp_path):
    import warnings

    import mcexact.__main__ as cli_module

    real = cli_module.read_table

    def warn_then_read(path):
        warnings.warn("a column looks odd\n(second line)", UserWarning)
        return real(path)

    monkeypatch.setattr(cli_module, "read_table", warn_then_read)
    args = ["plan", folder / "rust.csv", *MODEL]
    code, _, err = run(capsys, *args)
    assert code == 0 and err == "mcexact: warning: a column looks odd (second line)\n"
    code, out, err = run(capsys, "analyse", folder / "rust.csv", *MODEL, "--interest", "humid",
                         "--quiet")
    assert (code, out, err) == (0, "", "")


# ------------------------------------------------------------------------------ dask, Ctrl-C

def test_dask_scheduler_gives_the_local_numbers(folder, analysed):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=True,
                                  host="127.0.0.1", protocol="tcp",
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        with distributed.get_task_stream(client) as stream:
            proc = cli("analyse", folder / "rust.csv", *MODEL, *SAMPLING, "--backend", "dask",
                       "--scheduler", cluster.scheduler_address, "--json", "dask.json",
                       "--quiet", cwd=analysed[0])
        assert proc.returncode == 0, proc.stderr
        assert len(stream.data) > 0, "nothing ran on the cluster"
    remote = json.loads((analysed[0] / "dask.json").read_text())
    local = json.loads((analysed[0] / "out.json").read_text())
    assert remote["tests"] == local["tests"] and remote["estimates"] == local["estimates"]
    assert remote["method"]["options"]["backend"] == "dask"


def _wait_until_imported(pid: int, deadline: float) -> None:
    """Until the child has loaded the sampling kernel (then it reads the data and samples)."""
    maps = Path(f"/proc/{pid}/maps")
    while time.monotonic() < deadline and "_sampler" not in maps.read_text():
        time.sleep(0.1)


@pytest.mark.skipif(not Path("/proc/self/maps").exists(), reason="needs POSIX signals and /proc")
def test_ctrl_c_while_sampling_writes_the_draws_so_far(folder, tmp_path, capsys):
    # Markov chains make each draw costly (about 16,000 draws a second here, in rounds of a
    # tenth of the total), so the draws made when the signal comes are few and quick to analyse;
    # the whole run would take about 40 s. (Direct draws come 40 times faster, and analysing
    # the millions drawn by then would dominate the test's time.)
    proc = subprocess.Popen(
        [sys.executable, "-m", "mcexact", "analyse", str(folder / "rust.csv"), *MODEL,
         "--method", "mcmc", "--draws", "200000", "--save", "F.saved", "--json", "J.json"],
        cwd=tmp_path, env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        # A child of a shell without job control would inherit an ignored SIGINT.
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    try:
        _wait_until_imported(proc.pid, time.monotonic() + 60)
        time.sleep(4)        # the first round (20,000 draws) takes about 1.3 s here
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=240)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    written = json.loads((tmp_path / "J.json").read_text())
    assert written["interrupted"] is True
    reopened = mcexact.load_run(tmp_path / "F.saved")
    assert reopened.interrupted
    draws = [info.get("n_draws") or 0 for info in reopened.method["parts"].values()]
    assert 0 < max(draws) < 200_000
    assert written["tests"] == api_json(reopened)["tests"]
    code, out, _ = run(capsys, "check", tmp_path / "F.saved")     # incomplete: not quotable
    assert code == 1 and "stopped by Ctrl-C" in out
