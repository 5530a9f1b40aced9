"""Coefficients and group-level terms in the outcome's own units.

The candidates see predictors centred and scaled (``data.build_design``): a numeric
column x enters as (x - c) / s, with c its mean and s its sample SD, and a text column
as indicators centred at their means. A built-in's linear predictor is
``eta = intercept + X * coef + group_sd * group_z[group]``. So, from the posterior draws:

* per unit of a numeric predictor, eta changes by ``coef / s``; for an indicator, by
  ``coef`` between its level and the reference level;
* at every raw predictor equal to 0 (and every indicator at its reference level), for a
  group at the centre of the group distribution, eta is
  ``intercept - sum_k coef_k * c_k / s_k``;
* under an identity link these are in the outcome's units; under a log link exp() of
  them is: the change becomes a ratio per unit, the intercept a value of the outcome.

Each is computed draw by draw, then summarised (posterior mean and central 95 %
interval), so the intervals of derived values are exact up to Monte Carlo error. A
candidate whose link is not known (not an unchanged built-in) gets the internal values
only, with the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

#: Probability of the central posterior intervals shown.
LEVEL = 0.95

#: Groups shown at each end (lowest, highest) when the group terms are summarised.
EXTREMES = 2


def base_name(parameter: str) -> str:
    """A flattened parameter's name without its index.

    Parameters
    ----------
    parameter : str
        For example ``group_z[3]``.

    Returns
    -------
    str
        ``group_z``.
    """
    return parameter.split("[", 1)[0]


def group_terms(sizes: Mapping[str, int], J: int, K: int = -1) -> set[str]:
    """Names of the parameters that hold one value per group.

    Parameters
    ----------
    sizes : mapping of str to int
        Parameter -> element count.
    J : int
        Number of groups (none when 0 or less).
    K : int
        Number of predictors: ``coef`` counts only when J differs from K (with J = K its
        length says nothing).

    Returns
    -------
    set of str
        One-dimensional parameters with J elements (``log_lik`` never).
    """
    if J <= 0:
        return set()
    return {name for name, size in sizes.items()
            if size == J and not (name == "coef" and J == K) and name != "log_lik"}


def sizes_of(parameters: Sequence[str]) -> dict[str, int]:
    """Element counts per parameter from flattened names.

    Parameters
    ----------
    parameters : sequence of str
        Flattened names (``coef[1]``, ``coef[2]``, ...).

    Returns
    -------
    dict of str to int
        Base name -> element count.
    """
    out: dict[str, int] = {}
    for p in parameters:
        out[base_name(p)] = out.get(base_name(p), 0) + 1
    return out


def _summary(draws: np.ndarray, level: float = LEVEL) -> tuple[float, float, float]:
    d = np.asarray(draws, dtype=float).reshape(-1)
    d = d[np.isfinite(d)]
    if d.size == 0:
        return math.nan, math.nan, math.nan
    lo, hi = np.quantile(d, [(1 - level) / 2, (1 + level) / 2])
    return float(d.mean()), float(lo), float(hi)


#: A posterior summary: mean and the 2.5 % and 97.5 % quantiles.
Summary3 = tuple[float, float, float]


@dataclass
class CoefficientRow:
    """One coefficient, or the intercept, on the internal scale and in the outcome's units."""

    parameter: str                # coef[k] or intercept
    name: str                     # the predictor's column (with its level), or "intercept ..."
    kind: str                     # numeric, indicator or intercept
    column: str | None
    level: str | None             # an indicator's level and its reference level
    reference: str | None
    center: float | None          # how the predictor was centred and scaled for the fit
    scale: float | None
    internal: Summary3            # on the fit's scale
    value: Summary3               # per unit of the predictor, in the outcome's units (NaN: link not known)
    units: str = ""               # in words: contenders.output.readings.word_coefficients fills it
    at: list | None = None        # the intercept: where it is read, (column, value) pairs


