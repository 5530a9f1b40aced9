"""Posterior predictive checks: test statistics, grouped statistics and LOO-PIT."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from . import statistics as st


@dataclass
class PredictiveChecks:
    rows: list[dict]                                  # one per statistic, with p_value
    grouped: dict[str, dict[str, list[dict]]]         # condition -> level -> rows
    loo_pit: np.ndarray                               # one value per observation
    loo_pit_test: dict                                # statistic, p_value, method
    extreme: list[str]                                # statistics with p beyond ppp_extreme (detectable)
    stat_draws: dict[str, np.ndarray] = field(repr=False, default_factory=dict)


def thin_draws(n_total: int, n_keep: int) -> np.ndarray:
    """Evenly spaced indices of ``n_keep`` out of ``n_total`` draws (all if fewer)."""
    if n_keep >= n_total:
        return np.arange(n_total)
    return np.unique(np.linspace(0, n_total - 1, n_keep).round().astype(int))


def loo_pit(y: np.ndarray, y_rep: np.ndarray, log_lik: np.ndarray, reff: float = 1.0) -> np.ndarray:
    """LOO-PIT values with PSIS weights: Pr(y_rep_i <= y_i | y_{-i}) for each i.

    ``y_rep`` and ``log_lik`` have shape (draws, N). Computed with ArviZ's
    ``psislw`` and ``loo_pit`` (Vehtari, Gelman & Gabry 2017, Statistics and
    Computing 27, section 2.1, and Gabry et al. 2019, JRSS A 182, section 5)."""
    import arviz as az

    lw, _ = az.psislw(-np.asarray(log_lik, dtype=float).T, reff=reff)
    return np.asarray(az.loo_pit(y=np.asarray(y, dtype=float), y_hat=np.asarray(y_rep, dtype=float).T,
                                 log_weights=lw))


def uniformity_test(pit: np.ndarray) -> dict:
    """One-sample Kolmogorov-Smirnov test of the LOO-PIT values against uniform(0, 1)
    (SciPy ``kstest``). Approximate: LOO-PIT values are not independent, so read the
    p-value as a screen, together with the figure."""
    from scipy import stats as sps

    pit = np.asarray(pit, dtype=float)
    pit = pit[np.isfinite(pit)]
    res = sps.kstest(pit, "uniform")
    return {"statistic": float(res.statistic), "p_value": float(res.pvalue),
            "method": "Kolmogorov-Smirnov test of LOO-PIT values against uniform(0, 1), approximate"}


def predictive_checks(
    y: np.ndarray,
    y_rep: np.ndarray,
    log_lik: np.ndarray,
    thresholds: Sequence[float] = (),
    conditions: Mapping[str, np.ndarray] | None = None,
    reff: float = 1.0,
    ppp_extreme: float = 0.01,
) -> PredictiveChecks:
    """All posterior predictive checks of one candidate; arrays shaped (draws, N).
    ``extreme`` lists the statistics whose ppp-value lies below ``ppp_extreme`` or above
    1 - ``ppp_extreme`` (the run's ``[checks] ppp_extreme``)."""
    reps = st.compute(y_rep, thresholds)
    obs = st.compute(y, thresholds)
    rows = st.summarise(reps, obs)
    grouped_rows: dict[str, dict[str, list[dict]]] = {}
    for cond, labels in (conditions or {}).items():
        g_rep = st.grouped(y_rep, labels, thresholds)
        g_obs = st.grouped(y, labels, thresholds)
        grouped_rows[cond] = {lev: st.summarise(g_rep[lev], g_obs[lev]) for lev in g_rep}
    pit = loo_pit(y, y_rep, log_lik, reff)
    extreme = [r["statistic"] for r in rows if st.detectable(r["p_value"], ppp_extreme)]
    return PredictiveChecks(rows, grouped_rows, pit, uniformity_test(pit), extreme, reps)
