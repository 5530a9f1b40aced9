"""CmdStanPy engine: used when a CmdStan installation is found.

Each program is copied into a folder named by the hash of its code and of the CmdStan
used (its folder and version) under the user's cache folder
(``~/.cache/contenders/cmdstan/``) and compiled there once, so the
candidates folder is never littered with executables. Sampler output (CSV files) goes
to a temporary folder that is removed once the draws are in memory.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import re
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from contenders.inputs.candidates import Candidate
from contenders.cleanup import while_writing
from contenders import machine
from contenders.machine import ChainShare
from contenders.engines.base import OBS_DIMS, Draws, Engine, Program, SamplerSettings, SamplingError, compile_lock


def _cache_root() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "contenders" / "cmdstan"


_NOISE = re.compile(r"^(Command and output files:|Consider re-running with show_console|RunSet:|"
                    r" *(cmd|retcodes|per-chain output files|csv_files|console_msgs)\b)")


def _cause(exc: BaseException, folder: str) -> str:
    """Stan's own reason for a failed run, on one line: the error lines of CmdStanPy's
    message, else of the chains' console files (still in ``folder``); never CmdStanPy's
    pointers to files about to be removed or to its ``show_console`` option."""
    text = str(exc)
    lines = []
    for line in text.splitlines():
        if _NOISE.match(line):
            break   # the rest lists the command and the (removed) output files
        line = line.strip()
        if line and not line.startswith(("Error during sampling", "Non-fatal error during sampling")):
            lines.append(line)
    if not lines:
        for path in sorted(Path(folder).glob("*.txt")):
            with contextlib.suppress(OSError):
                lines += [ln.strip() for ln in path.read_text(errors="replace").splitlines()
                          if re.match(r"\s*(E[rx]|Rejecting|Initialization|Unrecoverable|terminate)", ln)]
    unique = list(dict.fromkeys(lines))
    if not unique:
        return (f"{type(exc).__name__} with no message from CmdStan; check that the CmdStan installation "
                "works ('make examples/bernoulli/bernoulli' in its folder)")
    more = f" (and {len(unique) - 3} more)" if len(unique) > 3 else ""
    return "; ".join(unique[:3])[:1500] + more


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


def _compile_cause(exc: BaseException, folder: str) -> str:
    """The compiler's reason first (its first line naming an error), then its whole
    message (stanc's location and code excerpt) on the lines after."""
    text = str(exc).strip()
    if not text:
        return _cause(exc, folder)
    key = next((ln.strip() for ln in text.splitlines()
                if "error" in ln.lower() and not ln.startswith("Failed to compile")), "")
    return f"{key}\n{text[:4000]}" if key and key != text else text[:4000]


class CmdStanPyEngine(Engine):
    """``share``: how many chains this engine runs at once (``machine.ChainShare``); by
    default this process's share, which the run's executor sets. CmdStanPy starts all the
    chains of a sampling call together, so the engine decides once per call how many run
    at once (``chains_at_once``)."""

    name = "cmdstanpy"

    def __init__(self, cmdstan: str | os.PathLike | None = None, share: ChainShare | None = None) -> None:
        from contenders.engines.cmdstan_home import cmdstanpy_version_line, find_cmdstan

        _quiet_logger()
        if cmdstan is None:
            cmdstan, why = find_cmdstan()
            if cmdstan is None:
                raise SamplingError(f"the CmdStanPy engine cannot run: {why}")
        self.cmdstan = Path(cmdstan)
        self._version = cmdstanpy_version_line(self.cmdstan)
        self.share = share if share is not None else machine.THIS_PROCESS

    def chains_at_once(self, chains: int):
        """A context that yields how many of ``chains`` one sampling call runs at once,
        holding that many of the share's slots meanwhile (``ChainShare.hold``): the
        share's limit, or with shared slots one slot (waiting if need be) and every
        further free one."""
        return self.share.hold(chains)

    def version(self) -> str:
        return self._version

    def _folder(self, candidate: Candidate) -> Path:
        """The program's cache folder: its code and the CmdStan (folder and version) that builds it."""
        key = hashlib.sha256(f"{candidate.code_hash}|{self._version}".encode()).hexdigest()[:16]
        return _cache_root() / key

    @staticmethod
    def _stamp(exe: Path) -> str:
        st = exe.stat()
        return f"{st.st_size} {st.st_mtime_ns}"

    def is_cached(self, candidate: Candidate) -> bool:
        """An executable counts as compiled only with the mark written after a build that
        finished (a build stopped part-way can leave a half-linked executable)."""
        exe = self._folder(candidate) / candidate.id
        mark = exe.with_name(f"{candidate.id}.built")
        try:
            return mark.read_text() == self._stamp(exe)
        except OSError:
            return False

    def compile(self, candidate: Candidate) -> Program:
        import cmdstanpy
        from cmdstanpy import CmdStanModel

        cmdstanpy.set_cmdstan_path(str(self.cmdstan))
        folder = self._folder(candidate)
        start = time.perf_counter()
        # one process at a time builds a program into the shared cache (see compile_lock)
        with compile_lock(f"cmdstan-{folder.name}-{candidate.id}", what=candidate.id):
            folder.mkdir(parents=True, exist_ok=True)
            stan_file = folder / f"{candidate.id}.stan"
            if not stan_file.exists() or stan_file.read_text() != candidate.code:
                stan_file.write_text(candidate.code)
            exe, mark = folder / candidate.id, folder / f"{candidate.id}.built"
            cached = self.is_cached(candidate)
            if not cached:   # an executable without the mark is not trusted: build again
                for stale in (exe, mark):
                    with contextlib.suppress(OSError):
                        stale.unlink()
            try:
                model = CmdStanModel(stan_file=str(stan_file))
            except Exception as exc:
                raise SamplingError(f"{candidate.path.name}: compiling failed: {_compile_cause(exc, str(folder))}") from None
            if exe.exists():
                mark.write_text(self._stamp(exe))
        return Program(candidate.id, candidate.code, model, time.perf_counter() - start, cached)

    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        import arviz as az

        out = tempfile.mkdtemp(prefix="contenders_")
        start = time.perf_counter()
        # registered while it exists: a worker stopped part-way removes it (cleanup.remove_all)
        with while_writing(out), self.chains_at_once(settings.chains) as at_once:
            try:
                try:
                    fit = program.handle.sample(
                        data=dict(data),
                        chains=settings.chains,
                        parallel_chains=at_once,
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
                    raise SamplingError(f"{program.candidate_id}: sampling failed: {_cause(exc, out)}") from None
                idata = az.from_cmdstanpy(
                    posterior=fit,
                    posterior_predictive=["y_rep"],
                    log_likelihood=["log_lik"],
                    observed_data={"y": np.asarray(data["y"])},
                    dims=OBS_DIMS,
                )
                del fit
                # y_rep as float32, as the PyStan engine keeps it (log_lik stays float64 for LOO)
                pp = getattr(idata, "posterior_predictive", None)
                if pp is not None and "y_rep" in pp:
                    pp["y_rep"] = pp["y_rep"].astype(np.float32)
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
                        f"{'the given' if init else 'random initial'} values: {_cause(exc, out)}"
                    ) from None
                return {name: np.asarray(value)[0] for name, value in fit.stan_variables().items()}
            finally:
                shutil.rmtree(out, ignore_errors=True)
