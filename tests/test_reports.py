"""The evidence pack (reports/): every printed number traced to summary.json, the HTML
rendered by a real browser, the PDF's pages rendered and read back, the failing-section
case, and `noiseproof pack`.

The formatting and transformation rules are re-implemented here from their statement in
reports/_model.py (and in the pack's method notes), so the tests do not reuse the code they
check. PDF text is read back with pypdf, HTML is parsed with the standard library's
html.parser, pages are rendered with pypdfium2 and headless Chromium.
"""
from __future__ import annotations

import base64
import hashlib
import io
import json
import math
import os
import re
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

HERE = Path(__file__).resolve().parent
FIXTURES = HERE / "data" / "reports"
sys.path.insert(0, str(FIXTURES))
import make_fixture  # noqa: E402

import reports  # noqa: E402
from estimators.core import DataError  # noqa: E402
from noiseproof.cli import main as cli_main  # noqa: E402

SECTION_TITLES = ["Verdict", "Inputs and assumptions", "Weight stability", "Frontiers",
                  "Cost of estimation error", "How much history would it need",
                  "Out-of-sample backtest", "Engine self-check", "Method notes and cautions",
                  "Reproducibility"]


# --------------------------------------------------------------------------- independent rules

def expected_text(x, fmt):
    """The pack's stated formatting rules, written out again."""
    if x is None:
        return "n/a"
    def nozero(t):
        return t[1:] if t.startswith("-") and not re.search(r"[1-9]", t) else t
    if fmt == "pct1":
        return nozero("%.1f" % (100 * x)) + "%"
    if fmt == "pct2":
        return nozero("%.2f" % (100 * x)) + "%"
    if fmt.startswith("num"):
        return nozero("%.*f" % (int(fmt[3:]), x))
    if fmt == "snum3":
        t = "%+.3f" % x
        return t[1:] if not re.search(r"[1-9]", t) else t
    if fmt == "pval":
        return "<0.001" if x < 0.0005 else "%.3f" % x
    if fmt == "int":
        return "{:,}".format(int(round(x)))
    if fmt == "id":
        return str(int(round(x)))
    if fmt == "bp1":
        return nozero("%.1f" % (x * 1e4)) + " bp"
    raise AssertionError(f"format {fmt} not covered by the test")


def lookup(summary, path):
    node = summary
    for key in path:
        if isinstance(node, list):
            node = node[int(key)]
        else:
            node = node.get(key) if isinstance(node, dict) else None
        if node is None:
            return None
    return node


def expected_value(op, values, ppy):
    if op == "max_band":
        return max(w["p95"] - w["p5"] for w in values[0].values())
    if any(v is None for v in values):
        return None
    v = [float(x) for x in values]
    return {"id": lambda: v[0], "ann_mean": lambda: v[0] * ppy,
            "ann_vol": lambda: v[0] * math.sqrt(ppy), "ann_sharpe": lambda: v[0] * math.sqrt(ppy),
            "ann_vol_from_var": lambda: math.sqrt(v[0] * ppy), "diff": lambda: v[0] - v[1],
            "band": lambda: v[0] - v[1], "ann_mean_diff": lambda: (v[0] - v[1]) * ppy,
            "ann_sharpe_diff": lambda: (v[0] - v[1]) * math.sqrt(ppy)}[op]()


# --------------------------------------------------------------------------- HTML reading

