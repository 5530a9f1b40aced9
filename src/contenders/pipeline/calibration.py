"""The simulation-based calibration study of ``contenders calibrate``: simulate
datasets from each candidate's prior on the dataset's design, fit the candidate to
each, and collect the ranks (the ranks and their tests are
:mod:`contenders.statistics.calibration`).

For one candidate: draw parameters ``theta_s`` from its prior and a dataset ``y_s``
from ``theta_s`` (both from one prior predictive run of the program itself, with an
empty fit subset, so ``y_s`` is the program's own ``y_rep``); fit the candidate to
``y_s`` on the same predictors and groups; and take the rank of each true parameter
value among ``L`` posterior draws thinned evenly from the fit. A program whose
``y_rep`` is not drawn from the distribution of its likelihood fails: the fits recover
the parameters of the likelihood, not those the data were simulated with.

Every simulated dataset is accounted for: those outside the candidate's support or
with non-finite values cannot be fitted and are counted (the ranks then cover the
other simulations only, which makes the check conditional); fits that fail are
counted with their messages; fits with sampler problems are counted and their ranks
kept (dropping them would condition on the data and bias the ranks); simulated
datasets outside the plausibility bounds of ``[checks.bounds]`` are counted. The
posterior draws are thinned evenly to ``L`` draws; fits whose smallest bulk ESS is
below ``L`` are counted, since their thinned draws are not near-independent and
autocorrelation alone can make the ranks non-uniform (Talts et al. 2018, Section 5.1).
The fits run as tasks of :mod:`contenders.pipeline.tasks`, and every fit goes to the
fit store, so an interrupted study resumes.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import replace
from functools import partial
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from contenders.errors import UserError
from contenders.inputs.candidates import Candidate, check_against_data, check_outputs, inputs_for
from contenders.inputs.config import RunConfig
from contenders.inputs.data import Design, support_problem
from contenders.output.readings import word_calibration
from contenders.records import CalibrationStudy
from contenders.statistics.calibration import (KEPT_DRAWS, Calibration, Unranked, flat_names, judge,
                                               stack_parameters)

#: Prior predictive draws made per simulation before even thinning to the simulations.
PRIOR_THIN = 5


def keep_thinned(draws, health, names: Sequence[str], kept: int) -> dict:
    """What a calibration fit sends back (runs in the worker): ``kept`` posterior draws
    of the named parameters, evenly spaced over all chains, and the smallest bulk ESS."""
    values = stack_parameters(draws.idata.posterior, names)
    idx = np.round(np.linspace(0, values.shape[0] - 1, kept)).astype(int)
    return {"draws": values[idx], "ess_bulk_min": float(health.ess_bulk_min), "healthy": bool(health.healthy),
            "problems": list(health.problems)}


def calibration_fit(c: Candidate, design: Design, cfg: RunConfig, engine_name: str, store_folder: str,
                    names: tuple[str, ...], kept: int, seed: int):
    """One simulated dataset's fit, in whichever process the executor chose (a thin
    wrapper of :func:`contenders.pipeline.runner.fit_task`)."""
    from contenders.pipeline.runner import fit_task

    return fit_task(c, design, cfg, engine_name, store_folder, partial(keep_thinned, names=names, kept=kept),
                    seed=seed)


def measured_fit_seconds(out: Path) -> dict[str, float]:
    """Posterior fit times measured by an earlier ``contenders run`` into ``out``."""
    try:
        summary = json.loads((Path(out) / "summary.json").read_text())
    except (OSError, ValueError):
        return {}
    found = {}
    for row in summary.get("candidates", []):
        sec = (row.get("seconds") or {}).get("posterior")
        if isinstance(sec, (int, float)) and sec > 0:
            found[row["id"]] = float(sec)
    return found


def _outside_bounds(y: np.ndarray, bounds, thresholds: Sequence[float]) -> bool:
    if not bounds:
        return False
    from contenders.statistics import features as st

    stats = st.compute(y[None, :], thresholds)
    return any(not (low <= float(stats[name][0]) <= high) for name, (low, high) in bounds.items() if name in stats)


def calibrate(cfg: RunConfig, simulations: int = 100, progress: Callable[[str], None] | None = None,
              kept: int = KEPT_DRAWS) -> "CalibrationStudy":
    """Simulation-based calibration of the candidates selected by ``cfg`` (``cfg.only``)
    on the design of ``cfg``'s data. Every fit goes to the fit store (an interrupted
    study resumes from it)."""
    from contenders.engines import compile_all, get_engine
    from contenders.machine import cores
    from contenders.pipeline.executor import share
    from contenders.pipeline.progress import Progress
    from contenders.pipeline.runner import load_design, output_folder, sampler_settings, select_candidates, with_outcome
    from contenders.pipeline.store import FitStore, StoredEngine
    from contenders.pipeline.tasks import Task, run_tasks

    if simulations < 1:
        raise UserError(f"--simulations must be a whole number >= 1; got {simulations}")
    say = progress or (lambda _t: None)
    start = time.perf_counter()
    design = load_design(cfg)
    cands = select_candidates(cfg)
    out = output_folder(cfg.out)
    store = FitStore(cfg.store or out / "fits")
    engine = StoredEngine(get_engine(cfg.engine), store)
    results: dict[str, Calibration] = {}
    for c in cands:
        check_against_data(c, design, cfg.hyperparameters.get(c.id))
        if not c.valid:
            results[c.id] = Calibration(c.id, c.label, "not run", "; ".join(c.problems), simulations)
        elif c.skip_reason:
            results[c.id] = Calibration(c.id, c.label, "not run", c.skip_reason, simulations)
    runnable = [c for c in cands if c.id not in results]
    jobs = cfg.jobs or cores()
    workers, _ = share(jobs, max(1, len(runnable) * simulations))
    kept = max(1, min(kept, cfg.chains * cfg.draws))
    # the cost, before anything is sampled
    measured = measured_fit_seconds(out)
    n_fits = len(runnable) * simulations
    known = [measured[c.id] for c in runnable if c.id in measured]
    line = (f"calibration: {len(runnable)} candidate(s) x {simulations} simulated datasets = {n_fits} fits "
            f"({cfg.chains} chains x {cfg.warmup} + {cfg.draws} iterations each) and {len(runnable)} prior "
            f"run(s), on {workers} worker(s)")
    if known:
        est = simulations * sum(known) / len(known) * len(runnable) / workers
        line += (f"; about {_minutes(est)} judging by the posterior fits measured in {out / 'summary.json'} "
                 "(simulated data can be slower or faster to fit)")
    else:
        line += "; no fit times measured yet (run 'contenders run' with the same --out first for an estimate)"
    say(line + ". Fits already in the fit store are loaded, not sampled.")
    compiled = compile_all(engine, runnable, jobs=jobs)
    programs = compiled.programs
    plan = []   # (candidate, names, theta, fittable simulation indices, Calibration)
    for c in runnable:
        cal = Calibration(c.id, c.label, "not run", simulations=simulations, kept_draws=kept)
        results[c.id] = cal
        if c.id not in programs:
            cal.reason = "; ".join(compiled.problems(c))
            continue
        program = programs[c.id]
        hyper = cfg.hyperparameters.get(c.id)
        try:
            check_outputs(c, engine, program, design, seed=cfg.seed)
            if not c.valid:
                cal.reason = "; ".join(c.problems)
                continue
            chains = max(1, min(cfg.chains, simulations))
            prior = engine.sample(program, inputs_for(c, design, np.arange(0), hyper),
                                  replace(sampler_settings(cfg, math.ceil(PRIOR_THIN * simulations / chains), chains),
                                          seed=cfg.seed + 104729))
        except Exception as exc:   # one candidate never stops the others
            cal.reason = f"prior predictive run: {exc}"
            continue
        post = prior.idata.posterior
        names = [n for n in c.parameter_names if n in post and post[n].size > 0]
        flat = flat_names(post, names)
        every = stack_parameters(post, names)
        y_rep_all = np.asarray(prior.idata.posterior_predictive["y_rep"].values, dtype=float)
        y_rep_all = y_rep_all.reshape(-1, y_rep_all.shape[-1])
        pick = np.round(np.linspace(0, every.shape[0] - 1, simulations)).astype(int)
        theta, y_sims = every[pick], y_rep_all[pick]
        cal.prior_divergences = int(np.asarray(prior.idata.sample_stats["diverging"].values).sum())
        fittable = []
        for s in range(simulations):
            y_s = y_sims[s]
            if not np.all(np.isfinite(y_s)):
                cal.not_fitted.append(Unranked(s + 1, "non_finite", non_finite=int((~np.isfinite(y_s)).sum())))
                continue
            why = support_problem(y_s, c.support)
            if why:
                cal.not_fitted.append(Unranked(s + 1, "outside_support", message=why))
                continue
            cal.implausible += _outside_bounds(y_s, cfg.bounds, cfg.thresholds)
            fittable.append(s)
        plan.append((c, tuple(names), flat, theta, y_sims, fittable, cal))
        del prior, every, y_rep_all
    total = sum(len(p[5]) for p in plan)
    shown = Progress([c.id for c in cands], workers=workers, quiet=progress is None or cfg.quiet)
    for cid, cal in results.items():
        if cal.status == "not run" and cal.reason:
            shown.event(cid, "failed")
    kept_by: dict[str, dict[int, np.ndarray]] = {p[0].id: {} for p in plan}
    left = {p[0].id: len(p[5]) for p in plan}
    n_fits_of = dict(left)
    done = [0]

    def fit(c: Candidate, names: tuple[str, ...], y_s: np.ndarray, s: int, cal: Calibration) -> Task:
        def finished(answer) -> None:
            health, kept_part = answer
            if health is None:
                cal.fit_failures.append(Unranked(s + 1, "fit_failed", message=str(kept_part)))
            else:
                kept_by[c.id][s] = kept_part["draws"]
                cal.unhealthy += not kept_part["healthy"]
                cal.low_ess += kept_part["ess_bulk_min"] < kept
            left[c.id] -= 1
            done[0] += 1
            eta = (time.perf_counter() - t0) / done[0] * (total - done[0])
            shown.event(c.id, "done" if left[c.id] == 0 else
                        f"posterior: {n_fits_of[c.id] - left[c.id]} of {n_fits_of[c.id]} fits; "
                        f"about {_minutes(eta)} left in all")

        return Task(calibration_fit, (c, with_outcome(design, y_s), cfg, engine.name, str(store.folder), names, kept,
                                      cfg.seed + 1 + s), finished, lambda message: (None, message))

    t0 = time.perf_counter()
    run_tasks((fit(c, names, y_sims[s], s, cal) for c, names, flat, theta, y_sims, fittable, cal in plan
               for s in fittable), engine.name, jobs, shown, cluster=cfg.cluster, count=total)
    for c, names, flat, theta, y_sims, fittable, cal in plan:
        word_calibration(judge(cal, theta, kept_by[c.id], flat, cfg.seed))
        if not fittable:
            shown.event(c.id, "done")
    return CalibrationStudy(cfg, design, [results[c.id] for c in cands], simulations, kept,
                            time.perf_counter() - start, engine.name, engine.version())


def _minutes(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
