"""Censored and truncated likelihoods of the ten built-ins, checked against SciPy.

Each built-in declares the censoring / truncation inputs of the data interface
(cens, has_lower_limit, lower_limit, has_upper_limit, upper_limit); the data are built
here and the programs are evaluated at fixed parameter values (one fixed_param draw), so
every check is deterministic.

Meaning checked (window (L, U), W = F(U) - F(L), L = -inf / U = +inf when open):
  cens 0:  log_lik = log f(y) - log W
  cens 1:  log_lik = log(F(U) - F(y)) - log W   (no window: log S(y))
  cens -1: log_lik = log(F(y) - F(L)) - log W   (no window: log F(y))
and y_rep is a draw from the family truncated to the window, then min(draw, y) for
cens 1 and max(draw, y) for cens -1.

Source of every reference value: the SciPy reference documentation of
scipy.stats.rv_continuous (methods logpdf, logcdf, logsf, cdf, sf) and of each
distribution (scipy.stats.norm, lognorm, gamma, weibull_min, t, uniform, exponnorm,
skewnorm, invgauss), with the
parameter mappings stated in tests/test_builtins_reference.py (its ``reference``).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from contenders.inputs.candidates import inputs_for
from test_builtins_reference import FAMILY_PARAMS, TRUE_VALUES, _init, _plain_design, reference

TEN = ["normal", "lognormal", "gamma", "weibull", "student_t",
        "shifted_lognormal", "lognormal_contaminated", "exgaussian", "skew_normal", "inverse_gaussian"]
CENS_INPUTS = ("cens", "has_lower_limit", "lower_limit", "has_upper_limit", "upper_limit")


@pytest.fixture(scope="module")
def ten(engine, builtins):
    """The ten programs, each compiled once (the compiled-program cache is shared)."""
    out = {}
    for cid in TEN:
        assert not builtins[cid].problems, builtins[cid].problems
        out[cid] = engine.compile(builtins[cid])
    return out


def censoring_data(c, design, cens, lower=None, upper=None) -> dict:
    """The complete data of one run with the censoring / truncation inputs set here.
    While the runner does not supply them they are data inputs without a default, given
    as overrides; once it does, inputs_for supplies them and they are replaced."""
    extra = {
        "cens": np.asarray(cens, dtype=np.int64),
        "has_lower_limit": int(lower is not None),
        "lower_limit": float(lower if lower is not None else 0.0),
        "has_upper_limit": int(upper is not None),
        "upper_limit": float(upper if upper is not None else 0.0),
    }
    assert extra["cens"].shape == (design.N,)
    hyper = set(c.info.hyperparameters)
    data = inputs_for(c, design, overrides={k: v for k, v in extra.items() if k in hyper})
    data.update(extra)
    return data


class _Mixture:
    """(1 - stray) * lognorm(s=sigma, scale=exp(eta)) + stray * uniform(loc=0, scale=upper):
    CDF, survival and density as the same mixture of the components' (SciPy lognorm and
    uniform docs)."""

    def __init__(self, eta, sigma, stray, upper):
        self.main = stats.lognorm(s=sigma, scale=np.exp(eta))
        self.other = stats.uniform(loc=0.0, scale=upper)
        self.stray = stray

    def logpdf(self, y):
        return np.logaddexp(np.log1p(-self.stray) + self.main.logpdf(y),
                            np.log(self.stray) + self.other.logpdf(y))

    def cdf(self, y):
        return (1 - self.stray) * self.main.cdf(y) + self.stray * self.other.cdf(y)

    def sf(self, y):
        return (1 - self.stray) * self.main.sf(y) + self.stray * self.other.sf(y)

    def logcdf(self, y):
        return np.log(self.cdf(y))

    def logsf(self, y):
        return np.log(self.sf(y))

    def ppf(self, q):
        # the lognormal component's quantiles: only used to place test points
        return self.main.ppf(q)


def scipy_dist(cid, values, y_all):
    if cid == "lognormal_contaminated":
        return _Mixture(values["intercept"], values["sigma"], values["stray"], np.max(y_all))
    return reference(cid, values["intercept"], values, y_all)


def expected_log_lik(dist, y, cens, lower=None, upper=None):
    """SciPy value of each observation's log_lik (module docstring)."""
    y = np.asarray(y, dtype=float)
    cens = np.asarray(cens)
    F = dist.cdf
    FL = 0.0 if lower is None else F(lower)
    FU = 1.0 if upper is None else F(upper)
    out = np.empty_like(y)
    for i, (v, k) in enumerate(zip(y, cens)):
        if k == 0:
            out[i] = dist.logpdf(v)
        elif k == 1:
            out[i] = dist.logsf(v) if upper is None else np.log(FU - F(v))
        else:
            out[i] = dist.logcdf(v) if lower is None else np.log(F(v) - FL)
    if lower is not None or upper is not None:
        out -= np.log(FU - FL)
    return out


