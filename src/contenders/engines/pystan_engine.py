"""PyStan 3 engine (httpstan underneath; installs from PyPI alone).

PyStan compiles each program once into httpstan's cache (under the user's cache
folder) and reuses it for every dataset. Sampling calls httpstan's compiled program
directly, one chain per forked process that the engine owns, and parses its output as
it is written (``httpstan_direct``, written for httpstan 4.13); the draws are exactly
PyStan's for the same seed. Whatever reaches inside httpstan or PyStan (compiling and
checking httpstan's cache too) is in ``httpstan_direct``. With another httpstan version
the engine compiles and samples through PyStan's public interface instead
(``stan.build`` then ``model.sample``: the same draws, more slowly) and says so once per
process. The one-draw evaluations (``single_draw``) go through PyStan either way, which
caches each fit on disk; this engine deletes those files once read.

An engine's state is its own: its chain processes and its share of the cores
(``machine.ChainShare``; by default this process's, which the run's executor sets).
"""

from __future__ import annotations

import asyncio
import contextlib
import io
import os
import re
import sys
import tempfile
import time
from typing import Any, Mapping

import arviz as az
import numpy as np

from contenders import machine
from contenders.engines import httpstan_direct as direct
from contenders.engines.base import (OBS_DIMS, Draws, Engine, Program, SamplerSettings, SamplingError, compile_lock,
                                     raise_if_interrupted)
from contenders.inputs.candidates import Candidate


def one_interpreter_name() -> str:
    """Give the running interpreter one name per environment, and return it.

    httpstan names a compiled program by a hash that includes ``sys.executable``. In a
    virtual environment the console script ``contenders`` runs as ``bin/python3`` and
    ``python -m pytest`` as ``bin/python``: the same interpreter under two names, so each
    compiled every program again (about 8 minutes for the ten built-ins on two cores).
    Where ``bin/python3`` (else ``bin/python``) of ``sys.prefix`` is the very file that
    runs, ``sys.executable`` becomes that path, before httpstan computes any name. Another
    environment keeps its own name and its own compiled programs, as httpstan intends."""
    here = sys.executable
    for name in ("python3", "python"):
        path = os.path.join(sys.prefix, "bin", name)
        try:
            if here and os.path.samefile(path, here):
                sys.executable = path
                break
        except OSError:
            continue
    return sys.executable


one_interpreter_name()


def _forgetting_fits():
    """PyStan calls that leave no cached fit behind (``httpstan_direct.forgetting_fits``;
    with an httpstan version that module was not written for, tried defensively)."""
    return direct.forgetting_fits(known=direct.compatible())


@contextlib.contextmanager
def _quiet():
    """Capture PyStan's console output and the compiler's, which writes to the process's
    file descriptors directly; yield a buffer whose ``getvalue()`` returns all of it."""
    buf = io.StringIO()
    sys.stdout.flush()
    sys.stderr.flush()
    saved = []
    with tempfile.TemporaryFile(mode="w+b") as sink:
        try:
            for fd in (1, 2):
                try:
                    saved.append((fd, os.dup(fd)))
                    os.dup2(sink.fileno(), fd)
                except OSError:  # no such descriptor (embedded interpreters)
                    pass
            with contextlib.redirect_stderr(buf), contextlib.redirect_stdout(buf):
                yield buf
        finally:
            for fd, copy in saved:
                os.dup2(copy, fd)
                os.close(copy)
            sink.seek(0)
            buf.write(sink.read().decode("utf-8", "replace")[-20000:])


def _layout(model) -> dict[str, tuple[tuple[int, ...], Any, int, int]]:
    """For each variable of the program: shape, dtype kept, and its slice in a draw."""
    layout = {}
    offset = 0
    for name, dims in zip(model.param_names, model.dims):
        size = int(np.prod(dims)) if dims else 1
        dtype = np.float32 if name == "y_rep" else np.float64
        layout[name] = (tuple(int(d) for d in dims), dtype, offset, offset + size)
        offset += size
    return layout



