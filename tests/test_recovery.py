"""Model recovery (Wilson & Collins 2019, eLife 8:e49547, rule 6): pure functions
against SciPy and closed forms, then two small simulation studies with built-in
candidates: clearly different families are recovered, similar ones at small N are not.
"""

from __future__ import annotations

import dataclasses
import json
import math

import arviz as az
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from contenders.cli import main
from contenders.inputs.config import RunConfig
from contenders.output.recovery_files import reading, write
from contenders.pipeline.recovery import recover
from contenders.output.readings import fit_problem, left_out_text
from contenders.statistics.recovery import (
    NO_DECISION, ReplicateFit, decide, evenly_spaced, paired_difference, recovery_matrix, wilson_interval,
)
from contenders.output.report import write_report
from contenders.pipeline.runner import run_with_programs


# --- pure functions -------------------------------------------------------------------

@pytest.mark.parametrize("wins,n", [(0, 5), (1, 5), (3, 5), (5, 5), (7, 20), (20, 20), (13, 37)])
def test_wilson_interval_matches_scipy(wins, n):
    # SciPy's binomtest(...).proportion_ci(method="wilson"): Wilson (1927), JASA 22(158),
    # the score interval without continuity correction (Brown, Cai & DasGupta 2001, eq. 4)
    ci = stats.binomtest(wins, n).proportion_ci(confidence_level=0.95, method="wilson")
    low, high = wilson_interval(wins, n, 0.95)
    assert low == pytest.approx(ci.low, abs=1e-12) and high == pytest.approx(ci.high, abs=1e-12)
    ci90 = stats.binomtest(wins, n).proportion_ci(confidence_level=0.9, method="wilson")
    assert wilson_interval(wins, n, 0.9) == pytest.approx((ci90.low, ci90.high), abs=1e-12)


def test_paired_difference_is_the_sum_and_sqrt_n_var():
    # Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, eq. 24: se = sqrt(n var(d_i))
    rng = np.random.default_rng(3)
    a, b = rng.normal(-1, 1, 40), rng.normal(-1.3, 1, 40)
    d, se = paired_difference(a, b)
    assert d == pytest.approx(float(np.sum(a - b)))
    assert se == pytest.approx(math.sqrt(40) * float(np.std(a - b)))  # np.std with ddof=0


def test_evenly_spaced_draws_are_seeded_and_spaced():
    idx = evenly_spaced(500, 5, seed=11)
    assert np.array_equal(idx, evenly_spaced(500, 5, seed=11))
    assert np.all(np.diff(idx) == 100) and 0 <= idx[0] < 100 and idx[-1] < 500
    assert np.all(np.diff(evenly_spaced(10, 3, seed=1)) >= 3)


def test_matrix_counts_shares_and_intervals():
    winners = {"a": ["a", "a", "b", None, "a"], "b": ["b", "a", "b", "b", "b"]}
    m = recovery_matrix(winners, ["a", "b"])
    assert [m.cells["a"][k].wins for k in ("a", "b", NO_DECISION)] == [3, 1, 1]
    assert [m.cells["b"][k].wins for k in ("a", "b", NO_DECISION)] == [1, 4, 0]
    assert m.share("a", "a") == pytest.approx(0.6) and m.share("b", "b") == pytest.approx(0.8)
    ci = stats.binomtest(3, 5).proportion_ci(method="wilson")   # Wilson (1927), via SciPy
    assert (m.cells["a"]["a"].low, m.cells["a"]["a"].high) == pytest.approx((ci.low, ci.high))


def test_reading_names_the_pairs_that_cannot_be_told_apart():
    labels = {"a": "Alpha", "b": "Beta", "c": "Gamma-ish"}
    winners = {"a": ["a", "b", "b", "a", "a"],      # Beta wins 2 of 5 Alpha datasets
               "b": ["a", "b", "a", "b", "b"],      # Alpha wins 2 of 5 Beta datasets
               "c": ["c", "c", "c", "c", "a"]}      # Alpha wins 1 of 5 Gamma-ish datasets: 0.2
    text = reading(recovery_matrix(winners, list(labels)), labels, observed_winner="b", threshold=0.2)
    pair = [s for s in text if "cannot be told apart" in s]
    assert len(pair) == 1 and pair[0].startswith("With this design, Alpha and Beta cannot be told apart")
    one_way = [s for s in text if s.startswith("Data simulated from Gamma-ish are often better predicted by Alpha")]
    assert len(one_way) == 1 and "(1 of 5)" in one_way[0] and "the reverse happened in 0 of 5" in one_way[0]
    assert any(s.startswith("If Beta, the winner on the observed data, were the true process, it would win 3 of 5")
               and "Alpha 2" in s for s in text)
    clean = reading(recovery_matrix({"a": ["a"] * 4, "b": ["b"] * 4}, ["a", "b"]), labels, "a",
                    clear={"a": (4, 4), "b": (1, 4)})
    assert "can be told apart" in clean[0] and "cannot" not in clean[0]
    assert [s for s in clean if "most wins were within two standard errors" in s][0].startswith(
        "On data simulated from Beta,")
    undecided = reading(recovery_matrix({"a": ["a", None], "b": ["b", "b"]}, ["a", "b"]), labels, "a")
    assert "too many had no decision" in undecided[0]
    assert any("1 of 4 simulated datasets had no decision" in s for s in undecided)


