"""One comparison run: every candidate through the same trials on one dataset.

``run(config)`` returns a :class:`RunResult` of plain dataclasses and writes
``summary.json`` into the output folder. One candidate failing at any stage is
recorded with its reason and never stops the others.
"""

from __future__ import annotations

import json
import math
import os
import platform
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from contenders import __version__
from contenders.output.readings import (QUICK_LOOK, REFITS_SKIPPED, compare_candidates, compare_effects,
                                        word_coefficients, word_health, word_prior)
from contenders.statistics.compare import Plan, plan_estimate
from contenders.inputs.candidates import Candidate, builtin_folder, check_against_data, check_outputs, discover, inputs_for, link_of
from contenders.inputs.config import RunConfig
from contenders.output.summary import write_summary
from contenders.records import CandidateResult, RunResult
from contenders.inputs.data import Design, build_design, check_reference, read_table
from contenders.engines import SamplingError, compile_all, get_engine
from contenders.engines.base import SamplerSettings
from contenders.engines.lazy import LazyEngine
from contenders.pipeline.executor import report
from contenders.pipeline.progress import Progress
from contenders.pipeline.store import FitStore, StoredEngine, data_origin, remembered_weights, trials_key
from contenders.errors import UserError
from contenders.statistics.checks import predictive_checks, thin_draws
from contenders.statistics.censored_checks import censor_like_the_data
from contenders.statistics.coefficients import coefficient_summary
from contenders.statistics.effects import effect_draws
from contenders.statistics.posterior import fit_with_health
from contenders.statistics.prior import summarise_prior
from contenders.statistics.sensitivity import power_scaling

#: Replicated datasets kept per candidate for figures (the checks use ``check_draws``).
FIGURE_DRAWS = 100


def y_rep_draws(cfg: RunConfig) -> int:
    """Replicated datasets a posterior fit keeps in the store: as many as the predictive
    checks (``check_draws``), the effects (``effects.MAX_DRAWS``), the figures and a
    model recovery (``replicates``) use, whichever is most. Every one of them reads
    its draws from this set, whether the fit was sampled now or loaded."""
    from contenders.statistics.effects import MAX_DRAWS

    return max(int(cfg.check_draws), MAX_DRAWS, FIGURE_DRAWS, int(cfg.replicates or 0))


def stored_engine(engine_name: str, store_folder: str, cfg: RunConfig) -> StoredEngine:
    """The engine a task samples with: answers from the fit store at ``store_folder``
    and stores every new fit, recording the run's data file in the store's index."""
    return StoredEngine(get_engine(engine_name), FitStore(store_folder, data_origin(cfg)), y_rep_draws(cfg))


def _file_hash(path: Path) -> str:
    import hashlib

    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def load_design(cfg: RunConfig) -> Design:
    if cfg.data is None:
        raise UserError("no data file given; pass DATA.csv or set file under [data] in the configuration")
    if not cfg.outcome:
        raise UserError("no outcome column given; pass --outcome COL or set outcome under [data]")
    table = read_table(cfg.data)
    for cond in cfg.conditions:
        if cond not in table.columns:
            raise UserError(
                f"{cfg.data}: condition column '{cond}' not found; the columns are: "
                + ", ".join(map(str, table.columns))
            )
    check_reference(table, cfg.reference, cfg.predictors, cfg.conditions, source=str(cfg.data))
    return build_design(
        table, cfg.outcome, cfg.predictors, cfg.group, cfg.typical_value, cfg.typical_spread,
        source=str(cfg.data), reference=cfg.reference, slopes=cfg.slopes,
        censored=cfg.censored, truncate=cfg.truncate,
    )


def output_folder(path) -> Path:
    """Create the output folder if needed; a user error if it cannot be created or written."""
    out = Path(path)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(f"{out}: cannot create the output folder ({exc.strerror}); choose another with --out")
    if not os.access(out, os.W_OK):
        raise UserError(f"{out}: the output folder is not writable; choose another with --out")
    return out


