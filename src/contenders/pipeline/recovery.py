"""Model recovery's study: simulate replicate datasets from each ranked candidate's
stored posterior fit, fit every candidate to every replicate through the shared task
loop, and decide each replicate's winner. The method, its sources and its rules are
described in statistics/recovery.py; the words and files are in output/recovery_files.py.
"""

from __future__ import annotations

import math
import time
import zlib
from dataclasses import replace
from pathlib import Path
from typing import Callable

import numpy as np

from contenders.errors import UserError
from contenders.output.readings import recovery_too_few
from contenders.output.recovery_files import reading
from contenders.rules import CONFUSED
from contenders.statistics.recovery import (DEFAULT_REPLICATES, LeftOut, Recovery, ReplicateFit, decide,
                                            evenly_spaced, keep_loo, recovery_matrix)


def _fit_seed(base: int, generator: str, replicate: int) -> int:
    """One seed per replicate dataset (the same for every candidate fitted to it),
    stable when other candidates are added or removed."""
    return (int(base) + 500_009 + zlib.crc32(f"{generator}:{replicate}".encode())) % (2**31 - 1)


def _clock(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "unknown"
    seconds = int(round(seconds))
    return f"{seconds // 3600}:{seconds // 60 % 60:02d}:{seconds % 60:02d}" if seconds >= 3600 \
        else f"{seconds // 60}:{seconds % 60:02d}"


# --- the analysis -------------------------------------------------------------------------

def recover(result, programs, replicates: int = DEFAULT_REPLICATES,
            progress: Callable[[str], None] | None = None, threshold: float = CONFUSED) -> Recovery:
    """Run the model-recovery analysis on the ranked candidates of ``result`` (a
    :class:`contenders.pipeline.runner.RunResult`) with ``replicates`` datasets per
    candidate. ``programs`` (a :class:`contenders.pipeline.runner.RunPrograms`, from
    ``runner.run_with_programs``) holds the candidates as the run read and checked them,
    and the programs it compiled; the others are compiled (from the engine's cache) here."""
    import arviz as az

    from contenders.inputs.candidates import inputs_for, skip_reason_on
    from contenders.engines import compile_all, get_engine
    from contenders.machine import cores
    from contenders.pipeline.executor import share
    from contenders.pipeline.progress import Progress
    from contenders.pipeline.runner import fit_task, sampler_settings, with_outcome
    from contenders.pipeline.store import FitStore, fit_key
    from contenders.pipeline.tasks import Task, run_tasks

    if isinstance(replicates, bool) or not isinstance(replicates, int) or replicates < 2:
        raise UserError(f"model recovery needs at least 2 replicated datasets per candidate; got "
                        f"{replicates!r}; set --replicates R or [recovery] replicates = R with R >= 2")
    say = progress or (lambda _t: None)
    cfg, design = result.config, result.design
    start = time.perf_counter()
    by_id = {r.id: r for r in result.candidates}
    ids = [cid for cid in result.comparison.ranking if by_id[cid].posterior_file
           and Path(by_id[cid].posterior_file).exists()]
    labels = {r.id: r.label for r in result.candidates}
    rec = Recovery(ids, labels, replicates, result.comparison.ranking[0] if result.comparison.ranking else None,
                   threshold=threshold)
    for r in result.candidates:
        if r.id not in ids:
            rec.left_out.append(LeftOut(r.id, r.label, r.status, r.reason or ""))
    if len(ids) < 2:
        rec.reason = recovery_too_few(len(ids))
        say(rec.reason)
        return rec
    cands = {m: programs.candidates[m] for m in ids}   # checked against the data by the run
    engine = get_engine(result.engine)
    store = FitStore(cfg.store or Path(cfg.out) / "fits")

    # the replicate datasets: y_rep of evenly spaced posterior draws of each generator
    datasets: dict[tuple[str, int], tuple[int, np.ndarray]] = {}
    for g in ids:
        idata = az.from_netcdf(by_id[g].posterior_file)
        y_rep = np.asarray(idata.posterior_predictive["y_rep"].values, dtype=float)
        y_rep = y_rep.reshape(-1, y_rep.shape[-1])
        if replicates > y_rep.shape[0]:
            raise UserError(f"--replicates {replicates} is more than the {y_rep.shape[0]} posterior draws of "
                            f"{g}; lower --replicates or raise --draws")
        for i, d in enumerate(evenly_spaced(y_rep.shape[0], replicates, zlib.crc32(g.encode()) + cfg.seed)):
            datasets[(g, i)] = (int(d), y_rep[d].copy())
        del idata, y_rep

    # the fits, their cost, and which are already stored (an earlier, interrupted analysis)
    tasks, fits = [], []
    version = engine.version()
    for (g, i), (_d, y) in datasets.items():
        rep_design = with_outcome(design, y)
        seed = _fit_seed(cfg.seed, g, i)
        for m in ids:
            c = cands[m]
            skip_reason = skip_reason_on(c, rep_design, cfg.hyperparameters.get(m))
            if skip_reason:
                fits.append(ReplicateFit(g, i, m, "outside_support", skip_reason.removeprefix("skipped: ")))
                continue
            key = fit_key(c.code, inputs_for(c, rep_design, None, cfg.hyperparameters.get(m)),
                          replace(sampler_settings(cfg), seed=seed), version)
            tasks.append((g, i, m, rep_design, seed, store.path(key).exists()))
    jobs = cfg.jobs or cores()
    rec.n_fits = len(tasks)
    rec.stored_before = sum(t[5] for t in tasks)
    workers, _chains = share(jobs, max(1, len(tasks)))   # as run_tasks below
    rec.workers = workers
    todo_seconds = sum(by_id[m].seconds.get("posterior", math.nan) for _g, _i, m, _d, _s, stored in tasks
                       if not stored)
    rec.estimated_seconds = todo_seconds / workers
    outside = sum(f.status == "outside_support" for f in fits)
    say(f"model recovery: {len(ids)} generating candidates x {replicates} replicated datasets x {len(ids)} "
        f"candidates = {len(tasks)} fits"
        + (f" ({outside} more skipped: a replicate outside a candidate's support)" if outside else "")
        + (f"; {rec.stored_before} already in the fit store" if rec.stored_before else "")
        + f"; estimated {_clock(rec.estimated_seconds)} on {workers} worker(s), from the sampling times "
          "measured in the run (loading and PSIS-LOO add a little)")

    # programs the run did not compile (its trials came from the fit store): from the engine's cache
    compile_all(engine, [c for m, c in cands.items() if m not in programs.compiled], jobs=jobs)
    shown = Progress(ids, workers=workers, quiet=progress is None or cfg.quiet)
    per_g = {g: sum(t[0] == g for t in tasks) for g in ids}
    done_g = {g: 0 for g in ids}

    def fit(g: str, i: int, m: str, rep_design, seed: int) -> Task:
        def done(answer) -> None:
            health, kept = answer
            fits.append(_record(g, i, m, health, kept))
            done_g[g] += 1
            shown.event(g, "done" if done_g[g] == per_g[g] else f"posterior: {done_g[g]} of {per_g[g]} fits")

        return Task(fit_task, (cands[m], rep_design, cfg, result.engine, str(store.folder), keep_loo, seed), done,
                    lambda message: (None, message))

    run_tasks([fit(g, i, m, rep_design, seed) for g, i, m, rep_design, seed, _stored in tasks], result.engine,
              jobs, shown, cluster=cfg.cluster)

    order = {m: k for k, m in enumerate(ids)}
    fits.sort(key=lambda f: (order[f.generator], f.replicate, order[f.candidate]))
    rec.fits = fits
    for (g, i), (d, _y) in datasets.items():
        rec.runs.append(decide(g, i, d, [f for f in fits if f.generator == g and f.replicate == i]))
    rec.by_elpd = recovery_matrix({g: [r.winner for r in rec.runs if r.generator == g] for g in ids}, ids)
    rec.by_weight = recovery_matrix({g: [r.weight_winner for r in rec.runs if r.generator == g] for g in ids},
                                    ids)
    clear = {g: (sum(r.clear for r in rec.runs if r.generator == g and r.winner),
                 sum(1 for r in rec.runs if r.generator == g and r.winner)) for g in ids}
    rec.reading = reading(rec.by_elpd, labels, rec.observed_winner, threshold, clear)
    rec.seconds = time.perf_counter() - start
    return rec


def _record(g: str, i: int, m: str, health, kept) -> ReplicateFit:
    if health is None:
        return ReplicateFit(g, i, m, "failed", str(kept).splitlines()[0][:300] if kept else "")
    k = np.asarray(kept["pareto_k"].values, dtype=float)
    f = ReplicateFit(g, i, m, "ok" if health.healthy else "unhealthy", "; ".join(health.problems),
                     elpd=float(kept["elpd_loo"]), se=float(kept["se"]),
                     k_max=float(np.nanmax(k)) if k.size else math.nan,
                     high_k=int((k > float(kept["good_k"])).sum()),
                     seconds=float(sum(a.seconds for a in health.attempts)), loo=kept)
    return f


# --- output -------------------------------------------------------------------------------


def run_with_recovery(cfg, progress: Callable[[str], None] | None = None):
    """A comparison run and, when ``cfg.replicates`` is set, its model recovery
    (``recover``), whose files (recovery.json, recovery.csv) are written beside the run's.
    The returned :class:`contenders.records.RunResult` holds both; nothing is attached
    to it afterwards."""
    from contenders.output.recovery_files import write as write_recovery
    from contenders.pipeline.runner import run_with_programs
    from contenders.pipeline.store import FitStore

    result, programs = run_with_programs(cfg, progress=progress)
    if not cfg.replicates:
        return result
    with FitStore(cfg.store or Path(cfg.out) / "fits").in_use():   # a prune waits for it
        rec = recover(result, programs, cfg.replicates, progress=progress)
    write_recovery(rec, result.out)
    return replace(result, recovery=rec)