def _points(cid, values):
    """Twelve outcome values at the 5 %..95 % quantiles of the fixed-parameter
    distribution (of the lognormal component for the mixture)."""
    y0 = np.ones(12)
    if cid == "shifted_lognormal":
        # shift = shift_frac * min(y): place the points on the unshifted lognormal + 0.3,
        # then the shift follows from min(y)
        base = stats.lognorm(s=values["sigma"], scale=np.exp(values["intercept"]))
        return 0.3 + base.ppf(np.linspace(0.05, 0.95, 12))
    return scipy_dist(cid, values, y0).ppf(np.linspace(0.05, 0.95, 12))


def _evaluate(engine, program, c, cid, y, cens, lower=None, upper=None, values=None, seed=11):
    values = values or TRUE_VALUES[cid]
    design = _plain_design(np.asarray(y, dtype=float))
    data = censoring_data(c, design, cens, lower, upper)
    draw = engine.single_draw(program, data, seed=seed, init=_init(cid, values))
    for name in ("intercept", *FAMILY_PARAMS[cid]):
        np.testing.assert_allclose(draw[name], values[name], rtol=1e-12, err_msg=name)
    log_lik = np.asarray(draw["log_lik"], dtype=float).reshape(-1)
    y_rep = np.asarray(draw["y_rep"], dtype=float).reshape(-1)
    return design, log_lik, y_rep


# the cens pattern of the twelve points: observed, right- and left-censored in turn
PATTERN = np.array([0, 1, -1] * 4)


@pytest.mark.parametrize("cid", TEN)
def test_uncensored_without_window_is_unchanged(cid, engine, builtins, ten):
    """With every cens 0 and no window, log_lik is the plain log density (the formula
    of tests/test_builtins_reference.py) to 1e-10."""
    y = _points(cid, TRUE_VALUES[cid])
    design, log_lik, y_rep = _evaluate(engine, ten[cid], builtins[cid], cid, y, np.zeros(12))
    expected = reference(cid, TRUE_VALUES[cid]["intercept"], TRUE_VALUES[cid], design.y).logpdf(design.y)
    np.testing.assert_allclose(log_lik, expected, rtol=1e-10, atol=0)
    assert np.all(np.isfinite(y_rep))


@pytest.mark.parametrize("cid", TEN)
def test_censored_log_lik_matches_scipy(cid, engine, builtins, ten):
    """Right-censored (log sf) and left-censored (log cdf) observations, no window."""
    values = TRUE_VALUES[cid]
    y = _points(cid, values)
    design, log_lik, _ = _evaluate(engine, ten[cid], builtins[cid], cid, y, PATTERN)
    dist = scipy_dist(cid, values, design.y)
    # Source: SciPy docs, scipy.stats.rv_continuous.logsf / logcdf / logpdf
    np.testing.assert_allclose(log_lik, expected_log_lik(dist, design.y, PATTERN), rtol=1e-8, atol=1e-12)
    # the three kinds really differ (the check can fail if cens were ignored)
    assert not np.allclose(log_lik[PATTERN == 1], dist.logpdf(design.y[PATTERN == 1]))


