"""Files written whole, and scratch paths removed if the process is stopped part-way.

A worker stopped by SIGTERM (Ctrl-C in the parent; see ``executor._worker_init``) ends
with ``os._exit``, so no ``finally`` block runs and whatever it was writing would stay
behind: a fit store file half written, a chain's folder of sockets and raw draws. Code
that writes such a path registers it for as long as it writes (``while_writing``); the
stop handlers call ``remove_all``. A process killed outright (SIGKILL) cannot clean up.

Every file the tool writes for others to read (the fit store, the reports, summary.json,
the CSV and JSON files) goes through ``write_whole``: a temporary file in the same folder,
renamed into place, so a reader sees the old file or the new one, never a part.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import threading
from pathlib import Path
from typing import Callable, Union

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


def write_whole(path, content: Union[str, bytes, Callable[[Path], None]]) -> Path:
    """Write ``path`` whole: into a temporary file beside it, then rename it into place.

    ``content`` is text (written as UTF-8, line ends as given), bytes, or a function that
    writes the temporary path it is given (for writers that want a file name, such as
    NetCDF). The temporary name carries the process and thread, so writers in parallel
    never share one; it is registered while it is written (``while_writing``) and removed
    when the write fails. The file gets the usual mode (0666 less the umask).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    with while_writing(tmp):
        try:
            if callable(content):
                content(tmp)
            elif isinstance(content, bytes):
                tmp.write_bytes(content)
            else:
                with tmp.open("w", encoding="utf-8", newline="") as fh:
                    fh.write(content)
            os.replace(tmp, path)
        finally:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
    return path
