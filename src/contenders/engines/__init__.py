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
