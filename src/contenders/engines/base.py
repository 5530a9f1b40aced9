"""The engine interface and the plain records it exchanges."""

from __future__ import annotations

import abc
import contextlib
import fcntl
import os
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Mapping

import numpy as np

from contenders.errors import SamplingError  # noqa: F401 - re-exported: engines raise it
from contenders.inputs.candidates import Candidate

if TYPE_CHECKING:   # ArviZ is imported where draws are made or read, not here
    import arviz as az


#: Set when the user interrupts (Ctrl-C) while an engine call is running; engines check it
#: after each call, because an interrupt can be absorbed inside asyncio-based clients.
INTERRUPTED = threading.Event()


def raise_if_interrupted() -> None:
    if INTERRUPTED.is_set():
        raise KeyboardInterrupt


def _lock_folder() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "contenders" / "compile-locks"


#: Called with one line of text when this process must wait for another one's compile
#: lock (see ``compile_lock``), and again when it got it; None: wait silently. Set with
#: ``lock_notices``.
LOCK_NOTICE: list[Callable[[str], None] | None] = [None]
#: A lock held longer than this is worth a word (checking a cached program takes less).
LOCK_NOTICE_SECONDS = 1.0


@contextlib.contextmanager
def lock_notices(say: Callable[[str], None] | None):
    """Within the block, ``compile_lock`` tells ``say`` when it waits for another process."""
    previous, LOCK_NOTICE[0] = LOCK_NOTICE[0], say
    try:
        yield
    finally:
        LOCK_NOTICE[0] = previous


def _acquire(handle, what: str) -> None:
    """Take the lock on ``handle``; when another process holds it for more than
    ``LOCK_NOTICE_SECONDS``, say so (``LOCK_NOTICE``) and say again when it is ours."""
    deadline = time.monotonic() + LOCK_NOTICE_SECONDS
    while True:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            if time.monotonic() >= deadline:
                break
            time.sleep(0.05)
    say = LOCK_NOTICE[0]
    started = time.monotonic()
    if say is not None:
        say(f"{what}: waiting for another process that is compiling this program (its compile lock); "
            "this one goes on when that is done")
    fcntl.flock(handle, fcntl.LOCK_EX)
    if say is not None:
        say(f"{what}: the other process is done (waited {time.monotonic() - started + LOCK_NOTICE_SECONDS:.0f} s)")


@contextlib.contextmanager
def compile_lock(key: str, what: str = ""):
    """Hold an exclusive lock, across all processes of this user, on one program in an
    engine's on-disk cache while it is checked or compiled.

    Two runs started at once (two terminals, a test session beside a run) would otherwise
    build the same program into the same cache folder at the same time: httpstan empties
    the folder before it builds, and a process that loads the module while another is
    still linking it reads a half-written file. The lock is released by the system if
    its holder dies. Not re-entrant: take it once per call chain. ``what`` names the
    program in the notice given when the lock is held by another process (``lock_notices``)."""
    folder = _lock_folder()
    folder.mkdir(parents=True, exist_ok=True)
    with open(folder / f"{key}.lock", "a+") as handle:
        _acquire(handle, what or key)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


@dataclass(frozen=True)
class SamplerSettings:
    """Settings of one NUTS run; ``adapt_delta`` and ``max_treedepth`` are Stan's own."""

    chains: int = 4
    warmup: int = 1000
    draws: int = 1000
    adapt_delta: float = 0.8
    max_treedepth: int = 10
    seed: int = 20261201

    def __post_init__(self) -> None:
        if self.chains < 1 or self.draws < 1 or self.warmup < 0:
            raise ValueError("chains and draws must be >= 1 and warmup >= 0")
        if not 0 < self.adapt_delta < 1:
            raise ValueError("adapt_delta must lie strictly between 0 and 1")


@dataclass
class Program:
    """A compiled candidate: the engine's handle plus how long compiling took."""

    candidate_id: str
    code: str
    handle: Any
    compile_seconds: float
    from_cache: bool


@dataclass
class Draws:
    """The result of one sampling run."""

    idata: az.InferenceData
    engine: str
    compile_seconds: float
    sample_seconds: float
    settings: SamplerSettings
    messages: str = ""
    from_store: bool = False
    #: seconds the fit waited, with none of its chains running, for a free chain slot
    #: held by other fits of the run; ``sample_seconds`` excludes them
    wait_seconds: float = 0.0


class Engine(abc.ABC):
    """Compile once, sample many times."""

    name: str = ""

    @abc.abstractmethod
    def version(self) -> str:
        """Engine and Stan versions, as one line."""

    @abc.abstractmethod
    def is_cached(self, candidate: Candidate) -> bool:
        """Whether the candidate's program is already compiled in the engine's cache."""

    @abc.abstractmethod
    def compile(self, candidate: Candidate) -> Program:
        """Compile (or fetch from the engine's cache) the candidate's program."""

    @abc.abstractmethod
    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        """Run NUTS; return all draws as InferenceData."""

    @abc.abstractmethod
    def single_draw(
        self, program: Program, data: Mapping[str, Any], seed: int,
        init: Mapping[str, Any] | None = None,
    ) -> dict[str, np.ndarray]:
        """One draw of every parameter and generated quantity without sampling: at the
        given parameter values ``init``, else at Stan's random initial values. Used to
        check output lengths before any sampling, and to simulate from fixed values."""


#: Dimension names shared by both engines' output.
OBS_DIMS = {"y_rep": ["obs"], "log_lik": ["obs"], "y": ["obs"]}
