"""Where the work of a run is done: in this process, or in a pool of local processes.

A run hands the executor one task per candidate (all trials of that candidate on one
dataset). Tasks return compact results (summaries, pointwise elpd, a few replicated
datasets for figures), never a fit's full draws, so the process that gathers them never
holds two candidates' draws at once; each worker process releases a fit's arrays
before it starts the next task.

Cores are shared out so the machine is not oversubscribed: with ``jobs`` cores and
``w = min(jobs, tasks)`` worker processes, each worker runs at most ``jobs // w`` Stan
chains at once (Stan's chains run in child processes of the worker). ``jobs = 1`` runs
everything in this process, one chain at a time.

Workers report progress (candidate, stage) through a queue that the caller drains in a
thread; see :mod:`contenders.pipeline.progress`.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import multiprocessing as mp
import os
import queue
import signal
import threading
from typing import Any, Callable

from contenders.machine import THIS_PROCESS, cores

#: The function a task calls to report a stage; set in each worker process.
_REPORT: list[Callable[[str, str], None]] = [lambda _cid, _stage: None]


def set_reporter(fn: Callable[[str, str], None]) -> Callable[[str, str], None]:
    """Make ``fn(candidate_id, stage)`` what ``report`` calls in this process (a Dask
    worker sends the events to its client); return the one it replaces."""
    previous, _REPORT[0] = _REPORT[0], fn
    return previous


def report(candidate_id: str, stage: str) -> None:
    """Tell whoever started the run that ``candidate_id`` has reached ``stage``."""
    with contextlib.suppress(Exception):
        _REPORT[0](candidate_id, stage)


def share(jobs: int, tasks: int) -> tuple[int, int]:
    """``(worker processes, chains at once per worker)`` for ``jobs`` cores and ``tasks``
    tasks; their product never exceeds ``jobs``."""
    jobs = max(1, jobs)
    workers = max(1, min(jobs, tasks))
    return workers, max(1, jobs // workers)


def set_chain_workers(engine_name: str, n: int) -> int:
    """Limit the chains this process runs at once; return the previous limit (0: none).
    Both engines read this process's share (``machine.THIS_PROCESS``) at each sampling
    call, unless an engine was given a share of its own. ``engine_name`` is not needed
    (kept for the callers)."""
    previous = THIS_PROCESS.chains_at_once
    THIS_PROCESS.chains_at_once = max(1, int(n))
    return previous


def close_chain_pool() -> None:
    """End this process's Stan chain processes (PyStan's), idle by now: the worker only
    exits between tasks."""
    import sys

    if "contenders.engines.pystan_engine" not in sys.modules:
        return
    from contenders.engines.pystan_engine import stop_workers

    stop_workers(join=5)


def _worker_init(engine_name: str, chain_workers: int, events, slots=None) -> None:
    """Runs once in each worker process. ``slots``, a semaphore shared by all workers,
    holds one slot per core: with it a worker may run up to ``chain_workers`` chains at
    once but only while cores are free, so a worker left alone (the last candidate, or
    its refits) uses every core, and all workers together never run more chains than
    there are slots."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # the parent handles Ctrl-C and stops us

    me = os.getpid()

    def on_term(_signum, _frame):
        if os.getpid() != me:   # a chain process forked from this worker: just go
            os._exit(143)
        with contextlib.suppress(Exception):
            from contenders.engines.pystan_engine import stop_workers

            stop_workers()
        with contextlib.suppress(Exception):
            from contenders.cleanup import remove_all

            remove_all()
        os._exit(143)

    signal.signal(signal.SIGTERM, on_term)
    set_chain_workers(engine_name, chain_workers)
    if slots is not None:
        THIS_PROCESS.slots = slots
    # Stan's chain processes are children of this worker; a worker's exit waits for its
    # children, so stop them first. multiprocessing runs finalisers with an exit priority
    # before it joins children, highest first; queues close their feeder threads at
    # priority 10, so this must come before them.
    from multiprocessing.util import Finalize

    Finalize(None, close_chain_pool, exitpriority=100)
    _REPORT[0] = lambda cid, stage: events.put((cid, stage))


