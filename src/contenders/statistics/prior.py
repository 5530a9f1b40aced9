"""Prior predictive trial: simulate datasets from a candidate's priors.

The same compiled program runs with an empty fit subset, so the draws of ``y_rep`` are
prior predictive draws. Each replicated dataset's test statistics are compared with
the observed ones and with the user's plausibility bounds.

When too few prior datasets are plausible, each bound that fails is read: on which side
the draws fall, and whether narrower priors can fix it. The second is measured on the
prior draws themselves (our own rule, no source): the draws are split into tenths of
each scalar parameter's prior draws in turn; if in some tenth of some parameter at
least ``implausible_share`` of the datasets are plausible (inside this bound and every
other, so that the fix does not break another bound), a narrower prior on that
parameter can fix it, and that parameter and its range are
named. If the best tenth reaches half of that, no one prior fixes it alone and several
should be narrowed together (narrowing several at once can do more than any one tenth
shows). Below half of it, narrower priors will not fix it: the family's structure (for
example a component that reaches down to 0) puts the statistic there, and the bound,
or the family, is what to reconsider.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np

from contenders.statistics import features as st
from contenders.rules import IMPLAUSIBLE_SHARE


@dataclass
class PriorTrial:
    """Summary of the prior predictive draws of one candidate."""

    n_draws: int
    rows: list[st.StatisticRow]           # per statistic, with the share of draws below the observed
    plausible_share: float | None        # share of draws inside every bound; None without bounds
    bounds: dict[str, tuple[float, float]]
    inside_each: dict[str, float]        # per bounded statistic: share of draws inside its bound
    n_nonfinite: int                     # replicated datasets with an infinite or NaN value
    flagged: bool
    message: str                         # in words: contenders.output.readings.word_prior fills it
    failing: list[BoundReading] = field(default_factory=list)   # reading of each failing bound (see module)
    stat_draws: dict[str, np.ndarray] = field(repr=False, default_factory=dict)


#: Parts the prior draws of each parameter are split into when asking whether a narrower
#: prior can fix a failing bound.
TENTHS = 10


@dataclass
class BoundReading:
    """Where the prior draws of one statistic fall against its plausibility bound, and
    whether a narrower prior on one parameter can bring enough of them inside
    (``read_bound``). The last five stay None when no parameter draws were given."""

    statistic: str
    low: float
    high: float
    inside: float                 # shares of the datasets inside, below and above the bound,
    below: float
    above: float
    nonfinite: float              # and with a non-finite value
    fixable: bool | None = None   # a tenth of one parameter's draws reaches the share needed
    reading: str | None = None    # narrow_one, narrow_several or structure
    best_parameter: str | None = None
    best_range: tuple[float, float] | None = None   # that tenth's range of the parameter
    best_share: float | None = None                 # the share of plausible datasets in it


def read_bound(name: str, values: np.ndarray, finite: np.ndarray, bound: tuple[float, float],
               parameters: Mapping[str, np.ndarray] | None, needed: float,
               plausible: np.ndarray | None = None) -> BoundReading:
    """Where the draws of one statistic fall against its bound, and whether a narrower prior
    on one parameter can bring enough of them inside (see the module docstring; our own
    rule, no source).

    Parameters
    ----------
    name : str
        The statistic.
    values : numpy.ndarray
        Its value in each prior predictive dataset.
    finite : numpy.ndarray
        Whether each dataset is finite throughout.
    bound : tuple of float
        ``(low, high)``.
    parameters : mapping of str to numpy.ndarray or None
        Scalar parameter name -> prior draws, in the order of the datasets; ``None``
        leaves the second question open.
    needed : float
        Share of plausible datasets a tenth of one parameter must reach.
    plausible : numpy.ndarray, optional
        Datasets inside every bound (default: inside this one); the tenths are judged
        by it.

    Returns
    -------
    BoundReading
        The shares, and with ``parameters`` the best tenth of one parameter's draws.
    """
    low, high = bound
    values = np.asarray(values, dtype=float)
    ok = finite & (values >= low) & (values <= high)
    out = BoundReading(name, float(low), float(high), float(ok.mean()), float((finite & (values < low)).mean()),
                       float((finite & (values > high)).mean()), float((~finite).mean()))
    if not parameters:
        return out
    good = ok if plausible is None else np.asarray(plausible, dtype=bool)
    best = (-1.0, None, None)
    for pname, draws in parameters.items():
        v = np.asarray(draws, dtype=float).reshape(-1)
        if v.shape[0] != ok.shape[0] or not np.all(np.isfinite(v)) or np.ptp(v) == 0:
            continue
        edges = np.quantile(v, np.linspace(0, 1, TENTHS + 1))
        part = np.clip(np.searchsorted(edges, v, side="right") - 1, 0, TENTHS - 1)
        for b in range(TENTHS):
            mask = part == b
            if mask.sum() < 10:
                continue
            share = float(good[mask].mean())
            if share > best[0]:
                best = (share, pname, (float(edges[b]), float(edges[b + 1])))
    if best[1] is not None:
        reading = ("narrow_one" if best[0] >= needed else "narrow_several" if best[0] >= needed / 2
                   else "structure")
        out = replace(out, fixable=best[0] >= needed, reading=reading, best_share=best[0],
                      best_parameter=best[1], best_range=best[2])
    return out


def summarise_prior(
    y_rep: np.ndarray,
    y: np.ndarray,
    bounds: Mapping[str, tuple[float, float]],
    thresholds: Sequence[float] = (),
    implausible_share: float = IMPLAUSIBLE_SHARE,
    parameters: Mapping[str, np.ndarray] | None = None,
) -> PriorTrial:
    """Summary of a candidate's prior predictive draws against the plausibility bounds.

    A draw is plausible when every bounded statistic lies within [low, high]; a draw with
    a non-finite value is never plausible. The message is left empty for
    ``contenders.output.readings.word_prior`` to write.

    Parameters
    ----------
    y_rep : numpy.ndarray
        Prior predictive datasets, shape (draws, N).
    y : numpy.ndarray
        Observed values, shape (N,).
    bounds : mapping of str to tuple of float
        Statistic -> ``(low, high)``.
    thresholds : sequence of float
        Thresholds of the "share below" statistics.
    implausible_share : float
        Priors are flagged below this share of plausible datasets (``rules.IMPLAUSIBLE_SHARE``).
    parameters : mapping of str to numpy.ndarray, optional
        Scalar parameter name -> prior draws, one per dataset; lets a flagged trial say
        whether a narrower prior can fix each failing bound (``read_bound``).

    Returns
    -------
    PriorTrial
        Statistic rows, the plausible share, each bound's share, whether flagged, and
        the reading of each failing bound.
    """
    y_rep = np.asarray(y_rep, dtype=float)
    reps = st.compute(y_rep, thresholds)
    obs = st.compute(y, thresholds)
    rows = st.summarise(reps, obs)
    for row in rows:
        d = reps[row.statistic]
        d = d[~np.isnan(d)]
        row.share_below_observed = float(np.mean(d < row.observed)) if d.size else float("nan")
    finite = np.all(np.isfinite(y_rep), axis=-1)
    inside_each = {}
    plausible = finite.copy()
    for name, (low, high) in bounds.items():
        ok = (reps[name] >= low) & (reps[name] <= high) & finite
        inside_each[name] = float(ok.mean())
        plausible &= ok
    share = float(plausible.mean()) if bounds else None
    flagged = share is not None and share < implausible_share
    failing: list[BoundReading] = []
    if flagged:
        names = [k for k in bounds if inside_each[k] < implausible_share] or [min(inside_each, key=inside_each.get)]
        names.sort(key=inside_each.get)
        failing = [read_bound(k, reps[k], finite, bounds[k], parameters, implausible_share, plausible)
                   for k in names]
    return PriorTrial(
        n_draws=int(y_rep.shape[0]), rows=rows, plausible_share=share, bounds=dict(bounds),
        inside_each=inside_each, n_nonfinite=int((~finite).sum()), flagged=flagged,
        message="", failing=failing, stat_draws=reps,
    )
