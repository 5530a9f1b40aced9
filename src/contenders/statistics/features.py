"""Test statistics of datasets and posterior predictive p-values.

Pure functions over arrays: a dataset is the last axis, so one call computes a
statistic for the observed data (shape ``(N,)``) or for every replicated dataset at
once (shape ``(S, N)``).

Besides whether a statistic is off (the ppp-value), how far: the *miss* is the observed
value minus the nearest end of the central 90 % interval of the replicated values (0
when the observed value lies inside), in the statistic's own units, and for statistics
in the outcome's units also as a share of the observed SD. With a *relevant size* per
statistic (``[checks] relevant``), ``reading`` tells a miss that is only detectable
(large N detects any difference) from one larger than what matters.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from contenders.rules import PPP_EXTREME

#: Statistics measured in the outcome's own units (their miss is also given as a share
#: of the observed SD). ``skewness`` has no unit; ``below_T`` is a share of observations.
OUTCOME_UNITS = ("mean", "sd", "min", "max", "q05", "q50", "q95")

#: The central interval of the replicated values that a miss is measured from.
INTERVAL = 0.90

#: Reading codes of one statistic (``reading``); their words are
#: ``contenders.output.readings.CHECK_READINGS``.
READING_CODES = ("fits", "detectable", "small", "relevant", "possibly_relevant", "unknown")


def unit_of(name: str) -> str:
    """The unit of a statistic's values.

    Parameters
    ----------
    name : str
        A statistic name (one of ``inputs.config.DEFAULT_STATISTICS`` or a ``threshold_name``).

    Returns
    -------
    str
        ``"outcome"`` (``OUTCOME_UNITS``), ``"share"`` (the ``below_T`` statistics) or
        ``"none"`` (skewness).
    """
    if name in OUTCOME_UNITS:
        return "outcome"
    return "share" if name.startswith("below_") else "none"


def threshold_name(t: float) -> str:
    """The name of the statistic "share of values below ``t``".

    Parameters
    ----------
    t : float
        The threshold.

    Returns
    -------
    str
        ``"below_<t>"`` with ``t`` written by ``format(t, "g")``: ``below_300``.
    """
    return f"below_{t:g}"


def compute(y: np.ndarray, thresholds: Sequence[float] = ()) -> dict[str, np.ndarray]:
    """Every statistic of each dataset along the last axis of ``y``.

    ``sd`` uses ddof = 1; quantiles use linear interpolation; ``skewness`` is the
    Fisher-Pearson coefficient g1 = m3 / m2^(3/2) with central moments about the
    dataset's mean; ``below_t`` is the share of values strictly below t. A dataset
    holding a non-finite value gets NaN for every statistic except min, max and the
    shares.

    Parameters
    ----------
    y : numpy.ndarray
        One dataset, shape (N,), or many, shape (S, N).
    thresholds : sequence of float
        Thresholds of the "share below" statistics.

    Returns
    -------
    dict of str to numpy.ndarray
        Statistic name -> values, of the shape of ``y`` without its last axis.

    References
    ----------
    Hyndman & Fan (1996), "Sample quantiles in statistical packages", The American
    Statistician 50(4) (type 7, NumPy's default); the skewness g1 as in SciPy's
    ``scipy.stats.skew`` with ``bias=True``.
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
    """Posterior predictive p-value Pr(T(y_rep) >= T(y) | y), ties counted half.

    Parameters
    ----------
    replicated : numpy.ndarray
        The statistic of each replicated dataset; NaN values are left out.
    observed : float
        The statistic of the observed data.

    Returns
    -------
    float
        The p-value; NaN when no replicate is left or ``observed`` is not finite.

    References
    ----------
    Gelman, Meng & Stern (1996), "Posterior predictive assessment of model fitness via
    realized discrepancies", Statistica Sinica 6, 733-807, eq. 2.3 (with the mid-p
    convention for discrete statistics).
    """
    r = np.asarray(replicated, dtype=float)
    r = r[~np.isnan(r)]
    if r.size == 0 or not np.isfinite(observed):
        return float("nan")
    return float(np.mean(r > observed) + 0.5 * np.mean(r == observed))


def miss(observed: float, low: float, high: float) -> float:
    """How far ``observed`` lies outside the interval [``low``, ``high``]: observed minus
    the nearest end, so positive above the interval (the replicates fall short), negative
    below it, 0 inside; NaN when any value is missing or not finite.

    Parameters
    ----------
    observed : float
        The statistic of the observed data.
    low, high : float
        Ends of the central interval of the replicated statistic (``INTERVAL``).

    Returns
    -------
    float
        The miss in the statistic's own units.
    """
    vals = np.array([observed, low, high], dtype=float)
    if not np.all(np.isfinite(vals)):
        return float("nan")
    if observed > high:
        return float(observed - high)
    if observed < low:
        return float(observed - low)
    return 0.0


def miss_share(size: float, name: str, observed_sd: float | None) -> float:
    """The miss of a statistic as a share of the observed SD.

    Parameters
    ----------
    size : float
        The miss (``miss``), in the statistic's units.
    name : str
        The statistic; only those in the outcome's units (``OUTCOME_UNITS``) get a share.
    observed_sd : float or None
        The observed data's SD.

    Returns
    -------
    float
        ``size / observed_sd``; NaN for other statistics or without a positive, finite SD.
    """
    if unit_of(name) != "outcome" or observed_sd is None:
        return float("nan")
    sd = float(observed_sd)
    if not (np.isfinite(sd) and sd > 0 and np.isfinite(size)):
        return float("nan")
    return float(size / sd)


def detectable(p: float, ppp_extreme: float) -> bool:
    """Whether a ppp-value is extreme: the statistic is "detectably off".

    Parameters
    ----------
    p : float
        Posterior predictive p-value (``ppp_value``).
    ppp_extreme : float
        The extreme (``rules.PPP_EXTREME`` by default in the run).

    Returns
    -------
    bool
        True when ``p`` is finite and below ``ppp_extreme`` or above 1 - ``ppp_extreme``.
    """
    return bool(p is not None and np.isfinite(p) and (p < ppp_extreme or p > 1 - ppp_extreme))


def reading(p: float, size: float, relevant: float | None, ppp_extreme: float = PPP_EXTREME) -> str:
    """One reading code of ``READING_CODES`` for a statistic: its ppp-value ``p``, its miss
    ``size`` (``miss``) and the relevant size set for it (``None``: none set).

    The one definition every table and sentence reads (our own rule, no source):
    detectably off means ``p`` beyond ``ppp_extreme`` (``detectable``); with a relevant
    size, a detectable miss whose absolute size is at most it is ``small``, one above it
    ``relevant``; a miss above the relevant size whose p is not beyond the extreme is
    ``possibly_relevant`` (the replicates vary too much to call it). A detectable miss of
    unknown size counts as ``detectable``.

    Parameters
    ----------
    p : float
        Posterior predictive p-value (``ppp_value``).
    size : float
        The miss, in the statistic's units.
    relevant : float or None
        Smallest miss that matters, in the same units; ``None`` when not set.
    ppp_extreme : float
        p-values below this or above 1 minus this are detectable.

    Returns
    -------
    str
        One of ``READING_CODES``.
    """
    if p is None or not np.isfinite(p):
        return "unknown"
    big = relevant is not None and size is not None and np.isfinite(size) and abs(size) > relevant
    if not detectable(p, ppp_extreme):
        return "possibly_relevant" if big else "fits"
    if relevant is None or size is None or not np.isfinite(size):
        return "detectable"
    return "relevant" if big else "small"


def read_rows(rows: Sequence[StatisticRow], ppp_extreme: float,
              relevant: Mapping[str, float] | None = None) -> list[str]:
    """The ``reading`` of each row of ``summarise``.

    Parameters
    ----------
    rows : sequence of StatisticRow
        Rows of ``summarise``.
    ppp_extreme : float
        See ``detectable``.
    relevant : mapping of str to float, optional
        Statistic -> smallest miss that matters (``[checks] relevant``).

    Returns
    -------
    list of str
        One of ``READING_CODES`` per row, in order.
    """
    relevant = relevant or {}
    return [reading(r.p_value, r.miss, relevant.get(r.statistic), ppp_extreme)
            for r in rows]


def named_misses(rows: Sequence[StatisticRow], ppp_extreme: float,
                 relevant: Mapping[str, float] | None = None) -> list[StatisticRow]:
    """The rows the verdict names as misses.

    With no relevant sizes set, every detectable one; with some set, those off by more
    than their relevant size, and detectable ones of statistics without a relevant size
    (their size is not judged, so they stay named).

    Parameters
    ----------
    rows : sequence of mapping
        Rows of ``summarise``.
    ppp_extreme : float
        See ``detectable``.
    relevant : mapping of str to float, optional
        Statistic -> smallest miss that matters.

    Returns
    -------
    list of mapping
        The rows whose reading is ``relevant`` or ``detectable``, in order.
    """
    return [r for r, code in zip(rows, read_rows(rows, ppp_extreme, relevant))
            if code in ("relevant", "detectable")]


def grouped(y: np.ndarray, labels: np.ndarray, thresholds: Sequence[float] = ()) -> dict[str, dict[str, np.ndarray]]:
    """Statistics per level of a condition.

    Parameters
    ----------
    y : numpy.ndarray
        Datasets along the last axis (observations), shape (N,) or (S, N).
    labels : numpy.ndarray
        Each observation's level, shape (N,); compared as text.
    thresholds : sequence of float
        See ``compute``.

    Returns
    -------
    dict
        ``{level: {statistic: values}}``, levels in sorted order.
    """
    labels = np.asarray(labels).astype(str)
    return {level: compute(y[..., labels == level], thresholds) for level in sorted(set(labels))}


@dataclass
class StatisticRow:
    """One test statistic, observed and over simulated datasets (replicated from the
    posterior, or drawn from the prior). ``summary.json`` and the CSV files prefix the
    simulated summaries by where they come from (``replicated_q05``, ``prior_q05``)."""

    statistic: str
    observed: float
    mean: float                   # of the simulated values
    q05: float                    # 5 %, 50 % and 95 % quantiles of the simulated values
    q50: float
    q95: float
    p_value: float                # ppp-value (``ppp_value``)
    n_missing: int                # simulated values that are NaN
    miss: float                   # observed minus the nearest end of the 5-95 % interval (``miss``)
    miss_share_sd: float          # the miss as a share of the observed SD (``miss_share``)
    share_below_observed: float = float("nan")   # prior trial only: share of draws below the observed


def summarise(replicated: Mapping[str, np.ndarray], observed: Mapping[str, float]) -> list[StatisticRow]:
    """One row per statistic: observed value, replicated summaries, ppp-value and miss.

    Parameters
    ----------
    replicated : mapping of str to numpy.ndarray
        Statistic -> its values over replicated datasets (``compute`` of ``y_rep``).
    observed : mapping of str to float
        Statistic -> its observed value (``compute`` of ``y``); its ``sd`` gives the
        miss as a share of the SD.

    Returns
    -------
    list of StatisticRow
        One per statistic, in the order of ``replicated``.
    """
    rows = []
    observed_sd = observed.get("sd")
    for name, draws in replicated.items():
        d = np.asarray(draws, dtype=float)
        ok = d[~np.isnan(d)]
        obs = float(observed[name])
        q = np.quantile(ok, [0.05, 0.5, 0.95]) if ok.size else [np.nan] * 3
        size = miss(obs, float(q[0]), float(q[2]))
        rows.append(StatisticRow(
            statistic=name, observed=obs, mean=float(ok.mean()) if ok.size else float("nan"),
            q05=float(q[0]), q50=float(q[1]), q95=float(q[2]), p_value=ppp_value(d, obs),
            n_missing=int(d.size - ok.size), miss=size, miss_share_sd=miss_share(size, name, observed_sd)))
    return rows