def select_candidates(cfg: RunConfig) -> list[Candidate]:
    cands = discover(cfg.candidates or builtin_folder())
    every_id = [c.id for c in cands]
    if cfg.only:
        known = {c.id for c in cands}
        missing = [c for c in cfg.only if c not in known]
        if missing:
            raise UserError(
                f"candidate(s) {', '.join(missing)} not in {cfg.candidates or builtin_folder()}; "
                f"known: {', '.join(sorted(known))}"
            )
        cands = [c for c in cands if c.id in cfg.only]
    unknown = sorted(set(cfg.hyperparameters) - set(every_id))
    if unknown:
        raise UserError(
            f"[hyperparameters.{unknown[0]}] names no candidate in the run; the candidates are: "
            + ", ".join(every_id)
        )
    by_id = {c.id: c for c in cands}
    for cid, values in cfg.hyperparameters.items():
        c = by_id.get(cid)
        if c is None or c.info is None:   # not in this run, or a program stanc rejects (reported)
            continue
        wrong = [name for name in values if name not in c.info.hyperparameters]
        if wrong:
            raise UserError(_unknown_hyper_message(c, wrong[0]))
    return cands


def _unknown_hyper_message(c: Candidate, name: str) -> str:
    """One line for a hyperparameter override that names no input of candidate ``c``."""
    import difflib

    valid = c.info.hyperparameters if c.info else ()
    close = difflib.get_close_matches(name, valid, n=1)
    return (f"[hyperparameters.{c.id}] {name} (--hyper {c.id}.{name}=...) is not a hyperparameter of candidate "
            f"'{c.id}' ({c.path.name})" + (f"; did you mean {close[0]}?" if close else "")
            + " Its hyperparameters are: " + (", ".join(valid) or "(none)") + "; nothing was fitted.")


def sampler_settings(cfg: RunConfig, draws: int | None = None, chains: int | None = None) -> SamplerSettings:
    """The sampler settings of ``cfg`` (its chains, warmup, draws, adapt_delta, tree depth
    and seed), with ``draws`` per chain and ``chains`` in place of the run's when given.
    Studies that fit simulated datasets use it to find their fits in the fit store."""
    return SamplerSettings(
        chains=chains or cfg.chains, warmup=cfg.warmup, draws=draws or cfg.draws,
        adapt_delta=cfg.adapt_delta, max_treedepth=cfg.max_treedepth, seed=cfg.seed,
    )


def _stack(idata_group, name: str) -> np.ndarray:
    """(chain, draw, N) -> (chain * draw, N), chain-major."""
    values = np.asarray(idata_group[name].values)
    return values.reshape(-1, values.shape[-1])


def prior_parameters(posterior, names, J: int, K: int) -> dict[str, np.ndarray]:
    """Each scalar parameter's prior draws (vector elements as ``name[k]``), in the
    order of the stacked ``y_rep`` draws; the group terms (one value per group) are
    left out, since a prior on each group's term is the group SD's business; so are
    matrix-valued parameters (the group slopes ``slope_z`` and the Cholesky factor
    ``group_corr_L`` of their correlation), for the same reason."""
    from contenders.statistics.coefficients import group_terms

    flat = {}
    for name in names:
        if name not in posterior or posterior[name].ndim > 3:
            continue
        values = np.asarray(posterior[name].values, dtype=float)
        flat[name] = values.reshape(values.shape[0] * values.shape[1], -1)
    skip = group_terms({k: v.shape[1] for k, v in flat.items()}, J, K)
    out = {}
    for name, v in flat.items():
        if name in skip or v.shape[1] == 0:
            continue
        for j in range(v.shape[1]):
            out[name if posterior[name].ndim == 2 else f"{name}[{j + 1}]"] = v[:, j]
    return out