@pytest.mark.parametrize("window", ["both", "lower", "upper", "lower below support"])
@pytest.mark.parametrize("cid", TEN)
def test_truncated_log_lik_matches_scipy(cid, window, engine, builtins, ten):
    """Truncated observations (logpdf - log(cdf(U) - cdf(L))) and right- / left-censored
    and truncated ones (log(cdf(U) - cdf(y)) - log W, log(cdf(y) - cdf(L)) - log W)."""
    values = TRUE_VALUES[cid]
    y = _points(cid, values)
    lo, hi = y.min() - 0.05 * np.ptp(y), y.max() + 0.05 * np.ptp(y)
    if window == "lower":
        hi = None
    elif window == "upper":
        lo = None
    elif window == "lower below support":
        # positive families: a lower limit at or below the support's lower end (the shift,
        # or 0) has F(L) = 0; real families: a limit far below, F(L) ~ 0
        lo = 0.0 if cid in ("lognormal", "gamma", "weibull", "shifted_lognormal", "lognormal_contaminated",
                            "inverse_gaussian") else y.min() - 50
    design, log_lik, y_rep = _evaluate(engine, ten[cid], builtins[cid], cid, y, PATTERN, lo, hi)
    dist = scipy_dist(cid, values, design.y)
    expected = expected_log_lik(dist, design.y, PATTERN, lo, hi)
    # Source: SciPy docs, scipy.stats.rv_continuous.logpdf / cdf (truncated density
    # logpdf(y) - log(cdf(U) - cdf(L)); censored-and-truncated log(cdf(U) - cdf(y)) - ...)
    np.testing.assert_allclose(log_lik, expected, rtol=1e-8, atol=1e-12)
    if window != "lower below support" or cid in ("exgaussian", "skew_normal"):
        # the window changes the value (the check can fail if it were ignored)
        assert not np.allclose(log_lik, expected_log_lik(dist, design.y, PATTERN), rtol=1e-6)
    lo_ok = -np.inf if lo is None else lo
    hi_ok = np.inf if hi is None else hi
    assert np.all((y_rep >= lo_ok) & (y_rep <= hi_ok))


N_REP = 600


def _rep_case(cid, values):
    """y values inside the window (L, U) = 20 % and 90 % quantiles: 400 observed, 100
    right-censored at the median and 100 left-censored at the 40 % quantile."""
    y0 = np.ones(12)
    if cid == "shifted_lognormal":
        base = stats.lognorm(s=values["sigma"], scale=np.exp(values["intercept"]))
        q = lambda p: 0.3 + base.ppf(p)   # noqa: E731
    else:
        q = scipy_dist(cid, values, y0).ppf
    lo, hi = q(0.2), q(0.9)
    y = np.concatenate([np.linspace(q(0.25), q(0.85), 400), np.full(100, q(0.5)), np.full(100, q(0.4))])
    cens = np.concatenate([np.zeros(400), np.ones(100), -np.ones(100)]).astype(int)
    return y, cens, lo, hi


@pytest.mark.parametrize("cid", TEN)
def test_y_rep_truncated_and_censored_like_the_data(cid, engine, builtins, ten):
    values = TRUE_VALUES[cid]
    y, cens, lo, hi = _rep_case(cid, values)
    design, log_lik, y_rep = _evaluate(engine, ten[cid], builtins[cid], cid, y, cens, lo, hi,
                                       seed=31 + TEN.index(cid))
    assert y_rep.shape == (N_REP,)
    assert np.all((y_rep >= lo) & (y_rep <= hi)), "a replicate outside the window"
    dist = scipy_dist(cid, values, design.y)
    FL, FU = dist.cdf(lo), dist.cdf(hi)

    # observed values: draws of the family truncated to the window (KS against the
    # truncated CDF (F(x) - F(L)) / (F(U) - F(L)), SciPy docs; the 0.001 level is common
    # practice, no source; fixed seed)
    free = y_rep[cens == 0]
    truncated_cdf = lambda x: (dist.cdf(x) - FL) / (FU - FL)   # noqa: E731
    assert stats.kstest(free, truncated_cdf).pvalue > 0.001
    # power: the untruncated family is rejected with the same draws
    assert stats.kstest(free, dist.cdf).pvalue < 0.001

    # right-censored at c: min(draw, c): never above c, exactly c when the draw passed it,
    # which happens with chance (F(U) - F(c)) / W
    for kind, side in ((1, "right"), (-1, "left")):
        c = design.y[cens == kind][0]
        rep = y_rep[cens == kind]
        at = np.isclose(rep, c, rtol=1e-13, atol=0)
        if kind == 1:
            assert np.all(rep <= c), side
            p_pass = (FU - dist.cdf(c)) / (FU - FL)
        else:
            assert np.all(rep >= c), side
            p_pass = (dist.cdf(c) - FL) / (FU - FL)
        # the share exactly at the censoring point against the binomial chance: within
        # 4 binomial SE (4 SE is common practice, no source)
        n = rep.size
        se = np.sqrt(p_pass * (1 - p_pass) / n)
        assert abs(at.mean() - p_pass) < 4 * se, (side, at.mean(), p_pass)
        assert 0 < at.sum() < n, side   # both kinds of replicate occur


