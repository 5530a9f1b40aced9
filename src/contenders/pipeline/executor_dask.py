"""Running the tasks of a run on an existing Dask cluster (``--cluster tcp://HOST:PORT``).

The same interface as the local executors (:class:`contenders.pipeline.executor.Executor`):
``submit(fn, *args)`` returns a :class:`concurrent.futures.Future`, so the task loop that
gathers results (:mod:`contenders.pipeline.tasks`) does not change. Scheduling,
retries and worker failures are Dask's (the ``distributed`` package); each task is
submitted with ``retries`` so a fit whose worker was lost is run again elsewhere.

The fit store belongs to the client, the process that started the run. A task whose
function takes a ``store_folder`` argument (``runner.candidate_task``,
``runner.fit_task``) gets a fresh worker-local folder instead; when the task ends the
worker sends back the result and the bytes of every fit stored there, and the client
writes them into its own store (temporary name, then rename, like
:meth:`contenders.pipeline.store.FitStore.save`) and points the result's file names at its
copies. Compiled programs are not sent: each worker machine compiles a program once into
its own engine cache and loads it from there afterwards.

Progress: the client reports each task as sent; the stages a task reaches on a worker
come back as Dask worker events on a topic of this run.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import inspect
import shutil
import tempfile
import threading
import uuid
from pathlib import Path
from typing import Any, Callable

from contenders.cleanup import write_whole
from contenders.errors import UserError
from contenders.machine import cores
from contenders.pipeline.executor import Executor, set_reporter
from contenders.pipeline.store import INDEX_NAME, FitStore

#: Seconds to wait for the scheduler before giving up.
CONNECT_TIMEOUT = 5
#: How often Dask runs a task again when the worker running it was lost.
RETRIES = 2

_LOCAL = threading.local()   # the progress topic of the task running in this worker thread


def _report_to_client(cid: str, stage: str) -> None:
    topic = getattr(_LOCAL, "topic", None)
    if topic is None:
        return
    from distributed import get_worker

    get_worker().log_event(topic, (cid, stage))


def _chain_workers(threads_on_host: dict[str, int]) -> int:
    """Stan chains at once for a task on this worker: this machine's cores shared out
    over every Dask worker thread on it, so side-by-side tasks do not oversubscribe it."""
    from distributed import get_worker

    host = get_worker().address.rsplit(":", 1)[0].split("://")[-1]
    return max(1, cores() // max(1, threads_on_host.get(host, 1)))


_PREPARED = [False]


def _prepare_worker(engine_name: str, threads_on_host: dict[str, int]) -> None:
    """Once per worker process: share out the cores, and close the chain pool before
    multiprocessing stops its queues when the worker exits (as the local executor does)."""
    from multiprocessing.util import Finalize

    from contenders.pipeline.executor import close_chain_pool, set_chain_workers

    set_chain_workers(engine_name, _chain_workers(threads_on_host))
    if not _PREPARED[0]:
        Finalize(None, close_chain_pool, exitpriority=20)
        _PREPARED[0] = True


def _on_worker(fn: Callable, args: tuple, store_pos: int | None, engine_name: str, topic: str,
               threads_on_host: dict[str, int]):
    """Runs on a Dask worker: ``fn(*args)`` with a worker-local fit store; returns
    ``(result, local store folder, {file name: bytes})``."""
    _prepare_worker(engine_name, threads_on_host)
    set_reporter(_report_to_client)
    _LOCAL.topic = topic
    local = None
    try:
        if store_pos is not None:
            from distributed import get_worker

            local = tempfile.mkdtemp(prefix="contenders-fits-", dir=get_worker().local_directory)
            args = args[:store_pos] + (local,) + args[store_pos + 1:]
        result = fn(*args)
        files = {}
        if local is not None:
            for path in sorted(Path(local).glob("*.nc")):
                files[path.name] = path.read_bytes()
            index = Path(local) / INDEX_NAME
            if index.exists():   # what the fits were made from, for contenders store
                files[INDEX_NAME] = index.read_bytes()
        return result, local, files
    finally:
        _LOCAL.topic = None
        if local is not None:
            shutil.rmtree(local, ignore_errors=True)


def _store_position(fn: Callable) -> int | None:
    """Index of the ``store_folder`` argument of ``fn``, if it has one."""
    try:
        names = list(inspect.signature(fn).parameters)
    except (TypeError, ValueError):
        return None
    return names.index("store_folder") if "store_folder" in names else None


def _write_into(folder: Path, files: dict[str, bytes]) -> None:
    """Write fits into the client's store: temporary name, then rename into place."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        if name == INDEX_NAME:   # records are appended to the client's index
            FitStore(folder).append_index(data)
            continue
        write_whole(folder / name, data)


def _relocate(result: Any, local: str, store: str) -> Any:
    """Point a candidate result's file names at the client's copies."""
    def moved(name: str) -> str:
        return str(Path(store) / Path(name).name) if name and Path(name).parent == Path(local) else name

    if hasattr(result, "fit_files"):   # a candidate's result, or one refit's
        result.fit_files = [moved(f) for f in result.fit_files]
    if hasattr(result, "posterior_file"):
        result.posterior_file = moved(result.posterior_file)
    return result


