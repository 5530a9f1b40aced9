"""Posterior predictive checks: test statistics, grouped statistics, quantiles and LOO-PIT."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Mapping, Sequence

import numpy as np

from contenders.statistics import features as st
from contenders.statistics.censored_checks import censor_like_the_data, randomised_pit
from contenders.rules import PIT_ALPHA, PPP_EXTREME, SE_FACTOR


@dataclass
class PredictiveChecks:
    rows: list[st.StatisticRow]                      # one per statistic
    grouped: dict[str, dict[str, list[st.StatisticRow]]]  # condition -> level -> rows
    loo_pit: np.ndarray                               # one value per observation
    loo_pit_test: dict                                # uniformity_test: inside, band, where it leaves
    extreme: list[str]                                # statistics with p beyond ppp_extreme (detectable)
    stat_draws: dict[str, np.ndarray] = field(repr=False, default_factory=dict)
    quantiles: list[QuantileRow] = field(default_factory=list)   # quantile_checks: one row per level


def thin_draws(n_total: int, n_keep: int) -> np.ndarray:
    """Evenly spaced indices of ``n_keep`` out of ``n_total`` draws.

    Parameters
    ----------
    n_total : int
        Draws available.
    n_keep : int
        Draws wanted.

    Returns
    -------
    numpy.ndarray
        Sorted distinct indices (all of them when ``n_keep >= n_total``).
    """
    if n_keep >= n_total:
        return np.arange(n_total)
    return np.unique(np.linspace(0, n_total - 1, n_keep).round().astype(int))


def loo_log_weights(log_lik: np.ndarray, reff: float = 1.0) -> np.ndarray:
    """PSIS log weights of leaving each observation out.

    Parameters
    ----------
    log_lik : numpy.ndarray
        Pointwise log-likelihood draws, shape (draws, N).
    reff : float
        Relative efficiency of the draws (ESS / draws).

    Returns
    -------
    numpy.ndarray
        Smoothed log weights, shape (N, draws) (ArviZ's ``psislw`` of ``-log_lik``).

    References
    ----------
    Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance
    sampling", JMLR 25(72).
    """
    import arviz as az

    lw, _ = az.psislw(-np.asarray(log_lik, dtype=float).T, reff=reff)
    return lw


def loo_pit(y: np.ndarray, y_rep: np.ndarray, log_lik: np.ndarray | None = None, reff: float = 1.0,
            log_weights: np.ndarray | None = None) -> np.ndarray:
    """LOO-PIT values with PSIS weights: Pr(y_rep_i <= y_i | y_{-i}) for each i.

    Parameters
    ----------
    y : numpy.ndarray
        Observed values, shape (N,).
    y_rep : numpy.ndarray
        Replicated values, shape (draws, N).
    log_lik : numpy.ndarray, optional
        Pointwise log-likelihood draws, shape (draws, N); not needed with ``log_weights``.
    reff : float
        Relative efficiency of the draws.
    log_weights : numpy.ndarray, optional
        Weights from ``loo_log_weights``, to smooth once for several evaluations.

    Returns
    -------
    numpy.ndarray
        One LOO-PIT value per observation (ArviZ's ``loo_pit``).

    References
    ----------
    Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, section 2.1; Gabry,
    Simpson, Vehtari, Betancourt & Gelman (2019), "Visualization in Bayesian workflow",
    JRSS A 182, section 5.
    """
    import arviz as az

    lw = loo_log_weights(log_lik, reff) if log_weights is None else log_weights
    return np.asarray(az.loo_pit(y=np.asarray(y, dtype=float), y_hat=np.asarray(y_rep, dtype=float).T,
                                 log_weights=lw))


#: Most evaluation points of the LOO-PIT band (fewer when there are fewer observations).
BAND_POINTS = 100


@lru_cache(maxsize=16)
def _band(n: int, points: int, prob: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Evaluation points and the simultaneous band's lower and upper ECDF limits for ``n``
    uniform values (ArviZ's ``ecdf_confidence_band``, optimised method). Depends only on
    ``n``, the number of points and ``prob``, so it is computed once per size."""
    from arviz.stats.ecdf_utils import ecdf_confidence_band

    z = np.linspace(0.0, 1.0, points + 1)[1:-1]
    lower, upper = ecdf_confidence_band(n, z, z, prob=prob, method="optimized")
    return z, np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)


def band_limits(n: int, prob: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The simultaneous band of the ECDF of ``n`` independent uniform(0, 1) values.

    Parameters
    ----------
    n : int
        Number of values.
    prob : float
        Probability that a uniform ECDF stays inside the band at every point at once.

    Returns
    -------
    tuple of numpy.ndarray
        ``(z, lower, upper)``: the evaluation points (``min(n, BAND_POINTS)`` equal parts
        of (0, 1), the end points left out) and the band's limits there (ArviZ's
        ``ecdf_confidence_band``, optimised method; cached per size).

    References
    ----------
    Säilynoja, Bürkner & Vehtari (2022), Statistics and Computing 32:32, section 2.
    """
    return _band(int(n), int(min(n, BAND_POINTS)), float(prob))


def _stretches(z: np.ndarray, mask: np.ndarray) -> list[list[float]]:
    """Runs of consecutive True in ``mask`` as [first z, last z]."""
    out, start = [], None
    for i, m in enumerate(mask):
        if m and start is None:
            start = i
        if start is not None and (not m or i == len(mask) - 1):
            stop = i if m else i - 1
            out.append([round(float(z[start]), 4), round(float(z[stop]), 4)])
            start = None
    return out


def uniformity_test(pit: np.ndarray, alpha: float = PIT_ALPHA) -> dict:
    """Graphical uniformity test of the LOO-PIT values.

    Does their empirical distribution function stay inside the simultaneous ``1 -
    alpha`` band of uniform(0, 1) at every evaluation point? Under uniformity it does
    with probability ``1 - alpha`` at once over all points. LOO-PIT values are not quite
    independent, so read a departure together with the figure.

    Parameters
    ----------
    pit : numpy.ndarray
        LOO-PIT values; non-finite ones are left out.
    alpha : float
        1 minus the band's probability (``rules.PIT_ALPHA``).

    Returns
    -------
    dict
        ``inside`` (True when the ECDF never leaves the band; None below two values),
        ``band`` (its probability), ``points`` (evaluation points), ``outside_points``
        (how many lie outside), ``above`` and ``below`` (stretches of LOO-PIT values,
        [from, to], where the ECDF is above the upper or below the lower limit),
        ``largest_gap`` (the largest distance outside the band, 0 when inside) and
        ``n``; the method's words are ``contenders.output.readings.band_method``.

    References
    ----------
    Säilynoja, Bürkner & Vehtari (2022), "Graphical test for discrete uniformity and its
    applications in goodness-of-fit evaluation and multiple sample comparison",
    Statistics and Computing 32:32, section 2; the band is ArviZ's
    ``ecdf_confidence_band``.
    """
    pit = np.asarray(pit, dtype=float)
    pit = np.sort(pit[np.isfinite(pit)])
    prob = 1.0 - float(alpha)
    base = {"band": prob, "n": int(pit.size)}
    if pit.size < 2:
        return {**base, "inside": None, "points": 0, "outside_points": 0, "above": [], "below": [],
                "largest_gap": None}
    z, lower, upper = band_limits(pit.size, prob)
    ecdf = np.searchsorted(pit, z, side="right") / pit.size
    above, below = ecdf > upper, ecdf < lower
    gap = np.maximum(ecdf - upper, lower - ecdf)
    return {**base, "inside": bool(not (above.any() or below.any())), "points": int(z.size),
            "outside_points": int((above | below).sum()), "above": _stretches(z, above),
            "below": _stretches(z, below), "largest_gap": float(max(gap.max(), 0.0))}


def leaves_band(test: dict | None) -> bool:
    """Whether the LOO-PIT uniformity test says the ECDF leaves its band.

    Parameters
    ----------
    test : dict or None
        A result of ``uniformity_test``.

    Returns
    -------
    bool
        True only when the test ran and the ECDF left the band.
    """
    return bool(test) and test.get("inside") is False


def pit_shape(pit: np.ndarray, se_factor: float = SE_FACTOR) -> dict | None:
    """The shape of the LOO-PIT values: their share in the outer tenths and their mean.

    Under calibration the values are uniform(0, 1): a share 0.1 of them falls below 0.05
    or above 0.95 (binomial standard error ``sqrt(0.1 * 0.9 / n)``) and their mean is 0.5
    (standard error ``sqrt(1 / 12 / n)``, the uniform law's variance being 1/12). Too
    many values in the outer tenths means predictive distributions too narrow, too few
    too wide; a mean below 0.5 means observations fall low in their predictive
    distributions (predictions run high), above 0.5 the reverse. A pattern is called
    when the value lies more than ``se_factor`` standard errors from its expectation.

    Parameters
    ----------
    pit : numpy.ndarray
        LOO-PIT values; non-finite ones are left out.
    se_factor : float
        How many standard errors call a pattern (``rules.SE_FACTOR``).

    Returns
    -------
    dict or None
        None below ten finite values; otherwise ``n``, ``tails`` (the share below 0.05
        or above 0.95), ``tail_se``, ``mean``, ``mean_se``, ``spread`` (``"narrow"``,
        ``"wide"`` or ``""``) and ``centre`` (``"high"`` when predictions run high,
        ``"low"`` when they run low, or ``""``).

    References
    ----------
    Gneiting, Balabdaoui & Raftery (2007), "Probabilistic forecasts, calibration and
    sharpness", Journal of the Royal Statistical Society B 69(2), 243-268, section 3
    (the shapes of a probability integral transform histogram); the two-standard-error
    rule for calling a pattern is common practice, no source.
    """
    pit = np.asarray(pit, dtype=float)
    pit = pit[np.isfinite(pit)]
    if pit.size < 10:
        return None
    size = pit.size
    tails = float(np.mean((pit < 0.05) | (pit > 0.95)))
    tail_se = float(np.sqrt(0.1 * 0.9 / size))
    mean_se = float(np.sqrt(1 / 12 / size))
    mean = float(pit.mean())
    spread = ("narrow" if tails > 0.1 + se_factor * tail_se
              else "wide" if tails < 0.1 - se_factor * tail_se else "")
    centre = ("high" if mean < 0.5 - se_factor * mean_se
              else "low" if mean > 0.5 + se_factor * mean_se else "")
    return {"n": int(size), "tails": tails, "tail_se": tail_se, "mean": mean, "mean_se": mean_se,
            "spread": spread, "centre": centre}


def silverman_bandwidth(y: np.ndarray) -> float:
    """Rule-of-thumb bandwidth of a Gaussian kernel density estimate.

    Parameters
    ----------
    y : numpy.ndarray
        The values; non-finite ones are left out.

    Returns
    -------
    float
        ``0.9 min(SD, IQR / 1.34) n^(-1/5)``; the SD alone when the IQR is 0, and 1 when
        both are 0.

    References
    ----------
    Silverman (1986), "Density Estimation for Statistics and Data Analysis", Chapman &
    Hall, equation 3.31.
    """
    y = np.asarray(y, dtype=float)
    y = y[np.isfinite(y)]
    sd = float(np.std(y, ddof=1)) if y.size > 1 else 0.0
    q75, q25 = np.percentile(y, [75, 25]) if y.size else (0.0, 0.0)
    spread = min(sd, (q75 - q25) / 1.34) or sd or 1.0
    return 0.9 * spread * max(y.size, 1) ** -0.2


def binned_density(rows: np.ndarray, lo: float, hi: float, bandwidth: float,
                   m: int = 240) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian kernel density estimate of each row on an ``m``-point grid, by binning and
    smoothing.

    Parameters
    ----------
    rows : numpy.ndarray
        One dataset per row (a single dataset may be 1-D); non-finite values are left out.
    lo, hi : float
        The grid's range.
    bandwidth : float
        The kernel's SD in the values' units (``silverman_bandwidth``); below 0.3 bins
        the counts are not smoothed.
    m : int
        Number of grid points (bins).

    Returns
    -------
    grid : numpy.ndarray
        The bins' centres, shape ``(m,)``.
    density : numpy.ndarray
        Shape ``(rows, m)``: each row's density at the grid points. Values beyond the grid
        are left out of the counts but not of the total, so a row integrates to the share
        of its values inside ``[lo, hi]``.

    References
    ----------
    Silverman (1986), "Density Estimation for Statistics and Data Analysis", Chapman &
    Hall, section 3.5 (computing the estimate from binned data by a discrete
    convolution; the section number from memory); the smoothing is SciPy's
    ``ndimage.gaussian_filter1d``.
    """
    from scipy.ndimage import gaussian_filter1d

    rows = np.atleast_2d(np.asarray(rows, dtype=float))
    edges = np.linspace(lo, hi, m + 1)
    step = edges[1] - edges[0]
    counts = np.stack([np.histogram(r[np.isfinite(r)], bins=edges)[0] for r in rows]).astype(float)
    sigma = bandwidth / step
    if sigma >= 0.3:
        counts = gaussian_filter1d(counts, sigma, axis=1, mode="constant", truncate=4.0)
    total = np.maximum(np.isfinite(rows).sum(axis=1, keepdims=True), 1)
    return (edges[:-1] + edges[1:]) / 2, counts / (total * step)


#: Quantile levels of the quantile check: 5 %, 10 %, ..., 95 %.
QUANTILE_LEVELS = tuple(round(0.05 * k, 2) for k in range(1, 20))


@dataclass
class QuantileRow:
    """One quantile level: the observed quantile against the same quantile of each
    replicated dataset (``quantile_checks``); ``summary.json`` keeps these names."""

    level: float
    observed: float
    median: float                 # of the replicated quantiles
    lower: float                  # their central interval (95 % by default)
    upper: float
    lower50: float                # their central 50 % interval
    upper50: float
    share_above: float            # share of replicated datasets whose quantile is at or above the observed
    miss: str                     # "replicates low", "replicates high" or "" (inside the interval)


def quantile_checks(y: np.ndarray, y_rep: np.ndarray, levels: Sequence[float] = QUANTILE_LEVELS,
                    interval: float = 0.95) -> list[QuantileRow]:
    """Observed quantiles against the same quantile of each replicated dataset.

    Parameters
    ----------
    y : numpy.ndarray
        Observed values, shape (N,); non-finite ones are left out.
    y_rep : numpy.ndarray
        Replicated datasets, shape (draws, N).
    levels : sequence of float
        Quantile levels (``QUANTILE_LEVELS``: 5 %, 10 %, ..., 95 %).
    interval : float
        Probability of the central interval of the replicated quantiles.

    Returns
    -------
    list of QuantileRow
        One row per level; ``miss`` is ``"replicates low"`` or ``"replicates high"``
        (fixed codes, also shown as they are) when the observed quantile lies outside
        the ``interval``, else ``""``. NumPy's default (linear) quantile throughout.
    """
    y = np.asarray(y, dtype=float)
    y = y[np.isfinite(y)]
    y_rep = np.atleast_2d(np.asarray(y_rep, dtype=float))
    lv = np.asarray(levels, dtype=float)
    obs = np.quantile(y, lv)
    reps = np.nanquantile(y_rep, lv, axis=1)          # (levels, draws)
    tail = (1 - interval) / 2
    rows = []
    for k, q in enumerate(lv):
        r = reps[k][np.isfinite(reps[k])]
        if r.size == 0:
            nan = float("nan")
            rows.append(QuantileRow(float(q), float(obs[k]), nan, nan, nan, nan, nan, nan, ""))
            continue
        lo, lo50, med, hi50, hi = np.quantile(r, [tail, 0.25, 0.5, 0.75, 1 - tail])
        miss = "replicates high" if obs[k] < lo else "replicates low" if obs[k] > hi else ""
        rows.append(QuantileRow(float(q), float(obs[k]), float(med), float(lo), float(hi), float(lo50),
                                float(hi50), float(np.mean(r >= obs[k])), miss))
    return rows


def predictive_checks(
    y: np.ndarray,
    y_rep: np.ndarray,
    log_lik: np.ndarray,
    thresholds: Sequence[float] = (),
    conditions: Mapping[str, np.ndarray] | None = None,
    reff: float = 1.0,
    ppp_extreme: float = PPP_EXTREME,
    pit_alpha: float = PIT_ALPHA,
    cens: np.ndarray | None = None,
    seed: int = 0,
) -> PredictiveChecks:
    """All posterior predictive checks of one candidate.

    With ``cens`` the statistics use replicates censored like the data and the LOO-PIT is
    randomised over each censored value's range (``censored_checks``), from a generator
    seeded with ``seed``.

    Parameters
    ----------
    y : numpy.ndarray
        Observed values, shape (N,).
    y_rep : numpy.ndarray
        Replicated datasets, shape (draws, N).
    log_lik : numpy.ndarray
        Pointwise log-likelihood draws, shape (draws, N).
    thresholds : sequence of float
        Thresholds of the "share below" statistics.
    conditions : mapping of str to numpy.ndarray, optional
        Condition column -> each observation's level (statistics per level).
    reff : float
        Relative efficiency of the draws, for the PSIS weights.
    ppp_extreme : float
        ppp-values beyond this (or 1 minus it) are detectable (``rules.PPP_EXTREME``).
    pit_alpha : float
        The LOO-PIT band holds a uniform ECDF with probability 1 - ``pit_alpha``
        (``rules.PIT_ALPHA``).
    cens : numpy.ndarray, optional
        0 observed, 1 right-censored, -1 left-censored, per observation.
    seed : int
        Seed of the censoring draws and the randomised PIT.

    Returns
    -------
    PredictiveChecks
        Statistic rows (``features.summarise``), grouped rows, LOO-PIT values and their
        ``uniformity_test``, the detectable statistics (``extreme``), the replicated
        statistics and the ``quantile_checks``.

    References
    ----------
    Gelman, Meng & Stern (1996), Statistica Sinica 6 (ppp-values); Säilynoja, Bürkner &
    Vehtari (2022), Statistics and Computing 32:32 (the LOO-PIT band).
    """
    pit_y_rep = y_rep
    rng = np.random.default_rng(seed)
    censored = cens is not None and bool((np.asarray(cens) != 0).any())
    if censored:
        y_rep = censor_like_the_data(y, cens, y_rep, rng)
    reps = st.compute(y_rep, thresholds)
    obs = st.compute(y, thresholds)
    rows = st.summarise(reps, obs)
    grouped_rows: dict[str, dict[str, list[st.StatisticRow]]] = {}
    for cond, labels in (conditions or {}).items():
        g_rep = st.grouped(y_rep, labels, thresholds)
        g_obs = st.grouped(y, labels, thresholds)
        grouped_rows[cond] = {lev: st.summarise(g_rep[lev], g_obs[lev]) for lev in g_rep}
    if censored:
        # a censored value's replicate is the censoring point itself, kept as float32 by
        # the engines: up to half a float32 step either side of y, so "at y" means within
        # two float32 steps of it (measured: with an exact comparison about half of the
        # right-censored values got Pr(y_rep < y) = 1, and the band flagged every candidate)
        yy = np.asarray(y, dtype=float)
        tol = 2 * np.spacing(np.abs(yy).astype(np.float32)).astype(float)
        lw = loo_log_weights(log_lik, reff)          # smoothed once for both evaluations
        at = loo_pit(np.where(np.asarray(cens) == -1, yy + tol, yy), pit_y_rep, log_weights=lw)
        below = loo_pit(yy - tol, pit_y_rep, log_weights=lw)
        pit = randomised_pit(at, below, cens, rng)
    else:
        pit = loo_pit(y, pit_y_rep, log_lik, reff)
    extreme = [r.statistic for r in rows if st.detectable(r.p_value, ppp_extreme)]
    return PredictiveChecks(rows, grouped_rows, pit, uniformity_test(pit, pit_alpha), extreme, reps,
                            quantile_checks(y, y_rep))