def _sample_public(model, settings: SamplerSettings):
    """NUTS through PyStan's public interface (``model.sample``), for an httpstan version
    that ``httpstan_direct`` was not written for: the same call with the same arguments as
    the fast path (chain ids 1..chains, the model's seed), so the same draws, returned in
    the same form ``(arrays, stats)`` with the same dtypes. Slower: all chains run at once
    in httpstan's own processes (one per core; the engine's share is not applied) and
    PyStan holds every draw as text and as float64 meanwhile."""
    with _forgetting_fits():
        fit = _interrupted_if_none(model.sample(
            num_chains=settings.chains, num_warmup=settings.warmup, num_samples=settings.draws,
            delta=settings.adapt_delta, max_depth=settings.max_treedepth))
    chains, draws = settings.chains, settings.draws

    def per_chain(values: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
        # PyStan's fit[name] has shape (*dims, draws * chains), the chain index fastest
        values = np.asarray(values).reshape(*shape, draws, chains)
        return np.moveaxis(values, (-1, -2), (0, 1))

    arrays = {name: np.ascontiguousarray(per_chain(fit[name], shape), dtype=dtype)
              for name, (shape, dtype, _lo, _hi) in _layout(model).items()}
    stats = {name: np.ascontiguousarray(per_chain(fit[name], ()), dtype=np.float64)
             for name in fit.sample_and_sampler_param_names}
    return arrays, stats


_STAT_NAMES = {"lp__": "lp", "accept_stat__": "acceptance_rate", "stepsize__": "step_size",
               "treedepth__": "tree_depth", "n_leapfrog__": "n_steps", "divergent__": "diverging",
               "energy__": "energy"}


def _to_inference_data(model, arrays, stats, data) -> az.InferenceData:
    """InferenceData with the same groups, names and dims as ``az.from_pystan`` gives."""
    posterior = {k: v for k, v in arrays.items() if k not in ("y_rep", "log_lik") and v.size}
    sample_stats = {_STAT_NAMES.get(k, k.rstrip("_")): v for k, v in stats.items()}
    if "diverging" in sample_stats:
        sample_stats["diverging"] = sample_stats["diverging"].astype(bool)
    for k in ("tree_depth", "n_steps"):
        if k in sample_stats:
            sample_stats[k] = sample_stats[k].astype(np.int64)
    dims = dict(OBS_DIMS)
    return az.from_dict(
        posterior=posterior,
        posterior_predictive={"y_rep": arrays["y_rep"]} if "y_rep" in arrays else None,
        log_likelihood={"log_lik": arrays["log_lik"]} if "log_lik" in arrays else None,
        sample_stats=sample_stats,
        observed_data={"y": np.asarray(data["y"], dtype=float)} if "y" in data else None,
        dims=dims,
    )


def _lock_key(model_name: str) -> str:
    return "pystan-" + model_name.split("/")[1]


def stop_workers(join: float | None = None) -> None:
    """Terminate the chain processes of every PyStan engine of this process
    (``httpstan_direct.close_all``) and httpstan's own, which serve PyStan's public calls.
    Called on Ctrl-C, SIGTERM and a worker's exit: without it, chain processes whose
    parent has gone stay behind, holding the parent's output pipes open. The callers then
    remove the chains' temporary folders (``cleanup.remove_all``). ``join``: seconds to
    wait for each process to end (none: do not wait)."""
    direct.close_all(join)
    executor = direct.httpstan_pool()   # read defensively, with any httpstan version
    if executor is not None:
        direct.shut_down(executor, terminate=True, join=join)


#: Whether this process has said that it samples through PyStan's public interface.
_FALLBACK_SAID = [False]


def _say_fallback_once() -> None:
    """Print ``httpstan_direct.fallback_notice()`` to stderr, the first time only."""
    if not _FALLBACK_SAID[0]:
        _FALLBACK_SAID[0] = True
        print(direct.fallback_notice(), file=sys.stderr, flush=True)


def _interrupted_if_none(value):
    """PyStan answers Ctrl-C by returning None; turn that back into the interrupt."""
    if value is None:
        raise KeyboardInterrupt
    raise_if_interrupted()
    return value


def _short(exc: BaseException, limit: int = 1500, file_name: str = "") -> str:
    """Stan's own words from an httpstan error: the text inside ``RuntimeError("...")``
    without httpstan's traceback, with the temporary file name replaced."""
    text = str(exc)
    inner = re.search(r"""(?:RuntimeError|ValueError)\((['"])(.*?)\1\)`?""", text, re.DOTALL)
    if inner:
        text = inner.group(2)
    text = re.sub(r"'[^']*httpstan_[^']*\.stan'", f"'{file_name}'" if file_name else "the program", text)
    text = text.replace("\\n", " ").strip()
    return text if len(text) <= limit else text[:limit] + " ..."


def _stan_message(text: str) -> str:
    """The informative lines of PyStan's console output."""
    keep = [ln.strip() for ln in text.splitlines()
            if ln.strip() and not ln.lstrip().startswith(("Sampling", "Building", "Messages received"))]
    return "\n".join(dict.fromkeys(keep))[:4000]


#: How often a compile is asked for when PyStan's client gives up waiting for it.
COMPILE_TRIES = 2
#: The limit PyStan's client (an aiohttp session with aiohttp's default timeout) puts on
#: one request, the compile included.
REQUEST_LIMIT_SECONDS = 300


class PyStanEngine(Engine):
    """``share``: how many chains this engine runs at once (``machine.ChainShare``); by
    default this process's share, which the run's executor sets. The engine owns its
    chain processes (a ``httpstan_direct.ChainPool``, made at the first sampling call and
    remade when the share changes); ``close()`` ends them."""

    name = "pystan"

    def __init__(self, share: machine.ChainShare | None = None) -> None:
        self.share = share if share is not None else machine.THIS_PROCESS
        self._pool: direct.ChainPool | None = None

    def _chain_pool(self) -> direct.ChainPool:
        """The engine's chain processes, as many as its share allows."""
        workers = self.share.limit()
        if self._pool is None or self._pool.workers != workers:
            if self._pool is not None:
                self._pool.close()
            self._pool = direct.ChainPool(workers)
        return self._pool

    def close(self) -> None:
        """End the engine's chain processes (they also end with this process)."""
        if self._pool is not None:
            self._pool.close(terminate=True, join=5)
            self._pool = None

    def version(self) -> str:
        # from the installed packages' metadata: importing PyStan costs a second, which a
        # rerun that reads every result from the fit store does not otherwise pay
        from importlib.metadata import version

        return f"pystan {version('pystan')} (httpstan {version('httpstan')})"

    def is_cached(self, candidate: Candidate) -> bool:
        """Whether the program is compiled in httpstan's cache. With an httpstan version
        that ``httpstan_direct`` was not written for this cannot be known through
        PyStan's public interface: False (the compile then finds it in the cache)."""
        if not direct.compatible():
            return False
        model_name = direct.model_name(candidate.code)
        with compile_lock(_lock_key(model_name), what=candidate.id):
            return direct.module_ready(model_name)

    def compile(self, candidate: Candidate) -> Program:
        if not direct.compatible():
            return self._compile_public(candidate)
        model_name = direct.model_name(candidate.code)
        start = time.perf_counter()
        with compile_lock(_lock_key(model_name), what=candidate.id):
            cached = direct.module_ready(model_name)
            for attempt in range(1, COMPILE_TRIES + 1):
                try:
                    with _quiet():
                        status, message = direct.compile_request(candidate.code)
                    if status != 201:
                        raise SamplingError(f"{candidate.path.name}: compiling failed:\n{message[:4000]}")
                    break
                except asyncio.TimeoutError:
                    self._compile_timed_out(candidate, attempt)
            try:
                direct.load_module(model_name)
            except (KeyError, ImportError, OSError) as exc:
                raise SamplingError(f"{candidate.path.name}: compiled, but the compiled program "
                                    f"cannot be loaded: {exc}") from None
        return Program(candidate.id, candidate.code, model_name, time.perf_counter() - start, cached)

    @staticmethod
    def _compile_timed_out(candidate: Candidate, attempt: int) -> None:
        """PyStan's client gives up on a request after REQUEST_LIMIT_SECONDS; on a loaded
        machine a compile can take longer. httpstan finishes the build in the background
        before asyncio.run returns, so a second request usually finds the program
        compiled: return to try again, or raise after the last try."""
        raise_if_interrupted()
        if attempt == COMPILE_TRIES:
            raise SamplingError(
                f"{candidate.path.name}: compiling took longer than the {REQUEST_LIMIT_SECONDS} s "
                f"PyStan allows one request, {COMPILE_TRIES} times (the machine is busy); run again "
                "when it is less loaded, or with fewer programs compiled at once (--jobs 1)"
            ) from None

    def _compile_public(self, candidate: Candidate) -> Program:
        """Compile through PyStan's public interface (``stan.build`` without data), for an
        httpstan version that ``httpstan_direct`` was not written for. The handle is the
        program's code: ``sample`` and ``single_draw`` build it with their data, which
        finds the compiled program in httpstan's cache.

        ``stan.build`` raises ValueError for a compiler error (stanc's syntax or semantic
        errors); any other error here may be the data the build was not given (a program
        with a data block cannot be built without it), so it is not taken for a failed
        compile: a program that did not compile fails at its first build with data, with
        Stan's message. So no program that compiles is ever reported as failed."""
        import hashlib

        import stan

        _say_fallback_once()
        key = "pystan-public-" + hashlib.sha256(candidate.code.encode()).hexdigest()[:16]
        start = time.perf_counter()
        with compile_lock(key, what=candidate.id):
            for attempt in range(1, COMPILE_TRIES + 1):
                with _quiet() as buf:
                    try:
                        _interrupted_if_none(stan.build(candidate.code, random_seed=1))
                        break
                    except ValueError as exc:
                        raise SamplingError(f"{candidate.path.name}: compiling failed:\n"
                                            f"{_short(exc, 4000, candidate.path.name)}\n"
                                            f"{_stan_message(buf.getvalue())}".rstrip()) from None
                    except RuntimeError:
                        break   # compiled, most likely; see above
                    except asyncio.TimeoutError:
                        self._compile_timed_out(candidate, attempt)
        return Program(candidate.id, candidate.code, candidate.code, time.perf_counter() - start, False)

    def _build(self, program: Program, data: Mapping[str, Any], seed: int):
        import stan

        with _quiet() as buf:
            try:
                model = stan.build(program.code, data=dict(data), random_seed=int(seed))
                return _interrupted_if_none(model)
            except (RuntimeError, ValueError) as exc:
                raise SamplingError(f"{program.candidate_id}: Stan rejected the data: "
                                    f"{_short(exc, file_name=program.candidate_id + '.stan')}\n{_stan_message(buf.getvalue())}") from None

    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        fast = direct.compatible()
        if not fast:
            _say_fallback_once()
        model = self._build(program, data, settings.seed)
        start = time.perf_counter()
        waiting = direct.Waiting()
        logged = ""
        with _quiet() as buf:
            try:
                if fast:
                    arrays, stats, logged = direct.sample_direct(model, settings, _layout(model),
                                                                 self._chain_pool(), self.share.slots, waiting)
                else:
                    # PyStan starts every chain at once; it cannot be told fewer. The
                    # fit holds its share's slots meanwhile, as a CmdStanPy fit does, so
                    # the run's other workers wait for them (ChainShare.hold)
                    with self.share.hold(settings.chains):
                        arrays, stats = _sample_public(model, settings)
            except (RuntimeError, ValueError) as exc:
                raise SamplingError(
                    f"{program.candidate_id}: sampling failed: {_short(exc, file_name=program.candidate_id + '.stan')}\n{_stan_message(buf.getvalue())}"
                ) from None
            except KeyboardInterrupt:
                raise
        raise_if_interrupted()
        seconds = time.perf_counter() - start
        idata = _to_inference_data(model, arrays, stats, data)
        del arrays, stats
        wait = min(waiting.seconds, seconds)
        return Draws(idata, self.name, program.compile_seconds, seconds - wait, settings,
                     _stan_message(buf.getvalue() + logged), wait_seconds=wait)

    def single_draw(
        self, program: Program, data: Mapping[str, Any], seed: int,
        init: Mapping[str, Any] | None = None,
    ) -> dict[str, np.ndarray]:
        model = self._build(program, data, seed)
        # httpstan's server runs the call; with the httpstan this engine knows, in the
        # engine's own chain processes (not the one per core httpstan forks at import)
        serving = direct.serving_from(self._chain_pool()) if direct.compatible() else contextlib.nullcontext()
        with serving, _forgetting_fits(), _quiet() as buf:
            try:
                fit = _interrupted_if_none(
                    model.fixed_param(num_chains=1, num_samples=1, init=[dict(init or {})]))
            except (RuntimeError, ValueError) as exc:
                raise SamplingError(
                    f"{program.candidate_id}: could not evaluate the program at "
                    f"{'the given' if init else 'random initial'} values: {_short(exc, file_name=program.candidate_id + '.stan')}\n"
                    f"{_stan_message(buf.getvalue())}"
                ) from None
        return {name: np.asarray(fit[name])[..., 0] for name in fit.param_names
                if name in model.param_names}
