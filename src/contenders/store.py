"""Content-addressed store of fits.

Every sampling run is stored as an ArviZ NetCDF file named by a hash of everything
that determines it: the Stan code, the data passed to the program (fit subset and
hyperparameters included), the sampler settings with the seed, and the engine with its
version. A rerun with the same inputs loads the stored fit instead of sampling; adding
a candidate, editing one program or changing one data value only samples what changed.
Files are written to a temporary name and renamed, so an interrupted run leaves only
whole fits behind, and the next run resumes from them. Users can open any stored fit
with ``arviz.from_netcdf``.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import asdict
from pathlib import Path
from typing import Any, Mapping

import arviz as az
import numpy as np

from .engines.base import Draws, Engine, Program, SamplerSettings, raise_if_interrupted


def fit_key(code: str, data: Mapping[str, Any], settings: SamplerSettings, engine: str) -> str:
    """SHA-256 of the Stan code, every data value (names, dtypes, shapes, bytes), the
    sampler settings and the engine with its version."""
    h = hashlib.sha256()
    h.update(code.encode())
    for name in sorted(data):
        value = np.ascontiguousarray(np.asarray(data[name]))
        if value.dtype.kind in "iub":
            value = value.astype(np.int64)
        elif value.dtype.kind == "f":
            value = value.astype(np.float64)
        h.update(name.encode())
        h.update(str(value.dtype).encode())
        h.update(str(value.shape).encode())
        h.update(value.tobytes())
    h.update(json.dumps(asdict(settings), sort_keys=True).encode())
    h.update(engine.encode())
    return h.hexdigest()


class FitStore:
    """A folder of stored fits, ``<key>.nc``."""

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)

    def path(self, key: str) -> Path:
        return self.folder / f"{key[:32]}.nc"

    def load(self, key: str, settings: SamplerSettings, engine: str) -> Draws | None:
        path = self.path(key)
        if not path.exists():
            return None
        try:
            with az.rc_context({"data.load": "eager"}):
                idata = az.from_netcdf(path)
            attrs = idata.sample_stats.attrs
            if attrs.get("contenders_key") != key:
                return None
            return Draws(idata, engine, 0.0, float(attrs.get("contenders_sample_seconds", 0.0)), settings,
                         str(attrs.get("contenders_messages", "")))
        except Exception:  # a damaged file is refitted, never trusted
            return None

    def save(self, key: str, draws: Draws) -> Path:
        self.folder.mkdir(parents=True, exist_ok=True)
        path = self.path(key)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        attrs = draws.idata.sample_stats.attrs
        attrs["contenders_key"] = key
        attrs["contenders_sample_seconds"] = draws.sample_seconds
        attrs["contenders_messages"] = draws.messages[:10000]
        try:
            draws.idata.to_netcdf(str(tmp))
            os.replace(tmp, path)
        finally:
            if tmp.exists():
                tmp.unlink()
        return path


class StoredEngine(Engine):
    """An engine that answers from the fit store when it can and stores every new fit.

    ``sampled`` and ``reused`` count the runs that were sampled and loaded."""

    def __init__(self, inner: Engine, store: FitStore) -> None:
        self.inner = inner
        self.store = store
        self.name = inner.name
        self._version = inner.version()
        self.sampled = 0
        self.reused = 0
        self.paths: dict[str, list[Path]] = {}

    def version(self) -> str:
        return self._version

    def is_cached(self, candidate) -> bool:
        return self.inner.is_cached(candidate)

    def compile(self, candidate) -> Program:
        return self.inner.compile(candidate)

    def single_draw(self, program, data, seed, init=None):
        return self.inner.single_draw(program, data, seed, init)

    def sample(self, program: Program, data: Mapping[str, Any], settings: SamplerSettings) -> Draws:
        key = fit_key(program.code, data, settings, self._version)
        found = self.store.load(key, settings, self.name)
        if found is not None:
            self.reused += 1
            found.compile_seconds = program.compile_seconds
            found.from_store = True
            self.paths.setdefault(program.candidate_id, []).append(self.store.path(key))
            return found
        draws = self.inner.sample(program, data, settings)
        self.sampled += 1
        self.paths.setdefault(program.candidate_id, []).append(self.store.save(key, draws))
        raise_if_interrupted()  # a whole fit is kept; then stop
        return draws
