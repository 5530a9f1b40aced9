"""Simulation-based calibration of candidates on the dataset's design.

For one candidate: draw parameters ``theta_s`` from its prior and a dataset ``y_s``
from ``theta_s`` (both from one prior predictive run of the program itself, with an
empty fit subset, so ``y_s`` is the program's own ``y_rep``); fit the candidate to
``y_s`` on the same predictors and groups; and take the rank of each true parameter
value among ``L`` posterior draws thinned evenly from the fit. If the program's
likelihood, its ``y_rep`` and its priors agree and the sampler is accurate, every rank
is uniform on ``0..L`` (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
"Validating Bayesian inference algorithms with simulation-based calibration",
arXiv:1804.06788, Theorem 1; Modrák, Moon, Kim, Bürkner, Huurre, Faltejsková, Gelman
& Vehtari 2023, "Simulation-based calibration checking for Bayesian computation: the
choice of test quantities shapes sensitivity", Bayesian Analysis). A program whose
``y_rep`` is not drawn from the distribution of its likelihood fails: the fits recover
the parameters of the likelihood, not those the data were simulated with.

Uniformity is tested per scalar parameter in two ways, each at level ``alpha / P``
for ``P`` scalar parameters (Bonferroni), so a correct candidate is wrongly flagged
with probability at most about ``2 alpha``:

* Pearson's chi-square test of the ranks counted in ``B`` bins of (nearly) equal width,
  with ``B`` the smaller of 20 and a fifth of the ranked simulations, so that at least
  five ranks are expected per bin (common practice, no source for the bin rule);
* the simultaneous band of the empirical distribution function of the scaled ranks
  (Säilynoja, Bürkner & Vehtari 2022, "Graphical test for discrete uniformity and its
  applications in goodness-of-fit evaluation and multiple sample comparison",
  Statistics and Computing 32, 32), computed by ArviZ's
  ``arviz.stats.ecdf_utils.ecdf_confidence_band`` (the "optimized" method).

Every simulated dataset is accounted for: those outside the candidate's support or
with non-finite values cannot be fitted and are counted (the ranks then cover the
other simulations only, which makes the check conditional); fits that fail are
counted with their messages; fits with sampler problems are counted and their ranks
kept (dropping them would condition on the data and bias the ranks); simulated
datasets outside the plausibility bounds of ``[checks.bounds]`` are counted. The
posterior draws are thinned evenly to ``L`` draws; fits whose smallest bulk ESS is
below ``L`` are counted, since their thinned draws are not near-independent and
autocorrelation alone can make the ranks non-uniform (Talts et al. 2018, Section 5.1).
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import math
import time
from dataclasses import asdict, dataclass, field
from functools import partial
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import scipy.stats as sps

from contenders.inputs.candidates import Candidate, check_against_data, check_outputs, inputs_for
from contenders.inputs.config import RunConfig
from contenders.inputs.data import Design, support_problem
from contenders.errors import UserError

#: Overall level of the calibration verdict (split over parameters and the two tests).
ALPHA = 0.01

#: Posterior draws kept per fit (ranks run from 0 to this); Talts et al. use 100.
KEPT_DRAWS = 99

#: Prior predictive draws made per simulation before even thinning to the simulations.
PRIOR_THIN = 5

#: Fewer ranked simulations than this give no verdict.
MIN_RANKED = 10

#: Most bins of the chi-square test.
MAX_BINS = 20


# --- pure functions ----------------------------------------------------------------------

def rank_of(true: np.ndarray, draws: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Rank of each true value among the draws: the number of draws below it, ties
    (possible only for stuck chains) broken at random. ``true`` has shape (P,),
    ``draws`` (L, P); ranks lie in 0..L."""
    true = np.asarray(true, dtype=float)
    draws = np.asarray(draws, dtype=float)
    below = (draws < true).sum(axis=0)
    ties = (draws == true).sum(axis=0)
    return below + rng.integers(0, ties + 1)


