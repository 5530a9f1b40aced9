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


def compile_all(engine: Engine, candidates, jobs: int = 1) -> dict:
    """Compile valid candidates, ``jobs`` at a time, and return ``{id: Program}``.

    The C++ compiler is single-threaded, so with ``jobs`` > 1 the programs not yet in
    the engine's on-disk cache are first compiled by separate Python processes
    (``python -m contenders.engines.compile_one``), which fill that cache; then every
    program is loaded from the cache here. A candidate whose compilation fails gets the
    compiler's message appended to its ``problems``.
    """
    import concurrent.futures as cf
    import subprocess
    import sys

    todo = [c for c in candidates if c.valid]
    cold = [c for c in todo if not engine.is_cached(c)]
    seconds: dict[str, float] = {}
    if jobs > 1 and len(cold) > 1:
        def child(c):
            proc = subprocess.run(
                [sys.executable, "-m", "contenders.engines.compile_one", engine.name, str(c.path)],
                capture_output=True, text=True,
            )
            try:
                seconds[c.id] = float(proc.stdout.strip().splitlines()[-1])
            except (ValueError, IndexError):
                pass  # the compile in this process below reports the error

        with cf.ThreadPoolExecutor(max_workers=jobs) as pool:
            list(pool.map(child, cold))
    programs = {}
    for c in todo:
        try:
            program = engine.compile(c)
        except SamplingError as exc:
            c.problems.append(str(exc))
            continue
        if c.id in seconds:
            program.compile_seconds = seconds[c.id]
            program.from_cache = False
        programs[c.id] = program
    return programs