@dataclass
class GroupRow:
    """One group's intercept term."""

    level: str
    parameter: str
    internal: Summary3
    offset: Summary3              # from the typical group, on the linear predictor's scale (NaN: not known)
    value: Summary3               # the offset in the outcome's units (a ratio under a log link)


@dataclass
class SlopeRow:
    """The spread of the groups' slopes on one predictor, and their correlation with the
    groups' intercepts."""

    parameter: str                # slope_sd[k]
    name: str
    column: str
    level: str | None
    reference: str | None
    internal: Summary3
    per_unit: Summary3            # per unit of the predictor
    correlation: Summary3         # with the intercepts (NaN: not known)
    units: str = ""               # in words: contenders.output.readings.word_coefficients fills it


@dataclass
class Coefficients:
    """One candidate's coefficients on both scales and its group terms, summarised.

    ``rows``: one per coefficient, then the intercept at zero (``kind`` is
    ``numeric``, ``indicator`` or ``intercept``; the intercept's ``at`` lists
    (column, value) where it is read). Each row's and slope's ``units``, and the
    intercept's ``name``, are written by ``contenders.output.readings.word_coefficients``
    (the run calls it; here ``units`` is empty and the intercept is named ``intercept``). ``groups``: one row per group
    (``level``, the internal term and its offset of eta) and ``group_note`` the
    summary of them. ``link`` is ``identity``, ``log`` or ``""`` (not known, see
    ``reason``)."""

    link: str = ""
    sets: str = ""
    moves: str = ""
    reason: str = ""
    outcome: str = ""
    rows: list[CoefficientRow] = field(default_factory=list)
    group_column: str | None = None
    group_parameter: str = ""
    group_sd_parameter: str = ""
    group_sd: tuple[float, float, float] | None = None
    groups: list[GroupRow] = field(default_factory=list)
    #: slopes per group (built-ins' ``slope_sd``, ``group_corr_L``): per slope column, the
    #: SD of the groups' slopes (internal, and per unit of the column) and the correlation
    #: of the groups' slopes with their intercepts
    slopes: list[SlopeRow] = field(default_factory=list)


def _draws(posterior, name: str) -> np.ndarray | None:
    if name not in posterior:
        return None
    v = np.asarray(posterior[name].values, dtype=float)
    return v.reshape(v.shape[0] * v.shape[1], -1)


def _at_zero(coding) -> list[tuple[str, Any]]:
    """Where the intercept is read: (column, value) for every raw predictor at 0 and
    every text column at its reference level, in the coding's order."""
    parts, seen = [], set()
    for c in coding:
        if c.level is None:
            parts.append((c.source, 0))
        elif c.source not in seen:
            parts.append((c.source, c.reference))
            seen.add(c.source)
    return parts


