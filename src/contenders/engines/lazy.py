"""An engine that is only loaded when it has work to do.

A rerun whose every result comes from the fit store needs the engine's name and
version (both are part of the store's keys) but never compiles or samples. Loading the
PyStan engine imports ArviZ and httpstan, which costs seconds; :class:`LazyEngine`
answers ``name`` and ``version()`` from the installed packages' metadata and loads the
real engine on the first call that needs it.
"""

from __future__ import annotations

from typing import Any, Mapping

from contenders.engines.base import Draws, Engine, Program, SamplerSettings


def pystan_version() -> str:
    """The PyStan engine's version line, from package metadata (no import of PyStan);
    the same text as ``PyStanEngine().version()`` (tested)."""
    from importlib.metadata import version

    return f"pystan {version('pystan')} (httpstan {version('httpstan')})"


class LazyEngine(Engine):
    """``get_engine(name)``, loaded on first use; ``auto`` is resolved at once."""

    def __init__(self, name: str = "auto") -> None:
        from contenders.engines import resolve_engine
        from contenders.engines.cmdstan_home import cmdstanpy_version_line, find_cmdstan

        name, self.notice = resolve_engine(name)
        self.name = name
        self._engine: Engine | None = None
        # both version lines come from package metadata (CmdStan's from its makefile)
        self._version = pystan_version() if name == "pystan" else cmdstanpy_version_line(find_cmdstan()[0])

    def loaded(self) -> Engine:
        """The real engine (loaded now if it was not yet)."""
        if self._engine is None:
            from contenders.engines import get_engine

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
