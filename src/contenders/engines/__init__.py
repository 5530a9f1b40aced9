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


def _compile_in_child(engine_name: str, path: str) -> tuple[str, float, str | None]:
    from ..candidates import load_candidate

    c = load_candidate(path)
    try:
        program = get_engine(engine_name).compile(c)
    except SamplingError as exc:
        return c.id, 0.0, str(exc)
    return c.id, program.compile_seconds, None


def compile_all(engine: Engine, candidates, jobs: int = 1) -> dict:
    """Compile valid candidates, ``jobs`` at a time, and return ``{id: Program}``.

    The compiler is single-threaded, so with ``jobs`` > 1 the programs are first
    compiled in separate processes, which fill the engine's on-disk cache; the
    programs are then loaded from that cache here. A candidate whose compilation
    fails gets the compiler's message appended to its ``problems``.
    """
    import concurrent.futures as cf
    import multiprocessing as mp

    todo = [c for c in candidates if c.valid]
    seconds: dict[str, float] = {}
    if jobs > 1 and len(todo) > 1:
        ctx = mp.get_context("spawn")
        with cf.ProcessPoolExecutor(max_workers=jobs, mp_context=ctx) as pool:
            for cid, secs, _err in pool.map(_compile_in_child, [engine.name] * len(todo),
                                             [str(c.path) for c in todo]):
                seconds[cid] = secs
    programs = {}
    for c in todo:
        try:
            program = engine.compile(c)
        except SamplingError as exc:
            c.problems.append(str(exc))
            continue
        if c.id in seconds and seconds[c.id] > program.compile_seconds:
            program.compile_seconds = seconds[c.id]
        programs[c.id] = program
    return programs
