"""The PyStan engine's fast sampler: httpstan's compiled program called directly.

Everything here reaches inside httpstan and PyStan (its services stub, its compiled
module's wrapper functions, its JSON writer's line format, its default arguments, its
cache folders, PyStan's client class), as written for httpstan 4.13; no other module of
the package does. When this module loads it reads the installed httpstan's version;
``compatible()`` says whether it is the one this code was written for. The engine
(``pystan_engine``) uses this module only then, and otherwise samples through PyStan's
public interface, which gives the same draws more slowly (tested).

The engine's compile and cache checks (``model_name``, ``module_ready``,
``compile_request``) and its clean-up of cached fits (``forgetting_fits``) are here too.

The fast path: each chain runs in a process of a ``ChainPool`` (forked processes that
the engine owns; they end with their parent), parses the sampler's output as it is
written and hands the arrays back through raw files (``sample_direct``)."""

from __future__ import annotations

import concurrent.futures
import contextlib
import contextvars
import os
import tempfile
import time
import weakref
from importlib.metadata import PackageNotFoundError, version as _installed_version
from typing import Any

import numpy as np

from contenders.cleanup import while_writing
from contenders.engines.base import SamplerSettings

#: The httpstan release (major, minor) this module was written for.
WRITTEN_FOR = (4, 13)


def _detect() -> str:
    try:
        return _installed_version("httpstan")
    except PackageNotFoundError:  # pragma: no cover - PyStan depends on it
        return "not installed"


#: The installed httpstan's version, read once when this module loads.
DETECTED = _detect()


def compatible(detected: str | None = None) -> bool:
    """Whether httpstan's version (``DETECTED`` unless given) is the ``WRITTEN_FOR``
    release, any patch level: only then may the fast path touch httpstan's inside."""
    text = DETECTED if detected is None else detected
    parts = text.split(".")
    try:
        return (int(parts[0]), int(parts[1])) == WRITTEN_FOR
    except (IndexError, ValueError):
        return False


def fallback_notice() -> str:
    """The one line said (once per process) when the installed httpstan is another."""
    major_minor = ".".join(DETECTED.split(".")[:2])
    return (f"contenders: httpstan {major_minor} is not the {WRITTEN_FOR[0]}.{WRITTEN_FOR[1]} this "
            "engine's fast sampler was written for; compiling and sampling through PyStan's public interface "
            "instead (slower, same draws)")


# --- the PyStan engine's compile and cache, through httpstan's and PyStan's inside -----
# (used by ``pystan_engine`` only when ``compatible()``; otherwise it compiles through
# ``stan.build`` and leaves httpstan's cache to httpstan)


def model_name(code: str) -> str:
    """httpstan's name for the compiled ``code`` (``models/<hash>``)."""
    import httpstan.models

    return httpstan.models.calculate_model_name(code)


def load_module(name: str):
    """Import the compiled module of ``name`` (KeyError, ImportError or OSError if there
    is none that loads)."""
    import httpstan.models

    return httpstan.models.import_services_extension_module(name)


def module_ready(name: str) -> bool:
    """Whether httpstan's cache holds a whole build of ``name``: its module, which
    loads, with the compiler logs that httpstan's server reads back (``stanc.log``, and
    ``stderr.log``, which httpstan writes only once the module is built).

    An entry with some of these but not all (a compile cut off, or two processes that
    built the same program at once) is removed, so that the next compile builds it
    again: httpstan itself only rebuilds a missing module, and on such an entry its
    server fails with a reply that is not JSON. Call it holding ``compile_lock``."""
    import httpstan.cache

    folder = httpstan.cache.model_directory(name)
    if not folder.exists():
        return False
    if (folder / "stanc.log").exists() and (folder / "stderr.log").exists():
        try:
            load_module(name)
            return True
        except (KeyError, ImportError, OSError):
            pass
    httpstan.cache.delete_model_directory(name)
    return False


def compile_request(code: str) -> tuple[int, str]:
    """Ask httpstan's server (through PyStan's client) to compile ``code``, without data;
    return the reply's status (201: compiled) and its message. May raise
    ``asyncio.TimeoutError`` (the client's limit on one request)."""
    import asyncio

    import stan.common

    async def build() -> tuple[int, str]:
        async with stan.common.HttpstanClient() as client:
            resp = await client.post("/models", json={"program_code": code})
            return resp.status, ("" if resp.status == 201 else resp.json().get("message", ""))

    return asyncio.run(build())


