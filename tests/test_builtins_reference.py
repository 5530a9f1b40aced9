"""Reference checks of the ten built-in candidates against SciPy.

1. On real posterior draws of a small fit (one numeric predictor, a group column with
   four levels), every program's ``log_lik`` equals the SciPy log density at the mapped
   parameters, with the linear predictor recomputed here from the draws.
2. ``y_rep`` simulated at fixed parameter values (no predictors, no group) passes a
   Kolmogorov-Smirnov test against the SciPy distribution with those parameters.
3. The hand-written inverse Gaussian generator reproduces the closed-form mean and
   variance, including a setting where lambda is much smaller than mu.

Parameter mappings (each was checked against the Stan code of the program, not only
its "Reference:" comment line):

* normal            Stan normal(eta, sigma)              -> scipy.stats.norm(loc=eta, scale=sigma)
* lognormal         Stan lognormal(eta, sigma)           -> scipy.stats.lognorm(s=sigma, scale=exp(eta))
* shifted_lognormal Stan lognormal(y - shift | eta, sigma), shift = shift_frac * min(y)
                                                         -> scipy.stats.lognorm(s=sigma, loc=shift, scale=exp(eta))
* exgaussian        Stan exp_mod_normal(eta, sigma, 1/tau)
                                                         -> scipy.stats.exponnorm(K=tau/sigma, loc=eta, scale=sigma)
* gamma             Stan gamma(shape, rate=shape*exp(-eta))
                                                         -> scipy.stats.gamma(a=shape, scale=exp(eta)/shape)
* weibull           Stan weibull(shape, exp(eta))        -> scipy.stats.weibull_min(c=shape, scale=exp(eta))
* inverse_gaussian  mean mu = exp(eta), shape lambda = ratio*mu
                                                         -> scipy.stats.invgauss(mu=mu/lambda, scale=lambda)
* student_t         Stan student_t(nu, eta, sigma)       -> scipy.stats.t(df=nu, loc=eta, scale=sigma)
* skew_normal       Stan skew_normal(eta, omega, slant)  -> scipy.stats.skewnorm(a=slant, loc=eta, scale=omega)
* lognormal_contaminated
                    (1-stray)*lognormal(eta, sigma) + stray*uniform(0, max(y))
                                                         -> (1-stray)*scipy.stats.lognorm(s=sigma, scale=exp(eta))
                                                            + stray*scipy.stats.uniform(loc=0, scale=max(y))

The SciPy parametrizations are those of the SciPy reference documentation of each
distribution (scipy.stats.<name>, "Notes" section). The Stan argument orders named
above (shape-rate gamma, shape-scale Weibull, rate of exp_mod_normal, ...) are from
memory of the Stan Functions Reference; the log_lik checks below verify them.
All seeds are fixed, so every test here is deterministic.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from contenders.inputs.candidates import inputs_for
from contenders.inputs.data import build_design
from contenders.engines import SamplerSettings

BUILTIN_IDS = [
    "normal", "lognormal", "shifted_lognormal", "exgaussian", "gamma",
    "weibull", "inverse_gaussian", "student_t", "skew_normal", "lognormal_contaminated",
]

#: Family parameters of each program (besides intercept, coef, group_z, group_sd).
FAMILY_PARAMS = {
    "normal": ("sigma",),
    "lognormal": ("sigma",),
    "shifted_lognormal": ("sigma", "shift_frac"),
    "exgaussian": ("sigma", "tau"),
    "gamma": ("shape",),
    "weibull": ("shape",),
    "inverse_gaussian": ("ratio",),
    "student_t": ("sigma", "nu"),
    "skew_normal": ("omega", "slant"),
    "lognormal_contaminated": ("sigma", "stray"),
}

#: Values used to simulate data (test 1) and as fixed parameters (test 2). "intercept"
#: is on the scale of eta (log scale for the log-link families).
TRUE_VALUES = {
    "normal": {"intercept": 2.0, "sigma": 1.5},
    "lognormal": {"intercept": 0.2, "sigma": 0.5},
    "shifted_lognormal": {"intercept": -0.3, "sigma": 0.6, "shift_frac": 0.4},
    "exgaussian": {"intercept": 1.0, "sigma": 0.4, "tau": 1.2},
    "gamma": {"intercept": 0.5, "shape": 3.0},
    "weibull": {"intercept": 0.5, "shape": 1.7},
    "inverse_gaussian": {"intercept": 0.3, "ratio": 2.0},
    "student_t": {"intercept": 1.0, "sigma": 2.0, "nu": 4.0},
    "skew_normal": {"intercept": 1.0, "omega": 2.0, "slant": 4.0},
    "lognormal_contaminated": {"intercept": 0.0, "sigma": 0.5, "stray": 0.1},
}


class _Contaminated:
    """(1 - stray) * lognorm(s=sigma, scale=exp(eta)) + stray * uniform(loc=0, scale=upper),
    built from SciPy's lognorm and uniform (SciPy docs: scipy.stats.lognorm, scipy.stats.uniform)."""

    def __init__(self, eta, sigma, stray, upper):
        self.main = stats.lognorm(s=sigma, scale=np.exp(eta))
        self.stray_dist = stats.uniform(loc=0.0, scale=upper)
        self.stray = stray

    def logpdf(self, y):
        return np.logaddexp(np.log1p(-self.stray) + self.main.logpdf(y),
                            np.log(self.stray) + self.stray_dist.logpdf(y))

    def cdf(self, y):
        return (1 - self.stray) * self.main.cdf(y) + self.stray * self.stray_dist.cdf(y)


