"""Posterior fit with sampler health, and the automatic adapt_delta escalation.

Diagnostics and thresholds:

* rank-normalised split R-hat and bulk/tail ESS of every parameter (Vehtari, Gelman,
  Simpson, Carpenter & Buerkner 2021, "Rank-normalization, folding, and localization:
  an improved R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2)):
  R-hat below 1.01 and ESS above 100 per chain; computed with ArviZ;
* divergent transitions (any is a problem) and iterations that hit the maximum tree
  depth (an efficiency warning);
* E-BFMI per chain below 0.3 is flagged (Betancourt 2016, "Diagnosing suboptimal
  cotangent disintegrations in Hamiltonian Monte Carlo", arXiv:1604.00695).

When a fit has divergent transitions it is refitted with each higher ``adapt_delta``
of the escalation in turn until none remain. When the accepted fit then falls just
short on R-hat or ESS alone (no divergent transitions, E-BFMI fine, R-hat below 1.05,
ESS at least its floor divided by the factor), it is fitted once more with warmup and
draws times ``longer`` (the run's ``longer_retry``): R-hat from 1,000 draws per chain
varies by about +-0.005 between seeds for a well-behaved posterior (measured here, see
``config.QUICK_PROFILE``), so 1.012 can be chance; longer chains settle it, and ESS
grows about in proportion to the draws (common practice, no source). A fit far off
(R-hat 1.05 or more, or any divergent transition left) is not retried: more of the same
sampling does not fix a posterior the sampler cannot explore. Every attempt is recorded.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import math

import numpy as np

from contenders.engines.base import Draws, Engine, Program, SamplerSettings
from contenders.rules import EBFMI_MIN, ESS_PER_CHAIN_MIN, RHAT_FAR, RHAT_MAX


@dataclass
class Attempt:
    adapt_delta: float
    divergences: int
    seconds: float                 # sampling, without the waiting below
    wait_seconds: float = 0.0      # waiting for a free chain slot, no chain of the fit running
    warmup: int = 0                # per chain
    draws: int = 0                 # per chain


@dataclass
class ParameterRow:
    """Posterior summary and convergence diagnostics of one parameter element."""

    parameter: str
    mean: float
    sd: float
    q05: float
    q95: float
    rhat: float                   # rank-normalised split R-hat
    ess_bulk: float
    ess_tail: float


@dataclass
class Health:
    """Sampler diagnostics of the final attempt and the record of all attempts."""

    rhat_max: float
    rhat_worst: str
    ess_bulk_min: float
    ess_tail_min: float
    ess_worst: str
    divergences: int
    treedepth_hits: int
    ebfmi: list[float]
    adapt_delta: float
    attempts: list[Attempt]
    healthy: bool
    problems: list[str]            # in words: contenders.output.readings.word_health fills them
    warnings: list[str]            # from ``findings``
    table: list[ParameterRow] = field(default_factory=list)   # per parameter element
    warmup: int = 0                # per chain, of the accepted fit
    draws: int = 0                 # per chain, of the accepted fit
    #: what the diagnostics found, as codes with their values (see ``diagnose``), in the
    #: order the words list them; ``severity`` "problem" makes the fit unhealthy
    findings: list[dict] = field(default_factory=list)

    @property
    def posterior_means(self) -> dict[str, float]:
        return {row.parameter: row.mean for row in self.table}


def flatten(ds, var_names: Sequence[str]) -> dict[str, float]:
    """One value per scalar element of each named variable of a summary dataset.

    Parameters
    ----------
    ds : xarray.Dataset
        Variables without chain and draw dimensions (for example a per-parameter
        diagnostic such as R-hat).
    var_names : sequence of str
        Variables to take; names not in ``ds`` are left out.

    Returns
    -------
    dict
        ``name`` for a scalar, ``name[i,j]`` (1-based, as Stan names elements) for each
        element of an array, mapped to its value as a float.
    """
    out = {}
    for name in var_names:
        if name not in ds:
            continue
        values = np.asarray(ds[name].values, dtype=float)
        if values.ndim == 0:
            out[name] = float(values)
        else:
            for idx in np.ndindex(values.shape):
                out[f"{name}[{','.join(str(i + 1) for i in idx)}]"] = float(values[idx])
    return out


def diagnose(
    draws: Draws,
    parameters: Sequence[str],
    rhat_max: float = RHAT_MAX,
    ess_per_chain_min: float = ESS_PER_CHAIN_MIN,
    ebfmi_min: float = EBFMI_MIN,
    attempts: Sequence[Attempt] = (),
) -> Health:
    """Compute every diagnostic of one run and decide whether it is healthy.

    Parameters
    ----------
    draws : Draws
        The fit: its InferenceData (posterior and sample statistics ``diverging``,
        ``tree_depth``, ``energy``) and the sampler settings it ran with.
    parameters : sequence of str
        Parameters to diagnose (those present in the posterior; vectors are flattened,
        1-based). Elements equal in every draw (fixed by the program) are left out.
    rhat_max : float
        Rank-normalised split R-hat must be below this (``rules.RHAT_MAX``).
    ess_per_chain_min : float
        Bulk and tail ESS must be at least this times the chains (``rules.ESS_PER_CHAIN_MIN``).
    ebfmi_min : float
        E-BFMI of every chain must be at least this (``rules.EBFMI_MIN``).
    attempts : sequence of Attempt
        The record of the fits made so far (kept in the result).

    Returns
    -------
    Health
        The diagnostics, the per-parameter table and ``findings``: one dict per finding
        with ``code`` (``rhat_nan``, ``rhat``, ``ess``, ``divergences``, ``ebfmi`` are
        problems; ``treedepth`` is a warning), ``severity`` and the values the words
        need. ``healthy`` is True without problems. ``problems`` and ``warnings`` are
        left empty: ``contenders.output.readings.word_health`` writes them.

    References
    ----------
    Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021), "Rank-normalization, folding,
    and localization: an improved R-hat for assessing convergence of MCMC", Bayesian
    Analysis 16(2) (R-hat, bulk and tail ESS; computed with ArviZ). Betancourt (2016),
    "Diagnosing suboptimal cotangent disintegrations in Hamiltonian Monte Carlo",
    arXiv:1604.00695 (E-BFMI; ArviZ's ``bfmi``).
    """
    import arviz as az

    idata = draws.idata
    settings = draws.settings
    names = [p for p in parameters if p in idata.posterior]
    rhat = flatten(az.rhat(idata, var_names=names, method="rank"), names)
    bulk = flatten(az.ess(idata, var_names=names, method="bulk"), names)
    tail = flatten(az.ess(idata, var_names=names, method="tail"), names)
    post = idata.posterior
    mean = flatten(post[names].mean(dim=("chain", "draw")), names)
    sd = flatten(post[names].std(dim=("chain", "draw")), names)
    q05 = flatten(post[names].quantile(0.05, dim=("chain", "draw")), names)
    q95 = flatten(post[names].quantile(0.95, dim=("chain", "draw")), names)
    # elements equal in every draw of every chain are fixed by the program's structure (the
    # first row of a Cholesky factor of a correlation matrix is 1, 0, ..., 0), not stuck:
    # chains stuck at their random initial values would differ from one another
    spread = flatten(post[names].max(dim=("chain", "draw")) - post[names].min(dim=("chain", "draw")), names)
    for k in [k for k, v in spread.items() if v == 0 and post.sizes["chain"] * post.sizes["draw"] > 1]:
        for d in (rhat, bulk, tail):
            d.pop(k, None)
    table = [ParameterRow(k, mean[k], sd[k], q05[k], q95[k], rhat[k], bulk[k], tail[k]) for k in rhat]
    finite_rhat = {k: v for k, v in rhat.items() if np.isfinite(v)}
    worst_r = max(finite_rhat, key=finite_rhat.get) if finite_rhat else ""
    worst_e = min(bulk, key=lambda k: min(bulk[k], tail[k])) if bulk else ""
    ss = idata.sample_stats
    divergences = int(np.asarray(ss["diverging"].values).sum())
    hits = int((np.asarray(ss["tree_depth"].values) >= settings.max_treedepth).sum())
    ebfmi = [float(v) for v in np.atleast_1d(az.bfmi(idata))]
    min_ess = ess_per_chain_min * settings.chains

    findings: list[dict] = []

    def found(code: str, severity: str = "problem", **values) -> None:
        findings.append({"code": code, "severity": severity, **values})

    r_max = max(finite_rhat.values()) if finite_rhat else float("nan")
    if any(not np.isfinite(v) for v in rhat.values()):
        found("rhat_nan")
    if np.isfinite(r_max) and r_max >= rhat_max:
        found("rhat", value=r_max, limit=rhat_max, parameter=worst_r)
    e_bulk = min(bulk.values()) if bulk else float("nan")
    e_tail = min(tail.values()) if tail else float("nan")
    if min(e_bulk, e_tail) < min_ess:
        found("ess", value=min(e_bulk, e_tail), limit=min_ess, per_chain=ess_per_chain_min, parameter=worst_e)
    if divergences:
        found("divergences", count=divergences, adapt_delta=settings.adapt_delta)
    low = [i + 1 for i, v in enumerate(ebfmi) if v < ebfmi_min]
    if low:
        found("ebfmi", chains=low, values=[ebfmi[i - 1] for i in low], limit=ebfmi_min)
    if hits:
        found("treedepth", "warning", count=hits, max_treedepth=settings.max_treedepth)
    return Health(
        rhat_max=r_max, rhat_worst=worst_r, ess_bulk_min=e_bulk, ess_tail_min=e_tail,
        ess_worst=worst_e, divergences=divergences, treedepth_hits=hits, ebfmi=ebfmi,
        adapt_delta=settings.adapt_delta, attempts=list(attempts),
        healthy=not any(f["severity"] == "problem" for f in findings),
        problems=[], warnings=[], table=table, warmup=settings.warmup, draws=settings.draws,
        findings=findings,
    )


def just_short(health: Health, longer: float, rhat_max: float = RHAT_MAX, ess_per_chain_min: float = ESS_PER_CHAIN_MIN,
               ebfmi_min: float = EBFMI_MIN, chains: int = 4) -> bool:
    """Whether an unhealthy fit fell short on R-hat or ESS only, and by little enough that
    chains ``longer`` times as long can be expected to settle it.

    Parameters
    ----------
    health : Health
        The fit's diagnostics.
    longer : float
        Factor of warmup and draws of the retry (1 or less: never retry).
    rhat_max, ess_per_chain_min, ebfmi_min : float
        The thresholds of ``diagnose``.
    chains : int
        Chains of the fit.

    Returns
    -------
    bool
        True without divergent transitions, with E-BFMI fine, R-hat below
        max(``rules.RHAT_FAR``, ``rhat_max``) and ESS at least its floor divided by
        ``longer`` (ESS grows about in proportion to the draws; common practice, no
        source).
    """
    if health.healthy or longer <= 1 or health.divergences or any(v < ebfmi_min for v in health.ebfmi):
        return False
    if not np.isfinite(health.rhat_max) or health.rhat_max >= max(RHAT_FAR, rhat_max):
        return False
    ess = min(health.ess_bulk_min, health.ess_tail_min)
    return bool(np.isfinite(ess) and ess >= ess_per_chain_min * chains / longer)


def fit_with_health(
    engine: Engine,
    program: Program,
    data: Mapping[str, Any],
    settings: SamplerSettings,
    parameters: Sequence[str],
    escalation: Sequence[float],
    longer: float = 1.0,
    **thresholds: float,
) -> tuple[Draws, Health]:
    """Sample with sampler health checked, escalating adapt_delta and retrying longer.

    On divergent transitions the fit is made again at each higher adapt_delta of
    ``escalation`` in turn; when the result falls just short on R-hat or ESS
    (``just_short``), it is fitted once more with warmup and draws ``longer`` times as
    many. Both are recorded as findings (``escalated``, ``longer``) before the accepted
    fit's own.

    Parameters
    ----------
    engine : Engine
        The sampler.
    program : Program
        The compiled candidate.
    data : mapping
        The program's data.
    settings : SamplerSettings
        Chains, warmup, draws, adapt_delta, seed.
    parameters : sequence of str
        Parameters to diagnose.
    escalation : sequence of float
        Higher adapt_delta values to try after divergent transitions, in turn (the run
        passes its setting, whose default is in ``inputs.settings``; empty: none).
    longer : float
        Factor of warmup and draws of the one longer retry (1: never).
    **thresholds : float
        ``rhat_max``, ``ess_per_chain_min``, ``ebfmi_min`` (see ``diagnose``).

    Returns
    -------
    tuple
        ``(draws, health)`` of the accepted fit; every attempt is in ``health.attempts``.
    """
    steps = [settings.adapt_delta] + sorted(d for d in escalation if d > settings.adapt_delta)
    attempts: list[Attempt] = []

    def one(run: SamplerSettings) -> Draws:
        draws = engine.sample(program, data, run)
        n_div = int(np.asarray(draws.idata.sample_stats["diverging"].values).sum())
        attempts.append(Attempt(run.adapt_delta, n_div, draws.sample_seconds, draws.wait_seconds,
                                run.warmup, run.draws))
        return draws

    for i, delta in enumerate(steps):
        draws = one(replace(settings, adapt_delta=delta))
        if attempts[-1].divergences == 0 or i == len(steps) - 1:
            break
        del draws
    health = diagnose(draws, parameters, attempts=attempts, **thresholds)
    escalated = len(attempts) > 1
    short = [f for f in health.findings if f["severity"] == "problem"]
    if just_short(health, longer, chains=settings.chains, **thresholds):
        run = replace(settings, adapt_delta=health.adapt_delta, warmup=math.ceil(settings.warmup * longer),
                      draws=math.ceil(settings.draws * longer))
        del draws
        draws = one(run)
        health = diagnose(draws, parameters, attempts=attempts, **thresholds)
        health.findings.insert(0, {"code": "longer", "severity": "warning", "warmup": run.warmup,
                                   "draws": run.draws, "first_warmup": settings.warmup,
                                   "first_draws": settings.draws, "short": short, "passes": health.healthy})
    if escalated:
        health.findings.insert(0, {"code": "escalated", "severity": "warning",
                                   "attempts": [(a.adapt_delta, a.divergences) for a in attempts
                                                if a.draws == settings.draws]})
    return draws, health
