"""Prior predictive trial: simulate datasets from a candidate's priors.

The same compiled program runs with an empty fit subset, so the draws of ``y_rep`` are
prior predictive draws. Each replicated dataset's test statistics are compared with
the observed ones and with the user's plausibility bounds.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from . import statistics as st


@dataclass
class PriorTrial:
    """Summary of the prior predictive draws of one candidate."""

    n_draws: int
    rows: list[dict]                     # per statistic: observed, quantiles, share below observed
    plausible_share: float | None        # share of draws inside every bound; None without bounds
    bounds: dict[str, tuple[float, float]]
    inside_each: dict[str, float]        # per bounded statistic: share of draws inside its bound
    n_nonfinite: int                     # replicated datasets with an infinite or NaN value
    flagged: bool
    message: str
    stat_draws: dict[str, np.ndarray] = field(repr=False, default_factory=dict)


def summarise_prior(
    y_rep: np.ndarray,
    y: np.ndarray,
    bounds: Mapping[str, tuple[float, float]],
    thresholds: Sequence[float] = (),
    implausible_share: float = 0.5,
) -> PriorTrial:
    """``y_rep`` has shape (draws, N). A draw is plausible when every bounded statistic
    lies within [low, high]; a draw with a non-finite value is never plausible."""
    y_rep = np.asarray(y_rep, dtype=float)
    reps = st.compute(y_rep, thresholds)
    obs = st.compute(y, thresholds)
    rows = st.summarise(reps, obs)
    for row in rows:
        d = reps[row["statistic"]]
        d = d[~np.isnan(d)]
        row["share_below_observed"] = float(np.mean(d < row["observed"])) if d.size else float("nan")
    finite = np.all(np.isfinite(y_rep), axis=-1)
    inside_each = {}
    plausible = finite.copy()
    for name, (low, high) in bounds.items():
        ok = (reps[name] >= low) & (reps[name] <= high) & finite
        inside_each[name] = float(ok.mean())
        plausible &= ok
    share = float(plausible.mean()) if bounds else None
    flagged = share is not None and share < implausible_share
    if share is None:
        message = "no plausibility bounds configured; compare the prior statistics with the observed ones"
    elif flagged:
        worst = min(inside_each, key=inside_each.get)
        message = (
            f"only {100 * share:.0f} % of prior draws give plausible data (worst: {st.describe(worst)}, "
            f"{100 * inside_each[worst]:.0f} % inside its bounds); tighten this candidate's priors "
            "(its [hyperparameters] in the configuration) or check the bounds"
        )
    else:
        message = f"{100 * share:.0f} % of prior draws give data inside every plausibility bound"
    return PriorTrial(
        n_draws=int(y_rep.shape[0]), rows=rows, plausible_share=share, bounds=dict(bounds),
        inside_each=inside_each, n_nonfinite=int((~finite).sum()), flagged=flagged,
        message=message, stat_draws=reps,
    )