def reference(cid: str, eta, p: dict, y_all: np.ndarray):
    """The SciPy distribution of one observation (broadcast over ``eta``) with the
    parameter mapping stated in the module docstring. ``y_all`` is the whole outcome
    vector passed to Stan (for min(y) of the shift and max(y) of the stray component)."""
    eta = np.asarray(eta, dtype=float)
    if cid == "normal":
        # SciPy norm(loc, scale); Stan normal(mu, sigma)
        return stats.norm(loc=eta, scale=p["sigma"])
    if cid == "lognormal":
        # SciPy lognorm(s=sigma, scale=exp(mu)); Stan lognormal(mu, sigma)
        return stats.lognorm(s=p["sigma"], scale=np.exp(eta))
    if cid == "shifted_lognormal":
        # SciPy lognorm(s=sigma, loc=shift, scale=exp(eta)), shift = shift_frac * min(y)
        shift = p["shift_frac"] * np.min(y_all)
        return stats.lognorm(s=p["sigma"], loc=shift, scale=np.exp(eta))
    if cid == "exgaussian":
        # SciPy exponnorm(K=tau/sigma, loc=eta, scale=sigma): normal(eta, sigma) plus an
        # exponential with mean K*scale = tau; Stan exp_mod_normal(eta, sigma, rate 1/tau)
        return stats.exponnorm(K=p["tau"] / p["sigma"], loc=eta, scale=p["sigma"])
    if cid == "gamma":
        # SciPy gamma(a=shape, scale=1/rate), Stan rate = shape * exp(-eta)
        return stats.gamma(a=p["shape"], scale=np.exp(eta) / p["shape"])
    if cid == "weibull":
        # SciPy weibull_min(c=shape, scale=exp(eta)); Stan weibull(shape, scale)
        return stats.weibull_min(c=p["shape"], scale=np.exp(eta))
    if cid == "inverse_gaussian":
        # SciPy invgauss(mu=m/lambda, scale=lambda) has mean m and shape lambda
        # (SciPy invgauss docs); here m = exp(eta), lambda = ratio * m
        mean = np.exp(eta)
        lam = p["ratio"] * mean
        return stats.invgauss(mu=mean / lam, scale=lam)
    if cid == "student_t":
        # SciPy t(df=nu, loc=eta, scale=sigma); Stan student_t(nu, mu, sigma)
        return stats.t(df=p["nu"], loc=eta, scale=p["sigma"])
    if cid == "skew_normal":
        # SciPy skewnorm(a=slant, loc=eta, scale=omega); Stan skew_normal(xi, omega, alpha)
        return stats.skewnorm(a=p["slant"], loc=eta, scale=p["omega"])
    if cid == "lognormal_contaminated":
        # (1-stray) * SciPy lognorm(s=sigma, scale=exp(eta)) + stray * SciPy uniform(0, max(y))
        return _Contaminated(eta, p["sigma"], p["stray"], np.max(y_all))
    raise AssertionError(f"no reference for {cid}")


def simulate(cid: str, eta: np.ndarray, p: dict, rng: np.random.Generator) -> np.ndarray:
    """Outcome values from the family (SciPy draws), one per element of ``eta``."""
    if cid == "shifted_lognormal":
        # a fixed shift of 0.3 (the model re-expresses it as shift_frac * min(y))
        return 0.3 + stats.lognorm(s=p["sigma"], scale=np.exp(eta)).rvs(random_state=rng)
    if cid == "lognormal_contaminated":
        y = stats.lognorm(s=p["sigma"], scale=np.exp(eta)).rvs(random_state=rng)
        stray = rng.random(eta.size) < p["stray"]
        y[stray] = rng.uniform(0.0, y.max(), size=int(stray.sum()))
        return y
    return reference(cid, eta, p, np.ones(1)).rvs(random_state=rng)