def coefficient_summary(posterior, design, link=None, reason: str = "") -> Coefficients | None:
    """The coefficients of a built-in-shaped program on the internal and the outcome's scale.

    Each value is computed draw by draw, then summarised (posterior mean and central
    ``LEVEL`` interval), so the intervals of derived values are exact up to Monte Carlo
    error (see the module docstring).

    Parameters
    ----------
    posterior : xarray.Dataset
        Posterior draws with ``intercept`` and ``coef`` (one value per column of X) and,
        with groups, ``group_z`` and ``group_sd``.
    design : Design
        The design (coding of the predictors, groups, outcome name).
    link : Link, optional
        ``contenders.inputs.candidates.Link``; ``None`` gives internal values only.
    reason : str
        Why the link is not known, when it is not.

    Returns
    -------
    Coefficients or None
        Coefficient rows, group terms and group slopes; ``None`` when the program has
        neither coefficients nor group terms to show.
    """
    coding = list(design.coding)
    out = Coefficients(link=link.kind if link else "", sets=link.sets if link else "",
                       moves=link.moves if link else "", reason=reason, outcome=design.outcome)
    intercept, coef = _draws(posterior, "intercept"), _draws(posterior, "coef")
    log = link is not None and link.kind == "log"
    to_outcome = np.exp if log else (lambda v: v)
    if coding and intercept is not None and coef is not None and coef.shape[1] == len(coding):
        eta0 = intercept[:, 0].copy()
        for k, c in enumerate(coding):
            internal = _summary(coef[:, k])
            per_unit = coef[:, k] / c.scale
            eta0 -= coef[:, k] * c.center / c.scale
            kind = "numeric" if c.level is None else "indicator"
            value = _summary(to_outcome(per_unit)) if link else (math.nan,) * 3
            out.rows.append(CoefficientRow(f"coef[{k + 1}]", c.name, kind, c.source, c.level, c.reference,
                                           c.center, c.scale, internal, value))
        out.rows.append(CoefficientRow("intercept", "intercept", "intercept", None, None, None, None, None,
                                       _summary(intercept[:, 0]),
                                       _summary(to_outcome(eta0)) if link else (math.nan,) * 3,
                                       at=_at_zero(coding)))
    # group terms: the built-ins' group_z with group_sd[1]; any other program's vector of
    # one value per group is summarised by its own draws
    J = design.J
    if J > 0:
        names = [n for n in posterior.data_vars if posterior[n].ndim == 3 and posterior[n].shape[2] == J]
        found = group_terms({n: J for n in names}, J, design.K)
        term = "group_z" if "group_z" in found else (sorted(found)[0] if found else "")
        if term:
            z = _draws(posterior, term)
            sd = _draws(posterior, "group_sd")
            scaled = term == "group_z" and sd is not None and sd.shape[1] == 1 and link is not None
            offsets = z * sd[:, :1] if scaled else z
            out.group_column, out.group_parameter = design.group_column, term
            if sd is not None and sd.shape[1] == 1:
                out.group_sd_parameter, out.group_sd = "group_sd[1]", _summary(sd[:, 0])
            for j in range(J):
                out.groups.append(GroupRow(design.group_levels[j], f"{term}[{j + 1}]", _summary(z[:, j]),
                                           _summary(offsets[:, j]) if scaled else (math.nan,) * 3,
                                           _summary(to_outcome(offsets[:, j])) if scaled else (math.nan,) * 3))
    slope_sd, factor = _draws(posterior, "slope_sd"), _draws(posterior, "group_corr_L")
    if J > 0 and design.slopes and slope_sd is not None and slope_sd.shape[1] == len(design.slopes):
        size = len(design.slopes) + 1
        for k, col in enumerate(design.slopes):
            c = coding[col]
            # correlation of slope k with the intercepts: Omega = L L', and L's first row is
            # (1, 0, ..., 0), so Omega[k + 1, 1] = L[k + 1, 1] (row-major flattening)
            corr = factor[:, (k + 1) * size] if factor is not None and factor.shape[1] == size * size else None
            out.slopes.append(SlopeRow(f"slope_sd[{k + 1}]", c.name, c.source, c.level, c.reference,
                                       _summary(slope_sd[:, k]), _summary(slope_sd[:, k] / c.scale),
                                       _summary(corr) if corr is not None else (math.nan,) * 3))
    if not out.rows and not out.groups:
        return None
    return out


def extremes(c: Coefficients, n: int = EXTREMES) -> tuple[list[GroupRow], list[GroupRow]]:
    """The groups with the lowest and the highest posterior mean offset.

    Parameters
    ----------
    c : Coefficients
        A summary with ``groups``.
    n : int
        Groups at each end (at most half of them).

    Returns
    -------
    tuple of list
        ``(lowest, highest)``, each lowest-first and highest-first; the internal term is
        used when the offset is not known.
    """
    key = (lambda g: g.offset[0]) if c.groups and np.isfinite(c.groups[0].offset[0]) \
        else (lambda g: g.internal[0])
    ordered = sorted(c.groups, key=key)
    n = min(n, len(ordered) // 2)
    return ordered[:n], ordered[len(ordered) - n:][::-1]


