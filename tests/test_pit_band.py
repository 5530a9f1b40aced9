"""The LOO-PIT uniformity test (a simultaneous band on the ECDF) and the quantile checks."""

from __future__ import annotations

import numpy as np
import pytest

from contenders.output.readings import band_method, band_text, pit_shape_text, quantile_misses, with_band_method
from contenders.statistics.checks import (QUANTILE_LEVELS, QuantileRow, band_limits, leaves_band, pit_shape,
                                         quantile_checks, uniformity_test)


@pytest.mark.parametrize("n, alpha", [(50, 0.05), (200, 0.01)])
def test_band_holds_uniform_samples_at_the_stated_rate(n, alpha):
    # Säilynoja, Bürkner & Vehtari (2022), "Graphical test for discrete uniformity and its
    # applications in goodness-of-fit evaluation and multiple sample comparison",
    # Statistics and Computing 32:32, section 2: the ECDF of n independent uniform
    # values stays inside the simultaneous band at every evaluation point with
    # probability 1 - alpha. Checked by simulation: 4,000 samples, Monte Carlo SE
    # sqrt(a (1 - a) / 4000); the optimised band may be a little conservative (discrete
    # counts), so the rate may lie above 1 - alpha by a little, never below.
    rng = np.random.default_rng(20261204)
    sims = 4000
    inside = np.mean([uniformity_test(rng.uniform(size=n), alpha)["inside"] for _ in range(sims)])
    se = np.sqrt(alpha * (1 - alpha) / sims)
    assert 1 - alpha - 3 * se <= inside <= 1 - alpha + 3 * se + 0.01, (inside, 1 - alpha, se)


def test_pointwise_limits_alone_would_not_hold_the_rate():
    # The band is wider than a pointwise 95 % binomial interval at the same points: at
    # the middle point the simultaneous limits lie outside the pointwise ones
    # (scipy.stats.binom.interval, common practice, no source).
    from scipy.stats import binom

    z, lower, upper = band_limits(200, 0.95)
    mid = len(z) // 2
    lo, hi = binom.interval(0.95, 200, z[mid])
    assert lower[mid] < lo / 200 and upper[mid] > hi / 200
    assert len(z) == 99 and z[0] == pytest.approx(0.01) and z[-1] == pytest.approx(0.99)


def test_clearly_non_uniform_samples_leave_the_band_and_say_where():
    rng = np.random.default_rng(7)
    # too narrow predictions: LOO-PIT values pile up in both tails (a U shape)
    u_shape = rng.beta(0.4, 0.4, size=400)
    test = uniformity_test(u_shape, 0.01)
    assert test["inside"] is False and leaves_band(test)
    assert test["band"] == 0.99 and test["n"] == 400 and test["points"] == 99
    # a U shape puts the ECDF above the uniform at low values and below at high values
    assert test["above"] and test["above"][0][0] < 0.3
    assert test["below"] and test["below"][-1][1] > 0.7
    assert test["outside_points"] > 0 and test["largest_gap"] > 0
    assert band_text(test).startswith("above the 99 % band at LOO-PIT ")
    # predictions run high: values pile up low, the ECDF is above the uniform throughout
    low = uniformity_test(rng.beta(1, 2, size=400), 0.01)
    assert low["inside"] is False and low["above"] and not low["below"]


def test_band_probability_follows_alpha():
    z, lo99, hi99 = band_limits(100, 0.99)
    _, lo90, hi90 = band_limits(100, 0.90)
    assert np.all(lo99 <= lo90) and np.all(hi99 >= hi90) and np.any(hi99 > hi90)
    sample = np.random.default_rng(3).beta(1.25, 1, size=100)
    assert uniformity_test(sample, 0.01)["band"] == 0.99
    assert uniformity_test(sample, 0.10)["band"] == pytest.approx(0.90)
    # the statistics keep the band's probability; the readings name the method from it
    test = uniformity_test(sample, 0.01)
    assert "method" not in test
    assert band_method(test) == ("simultaneous 99 % band of the LOO-PIT ECDF under uniformity "
                                 "(Säilynoja, Bürkner & Vehtari 2022)")
    worded = with_band_method(test)
    assert list(worded)[:3] == ["band", "n", "method"] and worded["method"] == band_method(test)
    assert {k: v for k, v in worded.items() if k != "method"} == test and with_band_method(None) is None


def test_uniform_sample_inside_the_band_has_no_text():
    test = uniformity_test(np.linspace(0.005, 0.995, 100))
    assert test["inside"] is True and test["above"] == [] and test["below"] == []
    assert test["largest_gap"] == 0.0 and band_text(test) == "" and not leaves_band(test)
    assert uniformity_test(np.array([0.5]))["inside"] is None


def test_quantile_checks_match_numpy_quantile():
    rng = np.random.default_rng(11)
    y = rng.gamma(2.0, 150.0, size=250)
    y_rep = rng.gamma(2.0, 150.0, size=(400, 250))
    rows = quantile_checks(y, y_rep)
    assert [r.level for r in rows] == list(QUANTILE_LEVELS) and len(rows) == 19
    for r in rows:
        q = r.level
        reps = np.quantile(y_rep, q, axis=1)   # NumPy's default (linear) quantile
        assert r.observed == pytest.approx(np.quantile(y, q), rel=1e-12)
        assert r.median == pytest.approx(np.quantile(reps, 0.5), rel=1e-12)
        assert (r.lower, r.upper) == pytest.approx(tuple(np.quantile(reps, [0.025, 0.975])), rel=1e-12)
        assert (r.lower50, r.upper50) == pytest.approx(tuple(np.quantile(reps, [0.25, 0.75])), rel=1e-12)
        assert r.share_above == pytest.approx(np.mean(reps >= np.quantile(y, q)))


