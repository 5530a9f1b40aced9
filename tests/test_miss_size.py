"""How far off, not only whether: the miss of a test statistic (observed minus the nearest
end of the replicated 90 % interval), its share of the observed SD, the relevant size per
statistic ([checks] relevant) and the reading that separates "detectably off" from "off by
more than the relevant size"; checked against closed forms of the normal model."""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from contenders.cli import main
from contenders.output.readings import CHECK_READINGS, compare_candidates
from contenders.statistics.compare import Method, OutOfSample
from contenders.inputs.config import RunConfig, apply_flags, from_mapping, parse_flag
from contenders.errors import UserError
from contenders.output.format import miss as miss_text
from contenders.records import CandidateResult
from contenders.pipeline.store import TRIAL_SETTINGS
from contenders.statistics import features as st
from contenders.statistics.checks import PredictiveChecks, predictive_checks

PSIS = Method("psis", k_threshold=0.7)   # plain PSIS-LOO, no refit

HERE = Path(__file__).parent
Z95 = sps.norm.ppf(0.95)


# --- the pure functions ------------------------------------------------------------------

def test_miss_is_observed_minus_the_nearest_interval_end():
    assert st.miss(12.0, 5.0, 10.0) == 2.0
    assert st.miss(1.0, 5.0, 10.0) == -4.0
    assert st.miss(7.0, 5.0, 10.0) == 0.0
    assert st.miss(10.0, 5.0, 10.0) == 0.0          # an end belongs to the interval
    assert math.isnan(st.miss(float("nan"), 5.0, 10.0))
    # share of the SD only for statistics in the outcome's units
    assert st.miss_share(2.0, "mean", 40.0) == 0.05
    assert math.isnan(st.miss_share(0.1, "skewness", 40.0))
    assert math.isnan(st.miss_share(0.01, "below_300", 40.0))
    assert math.isnan(st.miss_share(2.0, "mean", 0.0))


@pytest.mark.parametrize("p, size, relevant, code", [
    (0.5, 0.0, None, "fits"),
    (0.0, 2.0, None, "detectable"),
    (1.0, -2.0, None, "detectable"),
    (0.0, 2.0, 10.0, "small"),
    (0.0, -12.0, 10.0, "relevant"),
    (0.0, 10.0, 10.0, "small"),                       # "more than" the relevant size
    (0.03, 12.0, 10.0, "possibly_relevant"),          # outside the interval, p not beyond 0.01
    (0.03, 12.0, None, "fits"),
    (0.0, float("nan"), 10.0, "detectable"),          # a detectable miss of unknown size
    (float("nan"), 1.0, 10.0, "unknown"),
])
def test_reading_codes(p, size, relevant, code):
    assert st.reading(p, size, relevant, 0.01) == code
    assert code in st.READING_CODES


def test_miss_text_in_each_unit():
    assert miss_text(12.345, 0.0412) == "+12.3 (0.041 SD)"
    assert miss_text(-2.0, -0.5) == "−2 (0.5 SD)"
    assert miss_text(0.0, 0.0) == "inside"
    assert miss_text(0.012, None, "share") == "+1.2 % points"
    assert miss_text(0.25, None, "none") == "+0.25"


def test_checks_use_the_configured_extreme_not_a_fixed_one():
    """A statistic with p near 0.03 is detectable at ppp_extreme 0.05, not at 0.01 (the
    list used a fixed 0.025-0.975 before)."""
    rng = np.random.default_rng(3)
    n, s = 50, 2000
    y = rng.normal(0.0, 1.0, n)
    y = (y - y.mean()) / y.std(ddof=1)
    # replicates whose mean is centred so that the observed mean 0 sits at p ~ 0.03
    shift = -sps.norm.ppf(0.97) / np.sqrt(n)
    y_rep = rng.normal(shift, 1.0, (s, n))
    log_lik = sps.norm.logpdf(y[None, :], shift, 1.0) * np.ones((s, 1))
    loose = predictive_checks(y, y_rep, log_lik, ppp_extreme=0.05)
    strict = predictive_checks(y, y_rep, log_lik, ppp_extreme=0.01)
    p_mean = next(r.p_value for r in loose.rows if r.statistic == "mean")
    assert 0.015 < p_mean < 0.045, p_mean
    assert "mean" in loose.extreme and "mean" not in strict.extreme


