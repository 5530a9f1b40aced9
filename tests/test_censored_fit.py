"""Right-censored durations fitted by the Weibull and lognormal built-ins: with the
censoring handled (``--censored``), the posterior agrees with SciPy's maximum-likelihood
fit on ``scipy.stats.CensoredData``; with the censoring ignored (the censoring times
taken as event times), the same data give a clearly biased estimate.

Source of the reference values: SciPy reference documentation, scipy.stats.CensoredData
(right_censored) and scipy.stats.rv_continuous.fit, which maximises the censored
likelihood (density of the observed values times the survival function at the censoring
times) when given CensoredData; weibull_min(c = shape, scale = exp(eta)) and
lognorm(s = sigma, scale = exp(eta)) as in tests/test_builtins_reference.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from contenders.inputs.candidates import inputs_for
from contenders.inputs.data import build_design
from contenders.engines.base import SamplerSettings

N = 1500


def _durations(family: str, seed: int) -> pd.DataFrame:
    """Event times from the family, each observed only up to its own censoring time
    (uniform between the 30 % and 95 % quantiles: random right censoring, about a
    third of the units still running)."""
    rng = np.random.default_rng(seed)
    truth = stats.weibull_min(c=1.6, scale=300.0) if family == "weibull" else stats.lognorm(s=0.6, scale=300.0)
    t = truth.rvs(size=N, random_state=rng)
    c = rng.uniform(truth.ppf(0.3), truth.ppf(0.95), size=N)
    return pd.DataFrame({"time": np.minimum(t, c), "still_running": (t > c).astype(int)})


def _posterior(engine, program, candidate, design):
    draws = engine.sample(program, inputs_for(candidate, design),
                          SamplerSettings(chains=2, warmup=300, draws=400, seed=17))
    post = draws.idata.posterior
    return {k: np.asarray(post[k].values, dtype=float).reshape(-1) for k in post.data_vars if post[k].ndim == 2}


@pytest.mark.parametrize("family, shape_name, scipy_family", [
    ("weibull", "shape", stats.weibull_min), ("lognormal", "sigma", stats.lognorm)])
def test_censored_fit_matches_scipy_censored_mle_and_ignoring_it_is_biased(
        family, shape_name, scipy_family, engine, programs, builtins):
    data = _durations(family, seed=41)
    share = data["still_running"].mean()
    assert 0.2 < share < 0.45, share
    c = builtins[family]

    handled = build_design(data, "time", censored="still_running")
    post = _posterior(engine, programs[family], c, handled)
    # SciPy's censored maximum-likelihood fit (location fixed at 0, as in our families)
    censored = stats.CensoredData.right_censored(data["time"].to_numpy(),
                                                 data["still_running"].to_numpy().astype(bool))
    shape_mle, loc, scale_mle = scipy_family.fit(censored, floc=0)
    assert loc == 0
    # With N = 1500 and priors this wide the posterior mode is the MLE up to O(1/N); the
    # posterior mean lies within a small part of a posterior SD of it (0.5 SD is common
    # practice, no source; the Monte Carlo error of the mean is about 0.05 SD here)
    for name, mle in (("intercept", np.log(scale_mle)), (shape_name, shape_mle)):
        mean, sd = post[name].mean(), post[name].std()
        assert abs(mean - mle) < 0.5 * sd, (name, mean, mle, sd)

    # Ignoring the censoring (every time taken as an event time) pulls the scale down
    # and is detected as far off the censored MLE: more than 5 posterior SD (measured:
    # about 8.6 for the lognormal)
    ignored = build_design(data, "time")
    naive = _posterior(engine, programs[family], c, ignored)
    gap = np.log(scale_mle) - naive["intercept"].mean()
    assert gap > 5 * naive["intercept"].std(), (gap, naive["intercept"].std())
    # and SciPy's plain fit to the same times agrees with the naive posterior, so the
    # bias is the censoring's, not the program's
    _, _, scale_plain = scipy_family.fit(data["time"].to_numpy(), floc=0)
    assert abs(naive["intercept"].mean() - np.log(scale_plain)) < 0.5 * naive["intercept"].std()