def test_quantile_checks_name_the_tail_a_candidate_misses():
    rng = np.random.default_rng(12)
    y = rng.lognormal(6.0, 0.5, size=400)                           # a long upper tail
    y_rep = rng.normal(y.mean(), y.std(), size=(300, 400))          # symmetric replicates
    rows = quantile_checks(y, y_rep)
    top = rows[-1]
    assert top.level == 0.95 and top.miss == "replicates low"   # the replicates' 95 % is too low
    # a normal with the same mean and SD reaches further down than the lognormal: its 5 %
    # quantile is too low as well, while the body (the median) lies too high
    assert rows[0].miss == "replicates low"
    assert rows[9].level == 0.5 and rows[9].miss == "replicates high"
    misses = quantile_misses(rows)
    assert misses[0].startswith("5") and misses[0].endswith("(replicates low)")
    assert any(m.endswith("(replicates high)") for m in misses)
    assert misses[-1].endswith("95 % (replicates low)")
    inside = QuantileRow(0.5, 1.0, 1.0, 0.9, 1.1, 0.95, 1.05, 0.5, "")
    assert quantile_misses([inside]) == []


def test_a_loo_pit_outside_the_band_is_named_in_the_misses():
    from types import SimpleNamespace

    from contenders.output.readings import _misfit
    from contenders.output.tables import misfits
    from contenders.statistics.checks import PredictiveChecks

    pit = np.random.default_rng(5).beta(0.4, 0.4, size=300)
    bad = PredictiveChecks([], {}, pit, uniformity_test(pit, 0.01), [])
    assert misfits(bad, 0.01) == ["LOO-PIT calibration"]
    (line,) = _misfit(SimpleNamespace(checks=bad), 0.01)
    assert line.startswith("calibration (LOO-PIT ECDF above the 99 % band at LOO-PIT 0.")
    assert "below it at LOO-PIT" in line
    good_pit = np.linspace(0.005, 0.995, 300)
    good = PredictiveChecks([], {}, good_pit, uniformity_test(good_pit, 0.01), [])
    assert misfits(good, 0.01) == [] and _misfit(SimpleNamespace(checks=good), 0.01) == []


def test_pit_alpha_is_read_from_the_configuration_and_checked(tmp_path):
    from contenders.inputs.config import from_mapping
    from contenders.errors import UserError
    from contenders.pipeline.store import TRIAL_SETTINGS

    cfg = from_mapping({"checks": {"pit_alpha": 0.05}}, tmp_path)
    assert cfg.pit_alpha == 0.05
    assert from_mapping({}, tmp_path).pit_alpha == 0.01
    assert "pit_alpha" in TRIAL_SETTINGS    # a new level recomputes the stored checks
    with pytest.raises(UserError, match="pit_alpha"):
        from_mapping({"checks": {"pit_alpha": 1.5}}, tmp_path)


def test_pit_shape_calls_spread_and_shift_beyond_two_standard_errors():
    # Closed forms, checked against SciPy: under uniformity the share of LOO-PIT values
    # below 0.05 or above 0.95 is Binomial(n, 0.1) / n, SD sqrt(0.1 * 0.9 / n), and their
    # mean has SD sqrt(1 / 12 / n) (the uniform law's variance 1/12). Gneiting,
    # Balabdaoui & Raftery (2007), JRSS B 69(2), section 3: too many values in the outer
    # tenths means predictions too narrow, too few too wide, a low mean predictions that
    # run high. The two-SE rule is common practice, no source.
    from scipy import stats

    n = 400
    even = (np.arange(n) + 0.5) / n
    shape = pit_shape(even)
    assert shape["tails"] == pytest.approx(0.1) and shape["mean"] == pytest.approx(0.5)
    assert shape["tail_se"] == pytest.approx(stats.binom(n, 0.1).std() / n)
    assert shape["mean_se"] == pytest.approx(stats.uniform.std() / np.sqrt(n))
    assert (shape["spread"], shape["centre"]) == ("", "") and pit_shape_text(shape) == ""
    # n = 400: tail SE 0.015, so 14 % in the outer tenths is beyond 0.1 + 2 SE = 0.13 and
    # 5 % below 0.07; the middle values are symmetric, so the mean stays 0.5
    def with_tails(k):
        return np.r_[np.full(k // 2, 0.02), np.full(k // 2, 0.98), np.linspace(0.1, 0.9, n - k)]

    narrow, wide = pit_shape(with_tails(56)), pit_shape(with_tails(20))
    assert (narrow["spread"], narrow["centre"]) == ("narrow", "")
    assert narrow["tails"] == pytest.approx(0.14)
    assert pit_shape_text(narrow).startswith("14 % of observations fall in the outer tenth")
    assert (wide["spread"], wide["centre"]) == ("wide", "")
    assert pit_shape_text(wide).startswith("only 5 % of observations")
    # u**2 of uniform u has mean 1/3, sqrt(u) mean 2/3: both far beyond 2 SE (0.029)
    assert pit_shape(even ** 2)["centre"] == "high"
    assert pit_shape(np.sqrt(even))["centre"] == "low"
    assert "average 0.67 (0.5 expected)" in pit_shape_text(pit_shape(np.sqrt(even)))
    # fewer than ten finite values: no reading
    assert pit_shape(np.r_[even[:9], np.nan, np.inf]) is None and pit_shape_text(None) == ""
