"""Effects across candidates: does the conclusion depend on which candidate is picked?

An effect here is a summary of a dataset that an analyst reads as the answer to a
question: the difference in mean (or median) outcome between a level of a condition
and its reference level, or the least-squares slope of the outcome on a numeric
predictor. Each is computed the same way on the observed data and on every replicated
dataset ``y_rep`` of a candidate, so it needs nothing of the candidate but its
replicated data under the observed design; any dropped-in candidate works.

The replicated values are posterior predictive draws of the effect in a new dataset of
the same size and design. They carry the candidate's posterior uncertainty about the
process plus the sampling noise of one dataset of this size, so their interval is
wider than an interval for the candidate's expected effect (for a difference of two
means of a well-specified candidate, by about the square root of two).

Pure functions over arrays; a dataset is the last axis, so one call handles the
observed data (shape ``(N,)``) and every replicated dataset at once (``(S, N)``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from contenders.statistics.checks import thin_draws
from contenders.rules import MIN_WEIGHT

#: Replicated effect draws kept per candidate and effect.
MAX_DRAWS = 1000

#: Probability of the central intervals.
LEVEL = 0.95

#: Statuses of candidates whose effects are shown: ranked, or sampled but unhealthy
#: (shown for information, never weighted). Failed and skipped ones are left out.
SAMPLED = ("ok", "unhealthy")

#: Every kind of effect; each one's words are ``contenders.output.readings.EFFECT_KINDS``.
KINDS = ("mean_difference", "median_difference", "slope")


# --- one dataset's effects -------------------------------------------------------------

def reference_and_levels(labels: Sequence, reference: str | None = None) -> tuple[str, list[str]]:
    """The reference level of a condition and its other levels.

    Parameters
    ----------
    labels : sequence
        Each observation's level.
    reference : str, optional
        The reference level; by default the first in sorted order of the labels' text,
        as ``data.build_design`` codes a text column.

    Returns
    -------
    tuple
        ``(reference, others)``, the other levels sorted.
    """
    from contenders.inputs.data import levels_with_reference

    return levels_with_reference(labels, reference)


def level_differences(y: np.ndarray, labels: Sequence, statistic: str = "mean",
                      reference: str | None = None) -> dict[str, np.ndarray]:
    """Difference of a statistic of the outcome between each level and the reference.

    Medians use NumPy's default linear interpolation (type 7 of Hyndman & Fan 1996), as
    the checks do. A dataset holding a non-finite value anywhere gives NaN (as in
    ``features.compute``), even where a median would stay finite.

    Parameters
    ----------
    y : numpy.ndarray
        Datasets along the last axis, shape (N,) or (S, N).
    labels : sequence
        Each observation's level, length N.
    statistic : str
        ``mean`` or ``median``.
    reference : str, optional
        See ``reference_and_levels``.

    Returns
    -------
    dict of str to numpy.ndarray
        Level -> level minus reference, of the shape of ``y`` without its last axis.
    """
    y = np.asarray(y, dtype=float)
    text = np.asarray(labels).astype(str)
    ref, others = reference_and_levels(text, reference)
    fn = {"mean": np.mean, "median": np.median}[statistic]
    finite = np.all(np.isfinite(y), axis=-1)
    with np.errstate(invalid="ignore", over="ignore"):
        base = fn(y[..., text == ref], axis=-1)
        out = {}
        for level in others:
            d = fn(y[..., text == level], axis=-1) - base
            out[level] = np.where(finite & np.isfinite(d), d, np.nan)
    return out


def slope(y: np.ndarray, x: Sequence[float]) -> np.ndarray:
    """Least-squares slope of ``y`` on ``x`` (with an intercept) along the last axis.

    sum((x - mean x) y) / sum((x - mean x)^2), the ordinary least-squares estimate of a
    straight line: the marginal slope, not adjusted for other predictors.

    Parameters
    ----------
    y : numpy.ndarray
        Datasets along the last axis, shape (N,) or (S, N).
    x : sequence of float
        The predictor, length N (not constant).

    Returns
    -------
    numpy.ndarray
        The slope of each dataset; NaN for a dataset holding a non-finite value.
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    dx = x - x.mean()
    with np.errstate(invalid="ignore", over="ignore"):
        b = (y @ dx) / float(dx @ dx)
    return np.where(np.isfinite(b), b, np.nan)


