"""PyStan 3 engine (httpstan underneath; installs from PyPI alone).

PyStan compiles each program once into httpstan's cache (under the user's cache
folder) and reuses it for every dataset. Sampling calls httpstan's compiled program
directly, one chain per forked process, and parses its output as it is written (see
``_sample_direct``); the draws are exactly PyStan's for the same seed. The one-draw
evaluations (``single_draw``) still go through PyStan, which caches each fit on disk;
this engine deletes those files once read."""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import contextvars
import io
import os
import re
import sys
import tempfile
import time
from typing import Any, Mapping

import arviz as az
import numpy as np

from contenders.inputs.candidates import Candidate
from contenders.cleanup import while_writing
from contenders.engines.base import (OBS_DIMS, Draws, Engine, Program, SamplerSettings, SamplingError, compile_lock,
                   raise_if_interrupted)


#: Socket files made by the httpstan call running in the current asyncio task.
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


_CALL_SOCKETS: contextvars.ContextVar[list | None] = contextvars.ContextVar("call_sockets", default=None)


def _removing_call_sockets() -> None:
    """Make httpstan remove the Unix socket file each sampler call creates: its
    ``services_stub.call`` binds one in the temporary folder and never unlinks it, so
    every one-draw evaluation left an empty ``httpstan_*.sock`` behind. The call's own
    ``mkstemp`` names are recorded (a context variable, so concurrent calls keep theirs
    apart) and unlinked once the call has closed its socket. Installed once."""
    import tempfile as real_tempfile
    import types

    import httpstan.services_stub as stub

    if getattr(stub.call, "_removes_sockets", False):
        return
    original = stub.call

    def mkstemp(*args, **kwargs):
        handle, name = real_tempfile.mkstemp(*args, **kwargs)
        made = _CALL_SOCKETS.get()
        if made is not None:
            made.append(name)
        return handle, name

    async def call(*args, **kwargs):
        made: list[str] = []
        token = _CALL_SOCKETS.set(made)
        try:
            return await original(*args, **kwargs)
        finally:
            _CALL_SOCKETS.reset(token)
            for name in made:
                with contextlib.suppress(OSError):
                    os.unlink(name)

    call._removes_sockets = True
    stub.tempfile = types.SimpleNamespace(mkstemp=mkstemp)   # the module's only use of it
    stub.call = call                                         # httpstan looks it up per call


