"""The shared task loop (pipeline/tasks.py): answers come back to their task's callback,
follow-up tasks are sent, a task that raises is recorded and the others go on, and an
interrupt stops the loop. The tasks are functions of the standard library, so worker
processes can import them."""

from __future__ import annotations

import operator

import pytest

from contenders.pipeline.tasks import Task, run_tasks


def _tasks(seen: list):
    """2 * 3 and 5 * 7, whose answers each send one follow-up (the answer plus 1), and
    1 / 0, which raises in its worker."""
    def follow(answer):
        seen.append(("follow", answer))

    def first(answer):
        seen.append(("first", answer))
        return [Task(operator.add, (answer, 1), follow, lambda m: seen.append(("lost", m)))]

    lost = lambda message: ("lost", message)   # noqa: E731
    return [Task(operator.mul, (2, 3), first, lost),
            Task(operator.truediv, (1, 0), lambda answer: seen.append(answer), lost),
            Task(operator.mul, (5, 7), first, lost)]


def test_one_process_handles_answers_in_the_order_sent_with_follow_ups_and_failures():
    seen: list = []
    run_tasks(_tasks(seen), "pystan", jobs=1)
    # one core: every task runs as it is sent, so the answers are handled in that order,
    # then the follow-ups, sent while the first answers were handled
    assert seen == [("first", 6), ("lost", "worker: ZeroDivisionError: division by zero"), ("first", 35),
                    ("follow", 7), ("follow", 36)]


def test_worker_processes_give_the_same_answers():
    seen: list = []
    run_tasks(_tasks(seen), "pystan", jobs=2)
    assert sorted(seen, key=repr) == sorted([("first", 6), ("lost", "worker: ZeroDivisionError: division by zero"),
                                             ("first", 35), ("follow", 7), ("follow", 36)], key=repr)


def test_an_interrupt_while_answers_are_handled_stops_the_loop():
    seen: list = []

    def stop(answer):
        seen.append(answer)
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_tasks([Task(operator.mul, (2, 3), stop, str), Task(operator.mul, (4, 5), seen.append, str)],
                  "pystan", jobs=1)
    assert seen == [6]   # the second answer was never handled
