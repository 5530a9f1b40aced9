"""The CmdStanPy engine's own logic, tested without a CmdStan installation (a fake CmdStan
folder, fake program handles): finding and checking CmdStan, failure messages, the program
cache and version line, chains at once, y_rep's precision; and: its log stays
quiet, its scratch folders are registered for removal on a stop, and its sampling time
includes reading the draws. Fake program handles stand in for compiled CmdStan programs."""

import os
import subprocess
import sys
import time
from pathlib import Path

import arviz
import pytest

from contenders import cleanup
from contenders.engines import cmdstanpy_engine as ce
from contenders.engines.base import Program, SamplerSettings, SamplingError


@pytest.fixture(autouse=True)
def _cmdstan_variable_restored():
    """CmdStanPy's ``set_cmdstan_path`` writes ``os.environ["CMDSTAN"]`` (cmdstanpy/utils/
    cmdstan.py); a fake folder set by a test here must not reach later tests, which would
    then take it for a real CmdStan. (monkeypatch.delenv records nothing when the variable
    is absent, so it would not remove one set later.)"""
    before = os.environ.get("CMDSTAN")
    os.environ.pop("CMDSTAN", None)
    yield
    os.environ.pop("CMDSTAN", None)
    if before is not None:
        os.environ["CMDSTAN"] = before


def fake_cmdstan(root: Path, version: str = "2.35.0", stanc: bool = True) -> Path:
    """A folder shaped like a built CmdStan: its makefile (with the version line CmdStan's
    own makefile carries) and, with ``stanc``, an executable bin/stanc."""
    folder = root / f"cmdstan-{version}"
    (folder / "bin").mkdir(parents=True, exist_ok=True)
    (folder / "makefile").write_text(f"# CmdStan makefile\nCMDSTAN_VERSION := {version}\n")
    if stanc:
        (folder / "bin" / "stanc").write_text("#!/bin/sh\n")
        (folder / "bin" / "stanc").chmod(0o755)
    return folder


def test_cmdstanpys_log_stays_quiet_after_it_configures_itself():
    # CmdStanPy sets up its logger on first use (cmdstanpy/utils/logging.py, get_logger),
    # which undid a level set before; run in a fresh process so that first use is real
    code = ("from contenders.engines.cmdstanpy_engine import _quiet_logger; _quiet_logger(); "
            "from cmdstanpy.utils import get_logger; log = get_logger(); "
            "log.info('INFO-LINE'); log.warning('WARNING-LINE'); log.error('ERROR-LINE')")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "PYTHONWARNINGS": "ignore"})
    assert res.returncode == 0, res.stderr
    assert "INFO-LINE" not in res.stderr and "WARNING-LINE" not in res.stderr
    assert "cmdstanpy: ERROR-LINE" in res.stderr


class _Handle:
    """Stands in for a CmdStanModel: writes a partial CSV into the output folder."""

    def __init__(self, fail: bool):
        self.fail, self.seen = fail, []

    def sample(self, output_dir, **_kwargs):
        folder = Path(output_dir)
        self.seen.append((folder, folder in cleanup._PATHS))
        (folder / "chain-1.csv").write_text("lp__,a\n")
        if self.fail:
            raise RuntimeError("Error during sampling:\nChain 1 failed")
        return object()


@pytest.mark.parametrize("fail", [True, False])
def test_the_scratch_folder_is_registered_while_sampling_and_removed_after(fail, monkeypatch, tmp_path):
    handle = _Handle(fail)
    monkeypatch.setattr(arviz, "from_cmdstanpy", lambda **_k: "idata")
    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path))
    program = Program("toy", "", handle, 0.0, True)
    if fail:
        with pytest.raises(SamplingError, match="toy: sampling failed"):
            engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=1, warmup=1, draws=1))
    else:
        engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=1, warmup=1, draws=1))
    (folder, registered), = handle.seen
    assert folder.name.startswith("contenders_") and registered   # a stop would remove it
    assert not folder.exists() and folder not in cleanup._PATHS


