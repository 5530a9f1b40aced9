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
of the escalation in turn until none remain; every attempt is recorded.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import numpy as np

from ..engines.base import Draws, Engine, Program, SamplerSettings


@dataclass
class Attempt:
    adapt_delta: float
    divergences: int
    seconds: float                 # sampling, without the waiting below
    wait_seconds: float = 0.0      # waiting for a free chain slot, no chain of the fit running


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
    problems: list[str]
    warnings: list[str]
    table: list[dict] = field(default_factory=list)   # per parameter element

    @property
    def posterior_means(self) -> dict[str, float]:
        return {row["parameter"]: row["mean"] for row in self.table}


def _flatten(ds, var_names: Sequence[str]) -> dict[str, float]:
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
    rhat_max: float = 1.01,
    ess_per_chain_min: float = 100.0,
    ebfmi_min: float = 0.3,
    attempts: Sequence[Attempt] = (),
) -> Health:
    """Compute every diagnostic of one run and decide whether it is healthy."""
    import arviz as az

    from ..report.format import against, limit   # a value beside its threshold shows the side it is on

    idata = draws.idata
    settings = draws.settings
    names = [p for p in parameters if p in idata.posterior]
    rhat = _flatten(az.rhat(idata, var_names=names, method="rank"), names)
    bulk = _flatten(az.ess(idata, var_names=names, method="bulk"), names)
    tail = _flatten(az.ess(idata, var_names=names, method="tail"), names)
    post = idata.posterior
    mean = _flatten(post[names].mean(dim=("chain", "draw")), names)
    sd = _flatten(post[names].std(dim=("chain", "draw")), names)
    q05 = _flatten(post[names].quantile(0.05, dim=("chain", "draw")), names)
    q95 = _flatten(post[names].quantile(0.95, dim=("chain", "draw")), names)
    table = [{"parameter": k, "mean": mean[k], "sd": sd[k], "q05": q05[k], "q95": q95[k],
              "rhat": rhat[k], "ess_bulk": bulk[k], "ess_tail": tail[k]} for k in rhat]
    finite_rhat = {k: v for k, v in rhat.items() if np.isfinite(v)}
    worst_r = max(finite_rhat, key=finite_rhat.get) if finite_rhat else ""
    worst_e = min(bulk, key=lambda k: min(bulk[k], tail[k])) if bulk else ""
    ss = idata.sample_stats
    divergences = int(np.asarray(ss["diverging"].values).sum())
    hits = int((np.asarray(ss["tree_depth"].values) >= settings.max_treedepth).sum())
    ebfmi = [float(v) for v in np.atleast_1d(az.bfmi(idata))]
    min_ess = ess_per_chain_min * settings.chains

    problems, warnings = [], []
    r_max = max(finite_rhat.values()) if finite_rhat else float("nan")
    if any(not np.isfinite(v) for v in rhat.values()):
        problems.append("R-hat could not be computed for some parameters (constant draws: the chains are stuck)")
    if np.isfinite(r_max) and r_max >= rhat_max:
        problems.append(
            f"R-hat {against(r_max, rhat_max, 3)} for {worst_r} is not below {limit(rhat_max)}: chains "
            "disagree; run longer "
            "(more warmup and draws) or reparameterise"
        )
    e_bulk = min(bulk.values()) if bulk else float("nan")
    e_tail = min(tail.values()) if tail else float("nan")
    if min(e_bulk, e_tail) < min_ess:
        problems.append(
            f"effective sample size {against(min(e_bulk, e_tail), min_ess, 0)} for {worst_e} is below "
            f"{limit(min_ess)} ({limit(ess_per_chain_min)} per chain): increase draws"
        )
    if divergences:
        problems.append(
            f"{divergences} divergent transitions at adapt_delta {settings.adapt_delta}: the posterior "
            "has regions the sampler cannot explore; reparameterise or use stronger priors"
        )
    low = [i + 1 for i, v in enumerate(ebfmi) if v < ebfmi_min]
    if low:
        problems.append(
            f"E-BFMI below {limit(ebfmi_min)} in chain(s) "
            + ", ".join(f"{i} ({against(ebfmi[i - 1], ebfmi_min, 2)})" for i in low)
            + ": the sampler moves "
            "poorly between energy levels; reparameterise (for example non-centred group effects)"
        )
    if hits:
        warnings.append(
            f"{hits} iterations hit the maximum tree depth {settings.max_treedepth}: sampling is "
            "inefficient; raise max_treedepth or reparameterise"
        )
    return Health(
        rhat_max=r_max, rhat_worst=worst_r, ess_bulk_min=e_bulk, ess_tail_min=e_tail,
        ess_worst=worst_e, divergences=divergences, treedepth_hits=hits, ebfmi=ebfmi,
        adapt_delta=settings.adapt_delta, attempts=list(attempts), healthy=not problems,
        problems=problems, warnings=warnings, table=table,
    )


def fit_with_health(
    engine: Engine,
    program: Program,
    data: Mapping[str, Any],
    settings: SamplerSettings,
    parameters: Sequence[str],
    escalation: Sequence[float] = (0.95, 0.99),
    **thresholds: float,
) -> tuple[Draws, Health]:
    """Sample; on divergent transitions refit at each higher adapt_delta in turn."""
    steps = [settings.adapt_delta] + sorted(d for d in escalation if d > settings.adapt_delta)
    attempts: list[Attempt] = []
    for i, delta in enumerate(steps):
        draws = engine.sample(program, data, replace(settings, adapt_delta=delta))
        n_div = int(np.asarray(draws.idata.sample_stats["diverging"].values).sum())
        attempts.append(Attempt(delta, n_div, draws.sample_seconds, draws.wait_seconds))
        if n_div == 0 or i == len(steps) - 1:
            break
        del draws
    health = diagnose(draws, parameters, attempts=attempts, **thresholds)
    if len(attempts) > 1:
        record = "; ".join(f"adapt_delta {a.adapt_delta}: {a.divergences} divergences" for a in attempts)
        health.warnings.insert(0, f"refitted after divergent transitions ({record})")
    return draws, health