def numeric_columns(table: pd.DataFrame, columns: Sequence[str]) -> list[str]:
    """The columns that ``data.build_design`` treats as numeric.

    Parameters
    ----------
    table : pandas.DataFrame
        The design's table.
    columns : sequence of str
        Candidate column names.

    Returns
    -------
    list of str
        Those present with a numeric, non-boolean dtype, in order.
    """
    return [c for c in columns if c in table.columns and pd.api.types.is_numeric_dtype(table[c])
            and not pd.api.types.is_bool_dtype(table[c])]


# --- one candidate's effects ------------------------------------------------------------

@dataclass
class Effect:
    """One effect of one candidate: the observed value and the replicated draws."""

    key: str                  # stable name, for example "cue=on-off:mean_difference"
    kind: str                 # mean_difference | median_difference | slope
    column: str               # condition or predictor column
    level: str | None         # level compared with the reference (conditions only)
    reference: str | None     # reference level (conditions only)
    observed: float
    mean: float               # mean of the replicated draws
    lower: float              # 2.5 % quantile of the replicated draws
    upper: float              # 97.5 % quantile
    n_draws: int              # finite replicated draws kept
    n_missing: int            # replicated datasets whose effect was not finite
    draws: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))


def summarise(draws: np.ndarray, level: float = LEVEL) -> tuple[float, float, float, int]:
    """Mean and central interval of the finite draws.

    Parameters
    ----------
    draws : numpy.ndarray
        Draws of one effect.
    level : float
        Probability of the central interval (quantiles, NumPy's linear interpolation).

    Returns
    -------
    tuple
        ``(mean, lower, upper, count)``; NaN and 0 when no draw is finite.
    """
    d = np.asarray(draws, dtype=float)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return math.nan, math.nan, math.nan, 0
    lo, hi = np.quantile(d, [(1 - level) / 2, (1 + level) / 2])
    return float(d.mean()), float(lo), float(hi), int(d.size)


def _effect(key, kind, column, level, reference, observed, reps) -> Effect:
    reps = np.asarray(reps, dtype=float)
    mean, lo, hi, n = summarise(reps)
    return Effect(key, kind, column, level, reference, float(observed), mean, lo, hi, n,
                  int(reps.size - n), reps[np.isfinite(reps)])


def effect_draws(
    y_rep: np.ndarray,
    y: np.ndarray,
    table: pd.DataFrame | None,
    conditions: Sequence[str] = (),
    predictors: Sequence[str] = (),
    max_draws: int = MAX_DRAWS,
    reference: Mapping[str, str] | None = None,
) -> list[Effect]:
    """Every effect of one candidate, from its replicated datasets.

    For each condition column, each level other than the reference gives a difference in
    mean and a difference in median (level minus reference); each numeric column among
    ``predictors`` gives a least-squares slope in outcome units per unit of that column,
    from the raw column (not the centred and scaled one the candidates see).

    Parameters
    ----------
    y_rep : numpy.ndarray
        Replicated datasets, shape (draws, N), in the outcome's own units.
    y : numpy.ndarray
        Observed values, shape (N,).
    table : pandas.DataFrame or None
        The rows of the design in the same order (``Design.table``).
    conditions : sequence of str
        Condition columns.
    predictors : sequence of str
        Predictor columns (numeric ones give slopes).
    max_draws : int
        At most this many evenly spaced draws are used.
    reference : mapping of str to str, optional
        Condition column -> its reference level.

    Returns
    -------
    list of Effect
        Observed value and replicated draws of each effect.
    """
    reference = dict(reference or {})
    if table is None or y_rep is None or np.size(y_rep) == 0:
        return []
    y_rep = np.asarray(y_rep)
    reps = np.asarray(y_rep[thin_draws(y_rep.shape[0], max_draws)], dtype=float)
    out: list[Effect] = []
    for col in conditions:
        if col not in table.columns:
            continue
        labels = table[col].astype(str).to_numpy()
        ref, _ = reference_and_levels(labels, reference.get(col))
        for stat in ("mean", "median"):
            obs = level_differences(y, labels, stat, ref)
            rep = level_differences(reps, labels, stat, ref)
            kind = f"{stat}_difference"
            for level in obs:
                out.append(_effect(f"{col}={level}-{ref}:{kind}", kind, col, level, ref, obs[level], rep[level]))
    for col in numeric_columns(table, predictors):
        x = table[col].to_numpy(dtype=float)
        if np.ptp(x) == 0:
            continue
        out.append(_effect(f"{col}:slope", "slope", col, None, None, float(slope(y, x)), slope(reps, x)))
    return out


# --- across candidates ------------------------------------------------------------------