class Executor:
    """Runs tasks and relays their progress reports to ``on_event(candidate, stage)``."""

    workers: int = 1
    chain_workers: int = 1

    def submit(self, fn: Callable, *args: Any) -> cf.Future:
        raise NotImplementedError

    def close(self, cancel: bool = False) -> None:
        """Release the workers; with ``cancel``, stop running work at once."""


class InlineExecutor(Executor):
    """Everything in this process, in order (``jobs = 1``, or a single task)."""

    def __init__(self, engine_name: str, chain_workers: int = 1,
                 on_event: Callable[[str, str], None] | None = None) -> None:
        self.workers, self.chain_workers = 1, chain_workers
        self._engine = engine_name
        self._previous_chains: int | None = None   # chains are limited at the first task
        self._previous = _REPORT[0]
        _REPORT[0] = on_event or (lambda _cid, _stage: None)

    def submit(self, fn: Callable, *args: Any) -> cf.Future:
        if self._previous_chains is None:   # not before: a run without tasks loads no engine
            self._previous_chains = set_chain_workers(self._engine, self.chain_workers)
        future: cf.Future = cf.Future()
        try:
            future.set_result(fn(*args))
        except BaseException as exc:   # KeyboardInterrupt included: the caller re-raises it
            if isinstance(exc, KeyboardInterrupt):
                raise
            future.set_exception(exc)
        return future

    def close(self, cancel: bool = False) -> None:
        _REPORT[0] = self._previous
        # this process goes on (a library caller, a test session): give back its cores
        if self._previous_chains is not None:
            set_chain_workers(self._engine, self._previous_chains or cores())


class ProcessExecutor(Executor):
    """A pool of ``workers`` local processes (started fresh, not forked, so no state of
    this process leaks into them), each running ``chain_workers`` chains at once. With
    ``cores`` (PyStan), the workers instead share that many chain slots: each may run up
    to ``cores`` chains, all of them together no more than ``cores``."""

    def __init__(self, engine_name: str, workers: int, chain_workers: int,
                 on_event: Callable[[str, str], None] | None = None, cores: int = 0) -> None:
        ctx = mp.get_context("spawn")
        slots = None
        if cores and engine_name in ("pystan", "cmdstanpy"):
            slots, chain_workers = ctx.Semaphore(cores), cores
        self.workers, self.chain_workers = workers, chain_workers
        self._events = ctx.Queue()
        self._pool = cf.ProcessPoolExecutor(
            max_workers=workers, mp_context=ctx, initializer=_worker_init,
            initargs=(engine_name, chain_workers, self._events, slots),
        )
        self._on_event = on_event or (lambda _cid, _stage: None)
        self._stop = threading.Event()
        self._relay = threading.Thread(target=self._drain, name="progress-relay", daemon=True)
        self._relay.start()

    def _drain(self) -> None:
        while not self._stop.is_set():
            try:
                cid, stage = self._events.get(timeout=0.2)
            except queue.Empty:
                continue
            except (EOFError, OSError):
                return
            with contextlib.suppress(Exception):
                self._on_event(cid, stage)

    def submit(self, fn: Callable, *args: Any) -> cf.Future:
        return self._pool.submit(fn, *args)

    def close(self, cancel: bool = False) -> None:
        if cancel:
            processes = list(getattr(self._pool, "_processes", {}).values())
            self._pool.shutdown(wait=False, cancel_futures=True)
            for proc in processes:   # each stops its own chain processes (SIGTERM handler)
                with contextlib.suppress(Exception):
                    proc.terminate()
            for proc in processes:
                with contextlib.suppress(Exception):
                    proc.join(timeout=5)
        else:
            self._pool.shutdown(wait=True)
        # let the relay deliver what is queued, then stop it
        self._stop.set()
        self._relay.join(timeout=2)
        with contextlib.suppress(Exception):
            while True:
                cid, stage = self._events.get_nowait()
                self._on_event(cid, stage)
        with contextlib.suppress(Exception):
            self._events.close()

