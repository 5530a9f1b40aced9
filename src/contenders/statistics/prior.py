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

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from contenders.statistics import features as st
from contenders.statistics.rules import IMPLAUSIBLE_SHARE


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
    failing: list[dict] = field(default_factory=list)   # reading of each failing bound (see module)
    stat_draws: dict[str, np.ndarray] = field(repr=False, default_factory=dict)


#: Parts the prior draws of each parameter are split into when asking whether a narrower
#: prior can fix a failing bound.
TENTHS = 10


def read_bound(name: str, values: np.ndarray, finite: np.ndarray, bound: tuple[float, float],
               parameters: Mapping[str, np.ndarray] | None, needed: float,
               plausible: np.ndarray | None = None) -> dict:
    """Where the draws of one statistic fall against its bound and whether a narrower
    prior on one parameter can bring at least ``needed`` of them inside (see the module
    docstring). ``parameters`` maps scalar parameter names to their prior draws, in the
    order of the datasets; ``None`` leaves the second question open. ``plausible``
    marks the datasets inside every bound (default: inside this one); the tenths are
    judged by it."""
    low, high = bound
    values = np.asarray(values, dtype=float)
    ok = finite & (values >= low) & (values <= high)
    out = {"statistic": name, "low": float(low), "high": float(high), "inside": float(ok.mean()),
           "below": float((finite & (values < low)).mean()), "above": float((finite & (values > high)).mean()),
           "nonfinite": float((~finite).mean()), "fixable": None, "reading": None, "best_parameter": None,
           "best_range": None, "best_share": None}
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
        out.update(fixable=best[0] >= needed, reading=reading, best_share=best[0], best_parameter=best[1],
                   best_range=best[2])
    return out


def bound_sentence(r: dict) -> str:
    """One reading of a failing bound, in words (used in the message)."""
    what = st.describe(r["statistic"])
    side = []
    if r["below"] > 0:
        side.append(f"{100 * r['below']:.0f} % below {r['low']:g}")
    if r["above"] > 0:
        side.append(f"{100 * r['above']:.0f} % above {r['high']:g}")
    if r["nonfinite"] > 0:
        side.append(f"{100 * r['nonfinite']:.0f} % not finite")
    if np.isinf(r["high"]):
        where = f"at least {r['low']:g}"
    elif np.isinf(r["low"]):
        where = f"at most {r['high']:g}"
    else:
        where = f"inside {r['low']:g} to {r['high']:g}"
    text = f"{what}: {100 * r['inside']:.0f} % of prior draws {where}"
    if side:
        text += " (" + ", ".join(side) + ")"
    lo, hi = r["best_range"] or (np.nan, np.nan)
    if r["fixable"] is True:
        text += (f"; narrower priors can fix this: of the prior draws with {r['best_parameter']} between "
                 f"{lo:.3g} and {hi:.3g} (a tenth of them), {100 * r['best_share']:.0f} % are plausible (inside every "
                 "bound), so narrow "
                 f"the prior on {r['best_parameter']} toward that range (this candidate's [hyperparameters] in "
                 "the configuration)")
    elif r["reading"] == "narrow_several":
        text += (f"; no one prior fixes this alone: the best tenth of one parameter's prior draws "
                 f"({r['best_parameter']} between {lo:.3g} and {hi:.3g}) gives {100 * r['best_share']:.0f} % "
                 "plausible datasets; narrow several of this candidate's priors together ([hyperparameters] in "
                 "the configuration) and run again")
    elif r["reading"] == "structure":
        text += (f"; narrower priors will not fix this: in no tenth of any parameter's prior draws are more "
                 f"than {100 * r['best_share']:.0f} % plausible (best: {r['best_parameter']} between {lo:.3g} and "
                 f"{hi:.3g}), so the family's structure, not the width of its priors, puts the {what} there; "
                 "check that this bound applies to this family, and judge it on the posterior checks")
    else:
        text += "; tighten this candidate's priors (its [hyperparameters] in the configuration) or check the bound"
    return text


def summarise_prior(
    y_rep: np.ndarray,
    y: np.ndarray,
    bounds: Mapping[str, tuple[float, float]],
    thresholds: Sequence[float] = (),
    implausible_share: float = IMPLAUSIBLE_SHARE,
    parameters: Mapping[str, np.ndarray] | None = None,
) -> PriorTrial:
    """``y_rep`` has shape (draws, N). A draw is plausible when every bounded statistic
    lies within [low, high]; a draw with a non-finite value is never plausible.
    ``parameters`` (scalar parameter name -> prior draws, one per dataset) lets a
    flagged trial say whether a narrower prior can fix each failing bound."""
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
    failing: list[dict] = []
    if share is None:
        message = "no plausibility bounds configured; compare the prior statistics with the observed ones"
    elif flagged:
        names = [k for k in bounds if inside_each[k] < implausible_share] or [min(inside_each, key=inside_each.get)]
        names.sort(key=inside_each.get)
        failing = [read_bound(k, reps[k], finite, bounds[k], parameters, implausible_share, plausible)
                   for k in names]
        message = (f"only {100 * share:.0f} % of prior draws give plausible data; "
                   + "; ".join(bound_sentence(r) for r in failing))
    else:
        message = f"{100 * share:.0f} % of prior draws give data inside every plausibility bound"
    return PriorTrial(
        n_draws=int(y_rep.shape[0]), rows=rows, plausible_share=share, bounds=dict(bounds),
        inside_each=inside_each, n_nonfinite=int((~finite).sum()), flagged=flagged,
        message=message, failing=failing, stat_draws=reps,
    )