def run_candidate(c: Candidate, engine, program, design: Design, cfg: RunConfig,
                  defer_refits: bool = False) -> CandidateResult:
    """All trials of one candidate; exceptions are recorded, never raised. With
    ``defer_refits`` the exact refits of the out-of-sample estimate are not run here:
    ``res.pending`` lists them (``RefitsDue``) for the run to send to its executor, and
    ``res.oos`` is set when they are finished (``finish_refits``)."""
    res = CandidateResult(c.id, c.label, c.about, c.support, status="ok", code=c.code,
                          code_hash=c.code_hash)
    try:
        res.stage = "check"
        report(c.id, "check")
        res.hyperparameters = c.hyperparameter_values(cfg.hyperparameters.get(c.id))
        check_outputs(c, engine, program, design, seed=cfg.seed)
        if not c.valid:
            res.status, res.reason = "failed", "; ".join(c.problems)
            return res
        # 1. prior predictive trial: same program, empty fit subset
        res.stage = "prior"
        report(c.id, "prior")
        prior_chains = min(cfg.chains, cfg.prior_draws)
        pdraws = engine.sample(
            program, inputs_for(c, design, np.arange(0), cfg.hyperparameters.get(c.id)),
            sampler_settings(cfg, draws=max(1, math.ceil(cfg.prior_draws / prior_chains)), chains=prior_chains),
        )
        res.seconds["prior"] = pdraws.sample_seconds
        res.seconds["prior_wait"] = pdraws.wait_seconds
        res.prior = word_prior(summarise_prior(
            _stack(pdraws.idata.posterior_predictive, "y_rep"), design.y, cfg.bounds,
            cfg.thresholds, cfg.implausible_share,
            parameters=prior_parameters(pdraws.idata.posterior, c.parameter_names, design.J, design.K),
        ))
        del pdraws
        # 2. posterior fit with sampler health
        res.stage = "posterior"
        report(c.id, "posterior")
        draws, health = fit_with_health(
            engine, program, inputs_for(c, design, None, cfg.hyperparameters.get(c.id)), sampler_settings(cfg),
            c.parameter_names, cfg.escalation, cfg.longer_retry, rhat_max=cfg.rhat_max,
            ess_per_chain_min=cfg.ess_per_chain_min, ebfmi_min=cfg.ebfmi_min,
        )
        res.health = health = word_health(health)
        res.seconds["posterior"] = sum(a.seconds for a in health.attempts)
        res.seconds["posterior_wait"] = sum(a.wait_seconds for a in health.attempts)
        stored = getattr(engine, "paths", {}).get(c.id)
        res.posterior_file = str(stored[-1]) if stored else ""
        res.sensitivity = power_scaling(draws.idata, c.parameter_names)   # None without lprior
        res.coefficients = word_coefficients(coefficient_summary(draws.idata.posterior, design, *link_of(c)))
        # 3. posterior predictive checks on a thinned set of draws
        res.stage = "checks"
        report(c.id, "checks")
        # y_rep holds the draws the store keeps (``y_rep_draws``); LOO-PIT pairs each with
        # the log_lik of the same draw
        pp = draws.idata.posterior_predictive
        y_rep = _stack(pp, "y_rep")
        log_lik = _stack(draws.idata.log_likelihood.sel(draw=pp["draw"].values), "log_lik")
        keep = thin_draws(y_rep.shape[0], cfg.check_draws)
        conditions = {col: design.table[col].to_numpy() for col in cfg.conditions}
        res.checks = predictive_checks(design.y, y_rep[keep], log_lik[keep], cfg.thresholds, conditions,
                                       ppp_extreme=cfg.ppp_extreme, pit_alpha=cfg.pit_alpha,
                                       cens=design.censoring, seed=cfg.seed)
        figure_draws = thin_draws(y_rep.shape[0], FIGURE_DRAWS)
        res.y_rep_sample = censor_like_the_data(design.y, design.censoring, y_rep[figure_draws],
                                                np.random.default_rng(cfg.seed)).astype(np.float32)
        res.effects = effect_draws(y_rep, design.y, design.table, cfg.conditions, cfg.predictors,
                                   reference=cfg.reference)
        del y_rep, log_lik
        # 4. out-of-sample: PSIS-LOO, exact refits of high-k observations, or K-fold
        res.stage = "out-of-sample"
        report(c.id, "out-of-sample")
        groups = design.group if design.J > 0 else None
        # an unhealthy candidate is never ranked: its exact refits (high Pareto k, K-fold)
        # would cost fits and decide nothing, so it gets plain PSIS-LOO only
        plain = cfg.quick or not health.healthy
        plan = plan_estimate(draws.idata, "psis" if plain else cfg.cross_validation, cfg.refit_cap,
                             cfg.folds, groups, cfg.seed,
                             plain_because="quick" if cfg.quick else "unhealthy")
        del draws
        due = RefitsDue(plan, health.adapt_delta, health.warmup, health.draws)
        if plan.fits and defer_refits:
            res.pending = due
        else:
            outcomes = [refit_held_out(c, engine, program, design, cfg, due, j) for j in range(len(plan.fits))]
            finish_refits(res, due, outcomes)
        if not health.healthy and res.status == "ok":
            res.status, res.reason = "unhealthy", "; ".join(health.problems)
            if not cfg.quick:
                res.reason += f"; {REFITS_SKIPPED}"
        res.stage = "done"
    except (SamplingError, UserError) as exc:
        res.status, res.reason = "failed", f"{res.stage}: {exc}"
    except Exception as exc:  # one candidate never stops the others
        res.status, res.reason = "failed", f"{res.stage}: unexpected {type(exc).__name__}: {exc}"
    return res