@pytest.mark.parametrize("cid", TEN)
def test_y_rep_window_with_almost_no_mass(cid, engine, builtins, ten):
    """A narrow window far in the upper tail (mass below 1e-4): rejection gives up after
    its bounded number of tries and the replicate is put at the window edge nearest the
    last draw; every replicate is finite and inside the window, log_lik stays finite."""
    values = TRUE_VALUES[cid]
    if cid == "shifted_lognormal":
        base = stats.lognorm(s=values["sigma"], scale=np.exp(values["intercept"]))
        lo = 0.3 + base.isf(1e-7)
    else:
        lo = scipy_dist(cid, values, np.ones(12)).main.isf(1e-7) if cid == "lognormal_contaminated" \
            else scipy_dist(cid, values, np.ones(12)).isf(1e-7)
    hi = lo + 1e-4 * abs(lo)
    y = np.linspace(lo, hi, 12)
    dist = scipy_dist(cid, values, y)
    mass = dist.cdf(hi) - dist.cdf(lo)
    assert 0 < mass < 1e-4
    _, log_lik, y_rep = _evaluate(engine, ten[cid], builtins[cid], cid, y, np.zeros(12), lo, hi)
    assert np.all(np.isfinite(log_lik))
    assert np.all(np.isfinite(y_rep))
    assert np.all((y_rep >= lo) & (y_rep <= hi))
    # with at most 1000 tries nearly every replicate ends at an edge
    assert np.mean((y_rep == lo) | (y_rep == hi)) > 0.5


# ----------------------------------------------------------------------------------
# The hand-written inverse Gaussian log CDF / log survival over a wide grid
# ----------------------------------------------------------------------------------

def _accurate_pair(logcdf, logsf):
    """Reference [log F, log S] from SciPy, each taken where it is the smaller of the
    two and the other as log1p(-exp(.)) of it: SciPy's log of a probability near 1 (for
    example logsf = log1p(-exp(b - a)) in the lower tail of invgauss) is computed by a
    subtraction and carries an absolute error of about 1e-16, which is a large relative
    error when the log is itself tiny."""
    logcdf = np.asarray(logcdf, dtype=float)
    logsf = np.asarray(logsf, dtype=float)
    ref_cdf = np.where(logcdf <= -np.log(2), logcdf, np.log1p(-np.exp(logsf)))
    ref_sf = np.where(logsf <= -np.log(2), logsf, np.log1p(-np.exp(logcdf)))
    return ref_cdf, ref_sf


def _log_cdfs_from_program(engine, program, c, cid, x, values):
    """[log F, log S] of the program at each x: every point once left-censored (log F)
    and once right-censored (log S), no window."""
    n = x.size
    y = np.concatenate([x, x])
    cens = np.concatenate([-np.ones(n), np.ones(n)]).astype(int)
    _, log_lik, _ = _evaluate(engine, program, c, cid, y, cens, values=values)
    return log_lik[:n], log_lik[n:]


@pytest.mark.parametrize("mu, lam", [(1.5, 6.0), (2.0, 0.02), (0.5, 400.0), (1.0, 1e-4)],
                         ids=["lambda>mu", "lambda<<mu", "lambda>>mu", "lambda<<<mu"])
