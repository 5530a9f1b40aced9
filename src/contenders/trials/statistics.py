"""Test statistics of datasets and posterior predictive p-values.

Pure functions over arrays: a dataset is the last axis, so one call computes a
statistic for the observed data (shape ``(N,)``) or for every replicated dataset at
once (shape ``(S, N)``).
"""

from __future__ import annotations

from typing import Iterable, Mapping, Sequence

import numpy as np

from ..config import DEFAULT_STATISTICS

#: Plain-language names of the statistics, for reports.
DESCRIPTIONS = {
    "mean": "mean",
    "sd": "standard deviation",
    "min": "minimum",
    "max": "maximum",
    "q05": "5 % quantile",
    "q50": "median",
    "q95": "95 % quantile",
    "skewness": "skewness",
}


def threshold_name(t: float) -> str:
    return f"below_{t:g}"


def statistic_names(thresholds: Iterable[float] = ()) -> tuple[str, ...]:
    return DEFAULT_STATISTICS + tuple(threshold_name(t) for t in thresholds)


def describe(name: str) -> str:
    if name.startswith("below_"):
        return f"share below {name[6:]}"
    return DESCRIPTIONS.get(name, name)


def compute(y: np.ndarray, thresholds: Sequence[float] = ()) -> dict[str, np.ndarray]:
    """Every statistic of each dataset along the last axis of ``y``.

    ``sd`` uses ddof = 1; quantiles use linear interpolation (NumPy's default, type 7
    of Hyndman & Fan 1996); ``skewness`` is the Fisher-Pearson coefficient
    g1 = m3 / m2^(3/2) with central moments about the dataset's mean; ``below_t`` is
    the share of values strictly below t. A dataset holding a non-finite value gets
    NaN for every statistic except min, max and the shares.
    """
    y = np.asarray(y, dtype=float)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        mean = y.mean(axis=-1)
        dev = y - mean[..., None]
        m2 = np.mean(dev**2, axis=-1)
        m3 = np.mean(dev**3, axis=-1)
        q = np.quantile(y, [0.05, 0.5, 0.95], axis=-1)
        out = {
            "mean": mean,
            "sd": np.std(y, axis=-1, ddof=1),
            "min": y.min(axis=-1),
            "max": y.max(axis=-1),
            "q05": q[0],
            "q50": q[1],
            "q95": q[2],
            "skewness": m3 / m2**1.5,
        }
        finite = np.all(np.isfinite(y), axis=-1)
        for name in ("mean", "sd", "q05", "q50", "q95", "skewness"):
            out[name] = np.where(finite, out[name], np.nan)
        for t in thresholds:
            out[threshold_name(t)] = np.mean(y < t, axis=-1)
    return out


def ppp_value(replicated: np.ndarray, observed: float) -> float:
    """Posterior predictive p-value Pr(T(y_rep) >= T(y) | y), ties counted half
    (Gelman, Meng & Stern 1996, Statistica Sinica 6, 733-807, eq. 2.3 with the
    mid-p convention for discrete statistics). NaN replicates are left out."""
    r = np.asarray(replicated, dtype=float)
    r = r[~np.isnan(r)]
    if r.size == 0 or not np.isfinite(observed):
        return float("nan")
    return float(np.mean(r > observed) + 0.5 * np.mean(r == observed))


def grouped(y: np.ndarray, labels: np.ndarray, thresholds: Sequence[float] = ()) -> dict[str, dict[str, np.ndarray]]:
    """Statistics per level of a condition: ``{level: {statistic: values}}``; the
    last axis of ``y`` runs over observations and ``labels`` gives each one's level."""
    labels = np.asarray(labels).astype(str)
    return {level: compute(y[..., labels == level], thresholds) for level in sorted(set(labels))}


def summarise(replicated: Mapping[str, np.ndarray], observed: Mapping[str, float]) -> list[dict]:
    """One row per statistic: observed value, replicated mean and 5/50/95 % quantiles,
    the share of replicates below the observed value and the ppp-value."""
    rows = []
    for name, draws in replicated.items():
        d = np.asarray(draws, dtype=float)
        ok = d[~np.isnan(d)]
        obs = float(observed[name])
        q = np.quantile(ok, [0.05, 0.5, 0.95]) if ok.size else [np.nan] * 3
        rows.append({
            "statistic": name,
            "observed": obs,
            "mean": float(ok.mean()) if ok.size else float("nan"),
            "q05": float(q[0]), "q50": float(q[1]), "q95": float(q[2]),
            "p_value": ppp_value(d, obs),
            "n_missing": int(d.size - ok.size),
        })
    return rows
