"""An engine that is only loaded when it has work to do.

A rerun whose every result comes from the fit store needs the engine's name and
version (both are part of the store's keys) but never compiles or samples. Loading the
PyStan engine imports ArviZ and httpstan, which costs seconds; :class:`LazyEngine`
answers ``name`` and ``version()`` from the installed packages' metadata and loads the
real engine on the first call that needs it.
"""

from __future__ import annotations

from typing import Any, Mapping

from .base import Draws, Engine, Program, SamplerSettings


def pystan_version() -> str:
    """The PyStan engine's version line, from package metadata (no import of PyStan);
    the same text as ``PyStanEngine().version()`` (tested)."""
    from importlib.metadata import version

    return f"pystan {version('pystan')} (httpstan {version('httpstan')})"


class LazyEngine(Engine):
    """``get_engine(name)``, loaded on first use; ``auto`` is resolved at once."""

    def __init__(self, name: str = "auto") -> None:
        from . import ENGINE_NAMES, cmdstan_available, get_engine
        from ..errors import UserError

        if name not in ENGINE_NAMES:
            raise UserError(f"engine '{name}' is not known; choose one of: {', '.join(ENGINE_NAMES)}")
        if name == "auto":
            name = "cmdstanpy" if cmdstan_available()[0] else "pystan"
        self.name = name
        # CmdStanPy's version line needs CmdStanPy itself: load that engine now
        self._engine: Engine | None = None if name == "pystan" else get_engine(name)
        self._version = pystan_version() if name == "pystan" else self._engine.version()

    def loaded(self) -> Engine:
        """The real engine (loaded now if it was not yet)."""
        if self._engine is None:
            from . import get_engine

            self._engine = get_engine(self.name)
        return self._engine

    def version(self) -> str:
        return self._version

    def is_cached(self, candidate) -> bool:
        return self.loaded().is_cached(candidate)

    def compile(self, candidate) -> Program:
        return self.loaded().compile(candidate)

    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        return self.loaded().sample(program, data, settings)

    def single_draw(self, program, data, seed, init=None):
        return self.loaded().single_draw(program, data, seed, init)