@dataclass
class RefitsDue:
    """The refits an out-of-sample estimate still needs (``plan.fits``) and the
    ``adapt_delta``, warmup and draws per chain the accepted posterior fit used (longer
    than the run's when its first fit fell just short on R-hat or ESS)."""

    plan: Plan
    adapt_delta: float
    warmup: int = 0      # 0: the run's
    draws: int = 0       # 0: the run's


@dataclass
class RefitOutcome:
    """One refit's held-out ``log_lik`` draws, (S, held out), and what it cost."""

    held_out: np.ndarray | None
    divergences: int = 0
    seconds: float = 0.0
    wait_seconds: float = 0.0
    fit_files: list[str] = field(default_factory=list)
    sampled: int = 0
    reused: int = 0
    error: str = ""


def refit_held_out(c: Candidate, engine, program, design: Design, cfg: RunConfig, due: RefitsDue,
                   j: int) -> RefitOutcome:
    """Refit ``j`` of ``due``: the candidate fitted without its held-out observations.
    The seed depends on ``j`` only, so the refits give the same draws wherever they run."""
    fitted, held = due.plan.fits[j]
    report(c.id, f"out-of-sample: refit {j + 1} of {len(due.plan.fits)}")
    settings = replace(sampler_settings(cfg), adapt_delta=due.adapt_delta, seed=cfg.seed + 1001 + j,
                       warmup=due.warmup or cfg.warmup, draws=due.draws or cfg.draws)
    d = engine.sample(program, inputs_for(c, design, fitted, cfg.hyperparameters.get(c.id)), settings)
    # the store keeps a refit's held-out observations only: pick them by label
    held_ll = d.idata.log_likelihood.sel(obs=np.asarray(held))
    return RefitOutcome(_stack(held_ll, "log_lik").copy(),
                        int(np.asarray(d.idata.sample_stats["diverging"].values).sum()), d.sample_seconds,
                        d.wait_seconds)


def refit_task(c: Candidate, design: Design, cfg: RunConfig, engine_name: str, store_folder: str,
               due: RefitsDue, j: int) -> RefitOutcome:
    """One exact refit as a task of its own on the run's executor (any process)."""
    engine = stored_engine(engine_name, store_folder, cfg)
    try:
        out = refit_held_out(c, engine, engine.compile(c), design, cfg, due, j)
    except (SamplingError, UserError) as exc:
        return RefitOutcome(None, error=str(exc))
    out.fit_files = [str(p) for p in dict.fromkeys(engine.paths.get(c.id, []))]
    out.sampled, out.reused = engine.sampled, engine.reused
    return out