class PackHTML(HTMLParser):
    """Collects sections, table cells (with their data-* attributes), images and links."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.cells = []          # dicts: table, section, attrs, text
        self.sections = {}       # id -> text
        self.headings = []
        self.images, self.links, self.scripts, self.stylesheets = [], [], 0, 0
        self._section = None
        self._table = None
        self._cell = None
        self._h2 = None
        self._col = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self._section = a.get("id")
            self.sections[self._section] = ""
        elif tag == "table":
            self._table = a.get("data-table")
        elif tag == "tr":
            self._col = 0
        elif tag == "td":
            self._cell = {"table": self._table, "section": self._section, "attrs": a, "text": "",
                          "col": self._col}
            self._col += 1
        elif tag == "img":
            self.images.append(a.get("src", ""))
        elif tag in ("a", "link"):
            if tag == "link":
                self.stylesheets += 1
            self.links.append(a.get("href", ""))
        elif tag == "script":
            self.scripts += 1
        elif tag == "h2" and self._section:
            self._h2 = ""

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._cell["text"] = " ".join(self._cell["text"].split())
            self.cells.append(self._cell)
            self._cell = None
        elif tag == "table":
            self._table = None
        elif tag == "section":
            self._section = None
        elif tag == "h2" and self._h2 is not None:
            self.headings.append(" ".join(self._h2.split()))
            self._h2 = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell["text"] += data
        if self._section:
            self.sections[self._section] += data
        if self._h2 is not None:
            self._h2 += data


def parse_html(path):
    p = PackHTML()
    p.feed(Path(path).read_text(encoding="utf-8"))
    return p


def section_bounds(pages):
    """{section number: (first page index, one past its last)} from the section headings."""
    starts = {}
    for i, text in enumerate(pages):
        if "Contents" in text:
            continue
        for n, title in enumerate(SECTION_TITLES, start=1):
            if n not in starts and re.search(rf"(^| ){n} ?{re.escape(title)}", text):
                starts[n] = i
    assert sorted(starts) == list(range(1, 11)), starts
    order = sorted(starts.items(), key=lambda kv: kv[1])
    return {n: (p, order[j + 1][1] if j + 1 < len(order) else len(pages))
            for j, (n, p) in enumerate(order)}


def pdf_pages_text(path):
    from pypdf import PdfReader

    return [" ".join((page.extract_text() or "").split()) for page in PdfReader(str(path)).pages]


# --------------------------------------------------------------------------- fixtures

DEMO = HERE.parent / "demo_market" / "data"

REAL_STUDY = """name = "Pack test: Kestrel Bay trustees (invented)"
risk_aversion = 5
policy = "held"

[data]
path = "returns.csv"
kind = "returns"
frequency = "monthly"
{risk_free}

[estimate]
mean = "sample"
covariance = "ledoit-wolf-constant-correlation"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 5

[[rules]]
name = "min-variance"
type = "min-variance"

[[rules]]
name = "held"
type = "fixed"
weights = {{ "Domestic Equity" = 0.4, "Government Bonds" = 0.6 }}

[resample]
generator = "normal"
draws = 80
length = {length}
seed = 11
frontier_points = 7
sweep_years = [5, 10, 20]
sweep_draws = 40