@contextlib.contextmanager
def _forgetting_fits():
    """Run PyStan calls while noting the names of the fits its httpstan client reads,
    then delete exactly those cached fit files (the client class is swapped for the
    duration; PyStan looks it up at call time). The calls' socket files go too
    (``_removing_call_sockets``)."""
    import httpstan.cache
    import stan.common

    _removing_call_sockets()

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
#: A semaphore shared by the run's worker processes (one slot per core), or None: each
#: chain takes a slot while it runs, so workers together never run more chains than
#: cores, yet a worker left alone runs as many as its pool allows.
CHAIN_SLOTS: list = [None]


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
    at once on SIGTERM, whatever handler the forking process had installed. They also
    end when the process that forked them is gone (a worker killed outright, say by a
    cluster), instead of waiting on its queue for ever: a thread looks every
    ``PARENT_CHECK_SECONDS`` whether the parent changed."""
    import signal
    import threading

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    parent = os.getppid()

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(PARENT_CHECK_SECONDS)
        os._exit(1)

    threading.Thread(target=watch, name="parent-watch", daemon=True).start()


PARENT_CHECK_SECONDS = 2.0


class _Waiting:
    """Seconds a fit spends waiting for a free chain slot while none of its own chains
    runs: the time other fits of the run hold every slot. Time when one of its chains
    runs and the next waits for a slot is work, not waiting (the fit is progressing)."""

    def __init__(self, clock=time.perf_counter) -> None:
        import threading

        self.clock = clock
        self.seconds = 0.0
        self._lock = threading.Lock()
        self._running = 0
        self._acquiring = False
        self._idle_from: float | None = None

    def before_acquire(self) -> None:
        with self._lock:
            self._acquiring = True
            if self._running == 0:
                self._idle_from = self.clock()

    def acquired(self) -> None:
        with self._lock:
            if self._idle_from is not None:
                self.seconds += self.clock() - self._idle_from
                self._idle_from = None
            self._acquiring = False
            self._running += 1

    def chain_done(self) -> None:
        with self._lock:
            self._running -= 1
            if self._running == 0 and self._acquiring:
                self._idle_from = self.clock()


def _sample_direct(model, settings: SamplerSettings, waiting: "_Waiting | None" = None):
    """NUTS with httpstan's compiled program, one chain per forked process, read directly.

    The same stan::services call with the same arguments as PyStan's ``model.sample``
    (chain ids 1..chains, the model's seed, httpstan's defaults for everything else), so
    the draws are identical; but httpstan's server is not involved. Each chain process
    runs the sampler in one thread and, in another, reads the sampler's JSON lines from
    its socket as they are written, parsing each draw into arrays at once; it hands the
    arrays back through a raw file that this process reads into place. Through PyStan's
    server the same output is compressed, cached, decompressed and sent over HTTP, which
    cost about 40 % of a core beside each chain; PyStan also keeps every chain's raw JSON
    text and a float64 copy of all draws at once (4.7 GB for one fit at N = 10,000).
    ``log_lik`` stays float64 (LOO needs it); ``y_rep`` is kept as float32, which holds
    any latency to 7 significant digits.

    Returns ``(arrays, stats)``: per variable an array (chains, draws, *dims), and per
    sampler statistic an array (chains, draws). ``waiting`` (a ``_Waiting``) measures the
    time spent waiting for chain slots (``CHAIN_SLOTS``) with no chain of this fit running."""
    import json as _json

    import httpstan.services_stub as stub
    from stan.model import DataJSONEncoder

    # the data exactly as httpstan's server would receive it (JSON: lists, ints, floats)
    data = _json.loads(DataJSONEncoder().encode(dict(model.data)))
    kwargs = _service_arguments(model, settings)
    layout = _layout(model)
    arrays = {name: np.empty((settings.chains, settings.draws, *shape), dtype=dtype, order="C")
              for name, (shape, dtype, _lo, _hi) in layout.items()}
    stats: dict[str, np.ndarray] = {}
    logged: list[str] = []
    # the folder is removed by cleanup.remove_all if this process is stopped meanwhile
    with tempfile.TemporaryDirectory(prefix="contenders_chains_") as folder, while_writing(folder):
        slots = CHAIN_SLOTS[0]
        futures = []
        errors = []
        try:
            waiting = waiting or _Waiting()
            for chain in range(1, settings.chains + 1):
                if slots is not None:
                    waiting.before_acquire()
                    slots.acquire()
                    waiting.acquired()
                try:
                    future = stub.executor.submit(_run_chain, model.model_name, data,
                                                  dict(kwargs, chain=chain), layout, settings.draws, folder)
                except BaseException:
                    if slots is not None:
                        waiting.chain_done()
                        slots.release()
                    raise
                if slots is not None:
                    def done(_f, slots=slots, waiting=waiting) -> None:
                        waiting.chain_done()
                        slots.release()

                    future.add_done_callback(done)
                futures.append(future)
            for i, future in enumerate(futures):
                answer = future.result()
                logged.extend(answer["logged"])
                if answer["error"] or errors:
                    errors.append(answer["error"])
                    for later in futures[i + 1:]:
                        later.cancel()
                    continue
                for k in answer["stats"]:
                    stats.setdefault(k, np.empty((settings.chains, settings.draws)))
                    _read_into(stats[k][i], os.path.join(folder, f"{i + 1}.{k}"))
                for name in layout:
                    _read_into(arrays[name][i], os.path.join(folder, f"{i + 1}.{name}"))
        except concurrent.futures.CancelledError:
            pass
        finally:
            # the folder holds the chains' sockets: leave no chain running when it goes
            for future in futures:
                future.cancel()
            concurrent.futures.wait(futures)
        if errors:
            raise RuntimeError(next(e for e in errors if e))
    _LOGGED[id(model)] = "\n".join(dict.fromkeys(logged))
    return arrays, stats


def _service_arguments(model, settings: SamplerSettings) -> dict[str, Any]:
    """Arguments of the sampler call, filled with httpstan's defaults as its server does."""
    import httpstan.models
    import httpstan.services.arguments as arguments

    given = {"init": {}, "random_seed": model.random_seed, "num_warmup": settings.warmup,
             "num_samples": settings.draws, "delta": settings.adapt_delta,
             "max_depth": settings.max_treedepth, "chain": 1}
    module = httpstan.models.import_services_extension_module(model.model_name)
    names = arguments.function_arguments(_SAMPLE_FUNCTION.rsplit("::", 1)[1], module)
    del module
    for name in names:
        if name not in given and name != "data":
            given[name] = arguments.lookup_default(arguments.Method.SAMPLE, name)
    return given


def _read_into(target: np.ndarray, path: str) -> None:
    """Fill a C-contiguous array from a raw file written by ``ndarray.tofile``."""
    if target.size == 0:  # e.g. log_lik when no observation is fitted
        return
    with open(path, "rb") as fh:
        got = fh.readinto(memoryview(target).cast("B"))
    os.unlink(path)
    if got != target.nbytes:
        raise RuntimeError(f"a chain's output file held {got} bytes, expected {target.nbytes}")