def finish_refits(res: CandidateResult, due: RefitsDue, outcomes: list[RefitOutcome]) -> None:
    """Complete ``res`` with its out-of-sample estimate once every refit is back."""
    failed = next((o.error for o in outcomes if o.error), "")
    if failed:
        res.status, res.reason = "failed", f"out-of-sample: {failed}"
        return
    res.oos = due.plan.finish([o.held_out for o in outcomes])
    res.refit_divergences += sum(o.divergences for o in outcomes)
    spent = sum(o.seconds for o in outcomes)
    res.seconds["refits"] = res.seconds.get("refits", 0.0) + spent
    res.seconds["refits_wait"] = res.seconds.get("refits_wait", 0.0) + sum(o.wait_seconds for o in outcomes)
    if "total" in res.seconds:   # refits run as tasks of their own after the candidate's
        res.seconds["total"] += spent + sum(o.wait_seconds for o in outcomes)
    for o in outcomes:
        res.fit_files.extend(f for f in o.fit_files if f not in res.fit_files)
        res.fits_sampled += o.sampled
        res.fits_reused += o.reused
    res.pending = None


def candidate_task(c: Candidate, design: Design, cfg: RunConfig, engine_name: str,
                   store_folder: str) -> CandidateResult:
    """All trials of one candidate, in whichever process the executor chose. The compiled
    program comes from the engine's cache (compiled before the tasks start); every fit is
    written to the fit store as it finishes. Returns the compact result only."""
    engine = stored_engine(engine_name, store_folder, cfg)
    t0 = time.perf_counter()
    try:
        program = engine.compile(c)
    except SamplingError as exc:
        return CandidateResult(c.id, c.label, c.about, c.support, "failed", f"compile: {exc}",
                               c.code, c.code_hash, stage="compile")
    res = run_candidate(c, engine, program, design, cfg, defer_refits=True)
    res.fit_files = [str(p) for p in dict.fromkeys(engine.paths.get(c.id, []))]
    res.seconds["total"] = time.perf_counter() - t0
    res.fits_sampled, res.fits_reused = engine.sampled, engine.reused
    return res


def with_outcome(design: Design, y: np.ndarray) -> Design:
    """The same design (predictors, groups, reference scale) with another outcome vector,
    for fitting simulated datasets (calibration, recovery)."""
    y = np.asarray(y, dtype=float)
    if y.shape != design.y.shape:
        raise ValueError(f"outcome has shape {y.shape}, the design has {design.y.shape}")
    table = None
    if design.table is not None:
        table = design.table.copy()
        table[design.outcome] = y
    return replace(design, y=y, table=table)


def fit_task(c: Candidate, design: Design, cfg: RunConfig, engine_name: str, store_folder: str,
             keep, seed: int | None = None):
    """One posterior fit (with the run's adapt_delta escalation) of ``c`` to ``design``,
    for studies that fit many simulated datasets. Runs in any executor process, stores
    the fit, and returns ``(health, keep(draws, health))`` where ``keep`` is a
    module-level function that extracts the little the study needs, so the full draws
    never travel back. A failure returns ``(None, message)``."""
    engine = stored_engine(engine_name, store_folder, cfg)
    try:
        program = engine.compile(c)
        settings = replace(sampler_settings(cfg), seed=cfg.seed if seed is None else seed)
        draws, health = fit_with_health(
            engine, program, inputs_for(c, design, None, cfg.hyperparameters.get(c.id)), settings,
            c.parameter_names, cfg.escalation, cfg.longer_retry, rhat_max=cfg.rhat_max,
            ess_per_chain_min=cfg.ess_per_chain_min, ebfmi_min=cfg.ebfmi_min,
        )
        health = word_health(health)
        kept = keep(draws, health)
        del draws
        return health, kept
    except (SamplingError, UserError) as exc:
        return None, str(exc)


def run(cfg: RunConfig, progress=None) -> RunResult:
    """Run every candidate through every trial and write ``summary.json``.

    ``progress``, when given, is called with one line of text at each step, and a live
    line per candidate is shown; without it the run is silent. Candidates run side by
    side on ``cfg.jobs`` cores (see :mod:`contenders.pipeline.executor`); a candidate whose trials
    were already computed with the same inputs is read from the fit store."""
    return run_with_programs(cfg, progress)[0]


@dataclass
class RunPrograms:
    """The candidates of a run as the run read them and checked them against its data,
    and the programs it compiled (``{id: Program}``; none for candidates whose trials
    came from the fit store): what a study of the run's fits (``recovery.recover``)
    fits with, instead of reading the candidates again."""

    candidates: dict[str, Candidate]
    compiled: dict[str, Any]