def test_sampling_time_includes_reading_the_draws(monkeypatch, tmp_path):
    def slow_read(**_k):
        time.sleep(0.4)   # the CSV files being parsed into arrays
        return "idata"

    monkeypatch.setattr(arviz, "from_cmdstanpy", slow_read)
    draws = ce.CmdStanPyEngine(fake_cmdstan(tmp_path)).sample(Program("toy", "", _Handle(False), 0.0, True), {"y": [1.0]},
                                        SamplerSettings(chains=1, warmup=1, draws=1))
    assert draws.sample_seconds >= 0.4


# The message CmdStanPy 1.x raises when a chain fails (cmdstanpy/model.py, CmdStanModel.sample):
# Stan's error lines, then the command and the output files, then a hint about show_console.
CMDSTANPY_FAILURE = ("Error during sampling:\nException: lognormal_lpdf: Scale parameter is 0, but must be "
                     "positive! (in 'toy.stan', line 12, column 2 to column 30)\n"
                     "Command and output files:\nRunSet: chains=1, chain_ids=[1], num_processes=1\n"
                     " cmd (chain 1):\n\t['/x/toy', 'id=1']\n retcodes=[70]\n per-chain output files:\n"
                     " csv_files:\n\t/tmp/contenders_x/toy-1.csv\n"
                     "Consider re-running with show_console=True if the above output is unclear!")


def test_a_sampling_failure_gives_stans_reason_on_its_first_line(monkeypatch, tmp_path):
    class Failing(_Handle):
        def sample(self, output_dir, **_k):
            raise RuntimeError(CMDSTANPY_FAILURE)

    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path))
    with pytest.raises(SamplingError) as info:
        engine.sample(Program("toy", "", Failing(False), 0.0, True), {"y": [1.0]}, SamplerSettings(chains=1))
    text = str(info.value)
    assert text.splitlines()[0] == ("toy: sampling failed: Exception: lognormal_lpdf: Scale parameter is 0, "
                                    "but must be positive! (in 'toy.stan', line 12, column 2 to column 30)")
    assert "show_console" not in text and "csv_files" not in text and len(text.splitlines()) == 1