# ----------------------------------------------------------------------------------
# 1. log_lik on posterior draws equals the SciPy log density
# ----------------------------------------------------------------------------------

N_FIT = 40
N_CHECKED_DRAWS = 20


def _fit_design(cid: str, rng: np.random.Generator):
    n = N_FIT
    x = rng.normal(10.0, 3.0, size=n)
    g = np.repeat(np.array(["a", "b", "c", "d"]), n // 4)
    group_effect = dict(zip("abcd", [-0.2, 0.0, 0.1, 0.25]))
    z = (x - x.mean()) / x.std(ddof=1)
    eta = TRUE_VALUES[cid]["intercept"] + 0.3 * z + np.array([group_effect[k] for k in g])
    y = simulate(cid, eta, TRUE_VALUES[cid], rng)
    table = pd.DataFrame({"y": y, "x": x, "g": g})
    return build_design(table, "y", predictors=["x"], group="g")


def _flat(posterior, name: str, n_samples: int) -> np.ndarray:
    """Draws of one posterior variable as (samples, size), chains stacked in order."""
    return np.asarray(posterior[name].values, dtype=float).reshape(n_samples, -1)


@pytest.mark.parametrize("cid", BUILTIN_IDS)
def test_log_lik_matches_scipy_on_posterior_draws(cid, engine, builtins, programs, rng):
    design = _fit_design(cid, rng)
    assert design.K == 1 and design.J == 4
    data = inputs_for(builtins[cid], design)
    settings = SamplerSettings(chains=2, warmup=150, draws=100,
                               seed=1000 + BUILTIN_IDS.index(cid))
    draws = engine.sample(programs[cid], data, settings)
    post = draws.idata.posterior
    S = post.sizes["chain"] * post.sizes["draw"]
    assert S == 2 * 100

    intercept = _flat(post, "intercept", S)[:, 0]
    coef = _flat(post, "coef", S)                      # (S, K)
    group_z = _flat(post, "group_z", S)                # (S, J)
    group_sd = _flat(post, "group_sd", S)              # (S, 1)
    family = {name: _flat(post, name, S)[:, 0] for name in FAMILY_PARAMS[cid]}
    log_lik = np.asarray(draws.idata.log_likelihood["log_lik"].values,
                         dtype=float).reshape(S, design.N)
    assert np.all(np.isfinite(log_lik))

    y, X, group = design.y, design.X, design.group
    picks = np.linspace(0, S - 1, N_CHECKED_DRAWS).astype(int)
    for s in picks:
        eta = intercept[s] + X @ coef[s] + group_sd[s, 0] * group_z[s, group - 1]
        p = {name: values[s] for name, values in family.items()}
        expected = reference(cid, eta, p, y).logpdf(y)
        # Source: the SciPy distribution and mapping returned by reference() for this
        # family (see its comments and the module docstring).
        np.testing.assert_allclose(log_lik[s], expected, rtol=1e-6,
                                   err_msg=f"{cid}: log_lik of posterior draw {s}")

    if cid == "shifted_lognormal":
        # the transformed parameter shift is defined as shift_frac * min(y) (Stan code)
        np.testing.assert_allclose(_flat(post, "shift", S)[:, 0],
                                   family["shift_frac"] * y.min(), rtol=1e-10)


# ----------------------------------------------------------------------------------
# 2. y_rep at fixed parameters follows the SciPy distribution (Kolmogorov-Smirnov)
# ----------------------------------------------------------------------------------

N_KS = 2000
IDENTITY_LINK = ("normal", "exgaussian", "student_t", "skew_normal")


def _init(cid: str, values: dict) -> dict:
    """Every parameter of a program with no predictors and no group (K = 0, J = 0)."""
    init = {"intercept": values["intercept"], "coef": [], "group_z": [], "group_sd": []}
    init.update({name: values[name] for name in FAMILY_PARAMS[cid]})
    return init


def _plain_design(y: np.ndarray):
    return build_design(pd.DataFrame({"y": y}), "y")


@pytest.mark.parametrize("cid", BUILTIN_IDS)
def test_y_rep_at_fixed_parameters_passes_ks(cid, engine, builtins, programs, rng):
    values = TRUE_VALUES[cid]
    y_data = simulate(cid, np.full(N_KS, values["intercept"]), values, rng)
    design = _plain_design(y_data)
    assert design.K == 0 and design.J == 0
    data = inputs_for(builtins[cid], design)
    draw = engine.single_draw(programs[cid], data, seed=4242 + BUILTIN_IDS.index(cid),
                              init=_init(cid, values))
    # fixed_param keeps the parameters where they were put
    for name in ("intercept", *FAMILY_PARAMS[cid]):
        np.testing.assert_allclose(draw[name], values[name], rtol=1e-12, err_msg=name)
    y_rep = np.asarray(draw["y_rep"], dtype=float).reshape(-1)
    assert y_rep.shape == (N_KS,)
    assert np.all(np.isfinite(y_rep))

    dist = reference(cid, values["intercept"], values, design.y)
    # Source: SciPy distribution and mapping of reference() (module docstring);
    # scipy.stats.kstest one-sample test. The seed is fixed, so the test is
    # deterministic; the 0.001 level is common practice, no source.
    result = stats.kstest(y_rep, dist.cdf)
    assert result.pvalue > 0.001, f"{cid}: KS statistic {result.statistic:.4f}, p = {result.pvalue:.2g}"

    # Power: the same draws must be rejected against a clearly different member of the
    # family (eta moved by log(1.2) for the log-link families, i.e. a scale 20 % larger,
    # and by 0.3 for the identity-link ones), so the check above can fail.
    moved = values["intercept"] + (0.3 if cid in IDENTITY_LINK else np.log(1.2))
    assert stats.kstest(y_rep, reference(cid, moved, values, design.y).cdf).pvalue < 0.001


# ----------------------------------------------------------------------------------
# 3. The inverse Gaussian generator reproduces the closed-form mean and variance
# ----------------------------------------------------------------------------------

N_IG = 20000


@pytest.mark.parametrize("mu, lam", [(1.5, 6.0), (2.0, 0.2)],
                         ids=["lambda>mu", "lambda<<mu"])
def test_inverse_gaussian_generator_moments(mu, lam, engine, builtins, programs, rng):
    # Generator: Michael, Schucany & Haas (1976), "Generating random variates using
    # transformations with multiple roots", The American Statistician 30(2), 88-90.
    # Closed forms: mean mu, variance mu^3 / lambda (Chhikara & Folks 1989, The Inverse
    # Gaussian Distribution; also the SciPy invgauss docs: invgauss(mu=mu/lambda,
    # scale=lambda) has mean mu and variance mu^3/lambda).
    ref = stats.invgauss(mu=mu / lam, scale=lam)
    np.testing.assert_allclose(ref.mean(), mu, rtol=1e-12)
    np.testing.assert_allclose(ref.var(), mu**3 / lam, rtol=1e-12)

    y_data = ref.rvs(size=N_IG, random_state=rng)
    data = inputs_for(builtins["inverse_gaussian"], _plain_design(y_data))
    values = {"intercept": np.log(mu), "ratio": lam / mu}   # mu = exp(eta), lambda = ratio * mu
    draw = engine.single_draw(programs["inverse_gaussian"], data, seed=777,
                              init=_init("inverse_gaussian", values))
    y_rep = np.asarray(draw["y_rep"], dtype=float).reshape(-1)
    assert y_rep.shape == (N_IG,)
    assert np.all(y_rep > 0)

    n = y_rep.size
    var = mu**3 / lam
    # Mean: within 4 standard errors sqrt(var / n) (4 SE is common practice, no source).
    se_mean = np.sqrt(var / n)
    assert abs(y_rep.mean() - mu) < 4 * se_mean, (y_rep.mean(), mu, se_mean)

    # Variance: standard error of the sample variance sqrt((m4 - var^2 (n-3)/(n-1)) / n),
    # with m4 the fourth central moment (formula from memory); m4 = var^2 (3 + excess
    # kurtosis), the excess kurtosis 15 mu / lambda taken from SciPy's invgauss stats.
    excess_kurt = float(ref.stats(moments="k"))
    np.testing.assert_allclose(excess_kurt, 15 * mu / lam, rtol=1e-10)  # from memory: 15 mu/lambda
    m4 = var**2 * (3 + excess_kurt)
    se_var = np.sqrt((m4 - var**2 * (n - 3) / (n - 1)) / n)
    # 4 SE (common practice, no source); the heavy right tail makes the sample variance
    # skewed, but with the fixed seed the check is deterministic.
    assert abs(y_rep.var(ddof=1) - var) < 4 * se_var, (y_rep.var(ddof=1), var, se_var)

    # the draws also follow the SciPy distribution as a whole (KS, fixed seed;
    # the 0.001 level is common practice, no source)
    assert stats.kstest(y_rep, ref.cdf).pvalue > 0.001