{backtest}
[verdict]
max_band_width = 0.3
"""


BACKTEST = """[backtest]
window = 120
rebalance_every = 3
cost_bps = 10
bootstrap_resamples = 50
"""


def _real_run(base: Path, *, rows=None, length=120, risk_free=True, backtest=True) -> Path:
    """Run a small study on the invented demo market through the real runner (which builds
    the pack itself) and return its run folder."""
    from noiseproof.runner import run_study
    from noiseproof.studyfile import load_study

    base.mkdir(parents=True, exist_ok=True)
    returns = pd.read_csv(DEMO / "demo_returns.csv")
    if rows is not None:
        returns = returns.iloc[:rows]
    returns.to_csv(base / "returns.csv", index=False)
    rf = ""
    if risk_free:
        shutil.copy(DEMO / "demo_cash.csv", base / "cash.csv")
        rf = 'risk_free_path = "cash.csv"'
    (base / "study.toml").write_text(REAL_STUDY.format(risk_free=rf, length=length,
                                                       backtest=BACKTEST if backtest else ""))
    return run_study(load_study(base / "study.toml"), base / "run", quiet=True, pack=True,
                     argv=["noiseproof", "study", str(base / "study.toml")])


def _result(folder: Path):
    pack = folder / "pack"
    return reports.PackResult(html=pack / "report.html", pdf=pack / "report.pdf",
                              data_dir=pack / "data", manifest=pack / "manifest.json")


@pytest.fixture(scope="module")
def full_run(tmp_path_factory):
    """A real run (resampling and backtest) whose pack the runner built."""
    folder = _real_run(tmp_path_factory.mktemp("real"))
    return folder, _result(folder)


@pytest.fixture(scope="module")
def short_run(tmp_path_factory):
    """A real run on 100 months of history without a backtest: the pack must still build and
    say why section 7 is empty. (The runner raises, rather than skips, when a [backtest] window
    does not fit the history; the committed fixture covers the "too short" reason.)"""
    folder = _real_run(tmp_path_factory.mktemp("short"), rows=100, length=60, risk_free=False,
                       backtest=False)
    return folder, _result(folder)


@pytest.fixture(scope="module")
def hand_run(tmp_path_factory):
    """A hand-made run folder with every section filled (tests/data/reports/make_fixture.py)."""
    folder = make_fixture.make(tmp_path_factory.mktemp("hand") / "run", backtest=True)
    return folder, reports.build_pack(folder)


@pytest.fixture(scope="module")
def skipped_run(tmp_path_factory):
    """The committed failing-section case: the backtest was skipped (history too short)."""
    folder = tmp_path_factory.mktemp("skipped") / "run"
    shutil.copytree(FIXTURES / "run_backtest_skipped", folder)
    result = reports.build_pack(folder)
    return folder, result


# --------------------------------------------------------------------------- numbers traced

NUMBER = re.compile(r"^[+-]?(\d{1,3}(,\d{3})*|\d+)(\.\d+)?( ?%| bp| pp)?$|^<0\.001$")


@pytest.mark.parametrize("which", ["full_run", "short_run", "hand_run", "skipped_run"])
def test_every_number_in_the_html_tables_is_the_summary_number(which, request):
    folder, result = request.getfixturevalue(which)
    summary = json.loads((folder / "summary.json").read_text())
    ppy = summary["periods_per_year"]
    html = parse_html(result.html)
    traced = [c for c in html.cells if "data-src" in c["attrs"]]
    assert len(traced) > 100
    for c in traced:
        paths = json.loads(c["attrs"]["data-src"])
        values = [lookup(summary, p) for p in paths]
        x = expected_value(c["attrs"]["data-op"], values, ppy)
        want = expected_text(x, c["attrs"]["data-fmt"])
        got = c["text"]
        # a count of periods may carry its length in years after the number
        assert got == want or got.startswith(want + " "), (c["attrs"], got, want)
    # no untraced number: every cell that prints a bare number says where it came from
    for c in html.cells:
        if c["table"] == "reproducibility":
            continue   # the manifest's content (seed, hashes) is shown as text, not as a result
        if c["table"] == "verdict_criteria" and c["col"] == 0:
            continue   # the criterion's number
        if NUMBER.match(c["text"]):
            assert "data-src" in c["attrs"], (c["table"], c["text"])


def test_verdict_numbers_match_summary_in_html_and_pdf(full_run):
    """Computed here from summary.json alone, then found in the verdict of both renderings."""
    folder, result = full_run
    s = json.loads((folder / "summary.json").read_text())
    ppy = s["periods_per_year"]
    w = s["rules"]["proposed"]["weights"]
    widest = max(v["p95"] - v["p5"] for v in w.values())
    prob = s["rules"]["proposed"]["population"]["prob_beats_equal_weight_ceq"]
    bt = s["rules"]["proposed"]["backtest"]
    diff = bt["sharpe_diff"] * math.sqrt(ppy)
    settings = s["verdict"]["settings"]
    assert settings["max_band_width"] == 0.3            # the study file's [verdict]
    expected = ["%.1f%%" % (100 * widest), "%.1f%%" % (100 * prob), "%+.3f" % diff,
                "%.3f" % bt["sharpe_diff_p_lw"], "%.3f" % bt["dsr"],
                "%.1f%%" % (100 * settings["max_band_width"]),
                "%.1f%%" % (100 * settings["min_prob_beats_equal_weight"])]
    html = parse_html(result.html)
    verdict_html = " ".join(html.sections["s1"].split())
    pages = pdf_pages_text(result.pdf)
    verdict_pdf = pages[section_bounds(pages)[1][0]]
    for text in expected:
        assert text in verdict_html, text
        assert text in verdict_pdf, text
    # every in-sample and averaged weight of the proposed rule, as printed in the allocation table
    for asset in s["data"]["assets"]:
        for x in (s["rules"]["proposed"]["in_sample_weights"][asset],
                  s["rules"]["proposed"]["resampled_allocation"]["weights"][asset]):
            assert "%.1f%%" % (100 * x) in verdict_pdf
    # the pack's pass/fail per criterion agrees with the runner's own verdict in summary.json
    cells = [c for c in html.cells if c["table"] == "verdict_criteria" and "data-status" in c["attrs"]]
    mine = [c["attrs"]["data-status"] for c in cells]
    theirs = {c["name"]: c["passed"] for c in s["verdict"]["criteria"]}
    word = {True: "pass", False: "fail", None: "na"}
    assert mine[0] == word[theirs["weight_bands"]]
    assert mine[1] == word[theirs["prob_beats_equal_weight_ceq"]]
    backtest = "fail" if "fail" in mine[2:] else ("na" if "na" in mine[2:] else "pass")
    assert backtest == word[theirs["backtest_sharpe_vs_equal_weight"]]


def test_pdf_tables_print_the_same_numbers_as_the_html(full_run):
    """Each traced number of section k appears in the PDF text of section k's pages."""
    folder, result = full_run
    html = parse_html(result.html)
    pages = pdf_pages_text(result.pdf)
    bounds = section_bounds(pages)
    checked = 0
    for c in html.cells:
        if "data-src" not in c["attrs"]:
            continue
        n = int(c["section"][1:])
        lo, hi = bounds[n]
        text = " ".join(pages[lo:hi])
        assert c["text"] in text, (c["section"], c["table"], c["text"])
        checked += 1
    assert checked > 100


