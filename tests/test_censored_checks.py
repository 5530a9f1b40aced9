"""Predictive checks under censoring (contenders.statistics.censored_checks): replicates
censored like the data and the randomised LOO-PIT, checked against exact values and
by simulation from a known Weibull process (SciPy's weibull_min as the reference
distribution)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from contenders.statistics.censored_checks import censor_like_the_data, censoring_time_law, randomised_pit
from contenders.statistics.checks import predictive_checks


def test_censoring_time_law_is_the_reverse_kaplan_meier_by_hand():
    # exact computation: censorings at 1, 3, 5 with 5, 3 and 1 values at risk:
    # S = 4/5, 4/5 * 2/3, 0 (Kaplan & Meier 1958, JASA 53, 457-481, the product-limit form)
    y = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    cens = np.array([1, 0, 1, 0, 1])
    points, mass, beyond = censoring_time_law(y, cens)
    np.testing.assert_array_equal(points, [1.0, 3.0, 5.0])
    np.testing.assert_allclose(mass, [0.2, 0.8 / 3, 1.6 / 3], rtol=1e-14)
    assert beyond == 0.0


def test_observed_values_get_censoring_times_above_them():
    y = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    cens = np.array([1, 0, 1, 0, 1])
    y_rep = np.full((20_000, 5), 100.0)
    out = censor_like_the_data(y, cens, y_rep, np.random.default_rng(3))
    assert set(np.unique(out[:, 3])) == {5.0}                 # only 5 lies above 4
    share_3 = np.mean(out[:, 1] == 3.0)                       # given C > 2: 3 with (0.8/3) / 0.8 = 1/3
    assert set(np.unique(out[:, 1])) == {3.0, 5.0}
    assert abs(share_3 - 1 / 3) < 4 * np.sqrt(1 / 3 * 2 / 3 / 20_000)
    np.testing.assert_array_equal(out[:, [0, 2, 4]], y_rep[:, [0, 2, 4]])   # censored ones untouched


def _weibull_study(n=800, seed=1):
    """Weibull lifetimes (shape 1.8, scale 1500) watched for a uniform 800 to 3,200
    hours each, right-censored at the end of the follow-up."""
    rng = np.random.default_rng(seed)
    law = stats.weibull_min(1.8, scale=1500.0)
    life = law.rvs(n, random_state=rng)
    follow = rng.uniform(800, 3200, n)
    cens = (life > follow).astype(int)
    return law, np.where(cens == 1, follow, life), cens, rng


def test_true_process_replicates_fit_once_censored_like_the_data():
    law, y, cens, rng = _weibull_study()
    draws = law.rvs((400, y.size), random_state=rng)
    # as the programs draw them: censored values' replicates censored at their point,
    # observed values' replicates uncensored
    y_rep = np.where(cens == 1, np.minimum(draws, y), draws)

    def p_values(reps):
        return {name: np.mean(f(reps, axis=1) >= f(y)) for name, f in
                (("max", np.max), ("sd", np.std), ("q95", lambda a, axis=None: np.quantile(a, 0.95, axis=axis)))}

    before = p_values(y_rep)
    after = p_values(censor_like_the_data(y, cens, y_rep, rng))
    assert all(p > 0.99 for p in before.values()), before        # the data look too short
    assert all(0.01 < p < 0.99 for p in after.values()), after


def test_randomised_pit_is_uniform_under_the_true_process():
    law, y, cens, rng = _weibull_study(n=3000, seed=2)
    # the PIT of each value under the true law: Pr(y_rep <= y) is 1 for a right-censored
    # value (its replicate is censored at y), Pr(y_rep < y) = F(y)
    at = np.where(cens == 1, 1.0, law.cdf(y))
    below = law.cdf(y)
    plain = stats.kstest(at, "uniform").pvalue
    fixed = stats.kstest(randomised_pit(at, below, cens, rng), "uniform").pvalue
    assert plain < 1e-6 and fixed > 0.01, (plain, fixed)


def test_predictive_checks_take_the_censoring():
    law, y, cens, rng = _weibull_study(n=300, seed=4)
    draws = law.rvs((200, y.size), random_state=rng)
    y_rep = np.where(cens == 1, np.minimum(draws, y), draws)
    log_lik = np.where(cens == 1, law.logsf(y), law.logpdf(y)) + rng.normal(0, 0.01, (200, y.size))
    plain = predictive_checks(y, y_rep, log_lik)
    fixed = predictive_checks(y, y_rep, log_lik, cens=cens, seed=5)
    p = {r.statistic: r.p_value for r in plain.rows}
    q = {r.statistic: r.p_value for r in fixed.rows}
    assert p["max"] > 0.99 and 0.01 < q["max"] < 0.99, (p["max"], q["max"])
    assert np.isfinite(fixed.loo_pit).all() and (fixed.loo_pit[cens == 1] < 1).all()
    again = predictive_checks(y, y_rep, log_lik, cens=cens, seed=5)
    np.testing.assert_array_equal(again.loo_pit, fixed.loo_pit)   # seeded: the same each run


def test_censored_loo_pit_survives_float32_replicates():
    # the engines keep y_rep as float32, so a censored value's replicate (its censoring
    # point) lies up to half a float32 step above or below y; the randomised PIT must
    # still be uniform: the simultaneous band (Saeilynoja, Buerkner & Vehtari 2022) holds
    law, y, cens, rng = _weibull_study(n=1500, seed=6)
    y = np.round(y, 1)
    draws = law.rvs((400, y.size), random_state=rng)
    y_rep = np.where(cens == 1, np.minimum(draws, y), draws).astype(np.float32).astype(float)
    log_lik = np.where(cens == 1, law.logsf(y), law.logpdf(y)) + rng.normal(0, 0.01, (400, y.size))
    assert (y_rep[:, cens == 1] > y[cens == 1]).any()          # the rounding this is about
    fixed = predictive_checks(y, y_rep, log_lik, cens=cens, seed=7)
    assert fixed.loo_pit_test["inside"], fixed.loo_pit_test
    assert stats.kstest(fixed.loo_pit, "uniform").pvalue > 0.01
