"""The one loop that runs tasks on an executor, for a run, a model recovery and a
calibration study (a batch runs a run per dataset, so it goes through it too).

A :class:`Task` is a module-level function with its arguments (so it can be sent to
a worker process or a Dask worker), and two callbacks that run in this process:
``done(answer)`` with the task's answer as soon as it is back (it may return further
tasks, which are sent at once: a candidate's exact refits follow its trials), and
``lost(message)``, which turns an exception raised by the task or its worker into the
answer that stands in for it (one task failing never stops the others).

:func:`run_tasks` makes the executor (``make_executor``) with
``progress.event`` as its ``on_event``, so the stages that tasks report from their
workers reach the progress lines; it keeps the live block redrawn while tasks run,
and on any exception (Ctrl-C included) stops the workers at once and re-raises.
Answers are handled in the order the tasks were sent whenever several are back at
once, so a run on one core reports in the same order every time.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import itertools
from dataclasses import dataclass
from typing import Any, Callable, Iterable

from contenders.machine import cores
from contenders.pipeline.executor import Executor, InlineExecutor, ProcessExecutor, share


@dataclass
class Task:
    """One call of ``fn(*args)`` on the executor and what to do with its answer."""

    fn: Callable[..., Any]
    args: tuple
    done: Callable[[Any], Iterable["Task"] | None]
    lost: Callable[[str], Any]


def worker_failure(exc: BaseException) -> str:
    """The message recorded for a task whose worker raised ``exc`` (or died)."""
    return f"worker: {type(exc).__name__}: {exc}"


def make_executor(engine_name: str, jobs: int, tasks: int,
                  on_event: Callable[[str, str], None] | None = None, cluster: str = "") -> Executor:
    """The executor for ``tasks`` tasks on ``jobs`` cores (0: all cores), or on the Dask
    cluster whose scheduler is at ``cluster`` (see :mod:`contenders.pipeline.executor_dask`)."""
    if cluster:
        from contenders.pipeline.executor_dask import DaskExecutor   # imports distributed

        return DaskExecutor(cluster, engine_name, on_event)
    jobs = jobs or cores()
    workers, chain_workers = share(jobs, tasks)
    if workers == 1:
        return InlineExecutor(engine_name, chain_workers, on_event)
    return ProcessExecutor(engine_name, workers, chain_workers, on_event, cores=jobs)


def run_tasks(tasks: Iterable[Task], engine_name: str, jobs: int, progress=None, cluster: str = "",
              count: int | None = None) -> None:
    """Run ``tasks`` and their follow-ups to the end.

    ``jobs`` cores are shared out over the ``count`` tasks (``len(tasks)`` unless given,
    for a generator whose tasks' arguments are made as they are sent; see
    ``executor.share``) on local workers, or the tasks go to the Dask scheduler at
    ``cluster`` (never contacted when there is nothing to run). ``progress`` (a
    :class:`contenders.pipeline.progress.Progress` or None) receives the stages the tasks
    report and is redrawn while they run. A task's arguments are not kept once it is sent."""
    from contenders.engines.base import raise_if_interrupted

    count = len(tasks) if count is None else count   # type: ignore[arg-type]
    on_event = progress.event if progress is not None else None
    executor = make_executor(engine_name, jobs, count, on_event=on_event, cluster=cluster if count else "")
    order = itertools.count()
    running: dict[cf.Future, tuple[int, Task]] = {}

    def send(task: Task) -> None:
        future = executor.submit(task.fn, *task.args)
        running[future] = (next(order), Task(task.fn, (), task.done, task.lost))

    try:
        with progress.ticker() if progress is not None else contextlib.nullcontext():
            for task in tasks:
                send(task)
            while running:
                finished, _ = cf.wait(list(running), return_when=cf.FIRST_COMPLETED)
                for future in sorted(finished, key=lambda f: running[f][0]):
                    _n, task = running.pop(future)
                    try:
                        answer = future.result()
                    except Exception as exc:   # a worker died: recorded, the others go on
                        answer = task.lost(worker_failure(exc))
                    for follow in task.done(answer) or ():
                        send(follow)
                    raise_if_interrupted()
        executor.close()
    except BaseException:
        executor.close(cancel=True)
        raise
