"""Stan engines behind one small interface.

An engine compiles a candidate once and samples it with given data and sampler
settings, returning ArviZ ``InferenceData`` with the groups ``posterior``,
``posterior_predictive`` (``y_rep``), ``log_likelihood`` (``log_lik``),
``sample_stats`` and ``observed_data`` (``y``). Two engines exist:

* ``pystan``: PyStan 3, installed from PyPI alone; the default when no CmdStan
  installation is found.
* ``cmdstanpy``: CmdStanPy, chosen when a usable CmdStan installation is found (or
  asked for).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

from contenders.engines.base import Draws, Engine, Program, SamplerSettings, SamplingError
from contenders.engines.cmdstan_home import (cmdstan_available, cmdstan_version,  # noqa: F401  (re-exported)
                                             cmdstanpy_version_line, find_cmdstan)

ENGINE_NAMES = ("auto", "pystan", "cmdstanpy")

def resolve_engine(name: str = "auto") -> tuple[str, str]:
    """``(engine name, notice)``: ``auto`` becomes ``cmdstanpy`` when a usable CmdStan is
    found, else ``pystan``, with a notice when a CmdStan was pointed at (CMDSTAN set, or
    ~/.cmdstan present) but cannot be used, so the fallback is never silent. A user error
    for an unknown name, or for ``cmdstanpy`` without a usable CmdStan."""
    from contenders.errors import UserError

    if name not in ENGINE_NAMES:
        raise UserError(f"engine '{name}' is not known; choose one of: {', '.join(ENGINE_NAMES)}")
    if name == "pystan":
        return name, ""
    ok, why = cmdstan_available()
    if name == "cmdstanpy":
        if not ok:
            raise UserError(f"engine 'cmdstanpy' cannot run: {why}; or use --engine pystan")
        return name, ""
    if ok:
        return "cmdstanpy", ""
    pointed = os.environ.get("CMDSTAN") or os.path.exists(os.path.expanduser(os.path.join("~", ".cmdstan")))
    return "pystan", (f"engine: using PyStan, because the CmdStan found cannot be used: {why}" if pointed else "")


def get_engine(name: str = "auto") -> Engine:
    """Return the engine called ``name``; ``auto`` prefers CmdStanPy when a usable CmdStan is found."""
    name, _notice = resolve_engine(name)
    if name == "cmdstanpy":
        from contenders.engines.cmdstanpy_engine import CmdStanPyEngine

        return CmdStanPyEngine()
    from contenders.engines.pystan_engine import PyStanEngine

    return PyStanEngine()


__all__ = ["Compiled", "Draws", "Engine", "Program", "SamplerSettings", "SamplingError", "get_engine",
           "cmdstan_available", "find_cmdstan", "resolve_engine", "ENGINE_NAMES"]


@dataclass
class Compiled:
    """What ``compile_all`` gives back: the programs compiled, by candidate id, and for
    each candidate whose compile failed, the compiler's message. The candidates
    themselves are left as they were (they belong to ``inputs``)."""

    programs: dict[str, Program] = field(default_factory=dict)
    failures: dict[str, str] = field(default_factory=dict)

    def problems(self, candidate) -> list[str]:
        """``candidate``'s problems: those found when it was read and checked, then the
        compiler's message if its compile failed."""
        failed = self.failures.get(candidate.id)
        return [*candidate.problems, *([failed] if failed is not None else [])]


def compile_all(engine: Engine, candidates, jobs: int = 1, progress=None) -> Compiled:
    """Compile valid candidates, ``jobs`` at a time; return the programs and the failures
    (``Compiled``).

    The C++ compiler is single-threaded, so with ``jobs`` > 1 the programs not yet in
    the engine's on-disk cache are first compiled by separate Python processes
    (``python -m contenders.engines.compile_one``), which fill that cache; then every
    program is loaded from the cache here. A candidate whose compilation fails is left out
    of the programs, and the compiler's message is in the failures under its id.

    ``progress``, when given, is called with one line as each program not yet cached
    starts and ends compiling (with its seconds), and when a program waits for another
    process's compile lock (``base.compile_lock``).
    """
    import concurrent.futures as cf
    import subprocess
    import sys
    import time

    from contenders.engines.base import lock_notices

    say = progress or (lambda _text: None)
    todo = [c for c in candidates if c.valid]
    with lock_notices(progress):
        cold = [c for c in todo if not engine.is_cached(c)]
    cold_ids = {c.id for c in cold}
    seconds: dict[str, float] = {}
    if jobs > 1 and len(cold) > 1:
        def child(c):
            say(f"  compiling {c.id} ...")
            t0 = time.perf_counter()
            proc = subprocess.Popen(
                [sys.executable, "-m", "contenders.engines.compile_one", engine.name, str(c.path)],
                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,   # errors: see below
            )
            last = ""
            for line in proc.stdout:   # the child's lock notices as they come, then its seconds
                line = line.rstrip("\n")
                if line.startswith(compile_one_notice):
                    say("  " + line[len(compile_one_notice):])
                elif line.strip():
                    last = line
            proc.wait()
            try:
                seconds[c.id] = float(last)
                say(f"  compiled {c.id} in {time.perf_counter() - t0:.0f} s")
            except ValueError:
                pass  # the compile in this process below reports the error

        with cf.ThreadPoolExecutor(max_workers=jobs) as pool:
            list(pool.map(child, cold))
    compiled = Compiled()
    with lock_notices(progress):
        for c in todo:
            here = c.id in cold_ids and c.id not in seconds   # compiled in this process, now
            if here:
                say(f"  compiling {c.id} ...")
            t0 = time.perf_counter()
            try:
                program = engine.compile(c)
            except SamplingError as exc:
                compiled.failures[c.id] = str(exc)
                if here:
                    say(f"  {c.id}: compiling failed after {time.perf_counter() - t0:.0f} s")
                continue
            if here:
                say(f"  compiled {c.id} in {time.perf_counter() - t0:.0f} s")
            if c.id in seconds:
                program.compile_seconds = seconds[c.id]
                program.from_cache = False
            compiled.programs[c.id] = program
    return compiled


#: How ``compile_one`` marks a line that is a notice to show, not its result.
compile_one_notice = "notice: "