def _loo(log_lik: np.ndarray):
    """ArviZ PSIS-LOO of log-likelihood draws (chain, draw, obs)."""
    import warnings

    idata = az.from_dict(posterior={"mu": np.zeros(log_lik.shape[:2])}, log_likelihood={"log_lik": log_lik})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.loo(idata, pointwise=True, var_name="log_lik")


def test_decide_by_elpd_and_stacking_with_closed_form_densities():
    # every draw has the same log density, so each leave-one-out density is exactly the
    # SciPy normal log density of that observation (closed form)
    rng = np.random.default_rng(5)
    y = rng.normal(0, 1, 60)
    near, far = stats.norm.logpdf(y, 0, 1), stats.norm.logpdf(y, 1.5, 1)
    fits = [ReplicateFit("g", 0, "near", "ok", loo=_loo(np.broadcast_to(near, (2, 50, 60)).copy())),
            ReplicateFit("g", 0, "far", "ok", loo=_loo(np.broadcast_to(far, (2, 50, 60)).copy()))]
    r = decide("g", 0, 7, fits)
    assert r.winner == "near" and r.weight_winner == "near" and r.clear
    assert r.lead == pytest.approx(float(np.sum(near - far)), rel=1e-9)
    assert r.weights["near"] > 0.99   # stacking by ArviZ: one candidate dominates everywhere
    # a failed or unhealthy fit means no decision; a candidate outside its support sits out
    bad = decide("g", 1, 8, fits[:1] + [ReplicateFit("g", 1, "far", "unhealthy", "R-hat 1.2")])
    assert bad.winner is None and bad.weight_winner is None and bad.bad_fits == [("far", "unhealthy", "R-hat 1.2")]
    assert [fit_problem(*f) for f in bad.bad_fits] == ["far: unhealthy (R-hat 1.2)"]   # recovery.json's words
    assert fit_problem("far", "failed") == "far: failed"
    alone = decide("g", 2, 9, fits[:1] + [ReplicateFit("g", 2, "far", "outside_support", "2 values <= 0")])
    assert alone.winner == "near" and alone.excluded == ["far"] and alone.weights == {"near": 1.0}


def test_replicates_below_two_are_user_errors(tmp_path, capsys):
    path = tmp_path / "d.csv"
    pd.DataFrame({"rt": [1.0, 2.0, 3.0]}).to_csv(path, index=False)
    assert main(["recovery", str(path), "--outcome", "rt", "--replicates", "0"]) == 2
    assert "contenders recovery needs --replicates R with R >= 2" in capsys.readouterr().err
    assert main(["recovery", str(path), "--outcome", "rt", "--replicates", "1"]) == 2
    err = capsys.readouterr().err
    assert "'replicates' must be 0 (no model recovery) or a whole number >= 2; got 1" in err
    assert "Traceback" not in err


def test_fewer_than_two_ranked_candidates_say_why_and_who_is_left_out(tmp_path):
    """recover returns at once, with the reason and each left-out candidate in words
    (written by output.readings, the same words as before they moved there)."""
    from types import SimpleNamespace as NS

    fit = tmp_path / "fit.nc"
    fit.write_bytes(b"")
    cands = [NS(id="gamma", label="Gamma", status="ok", reason="", posterior_file=str(fit)),
             NS(id="normal", label="Normal", status="ok", reason="", posterior_file=str(tmp_path / "gone.nc")),
             NS(id="weibull", label="Weibull", status="unhealthy", reason="R-hat 1.2 for shape\nmore", posterior_file="")]
    result = NS(config=None, design=None, candidates=cands,
                comparison=NS(ranking=["gamma", "normal"]))
    said = []
    rec = recover(result, programs=None, replicates=2, progress=said.append)
    assert rec.reason == ("model recovery needs at least two ranked candidates with a stored posterior fit; "
                          "this run has 1")
    assert said == [rec.reason]
    assert [(x.candidate, x.status) for x in rec.left_out] == [("normal", "ok"), ("weibull", "unhealthy")]
    assert [left_out_text(x) for x in rec.left_out] == ["Normal (normal): its stored posterior fit is missing",
                                                        "Weibull (weibull): unhealthy: R-hat 1.2 for shape"]


