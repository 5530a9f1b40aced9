"""CmdStanPy engine: used when a CmdStan installation is found.

Each program is copied into a folder named by the hash of its code under the user's
cache folder (``~/.cache/contenders/cmdstan/``) and compiled there once, so the
candidates folder is never littered with executables. Sampler output (CSV files) goes
to a temporary folder that is removed once the draws are in memory.
"""

from __future__ import annotations

import logging
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Mapping

import arviz as az
import numpy as np

from ..candidates import Candidate
from ..cleanup import while_writing
from .base import OBS_DIMS, Draws, Engine, Program, SamplerSettings, SamplingError, compile_lock


def _cache_root() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "contenders" / "cmdstan"


#: Chains run at once by this process (0: all of them); set by the run's executor.
CHAIN_WORKERS = [0]


def set_chain_workers(n: int) -> None:
    CHAIN_WORKERS[0] = max(1, int(n))


def _quiet_logger() -> logging.Logger:
    """Keep CmdStanPy's log to errors, for good.

    CmdStanPy configures its logger the first time it uses it (``get_logger``: level DEBUG
    and a handler printing INFO and above), unless the logger already has a handler; a
    level set before then was undone, and a run printed about 50 log lines. A handler of
    our own, for errors only, keeps CmdStanPy from adding its own; what goes wrong reaches
    the user as the engine's error message instead."""
    logger = logging.getLogger("cmdstanpy")
    if not any(getattr(h, "_contenders", False) for h in logger.handlers):
        handler = logging.StreamHandler()
        handler.setLevel(logging.ERROR)
        handler.setFormatter(logging.Formatter("cmdstanpy: %(message)s"))
        handler._contenders = True
        logger.addHandler(handler)
    logger.setLevel(logging.ERROR)
    return logger


class CmdStanPyEngine(Engine):
    name = "cmdstanpy"

    def __init__(self) -> None:
        _quiet_logger()

    def version(self) -> str:
        import cmdstanpy

        return f"cmdstanpy {cmdstanpy.__version__} (CmdStan at {cmdstanpy.cmdstan_path()})"

    def is_cached(self, candidate: Candidate) -> bool:
        return (_cache_root() / candidate.code_hash[:16] / candidate.id).exists()

    def compile(self, candidate: Candidate) -> Program:
        from cmdstanpy import CmdStanModel

        folder = _cache_root() / candidate.code_hash[:16]
        start = time.perf_counter()
        # one process at a time builds a program into the shared cache (see compile_lock)
        with compile_lock(f"cmdstan-{candidate.code_hash[:16]}-{candidate.id}", what=candidate.id):
            folder.mkdir(parents=True, exist_ok=True)
            stan_file = folder / f"{candidate.id}.stan"
            if not stan_file.exists() or stan_file.read_text() != candidate.code:
                stan_file.write_text(candidate.code)
            cached = stan_file.with_suffix("").exists()
            try:
                model = CmdStanModel(stan_file=str(stan_file))
            except Exception as exc:
                raise SamplingError(f"{candidate.path.name}: compiling failed:\n{str(exc)[:4000]}") from None
        return Program(candidate.id, candidate.code, model, time.perf_counter() - start, cached)

    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        out = tempfile.mkdtemp(prefix="contenders_")
        start = time.perf_counter()
        # registered while it exists: a worker stopped part-way removes it (cleanup.remove_all)
        with while_writing(out):
            try:
                try:
                    fit = program.handle.sample(
                        data=dict(data),
                        chains=settings.chains,
                        parallel_chains=min(settings.chains, CHAIN_WORKERS[0] or settings.chains),
                        iter_warmup=settings.warmup,
                        iter_sampling=settings.draws,
                        adapt_delta=settings.adapt_delta,
                        max_treedepth=settings.max_treedepth,
                        seed=settings.seed,
                        output_dir=out,
                        show_progress=False,
                        show_console=False,
                    )
                except Exception as exc:
                    raise SamplingError(f"{program.candidate_id}: sampling failed: {str(exc)[:4000]}") from None
                idata = az.from_cmdstanpy(
                    posterior=fit,
                    posterior_predictive=["y_rep"],
                    log_likelihood=["log_lik"],
                    observed_data={"y": np.asarray(data["y"])},
                    dims=OBS_DIMS,
                )
                del fit
                # reading the CSV files is part of the sampling time (PyStan's engine counts
                # its own reading too)
                seconds = time.perf_counter() - start
            finally:
                shutil.rmtree(out, ignore_errors=True)
        return Draws(idata, self.name, program.compile_seconds, seconds, settings)

    def single_draw(
        self, program: Program, data: Mapping[str, Any], seed: int,
        init: Mapping[str, Any] | None = None,
    ) -> dict[str, np.ndarray]:
        out = tempfile.mkdtemp(prefix="contenders_")
        with while_writing(out):
            try:
                try:
                    fit = program.handle.sample(
                        data=dict(data), fixed_param=True, chains=1, iter_sampling=1, seed=seed,
                        inits=dict(init) if init else None,
                        output_dir=out, show_progress=False, show_console=False,
                    )
                except Exception as exc:
                    raise SamplingError(
                        f"{program.candidate_id}: could not evaluate the program at "
                        f"{'the given' if init else 'random initial'} values: {str(exc)[:4000]}"
                    ) from None
                return {name: np.asarray(value)[0] for name, value in fit.stan_variables().items()}
            finally:
                shutil.rmtree(out, ignore_errors=True)