# --- closed forms of the normal model -----------------------------------------------------

def _quantile_se(q: float, density: float, s: int) -> float:
    """Monte Carlo SE of a sample quantile: sqrt(q (1 - q) / S) / f(x_q) (asymptotic
    normality of sample quantiles; Serfling 1980, Approximation Theorems of Mathematical
    Statistics, section 2.3.3)."""
    return math.sqrt(q * (1 - q) / s) / density


def test_known_variance_conjugate_prior_against_closed_form():
    """y_i ~ normal(mu, sigma) with sigma known and mu ~ normal(mu0, tau0): the posterior
    of mu is normal(mu_n, tau_n) with 1/tau_n^2 = 1/tau0^2 + n/sigma^2 and
    mu_n = (mu0/tau0^2 + n ybar/sigma^2) tau_n^2 (Gelman et al., Bayesian Data Analysis,
    3rd ed., 2013, section 2.5, eqs. 2.11-2.12), so the mean of n replicated
    observations is normal(mu_n, sqrt(tau_n^2 + sigma^2/n)). ppp of the sample mean,
    the 90 % interval and the miss from S exact posterior predictive draws, to 4 Monte
    Carlo SE (common practice, no source)."""
    rng = np.random.default_rng(20261204)
    n, sigma, mu0, tau0, s = 40, 1.0, 0.0, 0.1, 20000
    y = rng.normal(0.7, sigma, n)
    ybar = y.mean()
    prec = 1 / tau0**2 + n / sigma**2
    mu_n, tau_n2 = (mu0 / tau0**2 + n * ybar / sigma**2) / prec, 1 / prec
    scale = math.sqrt(tau_n2 + sigma**2 / n)
    mu = rng.normal(mu_n, math.sqrt(tau_n2), s)
    y_rep = rng.normal(mu[:, None], sigma, (s, n))
    rows = {r.statistic: r for r in st.summarise(st.compute(y_rep), st.compute(y))}
    row = rows["mean"]
    p_exact = sps.norm.sf(ybar, mu_n, scale)
    assert row.p_value == pytest.approx(p_exact, abs=4 * math.sqrt(p_exact * (1 - p_exact) / s) + 1e-4)
    assert p_exact < 0.01                                           # the case is detectable
    q05, q95 = mu_n - Z95 * scale, mu_n + Z95 * scale
    tol = 4 * _quantile_se(0.95, sps.norm.pdf(Z95) / scale, s)
    assert row.q05 == pytest.approx(q05, abs=tol)
    assert row.q95 == pytest.approx(q95, abs=tol)
    assert row.miss == pytest.approx(ybar - q95, abs=tol)
    assert row.miss > 0
    assert row.miss_share_sd == pytest.approx((ybar - q95) / y.std(ddof=1), abs=tol / y.std(ddof=1))


