"""Predictive checks that compare like with like when the outcome is censored.

A candidate's ``y_rep`` of a right-censored observation is censored at that
observation's own point, but an observed (uncensored) value's own censoring time is
unknown, so its replicate is drawn uncensored. Replicated datasets then hold values
beyond every follow-up of the study, and statistics of the upper part (mean, SD,
maximum, high quantiles, skewness) separate data from replicates even under the
process that made the data. Two remedies, both resting on the assumption the
censored likelihood already makes (censoring independent of the outcome):

* ``censor_like_the_data``: each observed value's replicate is censored at a
  censoring time drawn, per draw, from the Kaplan-Meier estimate of the censoring
  times' distribution (censorings as events, observed values as censored; Efron
  1967, "The two sample problem with censored data", Proc. Fifth Berkeley Symp. 4,
  831-853, the "reverse" Kaplan-Meier), conditioned on exceeding the observed value
  (a value was observed, so its unit was still being followed then);
* ``randomised_pit``: a censored observation's PIT is drawn uniformly over the part
  of (0, 1) its censoring allows, (F(c), 1) when right-censored at c and (0, F(c))
  when left-censored: given the censoring, the PIT of the unseen value is uniform
  over that range under the candidate, so the whole set is uniform (common
  practice, no source; checked by simulation in tests/test_censored_checks.py).

Left-censored observations keep their replicates as the program draws them.
"""

from __future__ import annotations

import numpy as np


def censoring_time_law(y: np.ndarray, cens: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """The Kaplan-Meier estimate of the right-censoring times' distribution.

    Censorings count as events and observed values as censored (the "reverse"
    Kaplan-Meier).

    Parameters
    ----------
    y : numpy.ndarray
        Values, observed or censoring points, shape (N,).
    cens : numpy.ndarray
        0 observed, 1 right-censored, -1 left-censored.

    Returns
    -------
    tuple
        ``(points, mass, beyond)``: the distinct censoring points, the mass at each, and
        the mass left beyond the last point (units that would never have been censored
        within the data's range).

    References
    ----------
    Efron (1967), "The two sample problem with censored data", Proc. Fifth Berkeley
    Symp. 4, 831-853.
    """
    y = np.asarray(y, dtype=float)
    cens = np.asarray(cens)
    points, events = np.unique(y[cens == 1], return_counts=True)
    if points.size == 0:
        return points, np.zeros(0), 1.0
    order = np.sort(y)
    at_risk = y.size - np.searchsorted(order, points, side="left")   # values >= each point
    surv = np.cumprod(1.0 - events / at_risk)
    mass = -np.diff(np.concatenate([[1.0], surv]))
    return points, mass, float(surv[-1])


def censor_like_the_data(y: np.ndarray, cens: np.ndarray, y_rep: np.ndarray,
                         rng: np.random.Generator) -> np.ndarray:
    """Replicates of observed values censored at a drawn censoring time.

    Each observed value's replicate is censored, per draw, at a time drawn from
    ``censoring_time_law`` given that it exceeds the observed value (a value was
    observed, so its unit was still being followed then).

    Parameters
    ----------
    y : numpy.ndarray
        Values, shape (N,).
    cens : numpy.ndarray
        0 observed, 1 right-censored, -1 left-censored.
    y_rep : numpy.ndarray
        Replicated datasets, shape (draws, N).
    rng : numpy.random.Generator
        The generator of the censoring times.

    Returns
    -------
    numpy.ndarray
        ``y_rep`` with the observed values' replicates censored; unchanged when no
        observation is right-censored.

    References
    ----------
    Efron (1967), Proc. Fifth Berkeley Symp. 4, 831-853 (the reverse Kaplan-Meier).
    """
    y = np.asarray(y, dtype=float)
    cens = np.asarray(cens)
    y_rep = np.asarray(y_rep, dtype=float)
    if not (cens == 1).any():
        return y_rep
    points, mass, _beyond = censoring_time_law(y, cens)
    cum = np.cumsum(mass)
    observed = np.flatnonzero(cens == 0)
    start = np.searchsorted(points, y[observed], side="right")      # first point above the value
    below = np.where(start > 0, cum[np.maximum(start - 1, 0)], 0.0)  # mass at or below the value
    u = below + rng.random((y_rep.shape[0], observed.size)) * (1.0 - below)
    idx = np.searchsorted(cum, u, side="right")
    at = np.where(idx < points.size, points[np.minimum(idx, points.size - 1)], np.inf)
    out = y_rep.copy()
    out[:, observed] = np.minimum(y_rep[:, observed], at)
    return out


def randomised_pit(pit_at: np.ndarray, pit_below: np.ndarray, cens: np.ndarray,
                   rng: np.random.Generator) -> np.ndarray:
    """PIT values with censored observations drawn over the range their censoring allows.

    Right-censored: uniform on (Pr(y_rep < c), 1); left-censored: uniform on (0,
    Pr(y_rep <= c)); observed values unchanged. Given the censoring, the PIT of the
    unseen value is uniform over that range under the candidate (common practice, no
    source; checked by simulation in tests/test_censored_checks.py).

    Parameters
    ----------
    pit_at : numpy.ndarray
        LOO Pr(y_rep <= y) per observation.
    pit_below : numpy.ndarray
        LOO Pr(y_rep < y) per observation.
    cens : numpy.ndarray
        0 observed, 1 right-censored, -1 left-censored.
    rng : numpy.random.Generator
        The generator of the uniform draws.

    Returns
    -------
    numpy.ndarray
        One PIT value per observation.
    """
    pit_at = np.asarray(pit_at, dtype=float)
    pit_below = np.asarray(pit_below, dtype=float)
    cens = np.asarray(cens)
    v = rng.random(pit_at.size)
    out = pit_at.copy()
    right, left = cens == 1, cens == -1
    out[right] = pit_below[right] + v[right] * (1.0 - pit_below[right])
    out[left] = v[left] * pit_at[left]
    return out
