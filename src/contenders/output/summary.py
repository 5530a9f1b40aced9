"""``summary.json``: the run's results as plain JSON, made from the records
(contenders/records.py). Each key is written here and nowhere else; README.md lists them."""

from __future__ import annotations

import json
import math
import os
from dataclasses import asdict
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from contenders import __version__
from contenders.inputs.config import RunConfig
from contenders.records import CandidateResult, RunResult
from contenders.statistics.coefficients import summary as coefficients_summary
from contenders.statistics.compare import Comparison
from contenders.statistics.effects import effects_summary
from contenders.output.readings import elpd_method, sensitivity_summary, with_band_method
from contenders.statistics.features import INTERVAL
from contenders.rules import PPP_EXTREME


def json_safe(value: Any) -> Any:
    """JSON-safe: NaN and infinities become null; numpy scalars become Python numbers."""
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, Path):
        return str(value)
    return value


def ppc_entries(rows: Sequence, ppp_extreme: float = PPP_EXTREME,
                relevant: Mapping[str, float] | None = None) -> dict[str, dict[str, Any]]:
    """``summary.json``'s entry per statistic: observed value, p-value, the replicated
    median and 90 % interval, the miss in the statistic's units and as a share of the
    observed SD, the relevant size set for it and the reading (statistics/features.py)."""
    from contenders.statistics.features import read_rows

    relevant = relevant or {}
    return {row.statistic: {"observed": row.observed, "p_value": row.p_value,
                            "replicated_q50": row.q50, "replicated_q05": row.q05,
                            "replicated_q95": row.q95, "miss": row.miss,
                            "miss_share_sd": row.miss_share_sd,
                            "relevant": relevant.get(row.statistic), "reading": code}
            for row, code in zip(rows, read_rows(rows, ppp_extreme, relevant))}


def candidate_summary(r: CandidateResult, comparison: Comparison, cfg: RunConfig | None = None) -> dict[str, Any]:
    h, p, k, o = r.health, r.prior, r.checks, r.oos
    extreme, relevant = (cfg.ppp_extreme, cfg.relevant) if cfg is not None else (PPP_EXTREME, {})
    row = next((row for row in comparison.rows if row.id == r.id), None)
    return {
        "id": r.id, "label": r.label, "status": r.status, "reason": r.reason,
        "rhat_max": h.rhat_max if h else None,
        "ess_bulk_min": h.ess_bulk_min if h else None,
        "ess_tail_min": h.ess_tail_min if h else None,
        "divergences": h.divergences if h else None,
        "treedepth_hits": h.treedepth_hits if h else None,
        "ebfmi": h.ebfmi if h else None,
        "adapt_delta": h.adapt_delta if h else None,
        "warmup": h.warmup if h else None,
        "draws": h.draws if h else None,
        "adapt_delta_attempts": [asdict(a) for a in h.attempts] if h else [],
        "prior_plausible_share": p.plausible_share if p else None,
        "prior_flagged": p.flagged if p else None,
        "ppc": ppc_entries(k.rows, extreme, relevant) if k else {},
        "ppc_grouped": {cond: {lev: ppc_entries(rows, extreme, relevant) for lev, rows in levels.items()}
                        for cond, levels in k.grouped.items()} if k else {},
        "loo_pit_test": with_band_method(k.loo_pit_test) if k else None,
        "quantiles": k.quantiles if k else [],
        "elpd_loo": o.elpd_loo if o else None,
        "elpd_loo_se": o.elpd_loo_se if o else None,
        "p_loo": o.p_loo if o else None,
        "elpd_diff": row.elpd_diff if row else None,
        "elpd_diff_se": row.elpd_diff_se if row else None,
        "stacking_weight": row.stacking_weight if row else None,
        "pseudo_bma_weight": row.pseudo_bma_weight if row else None,
        "pareto_k_max": o.pareto_k_max if o else None,
        "n_high_pareto_k": o.n_high_pareto_k if o else None,
        "n_refits": o.n_refits if o else None,
        "refitted_observations": [i + 1 for i in o.refitted] if o else [],
        "elpd_method": elpd_method(o.elpd_method) if o else None,
        "elpd_mcse": o.elpd_mcse if o else None,
        "tied_with": list(row.tied_with) if row else [],   # from the comparison, not the candidate
        "power_scaling": sensitivity_summary(r.sensitivity),
        "coefficients": coefficients_summary(r.coefficients),
        "rank": row.rank if row else None,
        "shared_rank": row.shared_rank if row else None,     # "4–5" when tied within Monte Carlo error
        "standing": row.standing if row else None,           # best, tied, close, uncertain, worse (compare.standings)
        "hyperparameters": r.hyperparameters,
        "code_sha256": r.code_hash,
        "seconds": r.seconds,
        "fit_files": r.fit_files,
    }


def summary_dict(result: RunResult) -> dict[str, Any]:
    cfg = result.config
    return json_safe({
        "contenders_version": __version__,
        "profile": "quick look" if cfg.quick else "full",
        "data": {"file": cfg.data, "sha256": result.data_hash, "outcome": cfg.outcome,
                 "n": result.design.N, "dropped_rows": result.design.dropped_rows,
                 "predictors": [c.name for c in result.design.coding], "group": cfg.group,
                 "conditions": list(cfg.conditions), "y_center": result.design.y_center,
                 "y_scale": result.design.y_scale,
                 "censored_column": cfg.censored,
                 "censored_right": int((result.design.censoring == 1).sum()),
                 "censored_left": int((result.design.censoring == -1).sum()),
                 "truncation": {"lower": result.design.window[0], "upper": result.design.window[1]}},
        "sampler": {"engine": result.engine, "chains": cfg.chains, "warmup": cfg.warmup,
                    "draws": cfg.draws, "seed": cfg.seed, "adapt_delta": cfg.adapt_delta,
                    "max_treedepth": cfg.max_treedepth},
        "versions": result.versions,
        "seconds": result.seconds,
        "fits": {"sampled": result.fits_sampled, "from_store": result.fits_reused,
                 "store": cfg.store or result.out / "fits"},
        "ranking": result.comparison.ranking,
        "preferred": result.comparison.preferred,
        "verdict": " ".join(result.comparison.verdict),
        "verdict_lead": " ".join(result.comparison.lead),
        "verdict_details": " ".join(result.comparison.details),
        "checks": {"ppp_extreme": cfg.ppp_extreme, "interval": INTERVAL, "relevant": dict(cfg.relevant)},
        "candidates": [candidate_summary(r, result.comparison, cfg) for r in result.candidates],
        "effects": effects_summary(result.effects),
    })


def write_summary(result: RunResult) -> Path:
    """Write ``summary.json`` atomically (temporary file, then rename)."""
    path = result.out / "summary.json"
    tmp = path.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(summary_dict(result), indent=2))
    os.replace(tmp, path)
    return path
