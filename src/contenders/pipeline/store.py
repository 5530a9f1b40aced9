"""Content-addressed store of fits.

Every sampling run is stored as an ArviZ NetCDF file named by a hash of everything
that determines it: the Stan code, the data passed to the program (fit subset and
hyperparameters included), the sampler settings with the seed, and the engine with its
version. A rerun with the same inputs loads the stored fit instead of sampling; adding
a candidate, editing one program or changing one data value only samples what changed.
Files are written to a temporary name and renamed, so an interrupted run leaves only
whole fits behind, and the next run resumes from them. Users can open any stored fit
with ``arviz.from_netcdf``.

A fit keeps what later steps read and no more (``slim``): ``log_lik`` as float32 (all
observations for a posterior fit, the held-out ones only for a refit, none for a prior
predictive run), ``y_rep`` thinned to the replicated datasets the checks and figures use
(none for a refit), NetCDF with zlib and byte shuffling. What a run computes from a fit
it has just sampled is computed from this slim copy, so a later run that loads the file
gives the same numbers. ``index.jsonl`` records, per file written, the candidate, its
code hash, the data file and its hash, the engine and the settings, for ``contenders
store`` (sizes, pruning); files written before the index existed are "unknown".
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from contenders.cleanup import write_whole
from contenders.engines.base import Draws, Engine, Program, SamplerSettings, raise_if_interrupted
from contenders.inputs.settings import BY_NAME, SETTINGS


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


#: Settings of a run that change a candidate's trial results (and so their stored copy):
#: those marked ``enters_trials_key`` in ``contenders.inputs.settings.SETTINGS``.
TRIAL_SETTINGS = tuple(s.name for s in SETTINGS if s.enters_trials_key)
#: Bumped whenever the stored trial results change shape. Format 4: plain data only (no
#: ArviZ objects), so reading them back imports neither ArviZ nor xarray. Format 5:
#: coefficients in the outcome's units and group terms (``CandidateResult.coefficients``),
#: and the prior trial's reading of each failing bound. Format 6: warmup and draws per
#: chain of each posterior attempt and of the accepted fit (the longer retry). Format 7: each
#: check row (overall, per condition, prior) carries its miss (``miss``, ``miss_share_sd``),
#: and the checks' ``extreme`` list follows ``ppp_extreme`` (now a trial setting). The
#: relevant sizes (``[checks] relevant``) are not: readings are made at report time.
#: Format 8: the LOO-PIT band test (``checks.uniformity_test``) and the quantile checks.
#: Format 9: power-scaling readings ``pulled_both_ways``, ``set_by_prior``, ``led_by_data``, ``steady``.
#: Format 10: with censored observations, replicates censored like the data and the
#: LOO-PIT randomised over each censored value's range (``statistics.censored_checks``).
#: Format 11: a censored value counts as "at y" within two float32 steps (y_rep is float32).
#: Format 12: sampler health keeps its findings as codes (``Health.findings``); its words and
#: the prior trial's message are written from the numbers (``output.readings``).
#: Format 13: the out-of-sample estimate's fields are named as ``summary.json`` names them
#: (``OutOfSample.elpd_loo``, ``elpd_loo_se``, ``p_loo``, ``elpd_mcse``, ``elpd_method``), so
#: trials stored with the old names are not read. The rows of the trials are records:
#: ``features.StatisticRow``, ``checks.QuantileRow``, ``sensitivity.SensitivityRow``,
#: ``posterior.ParameterRow``, ``prior.BoundReading``, ``coefficients.CoefficientRow``,
#: ``GroupRow`` and ``SlopeRow``. An estimate's method is a
#: ``compare.Method`` (kind and counts), worded by ``output.readings.elpd_method``.
TRIALS_FORMAT = 13


def trials_key(candidate, design, cfg, engine_version: str) -> str:
    """SHA-256 of what determines one candidate's trial results: its code and inputs
    (as for a fit), the values of the condition columns, the run settings in
    ``TRIAL_SETTINGS``, the engine with its version and this package's version."""
    from contenders import __version__
    from contenders.inputs.candidates import inputs_for

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
    settings = {}
    for name in TRIAL_SETTINGS:
        if BY_NAME[name].kind != "bool":
            settings[name] = getattr(cfg, name)
        elif getattr(cfg, name, False):   # only when true: a quick look is never read back as a full result
            settings[name] = True
    h.update(json.dumps(settings, sort_keys=True, default=str).encode())
    h.update(f"{engine_version}|contenders {__version__}|format {TRIALS_FORMAT}".encode())
    return h.hexdigest()


#: Replicated datasets (``y_rep`` draws) a posterior fit keeps unless more are asked for:
#: the predictive checks' default ``check_draws``, which is also the most the effects use.
DEFAULT_Y_REP_DRAWS = 1000
#: The file of ``index.jsonl`` records in a store folder.
INDEX_NAME = "index.jsonl"
#: Format of the stored fits. 2: slim (see the module docstring).
FIT_FORMAT = 2


