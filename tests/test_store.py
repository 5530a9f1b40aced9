"""The fit store: reruns reuse fits, changes invalidate exactly what they touch, and an
interrupted run leaves whole, reusable fits."""

from __future__ import annotations

import shutil

import arviz as az
import numpy as np
import pandas as pd
import pytest

from contenders.candidates import builtin_folder
from contenders.config import RunConfig
from contenders.runner import run


@pytest.fixture
def setup(tmp_path, programs):
    rng = np.random.default_rng(21)
    pd.DataFrame({"rt": rng.lognormal(6, 0.4, 50)}).to_csv(tmp_path / "d.csv", index=False)
    folder = tmp_path / "cands"
    folder.mkdir()
    for cid in ("lognormal", "gamma"):
        shutil.copy(builtin_folder() / f"{cid}.stan", folder / f"{cid}.stan")
    cfg = RunConfig(data=tmp_path / "d.csv", outcome="rt", candidates=folder, out=tmp_path / "out",
                    chains=2, warmup=200, draws=200, prior_draws=100, engine="pystan")
    return cfg, folder


def test_rerun_samples_nothing_and_gives_the_same_answer(setup):
    cfg, _ = setup
    first = run(cfg)
    assert first.fits_sampled == 4 and first.fits_reused == 0  # prior + posterior, two candidates
    second = run(cfg)
    assert second.fits_sampled == 0 and second.fits_reused == 4
    for a, b in zip(first.candidates, second.candidates):
        assert a.oos.elpd == b.oos.elpd
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
    import contenders.runner as runner

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
