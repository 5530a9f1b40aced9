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

import numpy as np

from .cleanup import while_writing
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


#: Settings of a run that change a candidate's trial results (and so their stored copy).
TRIAL_SETTINGS = (
    "chains", "warmup", "draws", "prior_draws", "seed", "adapt_delta", "max_treedepth", "escalation",
    "rhat_max", "ess_per_chain_min", "ebfmi_min", "thresholds", "bounds", "implausible_share",
    "check_draws", "conditions", "cross_validation", "refit_cap", "folds",
)
#: Bumped whenever the stored trial results change shape. Format 4: plain data only (no
#: ArviZ objects), so reading them back imports neither ArviZ nor xarray.
TRIALS_FORMAT = 4


def trials_key(candidate, design, cfg, engine_version: str) -> str:
    """SHA-256 of what determines one candidate's trial results: its code and inputs
    (as for a fit), the values of the condition columns, the run settings in
    ``TRIAL_SETTINGS``, the engine with its version and this package's version."""
    from . import __version__
    from .candidates import inputs_for

    data = dict(inputs_for(candidate, design, None, cfg.hyperparameters.get(candidate.id)))
    for col in cfg.conditions:
        data[f"condition:{col}"] = design.table[col].astype(str).to_numpy().astype("U")
    h = hashlib.sha256()
    for name in sorted(data):
        value = np.ascontiguousarray(np.asarray(data[name]))
        h.update(name.encode())
        h.update(str(value.dtype).encode())
        h.update(str(value.shape).encode())
        h.update(value.tobytes())
    h.update(candidate.code.encode())
    settings = {k: getattr(cfg, k) for k in TRIAL_SETTINGS}
    h.update(json.dumps(settings, sort_keys=True, default=str).encode())
    h.update(f"{engine_version}|contenders {__version__}|format {TRIALS_FORMAT}".encode())
    return h.hexdigest()


class FitStore:
    """A folder of stored fits, ``<key>.nc``, and of computed trial results,
    ``<key>.trials.pickle`` (this package's own cache; the NetCDF fits are for users)."""

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)

    def path(self, key: str) -> Path:
        return self.folder / f"{key[:32]}.nc"

    def load(self, key: str, settings: SamplerSettings, engine: str) -> Draws | None:
        path = self.path(key)
        if not path.exists():
            return None
        import arviz as az

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
        attrs = draws.idata.sample_stats.attrs
        attrs["contenders_key"] = key
        attrs["contenders_sample_seconds"] = draws.sample_seconds
        attrs["contenders_messages"] = draws.messages[:10000]
        _write_whole(path, lambda tmp: draws.idata.to_netcdf(str(tmp)))
        return path

    def trials_path(self, key: str) -> Path:
        return self.folder / f"{key[:32]}.trials.pickle"

    def load_trials(self, key: str):
        """A candidate's stored trial results, or None (missing, damaged or stale)."""
        return _load_pickle(self.trials_path(key), key)

    def save_trials(self, key: str, result) -> Path:
        return _save_pickle(self.trials_path(key), key, result)

    def value_path(self, kind: str, key: str) -> Path:
        return self.folder / kind / f"{key[:32]}.pickle"

    def load_value(self, kind: str, key: str):
        """A value computed before from inputs whose hash is ``key`` (``kind`` names what
        it is: ``weights``, ``figures``), or None. Values hold plain data only."""
        return _load_pickle(self.value_path(kind, key), key)

    def save_value(self, kind: str, key: str, value) -> Path | None:
        """Store ``value`` under ``key``; a store that cannot be written is not an error
        (the value is computed again next time)."""
        try:
            return _save_pickle(self.value_path(kind, key), key, value)
        except OSError:
            return None


def _load_pickle(path: Path, key: str):
    import pickle

    if not path.exists():
        return None
    try:
        with path.open("rb") as fh:
            stored_key, value = pickle.load(fh)
    except Exception:   # a damaged or outdated file is recomputed, never trusted
        return None
    return value if stored_key == key else None


def _save_pickle(path: Path, key: str, value) -> Path:
    """Write ``(key, value)`` to a temporary file beside ``path``, then rename it."""
    import pickle

    path.parent.mkdir(parents=True, exist_ok=True)

    def write(tmp: Path) -> None:
        with tmp.open("wb") as fh:
            pickle.dump((key, value), fh, protocol=pickle.HIGHEST_PROTOCOL)

    _write_whole(path, write)
    return path


def _write_whole(path: Path, write) -> None:
    """Write through a temporary file renamed into place: readers see whole files only.
    A worker stopped while writing removes the temporary file (``cleanup``)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with while_writing(tmp):
        try:
            write(tmp)
            os.replace(tmp, path)
        finally:
            if tmp.exists():
                tmp.unlink()


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
