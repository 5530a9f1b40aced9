"""The HTML comparison report: built from a real run, parsed, and opened in a browser."""

from __future__ import annotations

import csv
import dataclasses
import os
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contenders.inputs.candidates import builtin_folder
from contenders.inputs.config import RunConfig
from contenders.output.report import SECTIONS, write_report
from contenders.output import figures
from contenders.output import format as fmt
from contenders.pipeline.runner import run

#: A candidate that breaks the contract: it declares no log_lik.
BROKEN = '''/*
[candidate]
label   = "{label}"
about   = "Normal with a fixed spread, without log_lik"
support = "real"
*/
data {{
  int<lower=0> N;
  vector[N] y;
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
}}
parameters {{
  real mu;
}}
model {{
  y[fit_idx] ~ normal(mu, 1);
}}
generated quantities {{
  array[N] real y_rep = normal_rng(rep_vector(mu, N), 1);
}}
'''


def _latencies(n: int = 120, seed: int = 20261201, column: str = "cue") -> pd.DataFrame:
    """Invented latencies: lognormal(6.3 + 0.25 * (cue == on), 0.45), seeded."""
    rng = np.random.default_rng(seed)
    cue = np.tile(["off", "on"], n // 2)
    return pd.DataFrame({"rt": rng.lognormal(6.3 + 0.25 * (cue == "on"), 0.45), column: cue})


def _setup(folder: Path, builtins: tuple[str, ...], broken_label: str, column: str) -> RunConfig:
    cands = folder / "candidates"
    cands.mkdir()
    for cid in builtins:
        shutil.copy(builtin_folder() / f"{cid}.stan", cands)
    (cands / "broken.stan").write_text(BROKEN.format(label=broken_label))
    _latencies(column=column).to_csv(folder / "rt.csv", index=False)
    # Short chains keep the test fast; the health thresholds are relaxed to match
    # (at the defaults, 2 x 200 draws rarely reach 100 effective draws per chain).
    return RunConfig(
        data=folder / "rt.csv", outcome="rt", predictors=(column,), conditions=(column,),
        candidates=cands, only=(*builtins, "broken"), out=folder / "out", chains=2, warmup=200,
        draws=200, prior_draws=200, engine="pystan", bounds={"mean": (150.0, 5000.0)},
        ess_per_chain_min=50.0, rhat_max=1.05, quiet=True,
    )


class Page(HTMLParser):
    """What the tests look at: elements, attributes, and text per section."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text_by_section: dict[str, list[str]] = {}
        self.all_text: list[str] = []
        self.scripts: list[str] = []
        self._section: str | None = None
        self._in_script = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "section":
            self._section = a.get("id")
            self.text_by_section.setdefault(self._section, [])
        if tag == "script":
            self._in_script = True
            self.scripts.append("")

    def handle_endtag(self, tag):
        if tag == "section":
            self._section = None
        if tag == "script":
            self._in_script = False

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data
            return
        self.all_text.append(data)
        if self._section:
            self.text_by_section[self._section].append(data)

    def text(self, section: str | None = None) -> str:
        parts = self.all_text if section is None else self.text_by_section[section]
        return " ".join(" ".join(parts).split())

    def find(self, tag: str, **attrs) -> list[dict]:
        return [a for t, a in self.tags if t == tag and all(a.get(k) == v for k, v in attrs.items())]


def _parse(path: Path) -> Page:
    page = Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def _csv(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def report(tmp_path_factory, programs):
    folder = tmp_path_factory.mktemp("report")
    cfg = _setup(folder, ("lognormal", "normal"), "Broken on purpose", "cue")
    result = run(cfg)
    path = write_report(result, cfg.out, command_line=["contenders", "run", "rt.csv", "--outcome", "rt"])
    return result, path


# --- the page from a real run ---------------------------------------------------------------

def test_report_has_every_section_candidate_and_embedded_figure(report):
    result, path = report
    page = _parse(path)
    assert [s["id"] for s in page.find("section")] == [anchor for anchor, _ in SECTIONS]
    statuses = {c.id: c.status for c in result.candidates}
    assert statuses["broken"] == "failed"
    assert statuses["lognormal"] == "ok" and statuses["normal"] == "ok", result.comparison.verdict

    ranking = page.text("ranking")
    for cid in ("lognormal", "normal", "broken"):
        assert cid in ranking
        assert f"candidate-{cid}" in [a.get("id") for a in page.find("article")]
    broken = next(c for c in result.candidates if c.id == "broken")
    assert "log_lik" in broken.reason
    assert broken.reason.splitlines()[0] in ranking
    assert "✗ failed" in ranking

    # The best candidate's elpd and SE as shown equal the comparison's numbers.
    best = result.comparison.rows[0]
    assert f"{fmt.fixed(best.elpd_loo, 1)} ({fmt.fixed(best.elpd_loo_se, 1)})" in ranking
    for sentence in result.comparison.verdict:
        assert " ".join(sentence.split()) in page.text("verdict")

    cautions = page.text("cautions")
    assert "does not make that candidate the true process" in cautions
    assert "they can never prove fit" in cautions
    assert "The modelling decision is yours" in cautions

    # Nothing is loaded from outside: no http(s) in any src or href, no external script.
    for tag, attrs in page.tags:
        for key in ("src", "href", "xlink:href", "data"):
            value = attrs.get(key) or ""
            assert not value.lower().startswith(("http://", "https://", "//")), (tag, key, value)
    assert [a for a in page.find("script") if "src" in a] == []
    assert page.find("link") == []

    # Every figure is inside the page: inline SVG or a data URI.
    plots = [a for t, a in page.tags if t == "figure" and "plot" in (a.get("class") or "").split()]
    assert len(plots) == 8     # elpd, prior, Pareto k, densities, quantiles, statistics, LOO-PIT, effects
    for img in page.find("img"):
        assert img["src"].startswith("data:image/png;base64,")
    n_svg = len(page.find("svg"))
    n_img = len(page.find("img"))
    n_lineups = min(3, len(result.comparison.preferred))
    assert n_lineups >= 1
    assert n_svg + n_img == 8 + 20 * n_lineups


def test_lineups_hide_the_observed_data_among_replicates(report):
    result, path = report
    page = _parse(path)
    y = result.design.y
    for k, cid in enumerate(result.comparison.preferred[:3]):
        box = page.find("div", id=f"lineup-{cid}")
        assert box, cid
        cells = [a for t, a in page.tags if t == "figure" and a.get("class") == "cell"]
        assert len(cells) == 20 * len(result.comparison.preferred[:3])
        answers = [a for a in page.find("p") if a.get("class") == "answer"]
        assert all("hidden" in a for a in answers)
        # The page's answer is where the observed data really are, with the same bins
        # in every panel: panel `answer` is the histogram of y, the others of replicates.
        cand = next(c for c in result.candidates if c.id == cid)
        lu = figures.lineup(y, cand.y_rep_sample, seed=result.config.seed + 7919 * (k + 1))
        assert answers[k]["data-answer"] == str(lu.answer)
        lo, hi = lu.edges[0], lu.edges[-1]
        assert np.array_equal(lu.counts[lu.answer - 1], np.histogram(np.clip(y, lo, hi), bins=lu.edges)[0])
        others = [c for i, c in enumerate(lu.counts) if i != lu.answer - 1]
        for row, counts in zip(lu.replicate_rows, others):
            assert np.array_equal(counts, np.histogram(np.clip(cand.y_rep_sample[row], lo, hi), bins=lu.edges)[0])
        assert sum(int(c.sum()) for c in lu.counts) == 20 * y.size
    assert "Buja, Cook, Hofmann, Lawrence, Lee, Swayne & Wickham (2009)" in page.text("checks")
    assert "4361–4383" in page.text("checks")
    assert "if you can spot the real data, the candidate misses something visible" in page.text("checks").lower()
    assert len(page.scripts) == 1 and "classList.add" in page.scripts[0]


def test_csv_tables_hold_the_numbers_of_the_run(report):
    result, path = report
    out = path.parent
    for name in ("ranking.csv", "prior_trial.csv", "sampler_health.csv", "parameters.csv",
                 "predictive_checks.csv", "grouped_checks.csv"):
        assert (out / name).is_file(), name
    assert not list(out.glob(".*.tmp")), "temporary files left behind"
    umask = os.umask(0o022)
    os.umask(umask)
    assert (path.stat().st_mode & 0o777) == 0o666 & ~umask     # readable like any file written here

    ranking = _csv(out / "ranking.csv")
    assert sorted(r["id"] for r in ranking) == sorted(c.id for c in result.candidates)
    by_id = {r["id"]: r for r in ranking}
    for row in result.comparison.rows:
        got = by_id[row.id]
        assert int(got["rank"]) == row.rank
        assert float(got["elpd"]) == pytest.approx(row.elpd_loo, rel=1e-12)
        assert float(got["stacking_weight"]) == pytest.approx(row.stacking_weight, rel=1e-12)
    assert by_id["broken"]["status"] == "failed" and by_id["broken"]["rank"] == ""
    assert "log_lik" in by_id["broken"]["reason"]

    checks = _csv(out / "predictive_checks.csv")
    ln = next(c for c in result.candidates if c.id == "lognormal")
    assert len(checks) == 2 * len(ln.checks.rows)
    first = next(r for r in checks if r["id"] == "lognormal" and r["statistic"] == "skewness")
    want = next(r for r in ln.checks.rows if r.statistic == "skewness")
    assert float(first["p_value"]) == want.p_value
    assert float(first["observed"]) == pytest.approx(want.observed, rel=1e-12)

    # the LOO-PIT band test and the quantile checks, number for number
    pit = {r["id"]: r for r in _csv(out / "loo_pit.csv")}
    test = ln.checks.loo_pit_test
    assert pit["lognormal"]["inside"] == ("true" if test["inside"] else "false")
    assert float(pit["lognormal"]["band"]) == 0.99 and int(pit["lognormal"]["points"]) == test["points"] == 99
    assert int(pit["lognormal"]["outside_points"]) == test["outside_points"]
    assert "ks_statistic" not in pit["lognormal"] and "p_value" not in pit["lognormal"]
    quantiles = [r for r in _csv(out / "quantiles.csv") if r["id"] == "lognormal"]
    assert [float(r["level"]) for r in quantiles] == [q.level for q in ln.checks.quantiles]
    q50 = next(r for r in quantiles if float(r["level"]) == 0.5)
    assert float(q50["observed"]) == pytest.approx(float(np.quantile(result.design.y, 0.5)), rel=1e-12)

    grouped = _csv(out / "grouped_checks.csv")
    assert {r["level"] for r in grouped} == {"off", "on"}
    assert len(grouped) == 2 * 2 * len(ln.checks.rows)

    params = _csv(out / "parameters.csv")
    sigma = next(r for r in params if r["id"] == "lognormal" and r["parameter"] == "sigma")
    # Known process: sigma = 0.45; the 5-95 % interval of a 120-point fit covers it.
    assert float(sigma["q05"]) < 0.45 < float(sigma["q95"])
    health = {r["id"]: r for r in _csv(out / "sampler_health.csv")}
    assert float(health["lognormal"]["rhat_max"]) == pytest.approx(ln.health.rhat_max)
    assert health["broken"]["rhat_max"] == ""
    prior = _csv(out / "prior_trial.csv")
    mean_row = next(r for r in prior if r["id"] == "lognormal" and r["statistic"] == "mean")
    assert (float(mean_row["bound_low"]), float(mean_row["bound_high"])) == (150.0, 5000.0)
    assert float(mean_row["share_inside_bound"]) == ln.prior.inside_each["mean"]
    # timing: each trial's sampling seconds, the waiting for a free core apart, and the
    # candidate's own total (once, not added to the parts again)
    files = {r["id"]: r for r in _csv(out / "candidate_files.csv")}
    s = ln.seconds
    assert float(files["lognormal"]["seconds_prior"]) == pytest.approx(s["prior"])
    assert float(files["lognormal"]["seconds_waiting"]) == pytest.approx(
        s["prior_wait"] + s["posterior_wait"] + s.get("refits_wait", 0.0))
    assert float(files["lognormal"]["seconds_total"]) == pytest.approx(s["total"])
    assert s["total"] >= s["prior"] + s["posterior"]


def test_report_writes_over_an_earlier_one_and_renders_without_optional_parts(report, tmp_path):
    result, _ = report
    # Every candidate failed: no prior, health, checks or out-of-sample results.
    failed = [dataclasses.replace(c, status="failed", reason="made to fail for this test", prior=None,
                                  health=None, checks=None, oos=None, y_rep_sample=None)
              for c in result.candidates]
    from contenders.output.readings import compare_candidates, compare_effects

    comparison = compare_candidates(failed)
    empty = dataclasses.replace(result, candidates=failed, comparison=comparison,
                                effects=compare_effects(failed, comparison.rows, result.config.seed))
    (tmp_path / "report.html").write_text("old")
    path = write_report(empty, tmp_path)
    page = _parse(path)
    assert [s["id"] for s in page.find("section")] == [anchor for anchor, _ in SECTIONS]
    assert "No candidate could be ranked" in page.text("verdict")
    assert page.find("svg") == [] and page.find("img") == []
    assert len(_csv(tmp_path / "ranking.csv")) == len(result.candidates)


# --- user text is escaped ----------------------------------------------------------------------

def test_labels_and_column_names_are_shown_as_text_not_markup(tmp_path, programs):
    label = "<script>alert(1)</script>"
    column = "<script>x</script>"
    cfg = _setup(tmp_path, ("lognormal",), label, column)
    result = run(cfg)
    # A ranked candidate with markup and mathtext in its label goes through every figure too.
    odd = "<marquee>moving</marquee> $x_1$ & co"
    result.candidates = [dataclasses.replace(c, label=odd) if c.id == "lognormal" else c
                         for c in result.candidates]
    path = write_report(result, cfg.out)
    html = path.read_text(encoding="utf-8")
    page = _parse(path)
    assert len(page.find("script")) == 1                 # ours only
    assert page.find("marquee") == []                    # the label's markup stayed text
    assert "<script>alert(1)" not in html and "<script>x" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;script&gt;x&lt;/script&gt;" in html
    text = page.text()
    assert label in text and column in text and odd in text
    assert f"By condition: {column}" in page.text("checks")
    grouped = _csv(cfg.out / "grouped_checks.csv")
    assert {r["condition"] for r in grouped} == {column}


# --- formatting -------------------------------------------------------------------------------

def test_number_formatting():
    assert fmt.num(1234.5678) == "1,235"      # thousands separated (changed with the report's number rules)
    assert fmt.num(0.012345) == "0.0123"
    assert fmt.num(-2.5e-6) == "−2.5 × 10⁻⁶"
    assert fmt.num(3.0e9) == "3 × 10⁹"
    assert fmt.num(float("nan")) == fmt.MISSING and fmt.num(None) == fmt.MISSING
    assert fmt.fixed(-0.04, 1) == "0.0" and fmt.fixed(-12.345, 1) == "−12.3"
    assert fmt.pvalue(0.0004) == "< 0.001" and fmt.pvalue(0.9996) == "> 0.999" and fmt.pvalue(0.5) == "0.500"
    assert fmt.share(0.755) == "76 %"
    assert fmt.seconds(75.4) == "1 min 15 s"
    assert fmt.raw(float("nan")) == "" and fmt.raw(float("inf")) == "inf" and fmt.raw(0.1) == "0.1"


def test_shared_scale_is_common_and_switches_to_log_for_orders_of_magnitude():
    rng = np.random.default_rng(3)
    narrow = rng.normal(10, 1, 1000)
    wide = rng.lognormal(5, 2, 1000)
    s = figures.shared_scale([narrow, narrow + 5], observed=11.0)
    assert s.kind == "linear"
    assert s.lo < np.quantile(narrow, 0.05) and s.hi > np.quantile(narrow + 5, 0.95)
    s = figures.shared_scale([narrow, wide], observed=11.0)
    assert s.kind == "log" and s.hi > np.quantile(wide, 0.95)
    s = figures.shared_scale([narrow, -wide, wide], observed=11.0)
    assert s.kind == "asinh" and s.lo < 0 < s.hi
    ticks = figures.nice_ticks(s)
    assert 0.0 in ticks and len(ticks) >= 3


# --- in a real browser -------------------------------------------------------------------------

def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    if os.geteuid() != 0 or not shutil.which("apt-get"):
        return None
    try:
        subprocess.run(["apt-get", "update", "-qq"], capture_output=True, timeout=300, check=True)
        subprocess.run(["apt-get", "install", "-y", "-qq", "chromium"], capture_output=True, timeout=600,
                       check=True, env={**os.environ, "DEBIAN_FRONTEND": "noninteractive"})
    except (subprocess.SubprocessError, OSError):
        return None
    return shutil.which("chromium")


CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def test_report_in_headless_chromium(report, tmp_path):
    result, path = report
    browser = _chromium()
    if browser is None:
        pytest.skip("chromium is not installed and could not be installed with apt-get")
    profile = tmp_path / "profile"
    shot = tmp_path / "page.png"
    subprocess.run([browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--screenshot={shot}",
                    "--window-size=1280,4000", path.resolve().as_uri()],
                   capture_output=True, timeout=180)
    assert shot.is_file() and shot.stat().st_size > 10_000
    from PIL import Image

    with Image.open(shot) as im:
        colours = im.convert("RGB").getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 50     # text, tables and figures, not a blank page

    # The same page with every lineup button pressed: the reveal script marks the panel.
    pressed = tmp_path / "pressed.html"
    pressed.write_text(path.read_text(encoding="utf-8").replace(
        "</body>", "<script>document.querySelectorAll('button.reveal').forEach(function (b) { b.click(); });"
                   "</script></body>"), encoding="utf-8")
    proc = subprocess.run([browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr",
                           "--v=0", "--dump-dom", pressed.resolve().as_uri()],
                          capture_output=True, text=True, timeout=180)
    dom = proc.stdout
    assert "Uncaught" not in proc.stderr, proc.stderr[-2000:]
    assert " ".join(result.comparison.verdict[0].split()) in " ".join(dom.replace("&amp;", "&").split())
    n_lineups = min(3, len(result.comparison.preferred))
    assert dom.count('class="cell observed"') == n_lineups
    assert dom.count("The observed data are panel") == n_lineups
    assert ' hidden=""' not in dom.split('id="checks"')[1].split("</section>")[0]