def test_data_csvs_hold_the_numbers_drawn(full_run):
    folder, result = full_run
    s = json.loads((folder / "summary.json").read_text())
    html = parse_html(result.html)
    data = result.data_dir
    # tables: the CSV holds the unrounded value behind each printed number
    by_table = {}
    for c in html.cells:
        if c["table"] and "data-value" in c["attrs"]:
            by_table.setdefault(c["table"], []).append(float(c["attrs"]["data-value"]))
    assert len(by_table) >= 8
    for key, values in by_table.items():
        frame = pd.read_csv(data / f"{key}.csv")
        numbers = pd.to_numeric(frame.stack(), errors="coerce").dropna().to_numpy()
        for v in values:
            assert np.any(np.isclose(numbers, v, rtol=1e-12, atol=0)), (key, v)
    # figures: weight bands are the summary's percentiles; growth is tables/backtest_cumulative
    bands = pd.read_csv(data / "fig_weight_bands_1.csv")
    for _, row in bands.iterrows():
        w = s["rules"][row["rule"]]["weights"][row["asset"]]
        assert row["p5"] == w["p5"] and row["p95"] == w["p95"] and row["p25"] == w["p25"]
    bt = pd.read_csv(data / "fig_backtest.csv")
    cum = pd.read_csv(folder / "tables" / "backtest_cumulative.csv")
    np.testing.assert_array_equal(bt["growth: proposed"].to_numpy(), cum["proposed"].to_numpy())
    # annualised figures say so in their columns (and rolling Sharpe is x sqrt(12))
    fr = pd.read_csv(data / "fig_frontiers.csv")
    assert "volatility (annualised)" in fr.columns and "expected return (annualised)" in fr.columns
    np.testing.assert_allclose(fr.loc[fr["series"] == "true (population)", "volatility (annualised)"],
                               np.array(s["frontiers"]["true_volatility"]) * math.sqrt(12), rtol=1e-14)
    roll = pd.read_csv(folder / "tables" / "backtest_rolling_sharpe.csv")
    np.testing.assert_allclose(bt["rolling_sharpe: min-variance"], roll["min-variance"] * math.sqrt(12),
                               rtol=1e-14, equal_nan=True)
    # one CSV per figure and per table
    n_fig = len(re.findall(r"<figure ", result.html.read_text()))
    n_tab = len(set(re.findall(r'<table data-table="([^"]+)"', result.html.read_text())))
    assert len(list(data.glob("*.csv"))) == n_fig + n_tab


