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
from pathlib import Path

from contenders.engines.base import Draws, Engine, Program, SamplerSettings, SamplingError

ENGINE_NAMES = ("auto", "pystan", "cmdstanpy")

_INSTALL_HINT = "install one with cmdstanpy's installer, or set CMDSTAN to a built CmdStan folder"


def _version_key(name: str) -> tuple:
    parts = name.split("-", 1)[-1].replace("-", ".").split(".")
    return tuple(int(p) if p.isdigit() else -1 for p in parts)


def find_cmdstan() -> tuple[Path | None, str]:
    """The CmdStan folder CmdStanPy would use, found without importing CmdStanPy, and
    ``""``; or ``None`` and why there is none or why it cannot be used.

    The folder is ``$CMDSTAN``, else the newest ``cmdstan-*`` folder in ``~/.cmdstan``
    (CmdStanPy's own order, ``cmdstanpy.utils.cmdstan_path``). It is usable when it holds
    CmdStan's ``makefile`` and a built compiler ``bin/stanc``: CmdStanPy accepts a folder
    with a makefile alone, and every program then fails to compile with an empty message."""
    env = os.environ.get("CMDSTAN")
    if env:
        folder, origin = Path(env), f"CMDSTAN={env}"
    else:
        home = Path(os.path.expanduser(os.path.join("~", ".cmdstan")))
        if not home.exists():
            return None, ("no CmdStan installation found (CMDSTAN is not set and ~/.cmdstan does not exist); "
                          + _INSTALL_HINT)
        found = sorted((p for p in home.iterdir() if p.is_dir() and p.name.startswith("cmdstan-")),
                       key=lambda p: _version_key(p.name))
        if not found:
            return None, f"~/.cmdstan holds no cmdstan-* folder; {_INSTALL_HINT}"
        folder, origin = found[-1], str(found[-1])
    if not folder.is_dir():
        return None, f"{origin}: no such folder; {_INSTALL_HINT}"
    if not (folder / "makefile").is_file():
        return None, f"{origin}: not a CmdStan folder (it has no makefile); {_INSTALL_HINT}"
    stanc = folder / "bin" / ("stanc.exe" if os.name == "nt" else "stanc")
    if not (stanc.is_file() and os.access(stanc, os.X_OK)):
        return None, (f"{origin}: CmdStan is not built (bin/stanc is missing); build it with 'make build' "
                      f"in that folder, or {_INSTALL_HINT}")
    return folder, ""


def cmdstan_version(folder) -> str:
    """CmdStan's version as its makefile states it (``CMDSTAN_VERSION := 2.35.0``), else ``unknown``."""
    try:
        for line in (Path(folder) / "makefile").read_text(errors="replace").splitlines():
            if line.startswith("CMDSTAN_VERSION"):
                return line.split("=", 1)[1].strip() or "unknown"
    except OSError:
        pass
    return "unknown"


def cmdstanpy_version_line(folder) -> str:
    """The CmdStanPy engine's version line, from package metadata and CmdStan's makefile
    (no import of CmdStanPy): the CmdStan version and folder are part of the fit store's
    keys, so a rebuilt or another CmdStan never serves fits made with the old one."""
    from importlib.metadata import version

    return f"cmdstanpy {version('cmdstanpy')} (CmdStan {cmdstan_version(folder)} at {folder})"


def cmdstan_available() -> tuple[bool, str]:
    """Whether a usable CmdStan installation is found: ``(True, folder)``, or ``(False, why)``."""
    import importlib.util

    folder, why = find_cmdstan()
    if folder is None:
        return False, why
    if importlib.util.find_spec("cmdstanpy") is None:  # pragma: no cover - dependency
        return False, "cmdstanpy is not installed"
    return True, str(folder)


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


__all__ = ["Draws", "Engine", "Program", "SamplerSettings", "SamplingError", "get_engine",
           "cmdstan_available", "find_cmdstan", "resolve_engine", "ENGINE_NAMES"]


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