def _run_chain(model_name: str, data: dict, kwargs: dict, layout, draws: int, folder: str) -> dict:
    """In a chain process: run one chain and parse its output while it is written.

    The sampler (C++, which releases the GIL) runs in a thread and writes JSON lines to
    a Unix socket; this thread reads them and fills one chain's arrays, then writes each
    array to ``folder/<chain>.<name>`` for the parent to read."""
    import select
    import socket
    import threading

    import httpstan.models

    module = httpstan.models.import_services_extension_module(model_name)
    function = getattr(module, _SAMPLE_FUNCTION.rsplit("::", 1)[1] + "_wrapper")
    chain = kwargs["chain"]
    reader = _ChainReader(layout, draws)
    outcome: dict[str, Any] = {}
    path = os.path.join(folder, f"{chain}.sock")

    finished = threading.Event()
    failure: list[BaseException] = []

    def read(server: socket.socket) -> None:
        pending: dict[socket.socket, bytearray] = {}
        quiet = 0
        try:
            while True:
                readable, _, _ = select.select([server, *pending], [], [], 0.05)
                for s in readable:
                    if s is server:
                        conn, _ = server.accept()
                        pending[conn] = bytearray()
                        continue
                    chunk = s.recv(1 << 20)
                    buf = pending[s]
                    if not chunk:
                        if buf:
                            reader.line(bytes(buf))
                        del pending[s]
                        s.close()
                        continue
                    buf += chunk
                    end = buf.rfind(b"\n")
                    if end >= 0:
                        block = bytes(buf[:end])
                        del buf[:end + 1]
                        for line in block.split(b"\n"):
                            reader.line(line)
                if not readable and finished.is_set():
                    quiet += 1
                    # every writer closes its connection when the sampler returns; one
                    # left open (a writer leaked by a C++ exception) must not hang us
                    if not pending or quiet > 20:
                        break
                else:
                    quiet = 0
        except BaseException as exc:  # noqa: BLE001 - handed to the calling thread
            failure.append(exc)
        finally:
            for s in pending:
                s.close()

    # the sampler runs in this (the main) thread: Stan's C++ needs its larger stack
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as server:
        server.bind(path)
        server.listen(8)
        thread = threading.Thread(target=read, args=(server,), daemon=True)
        thread.start()
        try:
            outcome["code"] = function(path, data, **kwargs)
        except Exception as exc:  # Stan's exceptions reach here as RuntimeError
            outcome["error"] = str(exc)
        finally:
            finished.set()
            thread.join()
    if failure:
        raise failure[0]
    error = outcome.get("error")
    if error is None and outcome.get("code", 0) != 0:
        error = " ".join(reader.errors) or f"the sampler returned error code {outcome.get('code')}"
    elif error is not None and reader.errors:
        error = f"{error} {' '.join(reader.errors[:4])}"
    if error is None and reader.draw != draws:
        error = f"chain {chain} returned {reader.draw} draws, expected {draws}"
    if error is None:
        for name, values in {**reader.arrays, **reader.stats}.items():
            if values.size:
                values.tofile(os.path.join(folder, f"{chain}.{name}"))
    return {"stats": list(reader.stats), "logged": reader.logged, "error": error}


class _ChainReader:
    """Parses one chain's JSON lines (httpstan's writer format) into arrays."""

    def __init__(self, layout, draws: int):
        import simdjson

        self.layout = layout
        self.draws = draws
        self.arrays = {name: np.empty((draws, *shape), dtype=dtype)
                       for name, (shape, dtype, _lo, _hi) in layout.items()}
        self.stats: dict[str, np.ndarray] = {}
        self.logged: list[str] = []
        self.errors: list[str] = []
        self.draw = 0
        self._parser = simdjson.Parser()

    def line(self, line: bytes) -> None:
        import json as _json

        import simdjson

        head = line[:48]
        if b'"logger"' in head:
            if b"info:Iteration" in line or b"Elapsed Time" in line or b'"info:"' in line:
                return
            try:
                value = str(_json.loads(line)["values"][0])
            except Exception:
                return
            if value.startswith(("error:", "warn:")):
                self.errors.append(value.split(":", 1)[1].strip())
            value = value.replace("info:", "").replace("error:", "").replace("warn:", "").strip()
            if value and not value.startswith(_BOILERPLATE) and not value.startswith("seconds"):
                self.logged.append(value)
            return
        if b'"sample"' not in head:
            return
        try:
            values = self._parser.parse(line)["values"]
            if not isinstance(values, simdjson.Object):
                return
            keys = None if self.stats else tuple(values.keys())
            row = np.fromiter(values.values(), dtype=np.float64)
            del values
        except ValueError:  # nan or infinity, which simdjson does not parse
            values = _json.loads(line)["values"]
            if not isinstance(values, dict):
                return
            keys = None if self.stats else tuple(values.keys())
            row = np.asarray([float(v) for v in values.values()], dtype=np.float64)
        if not self.stats:
            for k in keys:
                if k.endswith("__"):
                    self.stats[k] = np.empty(self.draws)
        if self.draw >= self.draws:
            raise RuntimeError("a chain returned more draws than asked for")
        n_stats = len(self.stats)
        for j, values in enumerate(self.stats.values()):
            values[self.draw] = row[j]
        params = row[n_stats:]
        for name, (shape, _dtype, lo, hi) in self.layout.items():
            if shape:
                # Stan writes arrays in column-major order
                self.arrays[name][self.draw] = params[lo:hi].reshape(shape, order="F")
            else:
                self.arrays[name][self.draw] = params[lo]
        self.draw += 1


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


