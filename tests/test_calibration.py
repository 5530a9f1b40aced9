"""Simulation-based calibration (statistics/calibration.py, pipeline/calibration.py and
``contenders calibrate``).

References: Talts, Betancourt, Simpson, Vehtari & Gelman (2018), "Validating Bayesian
inference algorithms with simulation-based calibration", arXiv:1804.06788 (Theorem 1:
with exact posterior draws the rank of the true value is uniform on 0..L); Säilynoja,
Bürkner & Vehtari (2022), "Graphical test for discrete uniformity and its applications
in goodness-of-fit evaluation and multiple sample comparison", Statistics and
Computing 32, 32 (the simultaneous ECDF band)."""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.stats as sps

from contenders.inputs.candidates import builtin_folder
from contenders.cli import main
from contenders.output.readings import calibration_reason, word_calibration
from contenders.statistics.calibration import (Calibration, chi_square_uniformity, ecdf_band, ecdf_of_ranks, judge,
                                           rank_of)

HERE = Path(__file__).parent


# --- the statistics, against closed forms and SciPy -----------------------------------------

def _conjugate_study(rng, sims: int, kept: int, width: float) -> tuple[np.ndarray, dict]:
    """mu ~ normal(0, 1), y_1..y_10 ~ normal(mu, 1): the exact posterior is normal with
    precision 1 + 10 and mean sum(y) / 11 (Gelman et al., Bayesian Data Analysis, 3rd ed.,
    2013, section 2.5). ``width`` scales the posterior SD used for the draws (1: exact)."""
    theta = rng.normal(0.0, 1.0, sims)
    kept_by = {}
    for s in range(sims):
        y = rng.normal(theta[s], 1.0, 10)
        kept_by[s] = rng.normal(y.sum() / 11, width / np.sqrt(11), (kept, 1))
    return theta[:, None], kept_by


def test_exact_posterior_draws_pass_and_too_narrow_ones_fail():
    """Exact conjugate posteriors give uniform ranks (Talts et al. 2018, Theorem 1), so
    the verdict passes; posteriors half as wide as they should be give ranks piled at
    both ends, and the verdict fails with a tiny chi-square p-value."""
    rng = np.random.default_rng(2)
    theta, kept_by = _conjugate_study(rng, 200, 99, 1.0)
    good = judge(Calibration("exact", "exact", "", simulations=200, kept_draws=99), theta, kept_by, ["mu"], 1)
    theta, kept_by = _conjugate_study(rng, 200, 99, 0.5)
    bad = judge(Calibration("narrow", "narrow", "", simulations=200, kept_draws=99), theta, kept_by, ["mu"], 1)
    print("exact p", good.parameters[0].p_value, "narrow p", bad.parameters[0].p_value)
    assert good.status == "passed" and good.parameters[0].p_value > 0.05 and not good.parameters[0].outside_band
    assert bad.status == "failed" and bad.parameters[0].p_value < 1e-6 and bad.parameters[0].outside_band
    counts = bad.parameters[0].counts
    assert counts[0] + counts[-1] > 4 * sum(counts) / len(counts)   # the U shape of too narrow posteriors
    # the statistics leave the words to the readings, which name the counts and p-values above
    assert good.reason == "" and bad.reason == ""
    assert calibration_reason(good) == ("no departure from uniform ranks found in 200 simulations; this cannot "
                                        "prove the program right, and small errors need more simulations to show")
    words = calibration_reason(bad)
    assert words.startswith(f"the ranks of mu are not uniform (smallest chi-square p = "
                            f"{bad.parameters[0].p_value:.2g}): fits of the program's own simulated data")
    assert "sampler problems" not in words
    bad.unhealthy = 3
    assert calibration_reason(bad).endswith("; some fits also had sampler problems, which can cause this too")


def test_too_few_or_no_ranked_simulations_give_no_verdict():
    """Below MIN_RANKED (10) ranked simulations the verdict is inconclusive, whatever the
    ranks (our own rule, no source); with none it is inconclusive without any test."""
    rng = np.random.default_rng(4)
    theta, kept_by = _conjugate_study(rng, 6, 99, 1.0)
    few = judge(Calibration("few", "few", "", simulations=6, kept_draws=99), theta, kept_by, ["mu"], 1)
    assert few.status == "inconclusive" and few.ranked == 6 and len(few.parameters) == 1
    assert calibration_reason(few) == ("only 6 simulated datasets gave ranks (at least 10 are needed for a "
                                       "verdict); run more simulations")
    none = word_calibration(judge(Calibration("none", "none", "", simulations=6), theta, {}, ["mu"], 1))
    assert none.status == "inconclusive" and none.ranked == 0 and none.parameters == []
    assert none.reason == "no simulated dataset could be fitted; see the counts below"