def test_inverse_gaussian_log_cdf_and_log_sf_on_a_grid(mu, lam, engine, builtins, ten):
    # Closed form F(x) = Phi(sqrt(lambda/x)(x/mu - 1)) + exp(2 lambda/mu) Phi(-sqrt(lambda/x)(x/mu + 1))
    # (Chhikara & Folks 1989, The Inverse Gaussian Distribution); reference values from
    # SciPy invgauss(mu=mu/lambda, scale=lambda) logcdf / logsf (SciPy docs, scipy.stats.invgauss).
    cid = "inverse_gaussian"
    ref = stats.invgauss(mu=mu / lam, scale=lam)
    x = mu * np.logspace(-4, 4, 17)          # x / mu from 1e-4 to 1e4: both far tails
    values = {"intercept": np.log(mu), "ratio": lam / mu}
    log_cdf, log_sf = _log_cdfs_from_program(engine, ten[cid], builtins[cid], cid, x, values)
    ref_cdf, ref_sf = _accurate_pair(ref.logcdf(x), ref.logsf(x))
    np.testing.assert_allclose(log_cdf, ref_cdf, rtol=1e-8, atol=1e-300)
    # The survival far in the upper tail is a difference of two terms whose ratio tends
    # to (x/mu - 1)/(x/mu + 1) (log_diff_exp in the program, log1p(-exp) in SciPy), so
    # both lose about log10(x/mu) digits of S there, i.e. an absolute error of about
    # 1e-12 on log S; relative 1e-8 on the log still holds over this grid.
    np.testing.assert_allclose(log_sf, ref_sf, rtol=1e-8, atol=1e-300)
    if lam > mu:
        # the far tails are really far: log probabilities below -500
        assert log_cdf.min() < -500 and log_sf.min() < -500


def test_exgaussian_log_cdf_and_log_sf_on_a_grid(engine, builtins, ten):
    """The log-space ex-Gaussian CDF / survival of the program against SciPy exponnorm
    (SciPy docs, scipy.stats.exponnorm: K = tau / sigma, loc = eta, scale = sigma) from
    25 SD below to about 300 tau above the location."""
    cid = "exgaussian"
    values = TRUE_VALUES[cid]                        # eta 1.0, sigma 0.4, tau 1.2
    ref = stats.exponnorm(K=values["tau"] / values["sigma"], loc=values["intercept"], scale=values["sigma"])
    x = np.concatenate([np.linspace(-9.0, 0.0, 7), np.linspace(0.5, 6.0, 8), [10, 20, 40, 100, 200, 400]])
    log_cdf, log_sf = _log_cdfs_from_program(engine, ten[cid], builtins[cid], cid, x, values)
    ref_cdf, ref_sf = _accurate_pair(ref.logcdf(x), ref.logsf(x))
    np.testing.assert_allclose(log_cdf, ref_cdf, rtol=1e-8, atol=1e-300)
    np.testing.assert_allclose(log_sf, ref_sf, rtol=1e-8, atol=1e-300)
    assert log_cdf.min() < -300 and log_sf.min() < -300


def _skew_light_tail_log_cdf(z, a):
    """log F of the standard skew-normal with slant a > 0 at z < 0 by adaptive quadrature
    of Owen's integral, F(z) = 2 (T(z, inf) - T(z, a)) with T(h, a) = (1/2pi) int_0^a
    exp(-h^2 (1 + x^2) / 2) / (1 + x^2) dx (Owen 1956, Tables for computing bivariate
    normal probabilities, Ann. Math. Statist. 27, 1075-1090), after x^2 = a^2 + w and
    the factor exp(-(1 + a^2) z^2 / 2) taken out: independent of the program's
    Gauss-Laguerre rule and of SciPy's skewnorm."""
    from scipy import integrate

    rate = z * z / 2
    integral, _ = integrate.quad(lambda w: np.exp(-rate * w) / (np.sqrt(a * a + w) * (1 + a * a + w)),
                                 0, np.inf, epsabs=0, epsrel=1e-13, limit=200)
    return -(1 + a * a) * rate - np.log(2 * np.pi) + np.log(integral)


