"""Both engines return the same InferenceData layout; the fit subset switches modes."""

from __future__ import annotations

import contextlib
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from contenders.inputs.candidates import inputs_for
from contenders.inputs.data import build_design
from contenders.engines import SamplerSettings, cmdstan_available, get_engine

SMALL = SamplerSettings(chains=2, warmup=200, draws=150, seed=11)


@contextlib.contextmanager
def _lock_held_elsewhere(key: str, seconds: float):
    """Another process holds the compile lock ``key`` for ``seconds`` while the body runs."""
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import time\n"
         "from contenders.engines.base import compile_lock\n"
         f"with compile_lock({key!r}):\n"
         "    print('held', flush=True)\n"
         f"    time.sleep({seconds})\n"],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        yield
    finally:
        holder.stdout.close()
        holder.wait(timeout=30)


@pytest.fixture(scope="module")
def design():
    rng = np.random.default_rng(3)
    n = 40
    table = pd.DataFrame({
        "rt": rng.lognormal(6.2, 0.35, n),
        "cue": np.tile(["off", "on"], n // 2),
        "who": np.repeat(["a", "b", "c", "d"], n // 4),
    })
    return build_design(table, "rt", ["cue"], "who")


def _check_layout(draws, design, settings):
    idata = draws.idata
    for group in ("posterior", "posterior_predictive", "log_likelihood", "sample_stats", "observed_data"):
        assert hasattr(idata, group), group
    shape = (settings.chains, settings.draws, design.N)
    assert idata.posterior_predictive["y_rep"].shape == shape
    assert idata.log_likelihood["log_lik"].shape == shape
    np.testing.assert_allclose(idata.observed_data["y"].values, design.y)
    for stat in ("diverging", "tree_depth", "energy", "step_size", "acceptance_rate"):
        assert idata.sample_stats[stat].shape == shape[:2], stat
    assert idata.posterior["intercept"].shape == shape[:2]
    assert idata.posterior["coef"].shape == shape[:2] + (design.K,)
    assert idata.posterior["group_z"].shape == shape[:2] + (design.J,)
    assert draws.sample_seconds > 0 and draws.compile_seconds >= 0


def test_pystan_output_layout_seed_and_cleanup(engine, programs, builtins, design):
    import httpstan.cache

    c = builtins["lognormal"]
    data = inputs_for(c, design)
    first = engine.sample(programs["lognormal"], data, SMALL)
    _check_layout(first, design, SMALL)
    again = engine.sample(programs["lognormal"], data, SMALL)
    np.testing.assert_array_equal(first.idata.posterior["sigma"].values, again.idata.posterior["sigma"].values)
    other = engine.sample(programs["lognormal"], data, SamplerSettings(chains=2, warmup=200, draws=150, seed=12))
    assert not np.array_equal(first.idata.posterior["sigma"].values, other.idata.posterior["sigma"].values)
    fits = httpstan.cache.model_directory(programs["lognormal"].handle) / "fits"
    assert not fits.exists() or not any(fits.iterdir()), "httpstan's on-disk fit copies are removed"


def test_pystan_lean_reader_gives_pystans_own_draws(engine, programs, builtins, design):
    """The engine reads httpstan's output chain by chain (to save memory) instead of
    through PyStan's ``Fit``; the draws must be exactly what PyStan's own
    ``model.sample`` returns for the same seed (PyStan 3 as the reference reader)."""
    import arviz as az
    import stan

    from contenders.engines.pystan_engine import _forgetting_fits

    c = builtins["lognormal"]
    data = inputs_for(c, design)
    ours = engine.sample(programs["lognormal"], data, SMALL).idata
    model = stan.build(programs["lognormal"].code, data=dict(data), random_seed=SMALL.seed)
    with _forgetting_fits():
        fit = model.sample(num_chains=SMALL.chains, num_warmup=SMALL.warmup, num_samples=SMALL.draws)
    ref = az.from_pystan(posterior=fit, posterior_model=model, posterior_predictive=["y_rep"],
                         log_likelihood=["log_lik"])
    for group in ("posterior", "sample_stats", "log_likelihood"):
        theirs = getattr(ref, group)
        for name in theirs.data_vars:
            np.testing.assert_array_equal(np.asarray(getattr(ours, group)[name].values, dtype=float),
                                          np.asarray(theirs[name].values, dtype=float), err_msg=name)
    # y_rep is kept as float32: equal to float32 rounding
    np.testing.assert_allclose(ours.posterior_predictive["y_rep"].values,
                               ref.posterior_predictive["y_rep"].values, rtol=1e-7)


def test_empty_fit_subset_samples_the_prior(engine, programs, builtins, design):
    """With N_fit = 0 the posterior is the prior: the lognormal intercept is
    normal(log(y_center), 1.5) and sigma is half-normal(0, 1), whose mean is
    sqrt(2 / pi) (closed forms)."""
    c = builtins["lognormal"]
    data = inputs_for(c, design, fit_idx=np.arange(0))
    draws = engine.sample(programs["lognormal"], data, SamplerSettings(chains=2, warmup=300, draws=1000, seed=5))
    a = draws.idata.posterior["intercept"].values.ravel()
    s = draws.idata.posterior["sigma"].values.ravel()
    # Monte Carlo tolerance: 5 standard errors with an effective size of at least 500 draws
    # (common practice, no source).
    assert abs(a.mean() - np.log(design.y_center)) < 5 * 1.5 / np.sqrt(500)
    assert abs(a.std() - 1.5) < 0.2
    assert abs(s.mean() - np.sqrt(2 / np.pi)) < 5 * np.sqrt(1 - 2 / np.pi) / np.sqrt(500)


@pytest.mark.cmdstan
def test_cmdstanpy_gives_the_same_layout_and_agrees_with_pystan(engine, programs, builtins, design):
    ok, why = cmdstan_available()
    if not ok:
        pytest.skip(f"CmdStanPy engine not tested: {why}")
    cmd = get_engine("cmdstanpy")
    c = builtins["lognormal"]
    data = inputs_for(c, design)
    settings = SamplerSettings(chains=2, warmup=300, draws=500, seed=4)
    a = cmd.sample(cmd.compile(c), data, settings)
    _check_layout(a, design, settings)
    b = engine.sample(programs["lognormal"], data, settings)
    for name in ("intercept", "sigma"):
        x, y = a.idata.posterior[name].values.ravel(), b.idata.posterior[name].values.ravel()
        # two independent MCMC runs: means agree within 5 combined standard errors,
        # effective size taken as 300 per run (common practice, no source)
        assert abs(x.mean() - y.mean()) < 5 * np.sqrt(x.var() / 300 + y.var() / 300), name


def test_unknown_engine_and_missing_cmdstan_are_user_errors():
    from contenders.errors import UserError

    with pytest.raises(UserError, match="engine 'stanny' is not known; choose one of: auto, pystan, cmdstanpy"):
        get_engine("stanny")
    ok, _ = cmdstan_available()
    if not ok:
        with pytest.raises(UserError, match="engine 'cmdstanpy' cannot run: no CmdStan installation found"):
            get_engine("cmdstanpy")
        assert get_engine("auto").name == "pystan"


def _state(pid: int) -> str:
    """The process's state letter from /proc (Linux), or "" when it is gone."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0]
    except OSError:
        return ""


def test_chain_processes_end_when_their_parent_is_killed(tmp_path):
    # A worker killed outright (a cluster does this) must not leave its idle chain
    # processes behind waiting on a queue for ever.
    import subprocess
    import sys
    import time

    script = tmp_path / "parent.py"
    script.write_text(
        "import os\n"
        "from contenders.engines import httpstan_direct as hd\n"
        "hd.PARENT_CHECK_SECONDS = 0.2\n"
        "pool = hd.ChainPool(1)\n"
        "print(pool.submit(os.getpid).result(), flush=True)\n"
        "os._exit(0)\n")
    # read the one line, not to end of file: a surviving chain process keeps the pipe open
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    try:
        chain = int(proc.stdout.readline())
        assert proc.wait(timeout=120) == 0
    finally:
        proc.stdout.close()
    deadline = time.monotonic() + 15
    while _state(chain) not in ("", "Z") and time.monotonic() < deadline:
        time.sleep(0.1)
    assert _state(chain) in ("", "Z"), f"chain process {chain} outlived its parent"


def test_compile_waits_while_another_process_builds_the_same_program(engine, programs, builtins):
    # Two runs started at once must not build one program into httpstan's cache side by
    # side: httpstan empties the folder before it builds, and loading a half-linked module
    # fails (a reply that is not JSON) or kills the process (bus error). Another process
    # holds the program's lock for 3 s; compiling the same program here must wait for it,
    # where a program already in the cache otherwise returns at once.
    import subprocess
    import sys
    import time

    import httpstan.models

    from contenders.engines.pystan_engine import _lock_key

    candidate = builtins["normal"]
    key = _lock_key(httpstan.models.calculate_model_name(candidate.code))
    with _lock_held_elsewhere(key, 3):
        start = time.monotonic()
        program = engine.compile(candidate)
        waited = time.monotonic() - start
    assert program.from_cache
    assert waited > 2.0, f"compile returned after {waited:.2f} s while another process held the program"
    # and this process let go of it: another can take it at once
    import fcntl

    from contenders.engines.base import _lock_folder

    with open(_lock_folder() / f"{key}.lock", "a+") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)   # raises BlockingIOError if held


def test_a_cache_entry_left_half_built_is_not_taken_as_compiled(engine, programs, builtins, tmp_path):
    # A compile killed while linking leaves a truncated module in httpstan's cache; two
    # processes that built one program at once can leave a module without the compiler
    # logs that httpstan's server reads back. httpstan only rebuilds a missing module; on
    # these its server fails with a reply that is not JSON, for ever. The engine must
    # report such an entry as not compiled and remove it, so the next compile builds it.
    import uuid

    import httpstan.cache
    import httpstan.models

    from contenders.inputs.candidates import load_candidate

    real = next(httpstan.cache.model_directory(programs["normal"].handle).glob("*.so"))
    path = tmp_path / "normal_copy.stan"
    cases = {"module cut off": (real.read_bytes()[:64], ["stanc.log", "stderr.log"]),
             "logs missing": (real.read_bytes(), ["stderr.log"])}
    for case, (module, logs) in cases.items():
        path.write_text(builtins["normal"].code + f"\n// copy for a cache test, {uuid.uuid4().hex}\n")
        candidate = load_candidate(path)
        name = httpstan.models.calculate_model_name(candidate.code)
        folder = httpstan.cache.model_directory(name)
        folder.mkdir(parents=True)
        try:
            (folder / real.name.replace(real.parent.name, folder.name)).write_bytes(module)
            for log in logs:
                (folder / log).write_text("")
            assert engine.is_cached(candidate) is False, case
            assert not folder.exists(), case
        finally:
            httpstan.cache.delete_model_directory(name)
    # the real entry, with its logs, is compiled
    assert engine.is_cached(builtins["normal"]) is True


def test_one_draw_evaluations_leave_no_socket_files(engine, programs, builtins, design, tmp_path, monkeypatch):
    # httpstan binds a Unix socket file in the temporary folder for each sampler call it
    # serves and never removes it; the engine removes it once the call is over.
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    data = inputs_for(builtins["normal"], design, None)
    values = engine.single_draw(programs["normal"], data, seed=5)
    assert values["y_rep"].shape == (design.N,)
    assert not list(tmp_path.glob("httpstan_*.sock")), "a socket file was left behind"


def test_a_compile_past_pystans_request_limit_is_retried_once_then_one_line(engine, programs, builtins,
                                                                            monkeypatch):
    # PyStan's client gives up on a request after aiohttp's default 300 s; a loaded machine
    # can take longer to compile. Simulated here: the compile request times out.
    import asyncio
    import dataclasses

    import stan.common

    from contenders.engines import compile_all
    from contenders.engines.base import SamplingError

    real = stan.common.HttpstanClient
    posts = []

    def client(times_out: int):
        class Client(real):
            async def post(self, path, json):
                posts.append(path)
                if len(posts) <= times_out:
                    raise asyncio.TimeoutError()
                return await super().post(path, json)
        return Client

    monkeypatch.setattr(stan.common, "HttpstanClient", client(1))
    program = engine.compile(builtins["normal"])   # the second request answers
    assert posts == ["/models", "/models"] and program.from_cache
    posts.clear()
    monkeypatch.setattr(stan.common, "HttpstanClient", client(99))
    with pytest.raises(SamplingError) as err:
        engine.compile(builtins["normal"])
    assert len(posts) == 2   # tried twice, not more
    message = str(err.value)
    assert "\n" not in message and "Traceback" not in message
    assert message.startswith("normal.stan: compiling took longer than the 300 s PyStan allows one request, "
                              "2 times (the machine is busy)")
    assert "--jobs 1" in message
    # in a run the candidate fails with that line and the others go on
    posts.clear()
    copy = dataclasses.replace(builtins["normal"], problems=[])
    got = compile_all(engine, [copy], jobs=1)
    assert got.programs == {} and got.failures == {"normal": message}
    assert got.problems(copy) == [message]
    assert copy.problems == []   # the candidate (inputs' object) is left as it was


def test_compiling_says_when_each_program_starts_and_ends_and_when_it_waits_for_a_lock(engine, programs,
                                                                                       builtins):
    import subprocess
    import sys
    import time

    import httpstan.models

    from contenders.engines import Program, compile_all
    from contenders.engines.base import Engine
    from contenders.engines.pystan_engine import _lock_key

    class Slow(Engine):   # compiles nothing, takes 1.2 s for it: the lines around a compile
        name = "slow"

        def version(self):
            return "slow 0"

        def is_cached(self, candidate):
            return False

        def compile(self, candidate):
            time.sleep(1.2)
            return Program(candidate.id, candidate.code, None, 1.2, False)

        def sample(self, *a):
            raise NotImplementedError

        def single_draw(self, *a, **k):
            raise NotImplementedError

    lines: list[str] = []
    compile_all(Slow(), [builtins["gamma"]], jobs=1, progress=lines.append)
    assert lines == ["  compiling gamma ...", "  compiled gamma in 1 s"]
    # another process holds the program's compile lock for 3 s: this one says it waits
    lines.clear()
    key = _lock_key(httpstan.models.calculate_model_name(builtins["normal"].code))
    with _lock_held_elsewhere(key, 3):
        got = compile_all(engine, [builtins["normal"]], jobs=1, progress=lines.append)
    assert set(got.programs) == {"normal"} and got.failures == {}
    assert lines[0] == ("normal: waiting for another process that is compiling this program (its compile lock); "
                        "this one goes on when that is done")
    assert lines[1] in ("normal: the other process is done (waited 2 s)",
                        "normal: the other process is done (waited 3 s)")
    assert len(lines) == 2   # cached: no compile lines
    # without a listener the wait is silent (library use)
    assert compile_all(engine, [builtins["normal"]], jobs=1).programs and len(lines) == 2


def test_waiting_for_a_free_chain_slot_is_counted_apart_from_sampling(engine, programs, builtins, design):
    """Another fit holds the only chain slot for 2 s: this fit's seconds exclude those 2 s,
    which are kept as its waiting time, and the two add up to the time the call took."""
    import threading
    import time

    from contenders.engines.httpstan_direct import Waiting
    from contenders.engines.pystan_engine import PyStanEngine
    from contenders.machine import ChainShare

    # the bookkeeping itself, on a hand-driven clock
    now = [0.0]
    w = Waiting(clock=lambda: now[0])
    w.before_acquire(); now[0] = 5.0; w.acquired()          # 5 s with nothing running: waiting
    w.before_acquire(); now[0] = 8.0; w.chain_done()        # 3 s with chain 1 running: work
    now[0] = 10.0; w.acquired()                             # 2 s with nothing running: waiting
    now[0] = 20.0; w.chain_done()
    assert w.seconds == pytest.approx(7.0)

    slots = threading.Semaphore(1)
    slots.acquire()
    sharing = PyStanEngine(ChainShare(slots=slots))   # its own share: the session's engine keeps none
    threading.Timer(2.0, slots.release).start()
    try:
        c = builtins["normal"]
        start = time.perf_counter()
        draws = sharing.sample(programs["normal"], inputs_for(c, design), SMALL)
        took = time.perf_counter() - start
    finally:
        sharing.close()
    assert 1.9 <= draws.wait_seconds <= 2.5
    assert draws.sample_seconds > 0
    assert draws.sample_seconds + draws.wait_seconds <= took
    # without slots (one process alone) nothing is waited for
    assert engine.sample(programs["normal"], inputs_for(c, design), SMALL).wait_seconds == 0.0