def test_noninformative_prior_mean_and_sd_against_closed_form():
    """y_i ~ normal(mu, sigma), p(mu, sigma^2) proportional to 1/sigma^2: sigma^2 | y is
    scaled inverse-chi^2(n - 1, s^2) and mu | sigma^2, y is normal(ybar, sigma^2/n)
    (Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, section 3.2). Then the mean of
    n replicated observations is ybar + s sqrt(2/n) t_{n-1}, and s_rep^2 / s^2 is
    F(n - 1, n - 1) (a ratio of two independent chi^2_{n-1}/(n-1)), so both ppp-values are
    1/2 and the 90 % intervals are t and F quantiles. To 4 Monte Carlo SE (common
    practice, no source)."""
    rng = np.random.default_rng(11)
    n, s = 30, 20000
    y = rng.normal(5.0, 2.0, n)
    ybar, sd = y.mean(), y.std(ddof=1)
    sigma2 = (n - 1) * sd**2 / rng.chisquare(n - 1, s)
    mu = rng.normal(ybar, np.sqrt(sigma2 / n))
    y_rep = rng.normal(mu[:, None], np.sqrt(sigma2)[:, None], (s, n))
    rows = {r.statistic: r for r in st.summarise(st.compute(y_rep), st.compute(y))}
    half_se = 4 * math.sqrt(0.25 / s)
    assert rows["mean"].p_value == pytest.approx(0.5, abs=half_se)
    assert rows["sd"].p_value == pytest.approx(0.5, abs=half_se)
    t = sps.t(n - 1, loc=ybar, scale=sd * math.sqrt(2 / n))
    tol = 4 * _quantile_se(0.95, t.pdf(t.ppf(0.95)), s)
    assert rows["mean"].q05 == pytest.approx(t.ppf(0.05), abs=tol)
    assert rows["mean"].q95 == pytest.approx(t.ppf(0.95), abs=tol)
    f = sps.f(n - 1, n - 1)
    for q in (0.05, 0.95):
        x = sd * math.sqrt(f.ppf(q))
        # density of s_rep at x: f_F(x^2/s^2) * 2x/s^2
        dens = f.pdf(f.ppf(q)) * 2 * x / sd**2
        assert getattr(rows["sd"], f"q{round(100 * q):02d}") == pytest.approx(x, abs=4 * _quantile_se(q, dens, s))
    assert rows["mean"].miss == 0.0 and rows["sd"].miss == 0.0
    assert st.read_rows([rows["mean"], rows["sd"]], 0.01) == ["fits", "fits"]


# --- large N: detectable, not relevant ----------------------------------------------------

def _one_candidate(rows, label="Normal") -> CandidateResult:
    r = CandidateResult("normal", label, "", "real", "ok", "")
    pw = np.full(100, -1.0)
    r.oos = OutOfSample(float(pw.sum()), 1.0, 2.0, pw, np.zeros(100), 0.7, PSIS, elpd_mcse=0.1, n_samples=4000)
    r.checks = PredictiveChecks(rows, {}, np.full(100, 0.5), {"p_value": 0.5}, [])
    return r


def test_large_n_tiny_discrepancy_is_detectable_but_not_relevant():
    """N = 20,000 observations; every replicated dataset comes from a normal whose mean is
    0.05 below the observed mean (0.05 observed SD: a known, tiny discrepancy), with the
    observed SD. The replicated mean is then normal(ybar - 0.05, s/sqrt(N)) (sum of
    independent normals; common practice, no source), so its 90 % interval ends at
    ybar - 0.05 + 1.645 s/sqrt(N) and the miss is 0.05 - 1.645 s/sqrt(N) = 0.038 SD:
    detectable (p essentially 0), but far below a relevant size of 0.5."""
    rng = np.random.default_rng(20000)
    n, s, delta = 20000, 400, 0.05
    y = rng.normal(0.0, 1.0, n)
    ybar, sd = y.mean(), y.std(ddof=1)
    y_rep = rng.normal(ybar - delta * sd, sd, (s, n)).astype(np.float32)
    rows = st.summarise(st.compute(y_rep), st.compute(y))
    mean = next(r for r in rows if r.statistic == "mean")
    exact = delta * sd - Z95 * sd / math.sqrt(n)
    assert mean.p_value == 0.0
    assert mean.miss == pytest.approx(exact, abs=4 * _quantile_se(0.95, sps.norm.pdf(Z95) * math.sqrt(n) / sd, s))
    assert mean.miss_share_sd == pytest.approx(exact / sd, rel=0.1)
    assert st.reading(mean.p_value, mean.miss, None) == "detectable"
    assert st.reading(mean.p_value, mean.miss, 0.5) == "small"
    assert st.reading(mean.p_value, mean.miss, 0.01) == "relevant"

    # the verdict: without relevant sizes the tiny miss is named, with its size, and a
    # sentence says no sizes are set; with mean = 0.5 it is left out and counted
    plain = compare_candidates([_one_candidate(rows)], seed=1)
    text = " ".join(plain.verdict)
    assert "misses features of the data (mean" in text
    assert re.search(r"mean \(observed -?[0-9.]+, 0\.0[34]\d* or 0\.0[34]\d* SD above the replicated 90 % "
                     r"interval; p < 0\.001\)", text), text
    assert "No relevant sizes are set ([checks] relevant)" in text
    judged = compare_candidates([_one_candidate(rows)], seed=1, relevant={"mean": 0.5})
    named = [m for m in judged.lead if m.startswith("But ")]
    assert not named or "(mean" not in named[0], judged.lead
    text = " ".join(judged.verdict)
    assert "No relevant sizes are set" not in text
    assert "named only when larger than that size" in text
    assert "detectable but smaller miss" in text
    # a relevant size smaller than the miss names it again
    strict = " ".join(compare_candidates([_one_candidate(rows)], seed=1, relevant={"mean": 0.01}).lead)
    assert "(mean" in strict