@pytest.mark.parametrize("slant", [4.0, -4.0, 0.5, 30.0])
def test_skew_normal_log_cdf_and_log_sf_on_a_grid(slant, engine, builtins, ten):
    """The program's skew-normal CDF / survival against SciPy skewnorm (SciPy docs,
    scipy.stats.skewnorm: a = slant, loc = eta, scale = omega) from the light to the
    heavy tail; in the light tail, where SciPy's own value is good only to about 1e-4
    relative for large slants (measured against the quadrature), against quadrature of
    Owen's integral."""
    cid = "skew_normal"
    values = dict(TRUE_VALUES[cid], slant=slant)     # eta 1.0, omega 2.0
    eta, omega = values["intercept"], values["omega"]
    z = np.array([-12, -8, -5, -3, -2, -1.5, -1, -0.5, -0.1, 0, 0.3, 1, 2, 3, 5, 8, 12, 20])
    x = eta + omega * z
    log_cdf, log_sf = _log_cdfs_from_program(engine, ten[cid], builtins[cid], cid, x, values)
    ref = stats.skewnorm(a=slant, loc=eta, scale=omega)
    ref_cdf, ref_sf = _accurate_pair(ref.logcdf(x), ref.logsf(x))
    # the light tail (left for a positive slant, right for a negative one, by the mirror
    # image: -X is skew-normal with slant -slant) from the quadrature
    a = abs(slant)
    zz = z if slant > 0 else -z
    quad = np.array([_skew_light_tail_log_cdf(v, a) if v < 0 else np.nan for v in zz])
    light = (zz < 0) & np.isfinite(quad) & (quad < np.log(1e-6))
    if slant > 0:
        ref_cdf = np.where(light, quad, ref_cdf)
        ref_sf = np.where(light, np.log1p(-np.exp(quad)), ref_sf)
    else:
        ref_sf = np.where(light, quad, ref_sf)
        ref_cdf = np.where(light, np.log1p(-np.exp(quad)), ref_cdf)
    assert light.sum() >= 3
    np.testing.assert_allclose(log_cdf, ref_cdf, rtol=1e-8, atol=1e-300)
    np.testing.assert_allclose(log_sf, ref_sf, rtol=1e-8, atol=1e-300)


def _skew_far_tail(z, a):
    """log of the standard skew-normal's (slant a >= 0) tail beyond z (log S for z > 0,
    log F for z < 0) by adaptive quadrature of its definition, density 2 phi(x) Phi(a x)
    (Azzalini 1985, Scand. J. Statist. 12, 171-178), with phi(z) Phi(a z) taken out so
    nothing underflows: independent of the program's Gauss-Laguerre rule."""
    from scipy import integrate, special

    base = special.log_ndtr(a * z)
    side = 1.0 if z > 0 else -1.0
    integral, _ = integrate.quad(
        lambda u: np.exp(-abs(z) * u - u * u / 2 + special.log_ndtr(a * (z + side * u)) - base),
        0, np.inf, epsabs=0, epsrel=1e-13, limit=200)
    return np.log(2) + stats.norm.logpdf(z) + base + np.log(integral)


@pytest.mark.parametrize("slant", [0.5, 0.01, 4.0, -4.0])
def test_skew_normal_far_tails(slant, engine, builtins, ten):
    """Far out in both tails (|z| from 31 to 200, where Owen's T underflows and a
    censored observation far from an initial value used to give log(0) and a non-finite
    gradient, found on survival's capacitor data) the program's log F and log S are
    finite and match quadrature of the density to 1e-8 on the tail's side."""
    cid = "skew_normal"
    values = dict(TRUE_VALUES[cid], slant=slant)
    eta, omega = values["intercept"], values["omega"]
    z = np.array([-200.0, -60.0, -40.0, -31.0, 31.0, 40.0, 60.0, 200.0])
    x = eta + omega * z
    log_cdf, log_sf = _log_cdfs_from_program(engine, ten[cid], builtins[cid], cid, x, values)
    a, zz = (slant, z) if slant >= 0 else (-slant, -z)
    tail = np.array([_skew_far_tail(v, a) for v in zz])
    # the tail beyond zz is S where zz > 0 and F where zz < 0 (mirrored back for a
    # negative slant: -X is skew-normal with slant -slant)
    upper_side = (zz > 0) if slant >= 0 else (zz < 0)
    ref_sf = np.where(upper_side, tail, np.log1p(-np.exp(tail)))
    ref_cdf = np.where(upper_side, np.log1p(-np.exp(tail)), tail)
    assert np.isfinite(log_cdf).all() and np.isfinite(log_sf).all()
    np.testing.assert_allclose(log_cdf, ref_cdf, rtol=1e-8, atol=1e-300)
    np.testing.assert_allclose(log_sf, ref_sf, rtol=1e-8, atol=1e-300)
