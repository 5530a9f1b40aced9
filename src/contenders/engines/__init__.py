"""Stan engines behind one small interface.

An engine compiles a candidate once and samples it with given data and sampler
settings, returning ArviZ ``InferenceData`` with the groups ``posterior``,
``posterior_predictive`` (``y_rep``), ``log_likelihood`` (``log_lik``),
``sample_stats`` and ``observed_data`` (``y``). Two engines exist:

* ``pystan``: PyStan 3, installed from PyPI alone; the default when no CmdStan
  installation is found.
* ``cmdstanpy``: CmdStanPy, chosen when a CmdStan installation is found (or asked
  for); faster and lighter on memory for large data.
"""

from __future__ import annotations

from .base import Draws, Engine, Program, SamplerSettings, SamplingError

ENGINE_NAMES = ("auto", "pystan", "cmdstanpy")


def cmdstan_available() -> tuple[bool, str]:
    """Whether a CmdStan installation is found, and if not, why."""
    import os

    # CmdStanPy looks only at $CMDSTAN and at ~/.cmdstan (cmdstanpy.utils.cmdstan_path);
    # when neither exists the answer is known without importing it (a fifth of a second)
    if not os.environ.get("CMDSTAN") and not os.path.exists(os.path.expanduser(os.path.join("~", ".cmdstan"))):
        return False, ("no CmdStan installation found (CMDSTAN is not set and ~/.cmdstan does not exist); "
                       "install one with cmdstanpy's installer")
    try:
        import cmdstanpy
    except ImportError as exc:  # pragma: no cover - dependency
        return False, f"cmdstanpy is not installed ({exc})"
    try:
        import logging

        logging.getLogger("cmdstanpy").disabled = True
        path = cmdstanpy.cmdstan_path()
    except Exception as exc:
        return False, f"no CmdStan installation found ({exc}); install one with cmdstanpy's installer"
    finally:
        logging.getLogger("cmdstanpy").disabled = False
    return True, str(path)


def get_engine(name: str = "auto") -> Engine:
    """Return the engine called ``name``; ``auto`` prefers CmdStanPy when CmdStan is found."""
    from ..errors import UserError

    if name not in ENGINE_NAMES:
        raise UserError(f"engine '{name}' is not known; choose one of: {', '.join(ENGINE_NAMES)}")
    if name == "auto":
        name = "cmdstanpy" if cmdstan_available()[0] else "pystan"
    if name == "cmdstanpy":
        ok, why = cmdstan_available()
        if not ok:
            raise UserError(f"engine 'cmdstanpy' cannot run: {why}; or use --engine pystan")
        from .cmdstanpy_engine import CmdStanPyEngine

        return CmdStanPyEngine()
    from .pystan_engine import PyStanEngine

    return PyStanEngine()


__all__ = ["Draws", "Engine", "Program", "SamplerSettings", "SamplingError", "get_engine",
           "cmdstan_available", "ENGINE_NAMES"]


def compile_all(engine: Engine, candidates, jobs: int = 1, progress=None) -> dict:
    """Compile valid candidates, ``jobs`` at a time, and return ``{id: Program}``.

    The C++ compiler is single-threaded, so with ``jobs`` > 1 the programs not yet in
    the engine's on-disk cache are first compiled by separate Python processes
    (``python -m contenders.engines.compile_one``), which fill that cache; then every
    program is loaded from the cache here. A candidate whose compilation fails gets the
    compiler's message appended to its ``problems``.

    ``progress``, when given, is called with one line as each program not yet cached
    starts and ends compiling (with its seconds), and when a program waits for another
    process's compile lock (``base.compile_lock``).
    """
    import concurrent.futures as cf
    import subprocess
    import sys
    import time

    from .base import lock_notices

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
    programs = {}
    with lock_notices(progress):
        for c in todo:
            here = c.id in cold_ids and c.id not in seconds   # compiled in this process, now
            if here:
                say(f"  compiling {c.id} ...")
            t0 = time.perf_counter()
            try:
                program = engine.compile(c)
            except SamplingError as exc:
                c.problems.append(str(exc))
                if here:
                    say(f"  {c.id}: compiling failed after {time.perf_counter() - t0:.0f} s")
                continue
            if here:
                say(f"  compiled {c.id} in {time.perf_counter() - t0:.0f} s")
            if c.id in seconds:
                program.compile_seconds = seconds[c.id]
                program.from_cache = False
            programs[c.id] = program
    return programs


#: How ``compile_one`` marks a line that is a notice to show, not its result.
compile_one_notice = "notice: "