def test_simulations_without_ranks_are_records_worded_in_calibration_json():
    """The record keeps each simulation without ranks as (number, kind, count or message);
    calibration.json lists them in the words the study always wrote."""
    from contenders.output.summary import calibration_dict
    from contenders.statistics.calibration import Unranked

    cal = Calibration("c", "c", "inconclusive", simulations=6,
                      not_fitted=[Unranked(2, "non_finite", non_finite=3),
                                  Unranked(4, "outside_support",
                                           message="1 outcome value(s) are zero or negative; this candidate needs y > 0")],
                      fit_failures=[Unranked(5, "fit_failed", message="c: sampling failed: boom\n  at line 20")])
    assert cal.not_fitted[0].non_finite == 3 and cal.fit_failures[0].kind == "fit_failed"
    d = json.loads(json.dumps(calibration_dict(cal)))
    assert d["not_fitted"] == ["simulation 2: 3 non-finite values",
                               "simulation 4: 1 outcome value(s) are zero or negative; this candidate needs y > 0"]
    assert d["fit_failures"] == ["simulation 5: c: sampling failed: boom"]


def test_rank_counts_draws_below_and_breaks_ties_at_random():
    rng = np.random.default_rng(0)
    draws = np.array([[1.0], [2.0], [2.0], [3.0]])
    assert rank_of(np.array([2.5]), draws, rng)[0] == 3
    assert {int(rank_of(np.array([2.0]), draws, rng)[0]) for _ in range(200)} == {1, 2, 3}


def test_chi_square_agrees_with_scipy_and_handles_unequal_bins():
    """With 100 possible ranks in 7 bins the widths differ (14 or 15 ranks); the expected
    counts must follow the widths. Reference: scipy.stats.chisquare on the same counts
    with expected counts computed here by brute force (common practice, no source)."""
    rng = np.random.default_rng(5)
    ranks = rng.integers(0, 100, 70)
    stat, p, counts, edges = chi_square_uniformity(ranks, 99, 7)
    width = np.diff(edges)
    assert sum(width) == 100 and set(width) <= {14, 15}
    brute = [int(((ranks >= lo) & (ranks < hi)).sum()) for lo, hi in zip(edges[:-1], edges[1:])]
    assert counts == brute
    ref = sps.chisquare(brute, 70 * width / 100)
    assert stat == pytest.approx(ref.statistic) and p == pytest.approx(ref.pvalue)


def test_simultaneous_ecdf_band_covers_uniform_ranks_at_its_level():
    """Ranks of exact posteriors are uniform on 0..L; the 95 % simultaneous band of
    their ECDF (Säilynoja et al. 2022, computed by ArviZ) must contain the whole ECDF in
    about 95 % of 1,000 simulated studies of 50 ranks each: within 3 binomial standard
    errors (common practice, no source). A pointwise band would cover far less."""
    rng = np.random.default_rng(11)
    z, lower, upper = ecdf_band(50, 99, 0.95)
    inside = [bool(np.all((f >= lower - 1e-12) & (f <= upper + 1e-12)))
              for f in (ecdf_of_ranks(rng.integers(0, 100, 50), 99, z) for _ in range(1000))]
    se = np.sqrt(0.95 * 0.05 / 1000)
    print("coverage", np.mean(inside))
    assert abs(np.mean(inside) - 0.95) < 3 * se


# --- the command on Stan programs -------------------------------------------------------------

