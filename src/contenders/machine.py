"""What this process may use of the machine: its cores, and its share of them for Stan
chains. Low level on purpose: engines and the pipeline both read it, and it imports
nothing of the package."""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass
from typing import Any


def cores() -> int:
    """Cores this process may use (the affinity mask where the platform has one)."""
    with contextlib.suppress(AttributeError):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


@dataclass
class ChainShare:
    """How many Stan chains a process runs at once, as the run's executor shares the cores
    out. ``chains_at_once`` 0 means one per core. ``slots``, when set, is a semaphore
    shared by the run's worker processes (one slot per core): each chain takes a slot
    while it runs, so workers together never run more chains than cores, yet a worker
    left alone runs as many as its own limit allows."""

    chains_at_once: int = 0
    slots: Any = None

    def limit(self) -> int:
        """Chains at once: the share set, else one per core."""
        return self.chains_at_once or cores()

    @contextlib.contextmanager
    def hold(self, chains: int):
        """For a sampling call that starts all its ``chains`` together: yield how many of
        them to run at once. Without ``slots``, that is ``chains`` up to ``limit()``.
        With ``slots``: take one slot, waiting if need be, then every further free one up
        to ``chains``, and hold them until the call is done (never waiting for a second
        slot, so two callers cannot wait on each other)."""
        slots = self.slots
        if slots is None:
            yield max(1, min(chains, self.limit()))
            return
        slots.acquire()
        held = 1
        while held < chains and slots.acquire(False):
            held += 1
        try:
            yield held
        finally:
            for _ in range(held):
                slots.release()


#: This process's share, set by the run's executor in each process that samples (the
#: process itself for one job, each worker otherwise). An engine reads it at each
#: sampling call unless it was given a share of its own.
THIS_PROCESS = ChainShare()
