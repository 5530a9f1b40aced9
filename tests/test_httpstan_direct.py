"""The PyStan engine's fast sampler is used only with the httpstan it was written for;
with any other version the engine samples through PyStan's public interface, says so
once, and gives the same draws."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from contenders.engines import SamplerSettings
from contenders.engines import httpstan_direct as hd
from contenders.engines import pystan_engine as pe
from contenders.inputs.candidates import inputs_for
from contenders.inputs.data import build_design

TINY = SamplerSettings(chains=2, warmup=100, draws=60, seed=23)


@pytest.fixture(scope="module")
def design():
    rng = np.random.default_rng(8)
    n = 24
    table = pd.DataFrame({
        "rt": rng.lognormal(6.0, 0.3, n),
        "cue": np.tile(["off", "on"], n // 2),
        "who": np.repeat(["a", "b", "c"], n // 3),
    })
    return build_design(table, "rt", ["cue"], "who")


def test_the_version_check_accepts_the_installed_httpstan_4_13_and_no_other():
    from importlib.metadata import version

    assert hd.DETECTED == version("httpstan")
    assert hd.DETECTED.startswith("4.13.")
    assert hd.compatible() is True
    assert hd.compatible("4.13.0") and hd.compatible("4.13.9")
    for other in ("4.12.0", "4.14.0", "5.13.0", "4", "", "not installed", "4.x"):
        assert hd.compatible(other) is False, other


def _refuse(*_a, **_k):
    raise AssertionError("httpstan's inside was touched with an httpstan it was not written for")


#: What ``httpstan_direct`` offers that reaches inside httpstan or PyStan, all refused in
#: the fallback tests (``forgetting_fits`` is tried there too, defensively; see its doc).
INSIDE = ("sample_direct", "remove_call_sockets", "serving_from", "ChainPool", "model_name", "module_ready",
          "load_module", "compile_request")


def test_another_httpstan_samples_through_pystan_with_one_notice_and_the_same_draws(
        engine, programs, builtins, design, capfd, monkeypatch):
    import httpstan.cache

    data = inputs_for(builtins["lognormal"], design)
    fast = engine.sample(programs["lognormal"], data, TINY)
    capfd.readouterr()

    monkeypatch.setattr(hd, "DETECTED", "4.14.2")     # the detected version, not the package
    monkeypatch.setattr(pe, "_FALLBACK_SAID", [False])
    for name in INSIDE:
        monkeypatch.setattr(hd, name, _refuse)
    slow = engine.sample(programs["lognormal"], data, TINY)
    again = engine.sample(programs["lognormal"], data, TINY)
    values = engine.single_draw(programs["lognormal"], data, seed=5)   # PyStan's fixed_param
    err = capfd.readouterr().err

    notice = ("contenders: httpstan 4.14 is not the 4.13 this engine's fast sampler was written for; "
              "compiling and sampling through PyStan's public interface instead (slower, same draws)")
    assert err.count(notice) == 1, err
    assert err.count("contenders:") == 1, err
    assert values["y_rep"].shape == (design.N,)
    # the same draws as the fast path, which tests/test_engines.py
    # (test_pystan_lean_reader_gives_pystans_own_draws) checks against PyStan's own
    # model.sample read by az.from_pystan: the outside reference for both
    for draws in (slow, again):
        for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive", "observed_data"):
            ours, theirs = getattr(fast.idata, group), getattr(draws.idata, group)
            assert set(ours.data_vars) == set(theirs.data_vars), group
            for name in ours.data_vars:
                assert ours[name].dtype == theirs[name].dtype, (group, name)
                assert ours[name].dims == theirs[name].dims, (group, name)
                np.testing.assert_array_equal(ours[name].values, theirs[name].values, err_msg=f"{group}/{name}")
        assert draws.sample_seconds > 0 and draws.wait_seconds == 0.0
    fits = httpstan.cache.model_directory(programs["lognormal"].handle) / "fits"
    assert not fits.exists() or not any(fits.iterdir()), "httpstan's on-disk fit copies are removed"


def test_another_httpstan_compiles_through_stan_build_and_samples_the_same_draws(
        engine, programs, builtins, design, capfd, monkeypatch):
    import dataclasses

    from contenders.engines import SamplingError

    lognormal = builtins["lognormal"]
    data = inputs_for(lognormal, design)
    fast = engine.sample(programs["lognormal"], data, TINY)
    capfd.readouterr()

    monkeypatch.setattr(hd, "DETECTED", "4.14.2")
    monkeypatch.setattr(pe, "_FALLBACK_SAID", [False])
    for name in INSIDE:
        monkeypatch.setattr(hd, name, _refuse)
    assert engine.is_cached(lognormal) is False    # not knowable through PyStan's public interface
    program = engine.compile(lognormal)            # built before: stan.build finds it in the cache
    assert program.candidate_id == "lognormal" and program.handle == lognormal.code
    assert program.from_cache is False
    slow = engine.sample(program, data, TINY)
    for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive"):
        ours, theirs = getattr(fast.idata, group), getattr(slow.idata, group)
        assert set(ours.data_vars) == set(theirs.data_vars), group
        for name in ours.data_vars:
            np.testing.assert_array_equal(ours[name].values, theirs[name].values, err_msg=f"{group}/{name}")
    # a program the compiler rejects fails its compile, with the compiler's words
    broken = dataclasses.replace(builtins["normal"], code=builtins["normal"].code.replace(
        "real<lower=0> sigma;", "real<lower=0> sigma", 1))
    assert broken.code != builtins["normal"].code
    with pytest.raises(SamplingError) as err:
        engine.compile(broken)
    message = str(err.value)
    assert message.startswith("normal.stan: compiling failed:\n"), message
    assert "Syntax error" in message and "Traceback" not in message
    err_text = capfd.readouterr().err
    assert err_text.count("contenders: httpstan 4.14 is not the 4.13") == 1, err_text


def test_another_httpstan_holds_the_shared_chain_slots_while_pystan_runs_its_chains(
        programs, builtins, design, monkeypatch):
    # PyStan's public sample starts every chain at once; the fit holds its share's slots
    # meanwhile (one, waiting if need be, then every free one up to its chains), so the
    # run's other workers wait for them, and gives them all back
    import threading

    from contenders.engines.pystan_engine import PyStanEngine
    from contenders.machine import ChainShare

    slots = threading.Semaphore(3)
    seen = []
    real = pe._sample_public

    def sample_public(model, settings):
        free = sum(slots.acquire(blocking=False) for _ in range(3))
        for _ in range(free):
            slots.release()
        seen.append(3 - free)   # slots held by the fit while PyStan samples
        return real(model, settings)

    monkeypatch.setattr(hd, "DETECTED", "4.14.2")
    monkeypatch.setattr(pe, "_FALLBACK_SAID", [True])
    monkeypatch.setattr(pe, "_sample_public", sample_public)
    for name in INSIDE:
        monkeypatch.setattr(hd, name, _refuse)
    engine = PyStanEngine(ChainShare(chains_at_once=3, slots=slots))
    data = inputs_for(builtins["normal"], design)
    engine.sample(programs["normal"], data, TINY)                          # 2 chains: 2 of the 3 slots
    slots.acquire()
    slots.acquire()   # two held by other workers
    engine.sample(programs["normal"], data, SamplerSettings(chains=3, warmup=100, draws=60, seed=23))
    slots.release()
    slots.release()
    assert seen == [2, 3]   # the second: the one slot left, plus the two others hold
    assert all(slots.acquire(blocking=False) for _ in range(3))   # every slot came back
    assert not slots.acquire(blocking=False)


def test_two_engines_in_one_process_keep_their_own_chain_processes(programs, builtins, design):
    from contenders.engines.pystan_engine import PyStanEngine
    from contenders.machine import ChainShare

    one, two = PyStanEngine(ChainShare(chains_at_once=1)), PyStanEngine(ChainShare(chains_at_once=2))
    try:
        data = inputs_for(builtins["normal"], design)
        a = one.sample(programs["normal"], data, TINY)
        b = two.sample(programs["normal"], data, TINY)
        assert one._pool is not two._pool
        assert (one._pool.workers, two._pool.workers) == (1, 2)
        # how many chains run at once never changes the draws
        np.testing.assert_array_equal(a.idata.posterior["sigma"].values, b.idata.posterior["sigma"].values)
        one.close()
        assert one._pool is None and two._pool is not None
        two.single_draw(programs["normal"], data, seed=3)   # the other engine goes on
    finally:
        one.close()
        two.close()