def test_pack_manifest_lists_files_with_sha256(full_run):
    folder, result = full_run
    m = json.loads(result.manifest.read_text())
    pack = folder / "pack"
    assert "report.html" in m["files"] and "report.pdf" in m["files"]
    assert len([k for k in m["files"] if k.startswith("data/")]) == len(list(result.data_dir.glob("*.csv")))
    for rel, digest in list(m["files"].items()) + [(k, v) for k, v in m["inputs"].items()]:
        base = pack if rel in m["files"] else folder
        assert hashlib.sha256((base / rel).read_bytes()).hexdigest() == digest
    assert "summary.json" in m["inputs"]
    assert [s["title"] for s in m["sections"]] == SECTION_TITLES


# --------------------------------------------------------------------------- PDF as a reader sees it

def test_pdf_has_contents_page_numbers_and_study_on_every_page(full_run):
    folder, result = full_run
    s = json.loads((folder / "summary.json").read_text())
    pages = pdf_pages_text(result.pdf)
    n = len(pages)
    assert n >= 11
    for i, text in enumerate(pages, start=1):
        assert s["study"]["name"] in text
        assert s["study"]["created"][:10] in text
        assert f"Page {i} of {n}" in text
    toc = pages[0]
    assert "Contents" in toc
    from pypdf import PdfReader

    reader = PdfReader(str(result.pdf))
    outline = [(item.title, reader.get_destination_page_number(item)) for item in reader.outline]
    assert [t for t, _ in outline] == [f"{i} {t}" for i, t in enumerate(SECTION_TITLES, start=1)]
    toc_numbers = re.findall(r"\.\s*(\d+)\b", toc)
    for (title, page), listed in zip(outline, toc_numbers):
        number, name = title.split(" ", 1)
        assert name in pages[page] and re.search(rf"(^| ){number} ?{re.escape(name)}", pages[page])
        assert int(listed) == page + 1, (title, listed, page + 1)   # the contents page agrees
        assert name in toc


def test_pdf_pages_render_and_are_not_blank(full_run):
    import pypdfium2 as pdfium

    folder, result = full_run
    pdf = pdfium.PdfDocument(str(result.pdf))
    try:
        for i in range(len(pdf)):
            img = np.asarray(pdf[i].render(scale=0.6).to_pil().convert("L"), dtype=float)
            assert img.std() > 5, f"page {i + 1} looks blank"
            assert (img < 128).mean() > 0.002, f"page {i + 1} has almost no ink"
    finally:
        pdf.close()


# --------------------------------------------------------------------------- HTML as a browser sees it

def test_html_is_self_contained_and_offline(full_run):
    folder, result = full_run
    text = result.html.read_text(encoding="utf-8")
    html = parse_html(result.html)
    assert html.scripts == 0 and html.stylesheets == 0
    assert not re.search(r"(src|href)\s*=\s*\"(https?:|//)", text)
    assert "url(" not in text and "@import" not in text
    assert html.images and all(src.startswith("data:image/png;base64,") for src in html.images)
    from PIL import Image

    for src in html.images:
        Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))).verify()
    assert html.headings == [f"{i}{t}" for i, t in enumerate(SECTION_TITLES, start=1)]
    assert "@media print" in text and "@page" in text


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _render(browser, url, tmp_path, size="1280,2000"):
    shot = tmp_path / "shot.png"
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", f"--window-size={size}",
           "--enable-logging=stderr", "--v=0", url]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    console = [line for line in proc.stderr.splitlines() if ":CONSOLE" in line]
    return proc, shot, console


needs_browser = pytest.mark.skipif(_chromium() is None and not os.environ.get("CI"),
                                   reason="chromium is not installed (CI installs it and runs this)")


