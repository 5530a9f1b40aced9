"""The CmdStanPy engine's own logic, tested without a CmdStan installation: its log stays
quiet, its scratch folders are registered for removal on a stop, and its sampling time
includes reading the draws. Fake program handles stand in for compiled CmdStan programs."""

import os
import subprocess
import sys
import time
from pathlib import Path

import pytest

from contenders import cleanup
from contenders.engines import cmdstanpy_engine as ce
from contenders.engines.base import Program, SamplerSettings, SamplingError


def test_cmdstanpys_log_stays_quiet_after_it_configures_itself():
    # CmdStanPy sets up its logger on first use (cmdstanpy/utils/logging.py, get_logger),
    # which undid a level set before; run in a fresh process so that first use is real
    code = ("from contenders.engines.cmdstanpy_engine import CmdStanPyEngine; CmdStanPyEngine(); "
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
def test_the_scratch_folder_is_registered_while_sampling_and_removed_after(fail, monkeypatch):
    handle = _Handle(fail)
    monkeypatch.setattr(ce.az, "from_cmdstanpy", lambda **_k: "idata")
    engine = ce.CmdStanPyEngine()
    program = Program("toy", "", handle, 0.0, True)
    if fail:
        with pytest.raises(SamplingError, match="toy: sampling failed"):
            engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=1, warmup=1, draws=1))
    else:
        engine.sample(program, {"y": [1.0]}, SamplerSettings(chains=1, warmup=1, draws=1))
    (folder, registered), = handle.seen
    assert folder.name.startswith("contenders_") and registered   # a stop would remove it
    assert not folder.exists() and folder not in cleanup._PATHS


def test_sampling_time_includes_reading_the_draws(monkeypatch):
    def slow_read(**_k):
        time.sleep(0.4)   # the CSV files being parsed into arrays
        return "idata"

    monkeypatch.setattr(ce.az, "from_cmdstanpy", slow_read)
    draws = ce.CmdStanPyEngine().sample(Program("toy", "", _Handle(False), 0.0, True), {"y": [1.0]},
                                        SamplerSettings(chains=1, warmup=1, draws=1))
    assert draws.sample_seconds >= 0.4