def allocate(weights: Sequence[float], size: int) -> np.ndarray:
    """Split ``size`` draws among candidates in proportion to ``weights``.

    Each gets the whole part of weight * size, and the draws left over go one each to
    the largest remainders (ties to the earlier candidate).

    Parameters
    ----------
    weights : sequence of float
        Finite, non-negative, not all zero.
    size : int
        Draws to split.

    Returns
    -------
    numpy.ndarray
        Integer count per candidate, summing to ``size``.

    References
    ----------
    The largest-remainder rule of apportionment (Hamilton's method; common practice, no
    source).
    """
    w = np.asarray(weights, dtype=float)
    if w.ndim != 1 or w.size == 0 or np.any(~np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise ValueError("weights must be finite, non-negative and not all zero")
    share = w / w.sum() * size
    counts = np.floor(share).astype(int)
    left = size - int(counts.sum())
    order = np.argsort(-(share - counts), kind="stable")
    counts[order[:left]] += 1
    return counts


def combine(
    per_candidate_draws: Sequence[np.ndarray],
    weights: Sequence[float],
    rng: np.random.Generator,
    size: int | None = None,
) -> np.ndarray:
    """A sample from the mixture of the candidates' replicated effect draws.

    ``allocate`` fixes how many of the ``size`` combined draws come from each candidate
    (its weight times ``size``, rounded by largest remainder), so a candidate's share is
    exact to one draw rather than random; the draws themselves are taken from the
    candidate's finite draws by ``rng`` without replacement (when more are needed than it
    has, every draw is used whole times and the rest are taken without replacement).

    Parameters
    ----------
    per_candidate_draws : sequence of numpy.ndarray
        Each candidate's draws of the effect.
    weights : sequence of float
        One (stacking) weight per candidate.
    rng : numpy.random.Generator
        The generator; the result is deterministic given its seed.
    size : int, optional
        Combined draws; by default the largest number of draws of any candidate with
        positive weight.

    Returns
    -------
    numpy.ndarray
        The combined draws (empty when no candidate has weight and draws).
    """
    draws = [np.asarray(d, dtype=float)[np.isfinite(np.asarray(d, dtype=float))] for d in per_candidate_draws]
    w = np.asarray(weights, dtype=float)
    if len(draws) != w.size:
        raise ValueError("one weight per candidate is needed")
    w = np.where([d.size > 0 for d in draws], w, 0.0)
    if size is None:
        size = max((d.size for d, wi in zip(draws, w) if wi > 0), default=0)
    if size == 0 or not np.any(w > 0):
        return np.zeros(0)
    out = []
    for d, n in zip(draws, allocate(w, size)):
        if n == 0:
            continue
        whole, rest = divmod(int(n), d.size)
        out.append(np.tile(d, whole))
        out.append(d[np.sort(rng.choice(d.size, size=rest, replace=False))])
    return np.concatenate(out)


def direction(lower: float, upper: float) -> str:
    """Where an interval lies with respect to zero.

    Parameters
    ----------
    lower, upper : float
        The interval's ends.

    Returns
    -------
    str
        ``above zero``, ``below zero`` or ``includes zero`` (fixed codes, shown as they are).
    """
    if lower > 0:
        return "above zero"
    if upper < 0:
        return "below zero"
    return "includes zero"


def agreement_reading(rows: Sequence[EffectRow], observed: float, min_weight: float = MIN_WEIGHT) -> dict:
    """Whether the healthy candidates with non-negligible weight reach the same
    conclusion about one effect.

    Candidates agree when every pair of intervals overlaps (the largest lower end is at
    most the smallest upper end) and every interval falls on the same side of zero (all
    above, all below, or all including it); otherwise the conclusion depends on the
    choice. Rows with weight below ``min_weight`` or without an interval are left out.

    Parameters
    ----------
    rows : sequence of EffectRow
        Per candidate; ``label``, ``weight`` (stacking weight; None when not ranked),
        ``lower`` and ``upper`` (the 95 % interval of its replicated effect) are read.
    observed : float
        The effect in the observed data.
    min_weight : float
        Smallest stacking weight that counts (``rules.MIN_WEIGHT``).

    Returns
    -------
    dict
        ``reading`` (``agree``, ``depends``, ``single`` or ``none``), ``use`` (the rows
        that count), ``misses`` (labels of those whose interval excludes ``observed``),
        ``sides`` (the ``direction`` of each row that counts, in order) and
        ``overlap`` (every pair of intervals overlaps). The sentence is
        ``contenders.output.readings.agreement``.
    """
    use = [r for r in rows if r.weight is not None and r.weight >= min_weight
           and np.isfinite(r.lower) and np.isfinite(r.upper)]
    misses = [r.label for r in use if not r.lower <= observed <= r.upper]
    sides = [direction(r.lower, r.upper) for r in use]
    overlap = bool(use) and max(r.lower for r in use) <= min(r.upper for r in use)
    if not use:
        reading = "none"
    elif len(use) == 1:
        reading = "single"
    elif overlap and len(set(sides)) == 1:
        reading = "agree"
    else:
        reading = "depends"
    return {"reading": reading, "use": use, "misses": misses, "sides": sides, "overlap": overlap}


@dataclass
class EffectRow:
    """One effect under one candidate (``effects_across``); ``summary.json`` keeps these
    names, without the draws."""

    id: str
    label: str
    status: str
    rank: int | None                 # None when not ranked
    weight: float | None             # stacking weight; None when not ranked
    mean: float                      # of the replicated effect
    lower: float                     # its 95 % interval
    upper: float
    direction: str | None            # ``direction`` of the interval; None without draws
    observed_inside: bool | None     # the observed effect lies inside the interval
    n_draws: int
    n_missing: int
    draws: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))