def test_an_empty_failure_reads_the_chain_console_or_says_there_was_none(tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    assert "no message from CmdStan" in ce._cause(RuntimeError(""), str(folder))
    (folder / "toy-1-stdout.txt").write_text("method = sample\nRejecting initial value:\n"
                                             "Initialization failed.\n")
    assert ce._cause(RuntimeError("Error during sampling:\n"), str(folder)) == \
        "Rejecting initial value:; Initialization failed."


def test_cmdstan_without_stanc_is_refused_and_auto_says_it_falls_back(tmp_path, monkeypatch):
    from contenders.engines import find_cmdstan, resolve_engine
    from contenders.errors import UserError

    half = fake_cmdstan(tmp_path / "half", stanc=False)
    monkeypatch.setenv("CMDSTAN", str(half))
    folder, why = find_cmdstan()
    assert folder is None and "bin/stanc is missing" in why
    name, notice = resolve_engine("auto")
    assert name == "pystan" and "using PyStan" in notice and "bin/stanc is missing" in notice
    with pytest.raises(UserError, match="engine 'cmdstanpy' cannot run: CMDSTAN=.*bin/stanc is missing"):
        resolve_engine("cmdstanpy")
    built = fake_cmdstan(tmp_path / "built")
    monkeypatch.setenv("CMDSTAN", str(built))
    assert find_cmdstan() == (built, "") and resolve_engine("auto") == ("cmdstanpy", "")


def test_home_cmdstan_takes_the_newest_version_folder(tmp_path, monkeypatch):
    # CmdStanPy's own order (cmdstanpy.utils.cmdstan_path / get_latest_cmdstan): newest version
    from contenders.engines import find_cmdstan

    monkeypatch.delenv("CMDSTAN", raising=False)
    monkeypatch.setenv("HOME", str(tmp_path))
    for v in ("2.9.0", "2.35.0", "2.34.1"):
        fake_cmdstan(tmp_path / ".cmdstan", v)
    assert find_cmdstan()[0].name == "cmdstan-2.35.0"


def test_engine_cmdstanpy_without_cmdstan_leaves_no_output_folder(tmp_path, monkeypatch):
    from contenders.inputs.config import RunConfig
    from contenders.errors import UserError
    from contenders.pipeline.runner import run

    monkeypatch.setenv("CMDSTAN", str(fake_cmdstan(tmp_path / "half", stanc=False)))
    data = tmp_path / "d.csv"
    data.write_text("y\n" + "".join(f"{1 + i / 10}\n" for i in range(12)))
    out = tmp_path / "out"
    cfg = RunConfig(data=str(data), outcome="y", out=str(out), engine="cmdstanpy")
    with pytest.raises(UserError, match="engine 'cmdstanpy' cannot run: CMDSTAN=.*bin/stanc is missing"):
        run(cfg)
    assert not out.exists()


def test_version_line_and_program_cache_follow_the_cmdstan_used(tmp_path, monkeypatch):
    from importlib.metadata import version

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    a = ce.CmdStanPyEngine(fake_cmdstan(tmp_path / "a", "2.35.0"))
    b = ce.CmdStanPyEngine(fake_cmdstan(tmp_path / "b", "2.36.0"))
    assert a.version() == f"cmdstanpy {version('cmdstanpy')} (CmdStan 2.35.0 at {a.cmdstan})"
    assert "CmdStan 2.36.0" in b.version()

    class Cand:
        id, code_hash = "toy", "ab" * 32

    assert a._folder(Cand) != b._folder(Cand)
    exe = a._folder(Cand) / "toy"
    exe.parent.mkdir(parents=True)
    exe.write_bytes(b"half-linked")
    assert not a.is_cached(Cand)   # an executable without the finished-build mark
    (exe.parent / "toy.built").write_text(a._stamp(exe))
    assert a.is_cached(Cand) and not b.is_cached(Cand)
    exe.write_bytes(b"relinked, longer than before")
    assert not a.is_cached(Cand)


def test_a_store_only_rerun_needs_neither_cmdstanpy_nor_arviz(tmp_path):
    folder = fake_cmdstan(tmp_path)
    code = ("import sys\nfrom contenders.engines.lazy import LazyEngine\ne = LazyEngine('auto')\n"
            "print(e.name, 'cmdstanpy' in sys.modules, 'arviz' in sys.modules)\nprint(e.version())\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "CMDSTAN": str(folder)})
    assert res.returncode == 0, res.stderr
    first, second = res.stdout.splitlines()
    assert first == "cmdstanpy False False" and "CmdStan 2.35.0" in second


class _Counting(_Handle):
    def sample(self, output_dir, parallel_chains=None, **_k):
        self.seen.append(parallel_chains)
        return object()


def test_without_an_executor_chains_at_once_follow_the_cores(monkeypatch, tmp_path):
    from contenders import machine

    monkeypatch.setattr(arviz, "from_cmdstanpy", lambda **_k: "idata")
    monkeypatch.setattr(machine, "THIS_PROCESS", machine.ChainShare())   # no executor's share
    monkeypatch.setattr(machine, "cores", lambda: 2)
    handle = _Counting(False)
    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path))
    assert engine.share is machine.THIS_PROCESS
    engine.sample(Program("toy", "", handle, 0.0, True), {"y": [1.0]}, SamplerSettings(chains=4))
    assert handle.seen == [2]


def test_the_share_set_by_an_executor_limits_the_chains_of_each_call(monkeypatch, tmp_path):
    from contenders import machine
    from contenders.pipeline.executor import set_chain_workers

    monkeypatch.setattr(arviz, "from_cmdstanpy", lambda **_k: "idata")
    monkeypatch.setattr(machine, "THIS_PROCESS", machine.ChainShare())
    monkeypatch.setattr("contenders.pipeline.executor.THIS_PROCESS", machine.THIS_PROCESS)
    monkeypatch.setattr(machine, "cores", lambda: 8)
    handle = _Counting(False)
    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path))
    program = Program("toy", "", handle, 0.0, True)
    assert set_chain_workers("cmdstanpy", 3) == 0    # the previous limit: none
    engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=4))
    engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=2))   # fewer chains than the limit
    own = ce.CmdStanPyEngine(fake_cmdstan(tmp_path), share=machine.ChainShare(chains_at_once=1))
    own.sample(program, {"y": [1.0]}, SamplerSettings(chains=4))     # its own share, not the process's
    assert handle.seen == [3, 2, 1]
    assert set_chain_workers("cmdstanpy", 8) == 3


