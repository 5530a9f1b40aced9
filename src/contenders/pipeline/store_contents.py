"""What a fit store holds, and which of its files no run can use again.

``contenders store`` lists the store's size by candidate, by data file and by kind of
file, from the index the store writes beside its files (``store.INDEX_NAME``). Files
written before the index existed are listed as "unknown".

Keys are hashes, so a stored file can never be looked up from its name alone; the index
says what each file was made from. ``contenders store --prune`` removes the files that
no run can reach any more:

* its candidate's program is not among the current candidates (the built-in folder and
  the folders given with ``--candidates``): the program was edited or removed, and every
  key holds the program's code;
* it was made by an engine version that is no longer installed (keys hold the version);
* the data file it was fitted to is gone or its content changed (a copy of the same
  bytes under another name would still reach it: prune only after a dataset is retired);
* stored trial results of another contenders version or format (never read again);
* with ``--older-than DAYS``: any file not used for that many days (a load counts as a
  use), including unknown ones. Other settings (draws, seed, ...) cannot make a file
  unreachable: any run with those settings reaches it again, so age is the rule there.

Files another process is writing now (``.NAME.PID.THREAD.tmp`` of a live process) are never
touched; those of a process that is gone are removed. Pruning takes the store's lock
exclusively (``FitStore.in_use``), so it never runs while a run uses the store.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

from contenders.cleanup import write_whole
from contenders.errors import UserError
from contenders.pipeline.store import INDEX_NAME, TRIALS_FORMAT, FitStore

LOCK_NAME = ".in-use.lock"
_TMP = re.compile(r"^\.(?P<name>.+?)\.(?P<pid>\d+)(?:\.(?P<thread>\d+))?\.tmp$")


def writer_pid(name: str) -> int | None:
    """The process writing a temporary file, read from its name, or None for any other file.

    ``cleanup.write_whole`` names it ``.NAME.PID.THREAD.tmp``; earlier versions wrote
    ``.NAME.PID.tmp``. Store files end in ``.nc`` or ``.pickle``, so the first number after
    the name is the process."""
    match = _TMP.match(name)
    if not match or match["name"].split(".")[-1].isdigit():
        return None
    return int(match["pid"])


@dataclass
class StoredFile:
    path: Path
    size: int
    used: float                    # last modification or load (seconds since the epoch)
    record: dict | None            # the index record, None for a file written before the index
    why: list[str] = field(default_factory=list)   # reasons no run can reach it

    @property
    def kind(self) -> str:
        """prior fit, posterior fit, refit, trial results, weights, figures or unknown."""
        if self.record is None:
            return "unknown"
        kind = self.record.get("kind", "unknown")
        if kind == "fit":
            mode = self.record.get("mode", "")
            return {"prior": "prior fit", "posterior": "posterior fit", "refit": "refit"}.get(mode, "fit")
        return {"trials": "trial results"}.get(kind, kind)

    @property
    def candidate(self) -> str:
        if self.record is None:
            return "unknown"
        return self.record.get("candidate") or "(shared: weights and figures)"

    @property
    def dataset(self) -> str:
        if self.record is None:
            return "unknown"
        name = self.record.get("data_file")
        if not name:
            return "(none recorded)"
        return f"{name} (sha256 {str(self.record.get('data_sha256', ''))[:12]})"


@dataclass
class Contents:
    folder: Path
    files: list[StoredFile]
    debris: list[Path]             # temporary files of processes that are gone
    busy: list[Path]               # temporary files being written now

    @property
    def size(self) -> int:
        return sum(f.size for f in self.files)

    def by(self, attribute: str) -> list[tuple[str, int, int]]:
        """(name, bytes, files) per value of ``attribute``, largest first."""
        totals: dict[str, list[int]] = {}
        for f in self.files:
            t = totals.setdefault(getattr(f, attribute), [0, 0])
            t[0] += f.size
            t[1] += 1
        return sorted(((k, v[0], v[1]) for k, v in totals.items()), key=lambda row: (-row[1], row[0]))


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, OverflowError):   # gone, or no process number at all
        return False
    except PermissionError:
        return True
    return True


def read(folder: str | Path) -> Contents:
    """Every file of the store at ``folder`` with its index record."""
    store = FitStore(folder)
    if not store.folder.is_dir():
        raise UserError(f"{store.folder}: no fit store there; give the folder of a run's stored fits with "
                        "--store DIR (a run keeps them in OUT/fits unless [run] store is set)")
    index = store.index()
    files, debris, busy = [], [], []
    for path in sorted(p for p in store.folder.rglob("*") if p.is_file()):
        if path.name in (INDEX_NAME, LOCK_NAME):
            continue
        pid = writer_pid(path.name)
        if pid is not None:
            (busy if _alive(pid) else debris).append(path)
            continue
        try:
            st = path.stat()
        except OSError:   # removed meanwhile
            continue
        files.append(StoredFile(path, st.st_size, st.st_mtime, index.get(path.name)))
    return Contents(store.folder, files, debris, busy)


def _engine_versions() -> set[str]:
    """The version lines of the engines installed now (as the store's keys hold them)."""
    from contenders.engines.lazy import pystan_version

    found = set()
    with contextlib.suppress(Exception):
        found.add(pystan_version())
    with contextlib.suppress(Exception):
        from contenders.engines.cmdstan_home import cmdstanpy_version_line, find_cmdstan

        folder, _why = find_cmdstan()
        if folder is not None:
            found.add(cmdstanpy_version_line(folder))
    return found


def _file_sha256(path: str, cache: dict) -> str | None:
    if path not in cache:
        try:
            cache[path] = hashlib.sha256(Path(path).read_bytes()).hexdigest()
        except OSError:
            cache[path] = None
    return cache[path]


def mark_unreachable(contents: Contents, codes: Iterable[str], engines: set[str] | None = None,
                     older_than_days: float | None = None, now: float | None = None) -> list[StoredFile]:
    """Set ``why`` on every file no run can reach (see the module docstring) and return
    those files. ``codes`` are the SHA-256 of the current candidates' programs."""
    from contenders import __version__

    codes = set(codes)
    engines = _engine_versions() if engines is None else engines
    now = time.time() if now is None else now
    hashes: dict = {}
    out = []
    for f in contents.files:
        f.why = []
        rec = f.record
        if rec is not None:
            kind = rec.get("kind")
            if kind in ("fit", "trials"):
                if rec.get("code_sha256") and rec["code_sha256"] not in codes:
                    f.why.append(f"the program of candidate '{rec.get('candidate', '?')}' changed or is gone")
                if rec.get("engine") and rec["engine"] not in engines:
                    f.why.append(f"made by {rec['engine']}, which is no longer installed")
                if rec.get("data_file"):
                    digest = _file_sha256(rec["data_file"], hashes)
                    if digest is None:
                        f.why.append(f"its data file {rec['data_file']} is gone")
                    elif rec.get("data_sha256") and digest != rec["data_sha256"]:
                        f.why.append(f"its data file {rec['data_file']} has changed")
            if kind == "trials" and (rec.get("contenders") != __version__
                                     or rec.get("trials_format") != TRIALS_FORMAT):
                f.why.append("trial results of another contenders version")
        if older_than_days is not None and now - f.used > older_than_days * 86400:
            f.why.append(f"not used for {(now - f.used) / 86400:.0f} days")
        if f.why:
            out.append(f)
    return out


@contextlib.contextmanager
def exclusive(folder: Path):
    """The store's lock, taken exclusively without waiting: a :class:`UserError` when a
    run is using the store."""
    import fcntl

    with open(Path(folder) / LOCK_NAME, "a+") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise UserError(f"{folder}: a contenders run is using this fit store now; prune it when the run "
                            "has finished (nothing was deleted)") from None
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def remove(contents: Contents, files: list[StoredFile]) -> tuple[int, int]:
    """Delete ``files`` and the debris of processes that are gone; returns (files, bytes).
    Call inside ``exclusive``. The index keeps its records; records of removed files are
    dropped when the index is rewritten here."""
    removed, freed = 0, 0
    for f in files:
        with contextlib.suppress(FileNotFoundError):
            f.path.unlink()
            removed += 1
            freed += f.size
    for path in contents.debris:
        with contextlib.suppress(FileNotFoundError):
            freed += path.stat().st_size
            path.unlink()
    _rewrite_index(contents.folder)
    return removed, freed


def _rewrite_index(folder: Path) -> None:
    """Keep only the latest record of each file still present (temporary name, rename)."""
    import json

    store = FitStore(folder)
    present = {p.name for p in folder.rglob("*") if p.is_file()}
    kept = [rec for name, rec in store.index().items() if name in present]
    write_whole(folder / INDEX_NAME, "".join(json.dumps(rec, sort_keys=True, default=str) + "\n" for rec in kept))


def human(size: float) -> str:
    for unit in ("bytes", "kB", "MB", "GB"):
        if size < 1000 or unit == "GB":
            return f"{size:.0f} {unit}" if unit == "bytes" else f"{size:.2f} {unit}"
        size /= 1000
    return f"{size:.2f} TB"  # pragma: no cover
