"""Prior and likelihood sensitivity by power-scaling (statistics/sensitivity.py), checked
against closed forms of the conjugate normal model and against the published rule of
Kallioinen, Paananen, Bürkner & Vehtari (2023), "Detecting and diagnosing prior and
likelihood sensitivity with power-scaling", Statistics and Computing 34, 57."""

from __future__ import annotations

import json
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from contenders.inputs.candidates import discover, inputs_for
from contenders.inputs.config import RunConfig
from contenders.inputs.data import build_design
from contenders.engines import SamplerSettings
from contenders.output.report import write_report
from contenders.pipeline.runner import run
from contenders.statistics.sensitivity import (THRESHOLD, power_scale_log_weights, power_scaled_mean,
                                           power_scaling)

HERE = Path(__file__).parent
FOLDER = HERE / "candidates" / "power_scaling"
CID = "normal_mean_known_sd"


@pytest.fixture(scope="module")
def fixture_program(engine):
    c = discover(FOLDER)[0]
    assert c.valid, c.problems
    return c, engine.compile(c)


def _closed_form(y, prior_mean, prior_sd, known_sd, alpha_prior=1.0, alpha_lik=1.0):
    """Posterior mean and SD of mu for mu ~ normal(m0, s0), y_i ~ normal(mu, s), with the
    prior raised to alpha_prior and the likelihood to alpha_lik. A normal density raised
    to alpha is proportional to a normal density with the same mean and its precision
    multiplied by alpha, so (conjugate normal update: Gelman et al., Bayesian Data
    Analysis, 3rd ed., 2013, section 2.5, eq. 2.12):
        precision = alpha_prior / s0^2 + alpha_lik * n / s^2
        mean      = (alpha_prior * m0 / s0^2 + alpha_lik * sum(y) / s^2) / precision."""
    precision = alpha_prior / prior_sd**2 + alpha_lik * len(y) / known_sd**2
    mean = (alpha_prior * prior_mean / prior_sd**2 + alpha_lik * np.sum(y) / known_sd**2) / precision
    return mean, 1 / np.sqrt(precision)


def test_power_scaled_mean_matches_the_closed_form_of_the_conjugate_normal(engine, fixture_program):
    """Draws from Stan's posterior of the conjugate model, reweighted to the posterior with
    the prior (or the likelihood) power-scaled by alpha, must give the closed-form mean
    of that posterior within 4 Monte Carlo standard errors (the importance-sampling SE
    of a self-normalised weighted mean, inflated by S / ESS for autocorrelation: common
    practice, no source)."""
    c, program = fixture_program
    rng = np.random.default_rng(31)
    y = rng.normal(0.0, 1.0, 20)
    design = build_design(pd.DataFrame({"y": y}), "y", [], None)
    hyper = {"prior_mean": 1.0, "prior_sd": 0.3, "known_sd": 1.0}
    draws = engine.sample(program, inputs_for(c, design, None, hyper),
                          SamplerSettings(chains=4, warmup=300, draws=1000, seed=5))
    post = draws.idata.posterior
    mu = np.asarray(post["mu"].values, dtype=float).reshape(-1)
    lprior = np.asarray(post["lprior"].values, dtype=float).reshape(-1)
    loglik = np.asarray(draws.idata.log_likelihood["log_lik"].values, dtype=float).reshape(mu.size, -1).sum(axis=1)
    ess_ratio = float(az.ess(draws.idata, var_names=["mu"])["mu"]) / mu.size
    # lprior is the program's own normal log density: check it against SciPy first
    import scipy.stats as sps  # SciPy as the reference density

    np.testing.assert_allclose(lprior, sps.norm.logpdf(mu, 1.0, 0.3), rtol=1e-6)
    base_mean, base_sd = _closed_form(y, **hyper)
    assert mu.mean() == pytest.approx(base_mean, abs=4 * base_sd / np.sqrt(ess_ratio * mu.size))
    measured = {}
    for component, values in (("prior", lprior), ("likelihood", loglik)):
        for alpha in (0.5, 0.8, 1.25, 2.0):
            estimate, k = power_scaled_mean(mu, values, alpha)
            lw, _ = power_scale_log_weights(values, alpha)
            w = np.exp(lw - lw.max())
            w /= w.sum()
            se = np.sqrt(np.sum(w**2 * (mu - estimate) ** 2) / ess_ratio)
            exact, _sd = _closed_form(y, **hyper, **{f"alpha_{'prior' if component == 'prior' else 'lik'}": alpha})
            measured[(component, alpha)] = (estimate, exact, se, k)
            assert k < 0.7, (component, alpha, k)
            assert estimate == pytest.approx(exact, abs=4 * se), (component, alpha, estimate, exact, se)
            # the shift is real, so the comparison is not trivially passed by the unweighted mean
            assert abs(exact - base_mean) > 5 * se
    print({key: tuple(round(float(v), 4) for v in val) for key, val in measured.items()})