def test_a_fit_takes_every_free_chain_slot_and_gives_them_back(monkeypatch, tmp_path):
    import threading

    from contenders.machine import ChainShare

    monkeypatch.setattr(arviz, "from_cmdstanpy", lambda **_k: "idata")
    slots = threading.Semaphore(3)
    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path), share=ChainShare(chains_at_once=3, slots=slots))
    handle = _Counting(False)
    program = Program("toy", "", handle, 0.0, True)
    engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=4))   # alone: all 3 slots
    slots.acquire()
    slots.acquire()   # two held by other workers
    engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=4))
    slots.release()
    slots.release()
    assert handle.seen == [3, 1]
    assert all(slots.acquire(blocking=False) for _ in range(3))   # every slot came back
    assert not slots.acquire(blocking=False)


def test_y_rep_is_kept_as_float32_and_log_lik_as_float64(monkeypatch, tmp_path):
    import numpy as np

    rng = np.random.default_rng(1)

    def read(**_k):   # what az.from_cmdstanpy gives: every variable float64
        return arviz.from_dict(posterior={"a": rng.normal(size=(2, 5))},
                               posterior_predictive={"y_rep": rng.normal(size=(2, 5, 3))},
                               log_likelihood={"log_lik": rng.normal(size=(2, 5, 3))})

    monkeypatch.setattr(arviz, "from_cmdstanpy", read)
    idata = ce.CmdStanPyEngine(fake_cmdstan(tmp_path)).sample(
        Program("toy", "", _Handle(False), 0.0, True), {"y": [1.0, 2.0, 3.0]}, SamplerSettings(chains=2)).idata
    assert idata.posterior_predictive["y_rep"].dtype == np.float32   # as the PyStan engine keeps it
    assert idata.log_likelihood["log_lik"].dtype == np.float64


def test_a_compile_failure_without_a_message_still_says_what_to_check(monkeypatch, tmp_path):
    import cmdstanpy

    class Broken:
        def __init__(self, stan_file):
            Path(stan_file).with_suffix("").write_bytes(b"half")   # a half-linked executable
            raise ValueError("")

    class Cand:
        id, code_hash, code, path = "toy", "cd" * 32, "model {}", Path("toy.stan")

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    monkeypatch.setattr(cmdstanpy, "CmdStanModel", Broken)
    engine = ce.CmdStanPyEngine(fake_cmdstan(tmp_path))
    with pytest.raises(SamplingError, match=r"toy.stan: compiling failed: ValueError with no message from CmdStan; "
                                            r"check that the CmdStan installation works"):
        engine.compile(Cand)
    assert not engine.is_cached(Cand)   # the failed build's executable does not count


def test_a_run_says_when_auto_falls_back_to_pystan(tmp_path, monkeypatch):
    from contenders.pipeline import runner
    from contenders.inputs.config import RunConfig

    class Stop(Exception):
        pass

    def stop(_path):
        raise Stop   # the notice must come before the output folder is made

    monkeypatch.setenv("CMDSTAN", str(tmp_path / "nowhere"))
    monkeypatch.setattr(runner, "output_folder", stop)
    data = tmp_path / "d.csv"
    data.write_text("y\n" + "".join(f"{1 + i / 10}\n" for i in range(12)))
    said = []
    with pytest.raises(Stop):
        runner.run(RunConfig(data=str(data), outcome="y", out=str(tmp_path / "out"), engine="auto"),
                   progress=said.append)
    assert said == [f"engine: using PyStan, because the CmdStan found cannot be used: CMDSTAN={tmp_path / 'nowhere'}: "
                    "no such folder; install one with cmdstanpy's installer, or set CMDSTAN to a built CmdStan folder"]


def test_a_compile_error_puts_stancs_reason_first():
    # the shape of CmdStanPy's compile failure (cmdstanpy/compilation.py, compile_stan_file)
    text = ("Failed to compile Stan model '/c/toy.stan'. Console:\n--- Translating Stan model to C++ code ---\n"
            "Syntax error in '/c/toy.stan', line 3, column 4 to column 5, parsing error:\n   3:  y ~ normal(\n"
            "Expected \")\" after arguments.")
    cause = ce._compile_cause(ValueError(text), "")
    assert cause.splitlines()[0] == "Syntax error in '/c/toy.stan', line 3, column 4 to column 5, parsing error:"
    assert cause.splitlines()[1:] == text.splitlines()