def fit_mode(data: Mapping[str, Any]) -> str:
    """``prior`` (empty fit subset), ``posterior`` (every observation) or ``refit``."""
    n_fit = int(np.asarray(data.get("N_fit", data.get("N", 0))))
    return "prior" if n_fit == 0 else "posterior" if n_fit == int(np.asarray(data.get("N", 0))) else "refit"


def y_rep_positions(draws_per_chain: int, chains: int, keep: int | None) -> np.ndarray:
    """Positions within each chain of the ``y_rep`` draws a posterior fit keeps: ``keep``
    in all, spread over the chains as ``ceil(keep / chains)`` evenly spaced draws per
    chain (every draw when that is more than a chain has)."""
    from contenders.statistics.checks import thin_draws

    if not keep:
        return np.arange(draws_per_chain)
    return thin_draws(draws_per_chain, math.ceil(keep / max(1, chains)))


def slim(idata, data: Mapping[str, Any], y_rep_draws: int | None = DEFAULT_Y_REP_DRAWS):
    """The InferenceData a fit store keeps of ``idata``, a fit to ``data``: ``log_lik``
    rounded to float32 (held-out observations only for a refit; dropped for a prior
    predictive run, which nothing reads it from) and returned as float64 values;
    ``y_rep`` thinned to ``y_rep_positions`` for a posterior fit, dropped for a refit.
    Also accepts a fit already slimmed to at least as much (a stored file); raises
    ``KeyError`` when it holds fewer ``y_rep`` draws than asked for."""
    import arviz as az

    mode = fit_mode(data)
    groups = {g: getattr(idata, g) for g in idata.groups()}
    ll = groups.pop("log_likelihood", None)
    if ll is not None and mode != "prior":
        if mode == "refit":
            n = int(np.asarray(data["N"]))
            held = np.setdiff1d(np.arange(n), np.asarray(data["fit_idx"], dtype=int) - 1)
            ll = ll.sel(obs=held)
        groups["log_likelihood"] = ll.astype(np.float32).astype(np.float64)
    pp = groups.pop("posterior_predictive", None)
    if pp is not None and mode != "refit":
        if mode == "posterior":
            full = next((groups[g] for g in ("sample_stats", "posterior") if g in groups), pp)
            keep = y_rep_positions(int(full.sizes["draw"]), int(pp.sizes["chain"]), y_rep_draws)
            pp = pp.sel(draw=keep)   # KeyError when a stored fit lacks some
        groups["posterior_predictive"] = pp
    return az.InferenceData(**groups)


def write_netcdf(idata, path: Path) -> None:
    """Write ``idata`` as ArviZ does (one NetCDF group per InferenceData group), with zlib
    and byte shuffling (about a quarter smaller for float32 draws, measured) and
    ``log_lik`` stored as float32."""
    import xarray as xr

    mode = "w"
    if idata.attrs:
        xr.Dataset(attrs=idata.attrs).to_netcdf(path, mode=mode, engine="h5netcdf")
        mode = "a"
    for group in idata.groups():
        data = getattr(idata, group)
        encoding = {}
        for name, values in data.variables.items():
            if values.dtype.kind in "biuf":
                encoding[name] = {"zlib": True, "shuffle": True}
                if name == "log_lik":
                    encoding[name]["dtype"] = "float32"
        data.to_netcdf(path, mode=mode, group=group, engine="h5netcdf", encoding=encoding)
        mode = "a"


def code_sha256(code: str) -> str:
    return hashlib.sha256(code.encode()).hexdigest()


def data_origin(cfg) -> dict[str, str]:
    """The data file a run reads and its SHA-256, for the store's index."""
    if getattr(cfg, "data", None) is None:
        return {}
    path = Path(cfg.data)
    try:
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        digest = ""
    return {"data_file": str(path.resolve()), "data_sha256": digest}