def httpstan_pool():
    """The process pool httpstan's server runs its chains in, if httpstan made one in this
    process, else None. Read defensively (a module looked up in ``sys.modules``, an
    attribute read with a default), so it is used with any httpstan version: with none
    of these names it finds nothing and stops nothing."""
    import sys

    return getattr(sys.modules.get("httpstan.services_stub"), "executor", None)


_SAMPLE_FUNCTION = "stan::services::sample::hmc_nuts_diag_e_adapt"

#: Socket files made by the httpstan call running in the current asyncio task.
_CALL_SOCKETS: contextvars.ContextVar[list | None] = contextvars.ContextVar("call_sockets", default=None)


def remove_call_sockets() -> None:
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
def forgetting_fits(known: bool = True):
    """Run PyStan calls while noting the names of the fits its httpstan client reads,
    then delete exactly those cached fit files (the client class is swapped for the
    duration; PyStan looks it up at call time); with ``known`` (the httpstan version this
    module was written for, ``compatible()``) the calls' socket files go too
    (``remove_call_sockets``).

    With another version (``known`` False) only the fit clean-up is tried, and
    defensively: each name is looked up with a default, and where one is missing or does
    not take the wrapper, PyStan's calls run untouched and their fits stay in httpstan's
    cache. PyStan's public interface cannot delete a fit; without this, every fit sampled
    through it would stay on disk."""
    import importlib

    common = cache = None
    with contextlib.suppress(Exception):
        common = importlib.import_module("stan.common")
        cache = importlib.import_module("httpstan.cache")
    original = getattr(common, "HttpstanClient", None)
    delete_fit = getattr(cache, "delete_fit", None)
    if original is None or delete_fit is None:
        yield
        return
    if known:
        remove_call_sockets()

    names: list[str] = []

    def recording_client(*args, **kwargs):
        client = original(*args, **kwargs)
        plain_get = getattr(client, "get", None)
        if plain_get is None:
            return client

        async def get(path, *a, **kw):
            if isinstance(path, str) and "/fits/" in path and not path.startswith("/operations"):
                names.append(path.lstrip("/"))
            return await plain_get(path, *a, **kw)

        with contextlib.suppress(Exception):
            client.get = get
        return client

    common.HttpstanClient = recording_client
    try:
        yield
    finally:
        common.HttpstanClient = original
        for name in set(names):
            with contextlib.suppress(Exception):
                delete_fit(name)


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


def shut_down(executor, terminate: bool = True, join: float | None = None) -> None:
    """Shut a process pool down without waiting for its queue; with ``terminate``, end
    its processes at once (idle or not), waiting up to ``join`` seconds for each."""
    processes = list((getattr(executor, "_processes", None) or {}).values())
    with contextlib.suppress(Exception):
        executor.shutdown(wait=False, cancel_futures=True)
    if terminate:
        for proc in processes:
            with contextlib.suppress(Exception):
                proc.terminate()
        if join is not None:
            for proc in processes:
                with contextlib.suppress(Exception):
                    proc.join(timeout=join)


class ChainPool:
    """Forked processes that run one chain each, ``workers`` at a time; owned by an
    engine. Its processes ignore Ctrl-C, die at once on SIGTERM and end when the process
    that forked them is gone (``_init_chain_process``). Every live pool is known to
    ``close_all``, which a worker calls on its way out (a signal handler has no engine
    at hand)."""

    def __init__(self, workers: int) -> None:
        import multiprocessing as mp

        self.workers = max(1, int(workers))
        self.executor = concurrent.futures.ProcessPoolExecutor(
            max_workers=self.workers, mp_context=mp.get_context("fork"), initializer=_init_chain_process)
        # A pool dropped with its engine (each task makes its own engine) must end its
        # processes then: a process pool left to the garbage collector can hang its
        # worker's exit, which waits for every child (seen here: test_recovery and the
        # Ctrl-C test of test_reliability hung in the full suite). The finalizer holds
        # the executor, so it is shut down by us, never collected half-way.
        self._finalizer = weakref.finalize(self, shut_down, self.executor, True, 5.0)
        _LIVE.add(self)

    def submit(self, fn, *args) -> concurrent.futures.Future:
        return self.executor.submit(fn, *args)

    def close(self, terminate: bool = False, join: float | None = None) -> None:
        """Shut the pool down; with ``terminate``, end its processes at once (idle or not),
        waiting up to ``join`` seconds for each."""
        shut_down(self.executor, terminate, join)
        self._finalizer.detach()
        _LIVE.discard(self)