@needs_browser
def test_browser_renders_the_pack_without_console_errors(full_run, tmp_path):
    folder, result = full_run
    browser = _chromium()
    assert browser, "chromium must be installed in CI"
    proc, shot, console = _render(browser, result.html.resolve().as_uri(), tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert console == []
    from PIL import Image

    img = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert img.shape[0] >= 1000 and img.std() > 10, "the screenshot looks blank"


@needs_browser
def test_browser_console_check_catches_an_error(tmp_path):
    """The console check above can fail: a page that logs an error is caught."""
    page = tmp_path / "bad.html"
    page.write_text("<html><body><p>x</p><script>console.error('deliberate');</script></body></html>")
    proc, shot, console = _render(_chromium(), page.as_uri(), tmp_path, size="400,300")
    assert any("deliberate" in line for line in console)


# --------------------------------------------------------------------------- failing section

@pytest.mark.parametrize("which", ["short_run", "skipped_run"])
def test_skipped_backtest_still_builds_and_says_why(which, request):
    folder, result = request.getfixturevalue(which)
    s = json.loads((folder / "summary.json").read_text())
    reason = s["backtest"]["skipped"]
    assert result.html.is_file() and result.pdf.is_file()
    manifest = json.loads(result.manifest.read_text())
    assert [x["title"] for x in manifest["sections"] if x["absent"]] == ["Out-of-sample backtest"]
    html = parse_html(result.html)
    assert reason in " ".join(html.sections["s7"].split())
    pages = pdf_pages_text(result.pdf)
    assert any("7 Out-of-sample backtest" in p and reason[:40] in p for p in pages)
    # the verdict cannot claim survival: criterion 3 is not assessed and says so
    verdict = " ".join(html.sections["s1"].split())
    assert "NOT ASSESSED" in verdict and not verdict.split("noise?")[1].strip().startswith("Yes")
    statuses = [c["attrs"]["data-status"] for c in html.cells
                if c["table"] == "verdict_criteria" and "data-status" in c["attrs"]]
    assert statuses.count("na") == 3


def test_missing_optional_sections_still_build(tmp_path):
    """A run with only the rules (no resampling extras, no tables, no manifest)."""
    folder = make_fixture.make(tmp_path / "run", backtest=False)
    s = json.loads((folder / "summary.json").read_text())
    for key in ("frontiers", "sweep", "attribution", "self_check"):
        s.pop(key)
    (folder / "summary.json").write_text(json.dumps(s))
    (folder / "manifest.json").unlink()
    shutil.rmtree(folder / "tables")
    result = reports.build_pack(folder)
    assert set(result.absent) >= {"Frontiers", "How much history would it need", "Engine self-check",
                                  "Out-of-sample backtest"}
    html = parse_html(result.html)
    assert "no manifest.json" in html.sections["s10"]


# --------------------------------------------------------------------------- verdict logic

def _with(summary_path, edit):
    s = json.loads(summary_path.read_text())
    edit(s)
    summary_path.write_text(json.dumps(s))


def test_verdict_passes_only_when_every_criterion_passes(tmp_path):
    folder = make_fixture.make(tmp_path / "run", backtest=True)

    def good(s):
        for w in s["rules"]["proposed"]["weights"].values():
            w["p5"], w["p95"] = w["p50"] - 0.05, w["p50"] + 0.05
        s["rules"]["proposed"]["population"]["prob_beats_equal_weight_ceq"] = 0.75
        bt = s["rules"]["proposed"]["backtest"]
        bt.update(sharpe_diff=0.05, sharpe_diff_p_lw=0.01, dsr=0.97)

    _with(folder / "summary.json", good)
    html = parse_html(reports.build_pack(folder).html)
    statuses = [c["attrs"]["data-status"] for c in html.cells
                if c["table"] == "verdict_criteria" and "data-status" in c["attrs"]]
    assert statuses == ["pass"] * 5
    assert "Yes." in html.sections["s1"]

    _with(folder / "summary.json", lambda s: s["rules"]["proposed"]["backtest"].update(dsr=0.90))
    html = parse_html(reports.build_pack(folder).html)
    statuses = [c["attrs"]["data-status"] for c in html.cells
                if c["table"] == "verdict_criteria" and "data-status" in c["attrs"]]
    assert statuses == ["pass"] * 4 + ["fail"]
    assert "No." in html.sections["s1"]


def test_verdict_thresholds_default_to_the_study_file_defaults(tmp_path):
    from noiseproof.studyfile import VerdictSettings
    from reports._verdict import DEFAULTS

    assert DEFAULTS == {k: getattr(VerdictSettings(), k) for k in DEFAULTS}
    folder = make_fixture.make(tmp_path / "run", backtest=False)
    _with(folder / "summary.json", lambda s: s.pop("verdict_settings"))
    m = json.loads((folder / "manifest.json").read_text())
    m["study_text"] = m["study_text"].replace("max_band_width = 0.3", "max_band_width = 0.2")
    (folder / "manifest.json").write_text(json.dumps(m))
    html = parse_html(reports.build_pack(folder).html)
    verdict = " ".join(html.sections["s1"].split())
    assert "at most 20.0%" in verdict                                 # from the study text
    assert "min_prob_beats_equal_weight = 0.500 (default)" in verdict  # named as a default


def test_verdict_answers_against_the_policy_with_the_transition_cost(full_run):
    """The study holds 'held' (a fixed rule): the verdict page answers both questions, and
    its policy criteria agree with the runner's own assessment in summary.json."""
    folder, result = full_run
    s = json.loads((folder / "summary.json").read_text())
    html = parse_html(result.html)
    verdict = " ".join(html.sections["s1"].split())
    assert "Does the proposed allocation survive input noise?" in verdict
    assert "Is it better than the portfolio held today (the policy, 'held')" in verdict
    assert "Against the policy held today ('held'), the proposed allocation ('proposed')" in verdict
    tr = s["rules"]["proposed"]["transition"]
    assert "%.1f bp" % (tr["cost"] * 1e4) in verdict and "%.1f%%" % (100 * tr["turnover"]) in verdict
    mine = [c["attrs"]["data-status"] for c in html.cells
            if c["table"] == "verdict_policy_criteria" and "data-status" in c["attrs"]]
    theirs = {c["name"]: c["passed"] for c in s["verdict"]["against_policy"]["criteria"]}
    word = {True: "pass", False: "fail", None: "na"}
    assert mine[0] == word[theirs["prob_beats_policy_ceq"]]
    backtest = "fail" if "fail" in mine[1:3] else ("na" if "na" in mine[1:3] else "pass")
    assert backtest == word[theirs["backtest_sharpe_vs_policy"]]
    assert mine[3] == word[theirs["transition_pays_back"]]
    tables = {c["table"] for c in html.cells}
    assert {"verdict_transition", "backtest_tests_policy"} <= tables
    # the policy's weights stand beside the proposal in the allocation table
    held = [c["text"] for c in html.cells if c["table"] == "verdict_allocation"
            and c["attrs"].get("data-src", "").find('"held"') >= 0]
    assert "40.0%" in held and "60.0%" in held


def test_policy_names_the_proposed_rule(tmp_path):
    folder = make_fixture.make(tmp_path / "run", backtest=False)
    _with(folder / "summary.json", lambda s: s.__setitem__("policy", "min-var"))
    html = parse_html(reports.build_pack(folder).html)
    assert "('min-var')" in html.sections["s1"]


# --------------------------------------------------------------------------- command line, errors

def test_cli_pack_rebuilds_from_the_folder_alone(full_run, capsys):
    folder, result = full_run
    before = (folder / "summary.json").read_bytes()
    assert cli_main(["pack", str(folder)]) == 0
    assert "report.pdf" in capsys.readouterr().out
    assert (folder / "summary.json").read_bytes() == before
    assert not list(folder.glob(".pack-*"))


@pytest.mark.parametrize("case", ["missing", "file", "no-summary", "bad-json", "no-rules"])
def test_cli_pack_bad_run_folder_is_one_line_exit_2(case, tmp_path, capsys):
    target = tmp_path / "run"
    if case == "file":
        target.write_text("x")
    elif case != "missing":
        target.mkdir()
        if case == "bad-json":
            (target / "summary.json").write_text("{not json")
        elif case == "no-rules":
            (target / "summary.json").write_text(json.dumps({"schema": 1, "periods_per_year": 12}))
    assert cli_main(["pack", str(target)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("noiseproof: error: ") and str(target) in err
    with pytest.raises(DataError):
        reports.build_pack(target)


def test_a_failed_build_leaves_the_previous_pack_untouched(full_run, monkeypatch):
    folder, result = full_run
    before = result.pdf.read_bytes()

    def boom(*a, **k):
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(reports, "render_pdf", boom)
    with pytest.raises(RuntimeError):
        reports.build_pack(folder)
    assert result.pdf.read_bytes() == before
    assert not list(folder.glob(".pack-*"))


# --------------------------------------------------------------------------- figures as drawn

@pytest.fixture(scope="module")
def drawn_figures(tmp_path_factory):
    """Every matplotlib Figure of a full pack (hand-made run, 12 assets), captured as drawn."""
    from reports import _style

    figures = []
    original = _style.png

    def capture(fig, dpi=180):
        data = original(fig, dpi=dpi)
        figures.append(fig)
        return data

    mp = pytest.MonkeyPatch()
    mp.setattr(_style, "png", capture)
    try:
        folder = make_fixture.make(tmp_path_factory.mktemp("figs") / "run", backtest=True)
        s = json.loads((folder / "summary.json").read_text())
        # a rule with short positions: weights below zero must stay inside the axes
        for w in s["rules"]["min-var"]["weights"].values():
            w["p5"] -= 0.2
        (folder / "summary.json").write_text(json.dumps(s))
        reports.build_pack(folder)
    finally:
        mp.undo()
    return figures, s


def _boxes(labels, renderer):
    return [t.get_window_extent(renderer) for t in labels if t.get_visible() and t.get_text()]


def test_figures_label_axes_with_units_and_keep_labels_apart(drawn_figures):
    figures, _ = drawn_figures
    assert len(figures) >= 7
    for fig in figures:
        renderer = fig.canvas.get_renderer()
        for ax in fig.axes:
            xl, yl = ax.get_xlabel(), ax.get_ylabel()
            assert xl or yl or ax.get_shared_x_axes().get_siblings(ax) != [ax], "axes without a label"
            for label in (xl, yl):
                if re.search(r"expected return|volatility|Sharpe ratio|^CEQ|CEQ loss|cost drag", label):
                    assert "annualised" in label, label
            for boxes in (_boxes(ax.get_xticklabels(), renderer), _boxes(ax.get_yticklabels(), renderer)):
                for a, b in zip(boxes, boxes[1:]):
                    assert not a.overlaps(b), (fig, [t.get_text() for t in ax.get_yticklabels()])
        # legends and axes titles do not overlap each other's axes' tick labels
        texts = [t for ax in fig.axes for t in _boxes([ax._left_title, ax.xaxis.label], renderer)]
        for i, a in enumerate(texts):
            for b in texts[i + 1:]:
                assert not a.overlaps(b)


def test_weight_bands_keep_every_value_inside_the_axes(drawn_figures):
    figures, s = drawn_figures
    assets = s["data"]["assets"]
    bands = next(f for f in figures if any(ax.get_title(loc="left") == "min-var" for ax in f.axes))
    ax = next(a for a in bands.axes if a.get_title(loc="left") == "min-var")
    lo, hi = ax.get_xlim()
    values = [v for w in s["rules"]["min-var"]["weights"].values() for v in (w["p5"], w["p95"])]
    assert lo <= min(values) and max(values) <= hi
    names = [t.get_text() for t in bands.axes[0].get_yticklabels()]
    assert names == assets                                               # all 12 names shown
