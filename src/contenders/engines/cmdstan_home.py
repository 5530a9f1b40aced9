"""Where CmdStan is installed, and its version, found without importing CmdStanPy.

Kept apart from the package's ``__init__`` (which chooses and makes engines) so the
CmdStanPy engine can read it without importing the module that imports it.
"""

from __future__ import annotations

import os
from pathlib import Path

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