def _module_ready(model_name: str) -> bool:
    """Whether httpstan's cache holds a whole build of ``model_name``: its module, which
    loads, with the compiler logs that httpstan's server reads back (``stanc.log``, and
    ``stderr.log``, which httpstan writes only once the module is built).

    An entry with some of these but not all (a compile cut off, or two processes that
    built the same program at once) is removed, so that the next compile builds it
    again: httpstan itself only rebuilds a missing module, and on such an entry its
    server fails with a reply that is not JSON. Call it holding ``compile_lock``."""
    import httpstan.cache
    import httpstan.models

    folder = httpstan.cache.model_directory(model_name)
    if not folder.exists():
        return False
    if (folder / "stanc.log").exists() and (folder / "stderr.log").exists():
        try:
            httpstan.models.import_services_extension_module(model_name)
            return True
        except (KeyError, ImportError, OSError):
            pass
    httpstan.cache.delete_model_directory(model_name)
    return False


def stop_workers() -> None:
    """Terminate httpstan's sampling worker processes (forked once per Python process).
    Called on Ctrl-C: without it, workers whose parent has gone stay behind, holding the
    parent's output pipes open. The callers then remove the chains' temporary folders
    (``cleanup.remove_all``)."""
    import sys

    stub = sys.modules.get("httpstan.services_stub")
    executor = getattr(stub, "executor", None)
    if executor is not None:
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


#: How often a compile is asked for when PyStan's client gives up waiting for it.
COMPILE_TRIES = 2
#: The limit PyStan's client (an aiohttp session with aiohttp's default timeout) puts on
#: one request, the compile included.
REQUEST_LIMIT_SECONDS = 300


class PyStanEngine(Engine):
    name = "pystan"

    def version(self) -> str:
        # from the installed packages' metadata: importing PyStan costs a second, which a
        # rerun that reads every result from the fit store does not otherwise pay
        from importlib.metadata import version

        return f"pystan {version('pystan')} (httpstan {version('httpstan')})"

    def is_cached(self, candidate: Candidate) -> bool:
        import httpstan.models

        model_name = httpstan.models.calculate_model_name(candidate.code)
        with compile_lock(_lock_key(model_name), what=candidate.id):
            return _module_ready(model_name)

    def compile(self, candidate: Candidate) -> Program:
        import httpstan.models
        import stan.common

        model_name = httpstan.models.calculate_model_name(candidate.code)

        async def build() -> None:
            async with stan.common.HttpstanClient() as client:
                resp = await client.post("/models", json={"program_code": candidate.code})
                if resp.status != 201:
                    raise SamplingError(
                        f"{candidate.path.name}: compiling failed:\n{resp.json().get('message', '')[:4000]}"
                    )

        start = time.perf_counter()
        with compile_lock(_lock_key(model_name), what=candidate.id):
            cached = _module_ready(model_name)
            for attempt in range(1, COMPILE_TRIES + 1):
                try:
                    with _quiet():
                        asyncio.run(build())
                    break
                except asyncio.TimeoutError:
                    # PyStan's client gives up on a request after REQUEST_LIMIT_SECONDS; on a
                    # loaded machine a compile can take longer. httpstan finishes the build
                    # in the background before asyncio.run returns, so a second request
                    # usually finds the program compiled.
                    raise_if_interrupted()
                    if attempt == COMPILE_TRIES:
                        raise SamplingError(
                            f"{candidate.path.name}: compiling took longer than the {REQUEST_LIMIT_SECONDS} s "
                            f"PyStan allows one request, {COMPILE_TRIES} times (the machine is busy); run again "
                            "when it is less loaded, or with fewer programs compiled at once (--jobs 1)"
                        ) from None
            try:
                httpstan.models.import_services_extension_module(model_name)
            except (KeyError, ImportError, OSError) as exc:
                raise SamplingError(f"{candidate.path.name}: compiled, but the compiled program "
                                    f"cannot be loaded: {exc}") from None
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
        waiting = _Waiting()
        with _quiet() as buf:
            try:
                arrays, stats = _sample_direct(model, settings, waiting)
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
                     _stan_message(buf.getvalue() + _LOGGED.get(id(model), "")), wait_seconds=wait)

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
