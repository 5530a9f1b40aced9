"""PyStan 3 engine (httpstan underneath; installs from PyPI alone).

PyStan compiles each program once into httpstan's cache (under the user's cache
folder) and reuses it for every dataset. With a random seed httpstan also caches each
fit on disk; this engine deletes those files once the draws are read, because a fit
with ``y_rep`` and ``log_lik`` for every observation can take hundreds of megabytes.
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

from ..candidates import Candidate
from .base import OBS_DIMS, Draws, Engine, Program, SamplerSettings, SamplingError, raise_if_interrupted


@contextlib.contextmanager
def _forgetting_fits():
    """Run PyStan calls while noting the names of the fits its httpstan client reads,
    then delete exactly those cached fit files (the client class is swapped for the
    duration; PyStan looks it up at call time)."""
    import httpstan.cache
    import stan.common

    original = stan.common.HttpstanClient
    names: list[str] = []

    def recording_client(*args, **kwargs):
        client = original(*args, **kwargs)
        plain_get = client.get

        async def get(path, *a, **kw):
            if "/fits/" in path and not path.startswith("/operations"):
                names.append(path.lstrip("/"))
            return await plain_get(path, *a, **kw)

        client.get = get
        return client

    stan.common.HttpstanClient = recording_client
    try:
        yield
    finally:
        stan.common.HttpstanClient = original
        for name in set(names):
            with contextlib.suppress(Exception):
                httpstan.cache.delete_fit(name)


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


def stop_workers() -> None:
    """Terminate httpstan's sampling worker processes (forked once per Python process).
    Called on Ctrl-C: without it, workers whose parent has gone stay behind, holding the
    parent's output pipes open."""
    import sys

    stub = sys.modules.get("httpstan.services_stub")
    executor = getattr(stub, "executor", None)
    if executor is None:
        return
    processes = list(getattr(executor, "_processes", {}).values())
    with contextlib.suppress(Exception):
        executor.shutdown(wait=False, cancel_futures=True)
    for proc in processes:
        with contextlib.suppress(Exception):
            proc.terminate()


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


class PyStanEngine(Engine):
    name = "pystan"

    def version(self) -> str:
        import httpstan
        import stan

        return f"pystan {stan.__version__} (httpstan {httpstan.__version__})"

    def is_cached(self, candidate: Candidate) -> bool:
        import httpstan.models

        try:
            httpstan.models.import_services_extension_module(
                httpstan.models.calculate_model_name(candidate.code))
        except KeyError:
            return False
        return True

    def compile(self, candidate: Candidate) -> Program:
        import httpstan.models
        import stan.common

        model_name = httpstan.models.calculate_model_name(candidate.code)
        cached = self.is_cached(candidate)

        async def build() -> None:
            async with stan.common.HttpstanClient() as client:
                resp = await client.post("/models", json={"program_code": candidate.code})
                if resp.status != 201:
                    raise SamplingError(
                        f"{candidate.path.name}: compiling failed:\n{resp.json().get('message', '')[:4000]}"
                    )

        start = time.perf_counter()
        with _quiet():
            asyncio.run(build())
        return Program(candidate.id, candidate.code, model_name, time.perf_counter() - start, cached)

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
        model = self._build(program, data, settings.seed)
        start = time.perf_counter()
        with _forgetting_fits(), _quiet() as buf:
            try:
                fit = _interrupted_if_none(model.sample(
                    num_chains=settings.chains,
                    num_warmup=settings.warmup,
                    num_samples=settings.draws,
                    delta=settings.adapt_delta,
                    max_depth=settings.max_treedepth,
                ))
            except (RuntimeError, ValueError) as exc:
                raise SamplingError(
                    f"{program.candidate_id}: sampling failed: {_short(exc, file_name=program.candidate_id + '.stan')}\n{_stan_message(buf.getvalue())}"
                ) from None
        seconds = time.perf_counter() - start
        idata = az.from_pystan(
            posterior=fit,
            posterior_model=model,
            posterior_predictive=["y_rep"],
            log_likelihood=["log_lik"],
            observed_data=["y"],
            dims=OBS_DIMS,
        )
        del fit
        return Draws(idata, self.name, program.compile_seconds, seconds, settings,
                     _stan_message(buf.getvalue()))

    def single_draw(
        self, program: Program, data: Mapping[str, Any], seed: int,
        init: Mapping[str, Any] | None = None,
    ) -> dict[str, np.ndarray]:
        model = self._build(program, data, seed)
        with _forgetting_fits(), _quiet() as buf:
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
