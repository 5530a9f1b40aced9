"""Runs on a Dask cluster (``--cluster``): a LocalCluster on loopback, started here,
gives the same results as the local executor for the same seeds; the client owns the
fit store; a bad address is one clear error."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import cloudpickle
import dask
import numpy as np
import pytest
from distributed import LocalCluster

from batch_cases import config, local_batch
from contenders.pipeline.batch import run_batch
from contenders.inputs.candidates import check_against_data
from contenders.errors import UserError
from contenders.pipeline.executor_dask import DaskExecutor
from contenders.pipeline.runner import candidate_task, fit_task, load_design, select_candidates

# helpers defined here travel to the workers by value (the workers cannot import this file)
cloudpickle.register_pickle_by_value(sys.modules[__name__])


@pytest.fixture(scope="module")
def cluster():
    # PyStan runs its chains in child processes, which daemonic processes may not start;
    # the README tells users to start their workers the same way.
    with dask.config.set({"distributed.worker.daemon": False}):
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                          dashboard_address=None) as c:
            yield c


def _summary(out: Path, name: str) -> dict:
    return json.loads((out / name / "summary.json").read_text())


def test_batch_on_the_cluster_equals_the_local_executor(programs, cluster, tmp_path):
    folder, local = local_batch()
    files = sorted(folder.glob("*.csv"))
    remote = run_batch(config(tmp_path / "remote", cluster=cluster.scheduler_address), files)
    assert [(r.name, r.status, r.outcome) for r in remote.rows] == [
        (r.name, r.status, r.outcome) for r in local.rows]
    assert remote.rows[2].reason == local.rows[2].reason
    for name in ("a_fast", "b_slow", "d_fast_again"):
        a, b = _summary(local.out, name), _summary(tmp_path / "remote", name)
        assert b["ranking"] == a["ranking"]
        for ca, cb in zip(a["candidates"], b["candidates"]):
            # same seeds, same programs: the same draws, so equal to the last digit
            for key in ("status", "elpd_loo", "elpd_loo_se", "p_loo", "elpd_diff", "stacking_weight",
                        "pseudo_bma_weight", "rhat_max", "divergences"):
                assert cb[key] == ca[key], (name, ca["id"], key)
        # the client owns the store: every fit file named is in its own folder
        for c in b["candidates"]:
            for f in c["fit_files"]:
                assert Path(f).parent == tmp_path / "remote" / "fits" and Path(f).exists()
    assert _summary(tmp_path / "remote", "d_fast_again")["fits"]["sampled"] == 0   # a store hit
    assert [r.lead for r in remote.rows] == [r.lead for r in local.rows]


def test_worker_stages_come_back_and_fits_land_in_the_client_store(programs, cluster, tmp_path):
    folder, local = local_batch()
    cfg = config(tmp_path, jobs=2).with_(data=folder / "a_fast.csv")
    design = load_design(cfg)
    cand = {c.id: c for c in select_candidates(cfg)}["lognormal"]
    check_against_data(cand, design, None)
    events: list[tuple[str, str]] = []
    store = tmp_path / "client-store"
    ex = DaskExecutor(cluster.scheduler_address, "pystan", on_event=lambda cid, s: events.append((cid, s)))
    try:
        res = ex.submit(candidate_task, cand, design, cfg, "pystan", str(store)).result(timeout=300)
    finally:
        ex.close()
    reference = next(c for c in _summary(local.out, "a_fast")["candidates"] if c["id"] == "lognormal")
    assert res.oos.elpd_loo == reference["elpd_loo"]
    assert res.fit_files and all(Path(f).parent == store and Path(f).exists() for f in res.fit_files)
    assert Path(res.posterior_file) in {Path(f) for f in res.fit_files}
    stages = [s for cid, s in events if cid == "lognormal"]
    assert stages[0] == "waiting: sent to the cluster"
    assert {"prior", "posterior", "out-of-sample"} <= set(stages)


def keep_means(draws, health):
    """What a study keeps of a fit: the posterior means."""
    return {name: float(np.mean(draws.idata.posterior[name].values))
            for name in ("intercept", "sigma")}


def test_fit_task_on_the_cluster_equals_the_call_in_this_process(programs, cluster, tmp_path):
    folder, _local = local_batch()
    cfg = config(tmp_path).with_(data=folder / "b_slow.csv")
    design = load_design(cfg)
    cand = {c.id: c for c in select_candidates(cfg)}["normal"]
    here_health, here = fit_task(cand, design, cfg, "pystan", str(tmp_path / "here"), keep_means, 7)
    ex = DaskExecutor(cluster.scheduler_address, "pystan")
    try:
        health, there = ex.submit(fit_task, cand, design, cfg, "pystan", str(tmp_path / "there"),
                                  keep_means, 7).result(timeout=300)
    finally:
        ex.close()
    assert there == here and health.rhat_max == here_health.rhat_max
    # the fit came back into the client's store under the same content-addressed name
    assert sorted(p.name for p in (tmp_path / "there").glob("*.nc")) == \
        sorted(p.name for p in (tmp_path / "here").glob("*.nc"))
    # sanity of the kept means against the generating process (normal, mean 650, SD 60);
    # exact only up to sampling error, so a wide band (common practice, no source)
    assert abs(there["sigma"] - np.std(design.y, ddof=1)) < 15


def test_bad_cluster_address_is_one_clear_error(programs, tmp_path):
    folder, _local = local_batch()
    base = [sys.executable, "-m", "contenders.cli", "run", str(folder / "a_fast.csv"), "--outcome", "rt",
            "--only", "normal", "--engine", "pystan", "--out", str(tmp_path / "o")]
    res = subprocess.run([*base, "--cluster", "tcp://127.0.0.1:9"], capture_output=True, text=True, timeout=300)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr
    assert "--cluster tcp://127.0.0.1:9: cannot connect to a Dask scheduler there" in lines[0]
    assert "leave out --cluster" in lines[0]
    res = subprocess.run([*base, "--cluster", "nonsense"], capture_output=True, text=True, timeout=300)
    assert res.returncode == 2
    assert res.stderr.strip() == ("contenders: configuration key 'cluster' must be a Dask scheduler address "
                                  "such as tcp://HOST:PORT, or empty for this machine; got 'nonsense'")


def test_daemonic_workers_are_refused_with_the_fix():
    with dask.config.set({"distributed.worker.daemon": True}), \
            LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                         dashboard_address=None) as c:   # Dask's default: daemonic worker processes
        with pytest.raises(UserError, match="DASK_DISTRIBUTED__WORKER__DAEMON=False dask worker"):
            DaskExecutor(c.scheduler_address, "pystan")


def die_once(marker: str) -> str:
    """Kills the worker running it the first time, as a lost machine would."""
    if not os.path.exists(marker):
        Path(marker).write_text("lost")
        os._exit(1)
    return "finished on the second attempt"


def test_a_lost_worker_is_retried(cluster, tmp_path):
    ex = DaskExecutor(cluster.scheduler_address, "cmdstanpy")   # no Stan here: skips the PyStan set-up
    try:
        assert ex.submit(die_once, str(tmp_path / "marker")).result(timeout=120) == "finished on the second attempt"
    finally:
        ex.close()
    assert (tmp_path / "marker").exists()