def run_with_programs(cfg: RunConfig, progress=None) -> tuple[RunResult, RunPrograms]:
    """:func:`run`, also returning the run's candidates and compiled programs."""
    say = progress or (lambda _text: None)
    start = time.perf_counter()
    design = load_design(cfg)
    if cfg.cross_validation == "leave_group_out" and design.J == 0:
        raise UserError("cross_validation = leave_group_out needs a group column; set group under [data] or --group")
    cands = select_candidates(cfg)
    from contenders.engines import resolve_engine

    _name, notice = resolve_engine(cfg.engine)   # before the output folder: a bad engine leaves nothing
    if notice:
        say(notice)
    out = output_folder(cfg.out)
    if cfg.quick:
        _never_over_a_full_result(out)
    store = FitStore(cfg.store or out / "fits", data_origin(cfg))
    with store.in_use():   # contenders store --prune waits for the run to end
        return _run(cfg, progress, say, start, design, cands, out, store)


def _run(cfg: RunConfig, progress, say, start: float, design: Design, cands: list[Candidate], out: Path,
         store: FitStore) -> tuple[RunResult, RunPrograms]:
    engine = StoredEngine(LazyEngine(cfg.engine), store)   # loaded only if something must be fitted
    for c in cands:
        check_against_data(c, design, cfg.hyperparameters.get(c.id))
    runnable = [c for c in cands if c.valid and not c.skip_reason]
    results: dict[str, CandidateResult] = {}
    for c in cands:
        if not c.valid:
            results[c.id] = CandidateResult(c.id, c.label, c.about, c.support, "failed",
                                            "; ".join(c.problems), c.code, c.code_hash)
        elif c.skip_reason:
            results[c.id] = CandidateResult(c.id, c.label, c.about, c.support, "skipped",
                                            c.skip_reason, c.code, c.code_hash)
    # trials computed before with exactly these inputs come from the store
    keys = {c.id: trials_key(c, design, cfg, engine.version()) for c in runnable}
    todo = []
    for c in runnable:
        found = store.load_trials(keys[c.id])
        if found is not None and all(Path(f).exists() for f in found.fit_files):
            found.from_store = True
            results[c.id] = found
        else:
            todo.append(c)
    jobs = cfg.jobs or None
    from contenders.machine import cores
    from contenders.pipeline.executor import share

    workers, chain_workers = share(jobs or cores(), len(todo))
    from contenders.engines.base import lock_notices

    with lock_notices(say if todo else None):   # another process may be compiling one of them
        cold = sum(not engine.is_cached(c) for c in todo)
    if cold:
        say(f"compiling {cold} program(s) with {engine.name} ({jobs or cores()} at a time; "
            "about 45 s each alone, about 90 s when two build at once; cached for later runs)")
    compiled = compile_all(engine, todo, jobs=jobs or cores(), progress=say)
    programs = compiled.programs
    for c in todo:
        if c.id not in programs:
            results[c.id] = CandidateResult(c.id, c.label, c.about, c.support, "failed",
                                            "; ".join(compiled.problems(c)), c.code, c.code_hash, stage="compile")
    todo = [c for c in todo if c.id in programs]
    if todo:
        say(f"fitting {len(todo)} candidate(s) on {workers} worker(s), at most "
            f"{chain_workers if workers == 1 else jobs or cores()} chain(s) at once in all"
            + (f"; {len(runnable) - len(todo)} from the fit store" if len(runnable) > len(todo) else ""))
    shown = Progress([c.id for c in cands], workers=workers, quiet=progress is None or cfg.quiet)
    for cid, r in results.items():
        shown.event(cid, "stored" if getattr(r, "from_store", False) else r.status)
    _run_tasks(todo, design, cfg, engine.name, jobs or cores(), store, keys, results, shown)
    ordered = [results[c.id] for c in cands]
    for r in ordered:
        if r.status in ("failed", "skipped", "unhealthy"):
            say(f"  {r.id}: {r.status}: {r.reason.splitlines()[0][:300] if r.reason else ''}")
    comparison = compare_candidates(ordered, cfg.seed, cfg.ppp_extreme, weigh=remembered_weights(store),
                                    relevant=cfg.relevant)
    if cfg.quick:
        comparison.lead.insert(0, QUICK_LOOK.format(chains=cfg.chains, draws=cfg.draws, rhat=cfg.rhat_max,
                                                         ess=cfg.ess_per_chain_min))
    sampled = sum(r.fits_sampled for r in ordered if not r.from_store)
    reused = sum(r.fits_reused for r in ordered if not r.from_store) + sum(
        len(r.fit_files) for r in ordered if r.from_store)
    result = RunResult(
        config=cfg, design=design, candidates=ordered, comparison=comparison, engine=engine.name,
        versions=versions(engine), data_hash=_file_hash(cfg.data) if cfg.data else "",
        seconds=time.perf_counter() - start, out=out, fits_sampled=sampled, fits_reused=reused,
        effects=compare_effects(ordered, comparison.rows, cfg.seed), store=store,
    )
    write_summary(result)
    return result, RunPrograms({c.id: c for c in cands}, programs)