# --- configuration --------------------------------------------------------------------------

def test_relevant_sizes_from_toml_and_flag():
    cfg = from_mapping({"checks": {"relevant": {"mean": 10, "min": 50.5}}}, Path("."))
    assert cfg.relevant == {"mean": 10.0, "min": 50.5}
    cfg = apply_flags(RunConfig(thresholds=(300.0,)), {"relevant": parse_flag("relevant", "mean=10,below_300=0.02")})
    assert cfg.relevant == {"mean": 10.0, "below_300": 0.02}
    with pytest.raises(UserError, match="'meen' names no statistic; the statistics are: max, mean, min"):
        from_mapping({"checks": {"relevant": {"meen": 10}}}, Path("."))
    with pytest.raises(UserError, match="below_300"):
        from_mapping({"checks": {"relevant": {"below_300": 0.01}}}, Path("."))   # no such threshold
    for bad in (-1, 0, "ten", float("inf"), True):
        with pytest.raises(UserError, match="must be a positive number"):
            from_mapping({"checks": {"relevant": {"mean": bad}}}, Path("."))
    with pytest.raises(UserError, match="--relevant must look like"):
        parse_flag("relevant", "mean:10")


def test_relevant_sizes_do_not_enter_the_trials_key():
    # readings are made at report time, so changing a relevant size refits nothing and
    # recomputes no trial result; the extreme list follows ppp_extreme, so that does
    assert "relevant" not in TRIAL_SETTINGS
    assert "ppp_extreme" in TRIAL_SETTINGS