def bins_for(n_ranked: int, kept: int) -> int:
    """Bins of the chi-square test: at least five ranks expected in each, at most
    :data:`MAX_BINS`, at most ``kept + 1`` (one per possible rank)."""
    return int(max(2, min(MAX_BINS, n_ranked // 5, kept + 1)))


def chi_square_uniformity(ranks: np.ndarray, kept: int, bins: int) -> tuple[float, float, list[int], list[int]]:
    """Pearson's chi-square test that ``ranks`` (integers 0..kept) are uniform, counting
    them in ``bins`` bins of nearly equal width; the expected count of a bin is
    proportional to the number of possible ranks in it, so unequal widths are exact.
    Returns (statistic, p-value, counts, edges); ``edges`` are rank boundaries, bin
    ``b`` holding ranks ``edges[b] <= r < edges[b + 1]``."""
    ranks = np.asarray(ranks, dtype=int)
    edges = np.unique(np.round(np.linspace(0, kept + 1, bins + 1)).astype(int))
    counts = np.histogram(ranks, bins=edges)[0]
    expected = ranks.size * np.diff(edges) / (kept + 1)
    stat, p = sps.chisquare(counts, expected)
    return float(stat), float(p), counts.tolist(), edges.tolist()


def ecdf_points(n_ranked: int, kept: int) -> np.ndarray:
    """Where the ECDF of the scaled ranks ``(r + 1) / (kept + 1)`` is evaluated: at
    most ``n_ranked`` rank boundaries ``k / (kept + 1)``, so the uniform distribution
    function there is exactly ``k / (kept + 1)`` (Säilynoja et al. 2022 evaluate at
    K <= N points)."""
    k = np.unique(np.round(np.linspace(0, kept + 1, min(n_ranked, kept + 1) + 1)).astype(int))[1:-1]
    return k / (kept + 1)


def ecdf_band(n_ranked: int, kept: int, prob: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Points ``z``, and lower and upper limits of the simultaneous ``prob`` band of the
    ECDF of ``n_ranked`` uniform scaled ranks at ``z`` (ArviZ's implementation of
    Säilynoja et al. 2022)."""
    from arviz.stats.ecdf_utils import ecdf_confidence_band

    z = ecdf_points(n_ranked, kept)
    lower, upper = ecdf_confidence_band(n_ranked, z, z, prob=prob, method="optimized")
    return z, np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)


def ecdf_of_ranks(ranks: np.ndarray, kept: int, z: np.ndarray) -> np.ndarray:
    """ECDF of the scaled ranks ``(r + 1) / (kept + 1)`` at ``z``."""
    u = np.sort((np.asarray(ranks, dtype=float) + 1) / (kept + 1))
    return np.searchsorted(u, z + 1e-12, side="right") / u.size


# --- results -----------------------------------------------------------------------------

@dataclass
class ParameterRanks:
    """Ranks of one scalar parameter over the ranked simulations and their tests."""

    parameter: str
    ranks: list[int]
    bins: int
    counts: list[int]
    edges: list[int]
    chi_square: float
    p_value: float
    outside_band: bool           # the ECDF leaves the simultaneous band somewhere
    flagged: bool


@dataclass
class Calibration:
    """Simulation-based calibration of one candidate."""

    id: str
    label: str
    status: str                              # passed | failed | inconclusive | not run
    reason: str = ""
    simulations: int = 0                     # asked for
    kept_draws: int = KEPT_DRAWS             # L: ranks run 0..L
    ranked: int = 0                          # simulations whose fit gave ranks
    unhealthy: int = 0                       # of the ranked: fits with sampler problems
    low_ess: int = 0                         # of the ranked: smallest bulk ESS below L
    fit_failures: list[str] = field(default_factory=list)    # "simulation s: message"
    not_fitted: list[str] = field(default_factory=list)      # "simulation s: reason"
    implausible: int = 0                     # simulated datasets outside [checks.bounds]
    prior_divergences: int = 0
    alpha: float = ALPHA
    level: float = ALPHA                     # per parameter and test: alpha / (2 P)
    parameters: list[ParameterRanks] = field(default_factory=list)

    @property
    def flagged(self) -> list[ParameterRanks]:
        return [p for p in self.parameters if p.flagged]


@dataclass
class CalibrationStudy:
    """Every candidate's calibration and what the study was run with."""

    config: RunConfig
    design: Design
    candidates: list[Calibration]
    simulations: int
    kept_draws: int
    seconds: float
    engine: str
    engine_version: str


def _flat_names(post, names: Sequence[str]) -> list[str]:
    """Scalar names (``coef[1]``, 1-based) in the order of ``values.reshape(draws, -1)``."""
    out = []
    for name in names:
        shape = post[name].shape[2:]
        if not shape:
            out.append(name)
        else:
            out.extend(f"{name}[{','.join(str(i + 1) for i in idx)}]" for idx in np.ndindex(shape))
    return out


def _stack_parameters(post, names: Sequence[str]) -> np.ndarray:
    """(chain * draw, P): the named parameters, chain-major, flattened as :func:`_flat_names`."""
    m = post.sizes["chain"] * post.sizes["draw"]
    return np.concatenate([np.asarray(post[n].values, dtype=float).reshape(m, -1) for n in names], axis=1)


def keep_thinned(draws, health, names: Sequence[str], kept: int) -> dict:
    """What a calibration fit sends back (runs in the worker): ``kept`` posterior draws
    of the named parameters, evenly spaced over all chains, and the smallest bulk ESS."""
    values = _stack_parameters(draws.idata.posterior, names)
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


def judge(cal: Calibration, theta: np.ndarray, kept_by_sim: dict[int, np.ndarray], names: Sequence[str],
          seed: int) -> Calibration:
    """Ranks, tests and the verdict from the true values ``theta`` (S, P) and the kept
    draws of each ranked simulation ``{s: (L, P)}``."""
    rng = np.random.default_rng(seed)
    sims = sorted(kept_by_sim)
    cal.ranked = len(sims)
    if not sims:
        cal.status = "inconclusive"
        cal.reason = "no simulated dataset could be fitted; see the counts below"
        return cal
    ranks = np.array([rank_of(theta[s], kept_by_sim[s], rng) for s in sims])   # (n, P)
    n, p = ranks.shape
    cal.level = cal.alpha / (2 * p)
    bins = bins_for(n, cal.kept_draws)
    z, lower, upper = ecdf_band(n, cal.kept_draws, 1 - cal.level) if n >= 2 else (None, None, None)
    for j, name in enumerate(names):
        stat, pval, counts, edges = chi_square_uniformity(ranks[:, j], cal.kept_draws, bins)
        outside = False
        if z is not None:
            f = ecdf_of_ranks(ranks[:, j], cal.kept_draws, z)
            outside = bool(np.any((f < lower - 1e-12) | (f > upper + 1e-12)))
        cal.parameters.append(ParameterRanks(name, ranks[:, j].astype(int).tolist(), bins, counts, edges, stat,
                                             pval, outside, bool(pval < cal.level or outside)))
    if n < MIN_RANKED:
        cal.status = "inconclusive"
        cal.reason = (f"only {n} simulated datasets gave ranks (at least {MIN_RANKED} are needed for a "
                      "verdict); run more simulations")
    elif cal.flagged:
        worst = min(cal.flagged, key=lambda q: q.p_value)
        cal.status = "failed"
        cal.reason = (
            f"the ranks of {', '.join(q.parameter for q in cal.flagged[:5])}"
            f"{' and more' if len(cal.flagged) > 5 else ''} are not uniform (smallest chi-square p = "
            f"{worst.p_value:.2g}): fits of the program's own simulated data do not recover the parameters "
            "they were simulated with. Check that y_rep is drawn from the same distribution as the "
            "likelihood and log_lik, with the same parameters, and that the priors in the model block "
            "are the ones the program describes"
            + ("; some fits also had sampler problems, which can cause this too" if cal.unhealthy else ""))
    else:
        cal.status = "passed"
        cal.reason = (f"no departure from uniform ranks found in {n} simulations; this cannot prove the "
                      "program right, and small errors need more simulations to show")
    return cal


# --- the study ---------------------------------------------------------------------------

def _settings(cfg: RunConfig, draws: int, chains: int, seed: int):
    from contenders.engines.base import SamplerSettings

    return SamplerSettings(chains=chains, warmup=cfg.warmup, draws=draws, adapt_delta=cfg.adapt_delta,
                           max_treedepth=cfg.max_treedepth, seed=seed)


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
    from contenders.pipeline.executor import cores, make_executor, share
    from contenders.pipeline.progress import Progress
    from contenders.pipeline.runner import load_design, output_folder, select_candidates, with_outcome
    from contenders.pipeline.store import FitStore, StoredEngine

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
    programs = compile_all(engine, runnable, jobs=jobs)
    plan = []   # (candidate, names, theta, fittable simulation indices, Calibration)
    for c in runnable:
        cal = Calibration(c.id, c.label, "not run", simulations=simulations, kept_draws=kept)
        results[c.id] = cal
        if c.id not in programs:
            cal.reason = "; ".join(c.problems)
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
                                  _settings(cfg, math.ceil(PRIOR_THIN * simulations / chains), chains,
                                            cfg.seed + 104729))
        except Exception as exc:   # one candidate never stops the others
            cal.reason = f"prior predictive run: {exc}"
            continue
        post = prior.idata.posterior
        names = [n for n in c.parameter_names if n in post and post[n].size > 0]
        flat = _flat_names(post, names)
        every = _stack_parameters(post, names)
        y_rep_all = np.asarray(prior.idata.posterior_predictive["y_rep"].values, dtype=float)
        y_rep_all = y_rep_all.reshape(-1, y_rep_all.shape[-1])
        pick = np.round(np.linspace(0, every.shape[0] - 1, simulations)).astype(int)
        theta, y_sims = every[pick], y_rep_all[pick]
        cal.prior_divergences = int(np.asarray(prior.idata.sample_stats["diverging"].values).sum())
        fittable = []
        for s in range(simulations):
            y_s = y_sims[s]
            if not np.all(np.isfinite(y_s)):
                cal.not_fitted.append(f"simulation {s + 1}: {int((~np.isfinite(y_s)).sum())} non-finite values")
                continue
            why = support_problem(y_s, c.support)
            if why:
                cal.not_fitted.append(f"simulation {s + 1}: {why}")
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
    executor = make_executor(engine.name, jobs, total, on_event=shown.event, cluster=cfg.cluster)
    kept_by: dict[str, dict[int, np.ndarray]] = {p[0].id: {} for p in plan}
    left = {p[0].id: len(p[5]) for p in plan}
    n_fits_of = dict(left)
    t0 = time.perf_counter()
    done = 0
    try:
        with shown.ticker():
            futures = {}
            for c, names, flat, theta, y_sims, fittable, cal in plan:
                for s in fittable:
                    f = executor.submit(calibration_fit, c, with_outcome(design, y_sims[s]), cfg, engine.name,
                                        str(store.folder), names, kept, cfg.seed + 1 + s)
                    futures[f] = (c.id, s, cal)
            for future in cf.as_completed(list(futures)):
                cid, s, cal = futures[future]
                try:
                    health, kept_part = future.result()
                except Exception as exc:   # a worker died: recorded, the others go on
                    health, kept_part = None, f"worker: {type(exc).__name__}: {exc}"
                if health is None:
                    cal.fit_failures.append(f"simulation {s + 1}: {str(kept_part).splitlines()[0][:300]}")
                else:
                    kept_by[cid][s] = kept_part["draws"]
                    cal.unhealthy += not kept_part["healthy"]
                    cal.low_ess += kept_part["ess_bulk_min"] < kept
                left[cid] -= 1
                done += 1
                eta = (time.perf_counter() - t0) / done * (total - done)
                shown.event(cid, "done" if left[cid] == 0 else
                            f"posterior: {n_fits_of[cid] - left[cid]} of {n_fits_of[cid]} fits; "
                            f"about {_minutes(eta)} left in all")
        executor.close()
    except BaseException:
        executor.close(cancel=True)
        raise
    for c, names, flat, theta, y_sims, fittable, cal in plan:
        judge(cal, theta, kept_by[c.id], flat, cfg.seed)
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


def calibration_dict(cal: Calibration) -> dict:
    """JSON-ready record of one candidate's calibration."""
    d = asdict(cal)
    d["flagged"] = [p.parameter for p in cal.flagged]
    return d