def test_calibrate_passes_a_builtin_and_fails_a_program_whose_y_rep_scale_is_wrong(tmp_path, capsys):
    """The built-in normal and a copy whose y_rep uses 2 * sigma (its likelihood and
    log_lik use sigma), on the design of 16 invented observations with one predictor;
    40 simulations each. The built-in passes; the wrong copy fails on sigma, whose true
    values rank below nearly all posterior draws. A second run loads every fit from the
    fit store and gives the same ranks."""
    folder = tmp_path / "cands"
    folder.mkdir()
    shutil.copy(builtin_folder() / "normal.stan", folder)
    shutil.copy(HERE / "candidates" / "miscalibrated" / "normal_wrong_scale.stan", folder)
    rng = np.random.default_rng(3)
    pd.DataFrame({"y": rng.normal(500, 80, 16), "x": rng.normal(size=16)}).to_csv(tmp_path / "d.csv", index=False)
    out = tmp_path / "out"
    out.mkdir()
    # a posterior fit time as an earlier run would have recorded it, for the estimate
    (out / "summary.json").write_text(json.dumps({"candidates": [{"id": "normal", "seconds": {"posterior": 0.5}}]}))
    argv = ["calibrate", "normal", "normal_wrong_scale", "--data", str(tmp_path / "d.csv"), "--outcome", "y",
            "--predictors", "x", "--candidates", str(folder), "--out", str(out), "--chains", "2", "--warmup", "200",
            "--draws", "200", "--ess-per-chain-min", "50", "--rhat-max", "1.05", "--simulations", "40",
            "--engine", "pystan", "--jobs", "2", "--bounds", "mean=450:550"]
    t0 = time.perf_counter()
    assert main(argv) == 1                      # a candidate failed
    first = time.perf_counter() - t0
    printed = capsys.readouterr().out
    assert "2 candidate(s) x 40 simulated datasets = 80 fits" in printed
    assert "about 20 s judging by the posterior fits measured in" in printed   # 40 x 0.5 s x 2 / 2 workers
    result = json.loads((out / "calibration.json").read_text())
    by = {c["id"]: c for c in result["candidates"]}
    good, bad = by["normal"], by["normal_wrong_scale"]
    for c in (good, bad):
        print(c["id"], c["status"], c["ranked"], c["unhealthy"], c["fit_failures"], c["not_fitted"],
              [(q["parameter"], q["counts"], round(q["p_value"], 4), q["outside_band"]) for q in c["parameters"]])
    assert good["status"] == "passed" and good["ranked"] == 40 and not good["flagged"]
    # prior means spread over about 500 +- 160, so some simulated datasets fall outside the bound
    assert 0 < good["implausible"] < 40 and good["not_fitted"] == [] and good["fit_failures"] == []
    assert {q["parameter"] for q in good["parameters"]} == {"intercept", "coef[1]", "sigma"}
    assert all(q["p_value"] > good["level"] for q in good["parameters"])
    assert bad["status"] == "failed" and bad["flagged"] == ["sigma"]
    sigma = next(q for q in bad["parameters"] if q["parameter"] == "sigma")
    assert sigma["p_value"] < 1e-10 and sigma["outside_band"]
    assert np.mean(np.array(sigma["ranks"]) <= 5) > 0.8      # true sigma below nearly every draw
    # the study words each verdict from the readings (calibration.json keeps the words)
    assert good["reason"].startswith("no departure from uniform ranks found in 40 simulations")
    assert bad["reason"].startswith(f"the ranks of sigma are not uniform (smallest chi-square p = "
                                    f"{sigma['p_value']:.2g})")
    page = (out / "calibration.html").read_text()
    assert "fails calibration" in page and "no problem found" in page and "<svg" in page
    rows = pd.read_csv(out / "calibration.csv")
    assert set(rows["id"]) == {"normal", "normal_wrong_scale"} and len(rows) == 6
    assert bool(rows.loc[(rows["id"] == "normal_wrong_scale") & (rows["parameter"] == "sigma"), "flagged"].iloc[0])
    # resume: every fit is in the fit store
    t0 = time.perf_counter()
    assert main(argv + ["--quiet"]) == 1
    again = json.loads((out / "calibration.json").read_text())
    print(f"first run {first:.1f} s, from the store {time.perf_counter() - t0:.1f} s")
    assert [q["ranks"] for c in again["candidates"] for q in c["parameters"]] == \
        [q["ranks"] for c in result["candidates"] for q in c["parameters"]]


def test_calibrate_names_an_unknown_candidate(tmp_path, capsys):
    pd.DataFrame({"y": np.arange(12.0)}).to_csv(tmp_path / "d.csv", index=False)
    assert main(["calibrate", "no_such", "--data", str(tmp_path / "d.csv"), "--outcome", "y",
                 "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "no_such" in err and "known:" in err