class FitStore:
    """A folder of stored fits, ``<key>.nc``, and of computed trial results,
    ``<key>.trials.pickle`` (this package's own cache; the NetCDF fits are for users).

    ``origin`` (the data file and its hash, ``data_origin``) goes into the index record
    of every file written."""

    def __init__(self, folder: str | Path, origin: Mapping[str, str] | None = None) -> None:
        self.folder = Path(folder)
        self.origin = dict(origin or {})

    # -- the index ---------------------------------------------------------------------
    def record(self, path: Path, about: Mapping[str, Any]) -> None:
        """Append one index record for ``path`` (one ``write`` of one line on a file
        opened for appending, so records of processes writing at once do not mix). An
        index that cannot be written is not an error: the file is then "unknown"."""
        line = json.dumps({"file": Path(path).name, "written": time.time(), **self.origin, **about},
                          sort_keys=True, default=str) + "\n"
        self.append_index(line.encode())

    def append_index(self, lines: bytes) -> None:
        with contextlib.suppress(OSError):
            fd = os.open(self.folder / INDEX_NAME, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            try:
                os.write(fd, lines)
            finally:
                os.close(fd)

    def index(self) -> dict[str, dict]:
        """The latest index record of each file name (damaged lines are skipped)."""
        out: dict[str, dict] = {}
        try:
            text = (self.folder / INDEX_NAME).read_text()
        except OSError:
            return out
        for line in text.splitlines():
            try:
                rec = json.loads(line)
                out[str(rec["file"])] = rec
            except (ValueError, KeyError, TypeError):
                continue
        return out

    @contextlib.contextmanager
    def in_use(self):
        """Hold a shared lock on the store while a run reads and writes it; ``contenders
        store --prune`` takes the lock exclusively, so it never deletes what a run is
        using (the lock goes with its holder if that process dies)."""
        import fcntl

        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            handle = open(self.folder / ".in-use.lock", "a+")
        except OSError:   # a store that cannot be written fails later with its own message
            yield
            return
        with handle:
            fcntl.flock(handle, fcntl.LOCK_SH)
            try:
                yield
            finally:
                fcntl.flock(handle, fcntl.LOCK_UN)

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
            with contextlib.suppress(OSError):
                os.utime(path)   # "last used", for contenders store --prune --older-than
            return Draws(idata, engine, 0.0, float(attrs.get("contenders_sample_seconds", 0.0)), settings,
                         str(attrs.get("contenders_messages", "")),
                         wait_seconds=float(attrs.get("contenders_wait_seconds", 0.0)))
        except Exception:  # a damaged file is refitted, never trusted
            return None

    def save(self, key: str, draws: Draws, about: Mapping[str, Any] | None = None) -> Path:
        self.folder.mkdir(parents=True, exist_ok=True)
        path = self.path(key)
        attrs = draws.idata.sample_stats.attrs
        attrs["contenders_key"] = key
        attrs["contenders_sample_seconds"] = draws.sample_seconds
        attrs["contenders_wait_seconds"] = draws.wait_seconds
        attrs["contenders_messages"] = draws.messages[:10000]
        attrs["contenders_fit_format"] = FIT_FORMAT
        write_whole(path, lambda tmp: write_netcdf(draws.idata, tmp))
        self.record(path, {"kind": "fit", **(about or {})})
        return path

    def trials_path(self, key: str) -> Path:
        return self.folder / f"{key[:32]}.trials.pickle"

    def load_trials(self, key: str):
        """A candidate's stored trial results, or None (missing, damaged or stale)."""
        return _load_pickle(self.trials_path(key), key)

    def save_trials(self, key: str, result, about: Mapping[str, Any] | None = None) -> Path:
        from contenders import __version__

        path = _save_pickle(self.trials_path(key), key, result)
        self.record(path, {"kind": "trials", "candidate": getattr(result, "id", ""),
                           "code_sha256": getattr(result, "code_hash", ""), "contenders": __version__,
                           "trials_format": TRIALS_FORMAT, **(about or {})})
        return path

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
            path = _save_pickle(self.value_path(kind, key), key, value)
        except OSError:
            return None
        self.record(path, {"kind": kind})
        return path


def remembered_weights(store: FitStore | None):
    """``statistics.compare.weights`` answered from ``store`` when these exact estimates
    were compared before (``compare.weights_key``: ids, elpd, SE, p, draws, pointwise
    values, seed and ArviZ version), and stored otherwise; a plain ``weights`` without
    a store. The answer is the same either way: a rerun only skips ArviZ."""
    from contenders.statistics import compare

    if store is None:
        return compare.weights

    def weigh(estimates: dict, seed: int = 0) -> tuple:
        if len(estimates) == 1:
            return compare.weights(estimates, seed)
        key = compare.weights_key(estimates, seed)
        found = store.load_value("weights", key)
        if found is not None:
            return found
        answer = compare.weights(estimates, seed)
        store.save_value("weights", key, answer)
        return answer

    return weigh


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

    write_whole(path, write)
    return path


class StoredEngine(Engine):
    """An engine that answers from the fit store when it can and stores every new fit.

    ``sampled`` and ``reused`` count the runs that were sampled and loaded. Every fit is
    returned as the store keeps it (``slim``), with ``y_rep_draws`` replicated datasets
    kept for a posterior fit, whether it was sampled now or loaded."""

    def __init__(self, inner: Engine, store: FitStore, y_rep_draws: int | None = DEFAULT_Y_REP_DRAWS) -> None:
        self.inner = inner
        self.store = store
        self.y_rep_draws = y_rep_draws
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
            try:
                found.idata = slim(found.idata, data, self.y_rep_draws)
            except KeyError:   # stored with fewer y_rep draws than asked for now: sample again
                found = None
        if found is not None:
            self.reused += 1
            found.compile_seconds = program.compile_seconds
            found.from_store = True
            self.paths.setdefault(program.candidate_id, []).append(self.store.path(key))
            return found
        draws = self.inner.sample(program, data, settings)
        draws.idata = slim(draws.idata, data, self.y_rep_draws)
        self.sampled += 1
        about = {"candidate": program.candidate_id, "code_sha256": code_sha256(program.code),
                 "engine": self._version, "mode": fit_mode(data), "settings": asdict(settings),
                 "n": int(np.asarray(data.get("N", 0))), "y_rep_draws": self.y_rep_draws}
        self.paths.setdefault(program.candidate_id, []).append(self.store.save(key, draws, about))
        raise_if_interrupted()  # a whole fit is kept; then stop
        return draws
