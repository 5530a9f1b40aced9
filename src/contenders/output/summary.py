"""``summary.json``: the run's results as plain JSON, made from the records
(contenders/records.py). Each key is written here and nowhere else; README.md lists them."""

from __future__ import annotations

import json
import math
from dataclasses import asdict
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np

from contenders import __version__
from contenders.cleanup import write_whole
from contenders.inputs.config import RunConfig
from contenders.records import CandidateResult, RunResult
from contenders.statistics.coefficients import Coefficients
from contenders.statistics.compare import Comparison
from contenders.statistics.effects import EffectAcross
from contenders.output.readings import elpd_method, sensitivity_summary, unranked_text, with_band_method
from contenders.statistics.features import INTERVAL
from contenders.rules import PPP_EXTREME

if TYPE_CHECKING:   # SciPy must not load on a warm rerun, which writes summary.json
    from contenders.statistics.calibration import Calibration


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


def coefficients_summary(c: Coefficients | None) -> dict[str, Any] | None:
    """The JSON-ready record of the coefficients for ``summary.json``.

    Parameters
    ----------
    c : Coefficients or None
        The summary.

    Returns
    -------
    dict or None
        Link, coefficients, groups and slopes as plain numbers and text.
    """
    if c is None:
        return None
    return {
        "link": c.link or None, "linear_predictor_sets": c.sets or None, "reason": c.reason or None,
        "coefficients": [{"parameter": r.parameter, "name": r.name, "units": r.units or None,
                          "internal_mean": r.internal[0], "internal_q025": r.internal[1],
                          "internal_q975": r.internal[2], "mean": r.value[0], "q025": r.value[1],
                          "q975": r.value[2]} for r in c.rows],
        "groups": {"column": c.group_column, "parameter": c.group_parameter, "count": len(c.groups),
                   "sd_parameter": c.group_sd_parameter or None,
                   "sd": list(c.group_sd) if c.group_sd else None} if c.groups else None,
        "slopes": [{"parameter": s.parameter, "name": s.name, "units": s.units or None,
                    "sd_internal_mean": s.internal[0], "sd_mean": s.per_unit[0],
                    "sd_q025": s.per_unit[1], "sd_q975": s.per_unit[2],
                    "correlation_with_intercept_mean": s.correlation[0],
                    "correlation_q025": s.correlation[1], "correlation_q975": s.correlation[2]}
                   for s in getattr(c, "slopes", [])],
    }


def effects_summary(effects: Sequence[EffectAcross]) -> list[dict]:
    """The ``effects`` block of summary.json.

    Parameters
    ----------
    effects : sequence of EffectAcross
        Effects with their sentences written.

    Returns
    -------
    list of dict
        Plain numbers and text per effect, no draws.
    """
    return [{
        "key": e.key, "kind": e.kind, "column": e.column, "level": e.level, "reference": e.reference,
        "description": e.title, "observed": e.observed,
        "candidates": [{k: v for k, v in asdict(row).items() if k != "draws"} for row in e.rows],
        "stacking_combined": asdict(e.combined) if e.combined else None, "reading": e.reading, "sentence": e.sentence,
    } for e in effects]


def calibration_dict(cal: Calibration) -> dict:
    """JSON-ready record of one candidate's calibration.

    Parameters
    ----------
    cal : Calibration
        The record.

    Returns
    -------
    dict
        Every field of ``cal`` (the simulations without ranks, ``not_fitted`` and
        ``fit_failures``, in words by ``readings.unranked_text``) and ``flagged``, the
        names of the flagged parameters.
    """
    d = asdict(cal)
    d["fit_failures"] = [unranked_text(u) for u in cal.fit_failures]
    d["not_fitted"] = [unranked_text(u) for u in cal.not_fitted]
    d["flagged"] = [p.parameter for p in cal.flagged]
    return d


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
        "quantiles": [asdict(q) for q in k.quantiles] if k else [],
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
    return write_whole(path, json.dumps(summary_dict(result), indent=2))