def test_unknown_statistic_exits_2_with_the_list(tmp_path, capsys):
    data = tmp_path / "d.csv"
    pd.DataFrame({"y": [1.0, 2.0, 3.0]}).to_csv(data, index=False)
    out = tmp_path / "out"
    code = main(["run", str(data), "--outcome", "y", "--relevant", "meen=10", "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert "'meen' names no statistic" in err and "mean, min, q05, q50, q95, sd, skewness" in err
    assert not out.exists()
    cfg = tmp_path / "c.toml"
    cfg.write_text('[data]\nfile = "d.csv"\noutcome = "y"\n[checks]\nrelevant = { mean = -2.0 }\n')
    assert main(["run", "--config", str(cfg), "--out", str(out)]) == 2
    assert "must be a positive number" in capsys.readouterr().err
    assert not out.exists()


# --- end to end with Stan: the conjugate candidate, its summary, CSV files and report -------

def test_run_reports_miss_and_reading_against_closed_form(tmp_path):
    """The conjugate normal candidate (tests/candidates/conjugate: mu ~ normal(0, tau0),
    y ~ normal(mu, 1)) fitted by Stan; the replicated mean against the closed form of
    Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, section 2.5 (as in the test
    above), to 4 Monte Carlo SE of 1,000 replicates (common practice, no source). Then
    the same run with relevant sizes: nothing is sampled again, and the tables, CSV
    files, summary.json and verdict carry the miss and the reading."""
    rng = np.random.default_rng(8)
    n, tau0 = 40, 0.05
    y = rng.normal(0.7, 1.0, n)
    arm = np.where(np.arange(n) % 2 == 0, "a", "b")
    pd.DataFrame({"y": y, "arm": arm}).to_csv(tmp_path / "c.csv", index=False)
    base = RunConfig(data=tmp_path / "c.csv", outcome="y", candidates=HERE / "candidates" / "conjugate",
                     out=tmp_path / "o", chains=4, warmup=300, draws=1000, prior_draws=100, engine="pystan",
                     jobs=1, conditions=("arm",), quiet=True,
                     hyperparameters={"normal_known_sd": {"prior_sd": tau0}})
    from contenders.pipeline.runner import run

    first = run(base)
    c = first.candidates[0]
    assert c.status == "ok", c.reason
    row = next(r for r in c.checks.rows if r.statistic == "mean")
    prec = 1 / tau0**2 + n
    mu_n = n * y.mean() / prec
    scale = math.sqrt(1 / prec + 1 / n)
    s = 1000
    p_exact = sps.norm.sf(y.mean(), mu_n, scale)
    assert p_exact < 0.002                                    # the case: clearly detectable
    assert row.p_value == pytest.approx(p_exact, abs=4 * math.sqrt(p_exact / s) + 1e-3)
    q95 = mu_n + Z95 * scale
    tol = 4 * _quantile_se(0.95, sps.norm.pdf(Z95) / scale, s)
    assert row.q95 == pytest.approx(q95, abs=tol)
    assert row.miss == pytest.approx(y.mean() - q95, abs=tol)
    assert 0.15 < y.mean() - q95 < 0.3                        # the case: a miss of about 0.2

    out = tmp_path / "o"
    summary = json.loads((out / "summary.json").read_text())
    entry = summary["candidates"][0]["ppc"]["mean"]
    assert entry["miss"] == pytest.approx(row.miss) and entry["reading"] == "detectable"
    assert entry["relevant"] is None and summary["checks"]["relevant"] == {}
    assert "No relevant sizes are set" in summary["verdict"]
    assert "mean (observed" in summary["verdict"]
    assert set(summary["candidates"][0]["ppc_grouped"]["arm"]["a"]["mean"]) >= {"miss", "miss_share_sd", "reading"}

    # relevant sizes: the miss (about 0.2) is below 0.5, so it is detectable but small
    second = run(base.with_(relevant={"mean": 0.5}))
    assert second.fits_sampled == 0
    from contenders.output.report import write_report

    write_report(second, out)
    summary = json.loads((out / "summary.json").read_text())
    entry = summary["candidates"][0]["ppc"]["mean"]
    assert entry["reading"] == "small" and entry["relevant"] == 0.5
    assert "named only when larger than that size" in summary["verdict"]
    assert "mean (observed" not in summary["verdict"]
    with open(out / "predictive_checks.csv", newline="") as fh:
        rows = {r["statistic"]: r for r in csv.DictReader(fh)}
    assert float(rows["mean"]["miss"]) == pytest.approx(row.miss)
    assert rows["mean"]["reading"] == "small" and float(rows["mean"]["relevant"]) == 0.5
    assert float(rows["mean"]["miss_share_sd"]) == pytest.approx(row.miss / y.std(ddof=1))
    with open(out / "grouped_checks.csv", newline="") as fh:
        grouped = list(csv.DictReader(fh))
    assert {"miss", "miss_share_sd", "relevant", "reading"} <= set(grouped[0])
    html = (out / "report.html").read_text()
    assert "Miss beyond the interval (share of SD)" in html
    assert CHECK_READINGS["small"] + " (0.5)" in html
    assert "Relevant sizes set ([checks] relevant): mean = 0.5" in html
    assert "miss +" in html                                   # under the p-value in the matrix
