"""Scratch paths a process is writing, removed if the process is stopped part-way.

A worker stopped by SIGTERM (Ctrl-C in the parent; see ``executor._worker_init``) ends
with ``os._exit``, so no ``finally`` block runs and whatever it was writing would stay
behind: a fit store file half written, a chain's folder of sockets and raw draws. Code
that writes such a path registers it for as long as it writes (``while_writing``); the
stop handlers call ``remove_all``. A process killed outright (SIGKILL) cannot clean up.
"""

from __future__ import annotations

import contextlib
import shutil
from pathlib import Path

#: Paths being written by this process now.
_PATHS: set[Path] = set()


@contextlib.contextmanager
def while_writing(path):
    """Register ``path`` (a file or a folder) until the block ends."""
    path = Path(path)
    _PATHS.add(path)
    try:
        yield path
    finally:
        _PATHS.discard(path)


def remove_all() -> None:
    """Remove every registered path (called when the process is being stopped)."""
    for path in list(_PATHS):
        if path.is_dir():
            shutil.rmtree(path, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                path.unlink()
        _PATHS.discard(path)