_LIVE: "weakref.WeakSet[ChainPool]" = weakref.WeakSet()


def close_all(join: float | None = None) -> None:
    """End the processes of every chain pool of this process (on Ctrl-C, SIGTERM or exit)."""
    for pool in list(_LIVE):
        pool.close(terminate=True, join=join)


@contextlib.contextmanager
def serving_from(pool: ChainPool):
    """Let httpstan's own server (PyStan's public calls: the one-draw evaluations) run its
    chains in ``pool`` for the duration, instead of the pool httpstan makes at import
    (one process per core, all forked at the first call, without ``_init_chain_process``)."""
    import httpstan.services_stub as stub

    saved = stub.executor
    stub.executor = pool.executor   # httpstan looks it up per call
    try:
        yield
    finally:
        stub.executor = saved


class Waiting:
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


def sample_direct(model, settings: SamplerSettings, layout, pool: "ChainPool", slots=None,
                  waiting: "Waiting | None" = None):
    """NUTS with httpstan's compiled program, one chain per process of ``pool``, read directly.

    The same stan::services call with the same arguments as PyStan's ``model.sample``
    (chain ids 1..chains, the model's seed, httpstan's defaults for everything else), so
    the draws are identical; but httpstan's server is not involved. Each chain process
    runs the sampler in one thread and, in another, reads the sampler's JSON lines from
    its socket as they are written, parsing each draw into arrays at once; it hands the
    arrays back through a raw file that this process reads into place. Through PyStan's
    server the same output is compressed, cached, decompressed and sent over HTTP, which
    cost about 40 % of a core beside each chain; PyStan also keeps every chain's raw JSON
    text and a float64 copy of all draws at once (4.7 GB for one fit at N = 10,000).
    ``layout`` (the engine's ``_layout``) gives each variable's shape, the dtype kept
    (``log_lik`` float64, LOO needs it; ``y_rep`` float32, which holds any latency to 7
    significant digits) and its slice in a draw.

    Returns ``(arrays, stats, logged)``: per variable an array (chains, draws, *dims), per
    sampler statistic an array (chains, draws), and the sampler's informative messages.
    ``slots`` (a semaphore, see ``machine.ChainShare``) is taken by each chain while it
    runs; ``waiting`` (a ``Waiting``) measures the time spent waiting for a slot with no
    chain of this fit running."""
    import json as _json

    from stan.model import DataJSONEncoder

    # the data exactly as httpstan's server would receive it (JSON: lists, ints, floats)
    data = _json.loads(DataJSONEncoder().encode(dict(model.data)))
    kwargs = _service_arguments(model, settings)
    arrays = {name: np.empty((settings.chains, settings.draws, *shape), dtype=dtype, order="C")
              for name, (shape, dtype, _lo, _hi) in layout.items()}
    stats: dict[str, np.ndarray] = {}
    logged: list[str] = []
    # the folder is removed by cleanup.remove_all if this process is stopped meanwhile
    with tempfile.TemporaryDirectory(prefix="contenders_chains_") as folder, while_writing(folder):
        futures = []
        errors = []
        try:
            waiting = waiting or Waiting()
            for chain in range(1, settings.chains + 1):
                if slots is not None:
                    waiting.before_acquire()
                    slots.acquire()
                    waiting.acquired()
                try:
                    future = pool.submit(_run_chain, model.model_name, data,
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
    return arrays, stats, "\n".join(dict.fromkeys(logged))


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


_BOILERPLATE = ("Gradient evaluation took", "1000 transitions using", "Adjust your expectations",
                "Elapsed Time", "Iteration")