def _task_id(args: tuple) -> str:
    first = args[0] if args else None
    return str(getattr(first, "id", "task"))


def _problem(address: str, why: str) -> UserError:
    return UserError(
        f"--cluster {address}: {why}; give the address the Dask scheduler printed when it started "
        "(tcp://HOST:PORT, e.g. from 'dask scheduler'), check that the scheduler is running and reachable "
        "from this machine, or leave out --cluster (and [run] cluster) to run on this machine")


def connect(address: str, timeout: float = CONNECT_TIMEOUT):
    """A ``distributed.Client`` connected to the scheduler at ``address``; a bad or
    unreachable address is a :class:`UserError` that names it."""
    try:
        from distributed import Client
    except ImportError:
        raise UserError("--cluster needs Dask's distributed package; install it with "
                        "pip install 'contenders[cluster]' (or pip install distributed)") from None
    try:
        return Client(address, timeout=timeout, set_as_default=False)
    except (OSError, ValueError, TypeError) as exc:
        raise _problem(address, f"cannot connect to a Dask scheduler there ({exc})") from None
    except Exception as exc:   # distributed raises a few kinds of its own
        raise _problem(address, f"cannot connect to a Dask scheduler there ({type(exc).__name__}: {exc})") from None


def _daemonic(_dask_worker=None) -> bool:
    import multiprocessing

    return bool(multiprocessing.current_process().daemon)


class DaskExecutor(Executor):
    """Tasks run on the workers of the Dask cluster at ``address``; results and fits come
    back to this process."""

    def __init__(self, address: str, engine_name: str,
                 on_event: Callable[[str, str], None] | None = None,
                 timeout: float = CONNECT_TIMEOUT, retries: int = RETRIES) -> None:
        self.address = address
        self.engine_name = engine_name
        self.retries = retries
        self._on_event = on_event or (lambda _cid, _stage: None)
        self.client = connect(address, timeout)
        try:
            info = self.client.scheduler_info()
            workers = info.get("workers", {})
            if not workers:
                raise _problem(address, "the scheduler has no workers; start some with "
                                        f"'dask worker {address}'")
            self.threads_on_host: dict[str, int] = {}
            for w in workers.values():
                host = str(w.get("host", ""))
                self.threads_on_host[host] = self.threads_on_host.get(host, 0) + int(w.get("nthreads", 1))
            self.workers = sum(int(w.get("nthreads", 1)) for w in workers.values())
            if engine_name == "pystan":
                daemonic = [addr for addr, d in self.client.run(_daemonic).items() if d]
                if daemonic:
                    raise UserError(
                        f"--cluster {address}: {len(daemonic)} Dask worker(s) run as daemonic processes, which "
                        "cannot start PyStan's chain processes; restart the workers with "
                        f"DASK_DISTRIBUTED__WORKER__DAEMON=False dask worker {address} "
                        "(or use --engine cmdstanpy where CmdStan is installed on the workers)")
        except BaseException:
            self.client.close()
            raise
        self.topic = f"contenders-{uuid.uuid4().hex}"
        self.client.subscribe_topic(self.topic, self._relay)
        self._futures: list = []
        self._lock = threading.Lock()

    def _relay(self, event) -> None:
        with contextlib.suppress(Exception):
            _time, (cid, stage) = event
            self._on_event(cid, stage)

    def submit(self, fn: Callable, *args: Any) -> cf.Future:
        store_pos = _store_position(fn)
        store = str(args[store_pos]) if store_pos is not None and store_pos < len(args) else None
        if store is None:
            store_pos = None
        cid = _task_id(args)
        out: cf.Future = cf.Future()
        remote = self.client.submit(
            _on_worker, fn, tuple(args), store_pos, self.engine_name, self.topic, self.threads_on_host,
            pure=False, retries=self.retries, key=f"contenders-{cid}-{uuid.uuid4().hex[:12]}")
        with self._lock:
            self._futures.append(remote)
        with contextlib.suppress(Exception):
            self._on_event(cid, "waiting: sent to the cluster")

        def finished(done) -> None:
            try:
                result, local, files = done.result()
                if store is not None:
                    _write_into(Path(store), files)
                    result = _relocate(result, local, store)
            except BaseException as exc:   # a lost worker beyond the retries, a cancelled task
                if not out.done():
                    out.set_exception(exc if isinstance(exc, Exception) else RuntimeError(repr(exc)))
                return
            if not out.done():
                out.set_result(result)

        remote.add_done_callback(finished)
        return out

    def close(self, cancel: bool = False) -> None:
        with self._lock:
            futures, self._futures = self._futures, []
        with contextlib.suppress(Exception):
            if cancel and futures:
                self.client.cancel(futures, force=True)
        with contextlib.suppress(Exception):
            self.client.unsubscribe_topic(self.topic)
        with contextlib.suppress(Exception):
            self.client.close()