@dataclass
class EffectMix:
    """The stacking-weighted mixture of the ranked candidates' replicated effects."""

    mean: float
    lower: float                     # 95 % interval
    upper: float
    n_draws: int


@dataclass
class EffectAcross:
    """One effect under every candidate that reached the predictive checks."""

    key: str
    kind: str
    column: str
    level: str | None
    reference: str | None
    title: str                       # in words: contenders.output.readings.compare_effects fills it
    observed: float
    rows: list[EffectRow]            # per candidate, ranked first by elpd; see compare_effects
    combined: EffectMix | None       # the stacking-weighted mixture
    reading: str                     # agree | depends | single | none
    sentence: str                    # in words: contenders.output.readings.compare_effects fills it
    combined_draws: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0))


def effects_across(results: Sequence, comparison_rows: Sequence, seed: int = 0,
                   min_weight: float = MIN_WEIGHT) -> list[EffectAcross]:
    """Gather each effect across candidates, combine the ranked candidates' draws by
    stacking weight, and read whether they agree (``agreement_reading``).

    Rows of the output come in the ranking's order, then candidates that were not ranked
    (weight None). The combination uses the generator ``numpy.random.default_rng([seed,
    k])`` for the k-th effect. The title and the sentence are left empty for
    ``contenders.output.readings.compare_effects`` to write.

    Parameters
    ----------
    results : sequence of CandidateResult
        Candidates with ``id``, ``label``, ``status`` and ``effects`` (lists of
        ``Effect``); only those whose status is in ``SAMPLED`` are shown.
    comparison_rows : sequence of ComparisonRow
        The ranked rows (``id``, ``rank``, ``stacking_weight``), best first.
    seed : int
        Seed of the combinations.
    min_weight : float
        Smallest stacking weight that counts (``rules.MIN_WEIGHT``).

    Returns
    -------
    list of EffectAcross
        One per effect: per-candidate rows, the stacking-weighted combination and the
        agreement reading.
    """
    ranked = {row.id: row for row in comparison_rows}
    results = [r for r in results if r.status in SAMPLED and getattr(r, "effects", None)]
    order = [r for row in comparison_rows for r in results if r.id == row.id]
    order += [r for r in results if r.id not in ranked]
    keys: dict[str, Effect] = {}
    for r in order:
        for e in r.effects or []:
            keys.setdefault(e.key, e)
    out = []
    for k, (key, first) in enumerate(keys.items()):
        rows, weighted, weights = [], [], []
        for r in order:
            e = next((e for e in r.effects or [] if e.key == key), None)
            if e is None:
                continue
            row = ranked.get(r.id)
            w = row.stacking_weight if row else None
            rows.append(EffectRow(r.id, r.label, r.status, row.rank if row else None, w, e.mean, e.lower, e.upper,
                                  direction(e.lower, e.upper) if e.n_draws else None,
                                  bool(e.lower <= e.observed <= e.upper) if e.n_draws else None,
                                  e.n_draws, e.n_missing, e.draws))
            if w is not None and e.n_draws:
                weighted.append(e.draws)
                weights.append(w)
        combined, mix = None, np.zeros(0)
        if len(weights) >= 2 and sum(weights) > 0:
            mix = combine(weighted, weights, np.random.default_rng([int(seed), k]))
            mean, lo, hi, n = summarise(mix)
            combined = EffectMix(mean, lo, hi, n)
        verdict = agreement_reading(rows, first.observed, min_weight)
        out.append(EffectAcross(key, first.kind, first.column, first.level, first.reference, "",
                                first.observed, rows, combined, verdict["reading"], "", mix))
    return out