def _run(tmp_path: Path, name: str, prior_mean: float, prior_sd: float):
    rng = np.random.default_rng(8)
    pd.DataFrame({"y": rng.normal(0.0, 1.0, 40)}).to_csv(tmp_path / f"{name}.csv", index=False)
    cfg = RunConfig(data=tmp_path / f"{name}.csv", outcome="y", candidates=FOLDER, out=tmp_path / name,
                    chains=2, warmup=300, draws=1000, prior_draws=100, engine="pystan", jobs=1, quiet=True,
                    hyperparameters={CID: {"prior_mean": prior_mean, "prior_sd": prior_sd, "known_sd": 1.0}})
    result = run(cfg)
    return result, cfg


def test_strong_prior_far_from_the_data_is_pulled_both_ways_and_a_weak_prior_is_led_by_data(tmp_path,
                                                                                           fixture_program):
    """40 observations near 0 with known SD 1. A prior normal(4, 0.1) is strong (its
    precision 100 exceeds the data's 40) and sits far from them: the paper's reading of
    prior and likelihood sensitivity both at least 0.05 is a sign that prior and data
    disagree (Kallioinen et al. 2023, Section 4, threshold 0.05), read here as "pulled
    both ways". A prior normal(0, 100) leaves the posterior to the data: prior
    sensitivity below 0.05, likelihood sensitivity above ("led by the data").
    Both are read from the run's summary.json and shown in the report."""
    strong, cfg = _run(tmp_path, "strong", 4.0, 0.1)
    weak, cfg_weak = _run(tmp_path, "weak", 0.0, 100.0)
    s = strong.candidates[0].sensitivity
    w = weak.candidates[0].sensitivity
    print("strong prior", s.rows, s.pareto_k)
    print("weak prior", w.rows, w.pareto_k)
    assert s.reliable and w.reliable
    (row_s,), (row_w,) = s.rows, w.rows
    assert row_s.parameter == "mu" and row_s.reading == "pulled_both_ways"
    assert row_s.prior > 5 * THRESHOLD and row_s.likelihood > 5 * THRESHOLD
    assert row_w.reading == "led_by_data"
    assert row_w.prior < THRESHOLD / 10 and row_w.likelihood > THRESHOLD
    assert not row_s.near_threshold
    summary = json.loads((cfg.out / "summary.json").read_text())
    ps = summary["candidates"][0]["power_scaling"]
    assert ps["parameters"][0]["reading"] == "pulled_both_ways" and ps["threshold"] == THRESHOLD
    assert ps["parameters"][0]["what_to_do"].startswith("Pulled both ways: the prior and the data push it")
    weak_row = json.loads((cfg_weak.out / "summary.json").read_text())["candidates"][0]["power_scaling"][
        "parameters"][0]
    assert weak_row["reading"] == "led_by_data" and weak_row["what_to_do"].endswith("Nothing to do.")
    page = write_report(strong, cfg.out).read_text()
    assert "Sensitivity to the priors (power-scaling)" in page
    assert "◆ mu" in page and "Check the priors of mu against what you meant" in page
    assert "prior-data conflict" not in page and "weak likelihood" not in page
    table = pd.read_csv(cfg.out / "sensitivity.csv")
    assert list(table["parameter"]) == ["mu"] and table["reading"][0] == "pulled_both_ways"
    assert table["what_to_do"][0].startswith("Pulled both ways")
    assert table["prior_sensitivity"][0] == pytest.approx(row_s.prior)


def test_programs_without_lprior_are_not_assessed():
    idata = az.from_dict(posterior={"mu": np.zeros((2, 50))}, log_likelihood={"log_lik": np.zeros((2, 50, 3))})
    assert power_scaling(idata, ["mu"]) is None


def test_a_failed_computation_is_recorded_as_its_exception_and_worded_by_the_readings():
    """A log-likelihood name the fit lacks makes ArviZ/xarray raise KeyError inside the
    computation: the statistics keep the exception (type and message), rows stay empty,
    and the readings write the sentence summary.json and the report show."""
    from contenders.output.readings import sensitivity_problem, sensitivity_summary

    idata = az.from_dict(posterior={"mu": np.zeros((2, 50)), "lprior": np.zeros((2, 50))},
                         log_likelihood={"log_lik": np.zeros((2, 50, 3))})
    s = power_scaling(idata, ["mu"], log_lik="no_such")
    assert s is not None and s.rows == [] and s.error.startswith("KeyError: ") and "no_such" in s.error
    assert sensitivity_problem(s) == f"power-scaling could not be computed: {s.error}"
    assert sensitivity_summary(s)["problem"] == sensitivity_problem(s)
    ok = power_scaling(az.from_dict(posterior={"mu": np.random.default_rng(1).normal(size=(2, 50)),
                                               "lprior": np.random.default_rng(2).normal(size=(2, 50))},
                                    log_likelihood={"log_lik": np.random.default_rng(3).normal(size=(2, 50, 3))}),
                       ["mu"])
    assert ok.error == "" and sensitivity_problem(ok) == "" and sensitivity_summary(ok)["problem"] is None
