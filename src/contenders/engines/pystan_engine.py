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


_SAMPLE_FUNCTION = "stan::services::sample::hmc_nuts_diag_e_adapt"
_LOGGED: dict[int, str] = {}
CHAIN_WORKERS = [0]   # 0: httpstan's default (one per core)


def set_chain_workers(n: int) -> None:
    """Run at most ``n`` chains at once in this process (httpstan runs chains in a pool of
    forked processes, one per core by default). Used by the run's executor so that
    candidates fitted side by side do not oversubscribe the cores. Takes effect before
    the first sampling call in the process; later calls replace the pool."""
    import concurrent.futures
    import multiprocessing as mp

    import httpstan.services_stub as stub

    n = max(1, int(n))
    if CHAIN_WORKERS[0] == n:
        return
    old = stub.executor
    stub.executor = concurrent.futures.ProcessPoolExecutor(
        max_workers=n, mp_context=mp.get_context("fork"), initializer=_init_chain_process)
    CHAIN_WORKERS[0] = n
    with contextlib.suppress(Exception):
        old.shutdown(wait=False)


def _init_chain_process() -> None:
    """Chain processes ignore Ctrl-C (their parent handles it, as in httpstan) and die
    at once on SIGTERM, whatever handler the forking process had installed."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


async def _sample_lean(model, settings: SamplerSettings):
    """NUTS through httpstan's API, chain by chain, without PyStan's ``Fit``.

    The same requests as PyStan's ``model.sample`` (chain ids 1..chains, the model's
    seed), so the draws are identical; but each chain's output is parsed as soon as it
    is read and its text released, and the fit files httpstan caches are deleted. PyStan
    keeps every chain's raw JSON text and a float64 copy of all draws at once, which at
    N = 10,000 peaked at 4.7 GB for one fit. ``log_lik`` stays float64 (LOO needs it);
    ``y_rep`` is kept as float32, which holds any latency to 7 significant digits.

    Returns ``(arrays, stats)``: per variable an array (chains, draws, *dims), and per
    sampler statistic an array (chains, draws)."""
    import stan.common

    payloads = []
    for chain in range(1, settings.chains + 1):
        payloads.append({
            "function": _SAMPLE_FUNCTION, "chain": chain, "data": model.data, "init": {},
            "random_seed": model.random_seed, "num_warmup": settings.warmup,
            "num_samples": settings.draws, "delta": settings.adapt_delta,
            "max_depth": settings.max_treedepth,
        })
    import json as _json

    from stan.model import DataJSONEncoder

    payloads = _json.loads(DataJSONEncoder().encode(payloads))
    layout = _layout(model)
    arrays = {name: np.empty((settings.chains, settings.draws, *shape), dtype=dtype, order="C")
              for name, (shape, dtype, _lo, _hi) in layout.items()}
    stats: dict[str, np.ndarray] = {}
    logged: list[str] = []
    async with stan.common.HttpstanClient() as client:
        operations = []
        for payload in payloads:
            resp = await client.post(f"/{model.model_name}/fits", json=payload)
            if resp.status == 422:
                raise ValueError(str(resp.json()))
            if resp.status != 201:
                raise RuntimeError(resp.json()["message"])
            operations.append(resp.json())
        pending = list(range(len(operations)))
        while pending:
            for i in list(pending):
                resp = await client.get(f"/{operations[i]['name']}")
                operations[i].update(resp.json())
                if not operations[i]["done"]:
                    continue
                pending.remove(i)
                result = operations[i]["result"]
                fit_name = result.get("name")
                if fit_name is None:
                    message = result.get("message", "")
                    if "Initialization failed" in message:
                        raise RuntimeError("Initialization failed.")
                    raise RuntimeError(message)
                resp = await client.get(f"/{fit_name}")
                if resp.status != 200:
                    raise RuntimeError(resp.json()["message"])
                text = resp.content
                await client.delete(f"/{fit_name}")
                _parse_chain(text, i, layout, arrays, stats, settings, logged)
                del text
            if pending:
                await asyncio.sleep(0.05)
    _LOGGED[id(model)] = "\n".join(logged)
    return arrays, stats


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


_BOILERPLATE = ("Gradient evaluation took", "1000 transitions using", "Adjust your expectations",
                "Elapsed Time", "Iteration")
_STAT_NAMES = {"lp__": "lp", "accept_stat__": "acceptance_rate", "stepsize__": "step_size",
               "treedepth__": "tree_depth", "n_leapfrog__": "n_steps", "divergent__": "diverging",
               "energy__": "energy"}


def _parse_chain(text: bytes, chain: int, layout, arrays, stats, settings, logged) -> None:
    """Fill one chain's slot of ``arrays`` and ``stats`` from httpstan's JSON lines."""
    import json as _json

    import simdjson

    parser = simdjson.Parser()
    draw = 0
    n_stats = None
    for line in text.splitlines():
        if b'"logger"' in line:
            if b'info:Iteration' in line or b'Elapsed Time' in line or b'"info:"' in line:
                continue
            try:
                msg = _json.loads(line)
                value = str(msg["values"][0]).replace("info:", "").replace("error:", "").strip()
                if value and not value.startswith(_BOILERPLATE) and not value.startswith("seconds"):
                    logged.append(value)
            except Exception:
                pass
            continue
        if b'"sample"' not in line[:40]:
            continue
        try:
            msg = parser.parse(line)
            values = msg["values"]
            if not isinstance(values, simdjson.Object):
                del msg, values
                continue
            keys = None if n_stats is not None else tuple(values.keys())
            row = np.fromiter(values.values(), dtype=np.float64)
            del msg, values
        except ValueError:  # nan or infinity, which simdjson does not parse
            msg = _json.loads(line)
            values = msg["values"]
            if not isinstance(values, dict):
                continue
            keys = None if n_stats is not None else tuple(values.keys())
            row = np.asarray([float(v) for v in values.values()], dtype=np.float64)
        if n_stats is None:
            stat_keys = [k for k in keys if k.endswith("__")]
            n_stats = len(stat_keys)
            for k in stat_keys:
                stats.setdefault(k, np.empty((settings.chains, settings.draws)))
        if draw >= settings.draws:
            raise RuntimeError(f"chain {chain + 1} returned more draws than asked for")
        for j, k in enumerate(list(stats)[:n_stats]):
            stats[k][chain, draw] = row[j]
        params = row[n_stats:]
        for name, (shape, _dtype, lo, hi) in layout.items():
            if shape:
                # Stan writes arrays in column-major order
                arrays[name][chain, draw] = params[lo:hi].reshape(shape, order="F")
            else:
                arrays[name][chain, draw] = params[lo]
        draw += 1
    if draw != settings.draws:
        raise RuntimeError(f"chain {chain + 1} returned {draw} draws, expected {settings.draws}")


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
        # from the installed packages' metadata: importing PyStan costs a second, which a
        # rerun that reads every result from the fit store does not otherwise pay
        from importlib.metadata import version

        return f"pystan {version('pystan')} (httpstan {version('httpstan')})"

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
        with _quiet() as buf:
            try:
                arrays, stats = _interrupted_if_none(asyncio.run(_sample_lean(model, settings)))
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
        return Draws(idata, self.name, program.compile_seconds, seconds, settings,
                     _stan_message(buf.getvalue() + _LOGGED.get(id(model), "")))

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