def test_calibration_notes_name_the_simulation_and_the_cause():
    from contenders.output.readings import simulation_note

    assert simulation_note(3, non_finite=4) == "simulation 3: 4 non-finite values"
    assert simulation_note(7, message="2 outcome value(s) are zero or negative; this candidate needs y > 0") == \
        "simulation 7: 2 outcome value(s) are zero or negative; this candidate needs y > 0"
    assert simulation_note(9, message="RuntimeError: boom\ntraceback " + "x" * 400) == "simulation 9: RuntimeError: boom"
    assert simulation_note(2, message="y" * 400) == "simulation 2: " + "y" * 300


# --- simulation studies -----------------------------------------------------------------

def _study(tmp_path, y, only, replicates):
    path = tmp_path / "data.csv"
    pd.DataFrame({"rt": y}).to_csv(path, index=False)
    # test scale: 2 chains x 250 draws, so the health thresholds are relaxed to what such
    # short chains can meet (R-hat 1.05, ESS 50 per chain)
    cfg = RunConfig(data=path, outcome="rt", only=only, out=tmp_path / "out", chains=2, warmup=250, draws=250,
                    prior_draws=100, check_draws=100, engine="pystan", jobs=2, seed=20261201,
                    rhat_max=1.05, ess_per_chain_min=50, replicates=replicates)
    result, programs = run_with_programs(cfg)
    result = dataclasses.replace(result, recovery=recover(result, programs, replicates))
    return result, programs


def test_normal_and_strongly_skewed_lognormal_are_recovered(tmp_path, programs):
    # invented data: lognormal, median 500, sigma 0.7 on the log scale, N = 250
    y = np.exp(np.random.default_rng(20261201).normal(np.log(500), 0.7, 250))
    result, programs = _study(tmp_path, y, ("normal", "lognormal"), 5)
    rec = result.recovery
    assert result.comparison.ranking[0] == "lognormal" and rec.observed_winner == "lognormal"
    assert rec.n_fits + sum(f.status == "outside_support" for f in rec.fits) == 2 * 5 * 2
    m = rec.by_elpd
    for g, rival in (("lognormal", "normal"), ("normal", "lognormal")):
        cell = m.cells[g][g]
        assert cell.n == 5 and cell.wins == 5 and m.cells[g][rival].wins == 0, (g, cell, rec.reading)
        # 5 of 5: the 95 % Wilson interval is (0.566, 1) (Wilson 1927; SciPy binomtest agrees)
        assert (cell.low, cell.high) == pytest.approx((0.5655, 1.0), abs=1e-3)
        assert rec.by_weight.cells[g][g].wins == 5
    # lognormal data are clearly won (lead beyond 2 SE); the normal's replicates have
    # negative values, so the lognormal sits those out
    assert all(r.clear for r in rec.runs if r.generator == "lognormal")
    assert all(r.excluded == ["lognormal"] for r in rec.runs if r.generator == "normal")
    assert any("can be told apart" in s for s in rec.reading)
    assert rec.estimated_seconds > 0
    # a second analysis (or one resumed after an interruption) finds every fit in the store
    again = recover(result, programs, 5)
    assert again.stored_before == again.n_fits == rec.n_fits
    assert [r.elpd for r in again.runs] == [r.elpd for r in rec.runs]
    # outputs: JSON, CSV and the report section
    write(rec, result.out)
    summary = json.loads((result.out / "recovery.json").read_text())
    row = next(r for r in summary["matrix"] if r["rule"] == "elpd" and r["generating"] == "lognormal"
               and r["winner"] == "lognormal")
    assert row["wins"] == 5 and row["replicates"] == 5
    assert len(pd.read_csv(result.out / "recovery_matrix.csv")) == 2 * 2 * 3
    html = write_report(result, result.out).read_text()
    assert '<section id="recovery">' in html and "Wilson &amp; Collins (2019)" in html
    assert "5/5 · 1.00 (0.57–1.00)" in html


def test_lognormal_and_gamma_at_low_skew_and_small_n_are_confused(tmp_path, programs):
    # invented data: lognormal, median 500, sigma 0.15 on the log scale (skewness about
    # 0.45), N = 24; a gamma with shape about 44 looks almost the same
    y = np.exp(np.random.default_rng(7).normal(np.log(500), 0.15, 24))
    result, _programs = _study(tmp_path, y, ("lognormal", "gamma"), 6)
    rec = result.recovery
    m = rec.by_elpd
    # measured: gamma data won 3 gamma / 3 lognormal; lognormal data 5 lognormal / 1 gamma
    off = m.cells["lognormal"]["gamma"].wins + m.cells["gamma"]["lognormal"].wins
    assert off >= 3, (off, rec.reading)
    assert m.share("gamma", "lognormal") >= 0.2   # the reading's threshold
    assert any("cannot be told apart" in s or "often better predicted" in s for s in rec.reading), rec.reading
    # no replicate is won clearly: the leads stay within two SE of the paired difference
    assert sum(r.clear for r in rec.runs) <= 1
    assert any("most wins were within two standard errors" in s for s in rec.reading)