def _never_over_a_full_result(out: Path) -> None:
    """A quick look never writes over the report of a full run."""
    path = out / "summary.json"
    if not path.exists():
        return
    try:
        profile = json.loads(path.read_text()).get("profile")
    except (OSError, ValueError):
        profile = None
    if profile != "quick look":
        raise UserError(f"{out} holds the output of a full run; a quick look never writes over it: "
                        "choose another folder with --out (the default for --quick is reports/quick)")


def _run_tasks(todo: list[Candidate], design: Design, cfg: RunConfig, engine_name: str, jobs: int,
               store: FitStore, keys: dict[str, str], results: dict, shown: Progress) -> None:
    """Every candidate's trials as one task each (:mod:`contenders.pipeline.tasks`); the
    exact refits a candidate's out-of-sample estimate needs then go to the same executor
    as tasks of their own, so a candidate with many refits spreads over the free workers.
    A candidate is finished (and its results stored) when its last refit is back."""
    from contenders.pipeline.tasks import Task, run_tasks

    folder = str(store.folder)

    def finished(c: Candidate, r: CandidateResult) -> None:
        results[c.id] = r
        if r.status in ("ok", "unhealthy"):
            store.save_trials(keys[c.id], r)
        shown.event(c.id, "done" if r.status == "ok" else r.status)

    def trials(c: Candidate) -> Task:
        def done(r: CandidateResult) -> list[Task]:
            results[c.id] = r
            if r.pending is None:
                finished(c, r)
                return []
            outcomes: list = [None] * len(r.pending.plan.fits)   # None while running
            shown.event(c.id, f"out-of-sample: {len(outcomes)} refit(s)")
            return [refit(c, r, outcomes, k) for k in range(len(outcomes))]

        def lost(message: str) -> CandidateResult:
            return CandidateResult(c.id, c.label, c.about, c.support, "failed", message, c.code, c.code_hash)

        return Task(candidate_task, (c, design, cfg, engine_name, folder), done, lost)

    def refit(c: Candidate, r: CandidateResult, outcomes: list, k: int) -> Task:
        def done(answer: RefitOutcome) -> None:
            outcomes[k] = answer
            left = sum(o is None for o in outcomes)
            if left:
                shown.event(c.id, f"out-of-sample: {left} refit(s) to go")
                return
            finish_refits(r, r.pending, outcomes)
            finished(c, r)

        return Task(refit_task, (c, design, cfg, engine_name, folder, r.pending, k), done,
                    lambda message: RefitOutcome(None, error=message))

    run_tasks([trials(c) for c in todo], engine_name, jobs, shown, cluster=cfg.cluster)


def versions(engine) -> dict[str, str]:
    from importlib.metadata import version   # no import of ArviZ or SciPy for their versions

    return {
        "contenders": __version__, "engine": engine.version(), "arviz": version("arviz"),
        "numpy": np.__version__, "scipy": version("scipy"), "python": platform.python_version(),
    }


