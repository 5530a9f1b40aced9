"""Load the data table and turn it into the inputs every candidate receives.

Coding of predictors (documented in the README, relied on by the built-in priors):

* a numeric predictor column is centred at its mean and divided by its sample
  standard deviation (ddof = 1), so a coefficient is the change in the linear
  predictor per standard deviation of that column;
* a non-numeric predictor column (text, category or boolean) is expanded into one
  0/1 indicator per level except the reference level (the level the user named with
  ``[data] reference``, else the first level in sorted order), and each indicator is
  centred at its mean, so that the intercept stays at the average of the data rather
  than at the reference level.

The reference scale passed to every candidate as ``y_center`` and ``y_scale`` is the
user's stated typical value and typical spread when given, else the median and the
sample standard deviation (ddof = 1) of the outcome.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from contenders.errors import UserError


@dataclass(frozen=True)
class PredictorCoding:
    """How one column of ``X`` was made from the table."""

    name: str            # name of the column of X, for example "density[high]"
    source: str          # column of the table it came from
    center: float        # value subtracted
    scale: float         # value divided by (1.0 for indicators)
    level: str | None = None       # indicators: the level coded 1
    reference: str | None = None   # indicators: the reference level (coded 0)


@dataclass(frozen=True)
class Design:
    """The outcome, predictors and grouping of one dataset, ready for Stan."""

    source: str
    outcome: str
    y: np.ndarray                      # float64, length N
    X: np.ndarray                      # float64, N x K
    coding: tuple[PredictorCoding, ...]
    group_column: str | None
    group: np.ndarray                  # int, 1..J, or zeros when there is no grouping
    group_levels: tuple[str, ...]
    y_center: float
    y_scale: float
    dropped_rows: int = 0
    table: pd.DataFrame | None = field(default=None, repr=False, compare=False)
    slopes: tuple[int, ...] = ()       # columns of X (0-based) with a slope per group
    cens: np.ndarray | None = None     # int per row: 0 observed, 1 right-, -1 left-censored (None: all 0)
    window: tuple[float | None, float | None] = (None, None)   # truncation window, None = open end
    #: each observation's row in the data file, counted from 1 at the line after the
    #: header (rows without a usable outcome are dropped, so these can skip numbers)
    data_rows: np.ndarray | None = field(default=None, repr=False, compare=False)

    @property
    def censoring(self) -> np.ndarray:
        return np.zeros(self.N, dtype=np.int64) if self.cens is None else self.cens

    @property
    def asks_censoring(self) -> bool:
        """True when censoring or truncation was asked for (candidates then need the inputs)."""
        return self.cens is not None or self.window != (None, None)

    def data_row(self, i: int) -> int:
        """The data-file row (1 = the line after the header) of 0-based observation ``i``."""
        return int(self.data_rows[i]) if self.data_rows is not None else int(i) + 1

    @property
    def N(self) -> int:
        return int(self.y.shape[0])

    @property
    def K(self) -> int:
        return int(self.X.shape[1])

    @property
    def J(self) -> int:
        return len(self.group_levels)

    def stan_inputs(self, fit_idx: np.ndarray | None = None) -> dict:
        """The inputs the contract defines, for one fit subset.

        ``fit_idx`` holds 0-based row numbers of the observations that enter the
        likelihood; ``None`` means all of them and an empty array means none (the
        prior predictive mode). Stan receives them 1-based.
        """
        if fit_idx is None:
            fit_idx = np.arange(self.N)
        fit_idx = np.asarray(fit_idx, dtype=np.int64)
        if fit_idx.size and (fit_idx.min() < 0 or fit_idx.max() >= self.N):
            raise ValueError("fit_idx holds a row number outside 0..N-1")
        return {
            "N": self.N,
            "y": self.y,
            "K": self.K,
            "X": self.X,
            "J": self.J,
            "group": self.group,
            "Kz": len(self.slopes),
            "Z": self.X[:, list(self.slopes)],
            "cens": self.censoring,
            "has_lower_limit": int(self.window[0] is not None),
            "lower_limit": float(self.window[0] or 0.0),
            "has_upper_limit": int(self.window[1] is not None),
            "upper_limit": float(self.window[1] or 0.0),
            "N_fit": int(fit_idx.size),
            "fit_idx": fit_idx + 1,
            "y_center": self.y_center,
            "y_scale": self.y_scale,
        }


#: Names of the inputs the runner supplies itself; every other declared input of a
#: candidate is a prior hyperparameter.
SUPPLIED_INPUTS = ("N", "y", "K", "X", "J", "group", "Kz", "Z", "cens", "has_lower_limit", "lower_limit",
                   "has_upper_limit", "upper_limit", "N_fit", "fit_idx", "y_center", "y_scale")


def levels_with_reference(labels: Sequence, reference: str | None = None) -> tuple[str, list[str]]:
    """The reference level of a column and its other levels (sorted), from the text of
    its values: ``reference`` when given (it must be one of the levels), else the first
    level in sorted order. The one rule behind the predictors' indicators and the
    effects' differences."""
    levels = sorted(set(np.asarray(labels).astype(str)))
    if reference is None:
        return levels[0], levels[1:]
    if reference not in levels:
        raise ValueError(f"reference level {reference!r} is not one of {levels}")
    return reference, [lev for lev in levels if lev != reference]


def _is_numeric(col: pd.Series) -> bool:
    return bool(pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col))


def check_reference(
    table: pd.DataFrame,
    reference: Mapping[str, str],
    predictors: Sequence[str] = (),
    conditions: Sequence[str] = (),
    source: str = "data",
) -> None:
    """One clear error for a reference level that cannot be used: its column is not a
    text predictor or a condition column of the run, or the level is not one of the
    column's levels (the message lists them)."""
    for col, level in reference.items():
        how = f'[data] reference = {{{col} = "LEVEL"}} or --reference {col}=LEVEL'
        if col not in predictors and col not in conditions:
            raise UserError(
                f"{source}: a reference level is set for column '{col}', which is neither a predictor nor "
                f"a condition of this run; the text predictors and conditions are: "
                + (", ".join(c for c in (*predictors, *conditions) if c in table.columns
                             and (c in conditions or not _is_numeric(table[c]))) or "(none)")
                + "; remove it or add the column under predictors or conditions."
            )
        if col not in table.columns:
            continue   # the missing column is reported with its role by the caller
        if col in predictors and col not in conditions and _is_numeric(table[col]):
            raise UserError(
                f"{source}: a reference level is set for column '{col}', which is numeric: it enters the "
                "candidates as a slope and has no reference level; remove it from [data] reference."
            )
        levels = sorted(set(table[col].dropna().astype(str)))
        if str(level) not in levels:
            shown = ", ".join(levels[:20]) + (f" and {len(levels) - 20} more" if len(levels) > 20 else "")
            raise UserError(
                f"{source}: reference level '{level}' of column '{col}' is not one of its levels: {shown}; "
                f"set {how} to one of them."
            )


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV file with a header row, with messages a user can act on."""
    path = Path(path)
    if not path.exists():
        raise UserError(f"{path}: data file not found; check the path.")
    if path.is_dir():
        raise UserError(f"{path}: is a folder; give the path of a CSV file.")
    try:
        table = pd.read_csv(path, encoding="utf-8")
    except UnicodeDecodeError:
        raise UserError(f"{path}: not UTF-8 text; save the file as UTF-8 CSV.") from None
    except pd.errors.EmptyDataError:
        raise UserError(f"{path}: the file is empty; it needs a header row and data rows.") from None
    except pd.errors.ParserError as exc:
        raise UserError(f"{path}: not a readable CSV file ({exc}).") from None
    if table.shape[0] == 0:
        raise UserError(f"{path}: has a header row but no data rows.")
    return table


def build_design(
    table: pd.DataFrame,
    outcome: str,
    predictors: Sequence[str] = (),
    group: str | None = None,
    typical_value: float | None = None,
    typical_spread: float | None = None,
    source: str = "data",
    min_rows: int = 10,
    reference: Mapping[str, str] | None = None,
    slopes: Sequence[str] = (),
    censored: str | None = None,
    truncate: tuple[float | None, float | None] = (None, None),
) -> Design:
    """Check the table and build the :class:`Design` (see the module docstring).

    Rows whose outcome is missing or not finite are dropped and counted in
    ``dropped_rows``; missing values in a predictor or the group column are an error,
    because silently dropping them would change which rows every candidate sees.
    ``reference`` maps a text predictor column to its reference level (checked with
    :func:`check_reference`; by default the first level in sorted order).
    ``slopes`` names predictor columns that get a slope per group (every column of X
    made from each of them: one for a number, one per non-reference level for text).
    """
    reference = dict(reference or {})
    columns = [str(c) for c in table.columns]
    for role, name in [("outcome", outcome), *[("predictor", p) for p in predictors],
                       *([("group", group)] if group else [])]:
        if name not in columns:
            raise UserError(
                f"{source}: {role} column '{name}' not found; the columns are: "
                + ", ".join(columns)
            )
    if outcome in predictors or (group and (group == outcome or group in predictors)):
        raise UserError(f"{source}: a column is used twice among outcome, predictors and group.")
    for name in slopes:
        if name not in predictors:
            raise UserError(
                f"{source}: slope column '{name}' is not among the predictors ("
                + (", ".join(predictors) or "none") + "); a slope per group varies around a predictor's "
                "common slope, so add it with --predictors or remove it from --slopes.")
    if censored is not None and censored not in columns:
        raise UserError(f"{source}: censoring column '{censored}' not found; the columns are: " + ", ".join(columns))
    if censored is not None and censored in (outcome, group, *predictors):
        raise UserError(f"{source}: censoring column '{censored}' is also used as outcome, predictor or group; "
                        "give it a column of its own.")
    if slopes and not group:
        raise UserError(f"{source}: slopes per group ({', '.join(slopes)}) need a group column; set --group.")

    y_raw = pd.to_numeric(table[outcome], errors="coerce")
    bad_text = y_raw.isna() & table[outcome].notna()
    if bad_text.any():
        # the first offending row, counted as the data rows of the file (row 1 is the line
        # after the header), so the user can find it in a spreadsheet or editor
        at = int(np.flatnonzero(bad_text.to_numpy())[0])
        first = table[outcome].iloc[at]
        where = f"data row {at + 1} (line {at + 2} of the file) holds {first!r}"
        if not y_raw.notna().any():   # no cell of the column reads as a number
            raise UserError(
                f"{source}: outcome column '{outcome}' is not numeric: {where}; "
                "choose a numeric column with --outcome."
            )
        raise UserError(
            f"{source}: outcome column '{outcome}' has {int(bad_text.sum())} non-numeric "
            f"value(s), for example {first!r} ({where}); fix or remove those rows."
        )
    y_all = y_raw.to_numpy(dtype=float)
    keep = np.isfinite(y_all)
    dropped = int((~keep).sum())
    table = table.loc[keep].reset_index(drop=True)
    y = y_all[keep]
    if y.size < min_rows:
        raise UserError(
            f"{source}: {y.size} usable observations of '{outcome}'; at least {min_rows} are needed."
        )
    if np.ptp(y) == 0:
        raise UserError(f"{source}: outcome column '{outcome}' is constant ({y[0]:g}); nothing to model.")

    cens = None
    if censored is not None:
        raw = pd.to_numeric(table[censored], errors="coerce").to_numpy(dtype=float)
        bad = ~np.isin(raw, (-1.0, 0.0, 1.0))
        if bad.any():
            at = int(np.flatnonzero(bad)[0])
            raise UserError(
                f"{source}: censoring column '{censored}' holds {str(table[censored].iloc[at])!r} at data row {at + 1}; "
                "its values must be 0 (observed), 1 (right-censored) or -1 (left-censored).")
        cens = raw.astype(np.int64)
    low, high = truncate
    outside = np.zeros(y.size, dtype=bool)
    if low is not None:
        outside |= y < low
    if high is not None:
        outside |= y > high
    if outside.any():
        at = int(np.flatnonzero(outside)[0])
        raise UserError(
            f"{source}: the truncation window {'' if low is None else f'{low:g}'}:{'' if high is None else f'{high:g}'} "
            f"excludes {int(outside.sum())} outcome value(s), e.g. {y[at]:g} at data row {at + 1}; "
            "widen --truncate or remove those rows.")

    coding: list[PredictorCoding] = []
    blocks: list[np.ndarray] = []
    for name in predictors:
        col = table[name]
        if col.isna().any():
            raise UserError(
                f"{source}: predictor column '{name}' has {int(col.isna().sum())} missing value(s); "
                "fill them or remove those rows."
            )
        if col.nunique() < 2:
            raise UserError(f"{source}: predictor column '{name}' is constant; remove it from the predictors.")
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            x = col.to_numpy(dtype=float)
            center, scale = float(x.mean()), float(x.std(ddof=1))
            coding.append(PredictorCoding(name, name, center, scale))
            blocks.append(((x - center) / scale)[:, None])
        else:
            text = col.astype(str).to_numpy()
            if name in reference and reference[name] not in set(text):
                check_reference(table, {name: reference[name]}, predictors, (), source)
            ref, others = levels_with_reference(text, reference.get(name))
            for level in others:
                ind = (text == level).astype(float)
                center = float(ind.mean())
                coding.append(PredictorCoding(f"{name}[{level}]", name, center, 1.0, level, ref))
                blocks.append((ind - center)[:, None])
    X = np.hstack(blocks) if blocks else np.zeros((y.size, 0))

    if group:
        gcol = table[group]
        if gcol.isna().any():
            raise UserError(
                f"{source}: group column '{group}' has {int(gcol.isna().sum())} missing value(s); "
                "fill them or remove those rows."
            )
        text = gcol.astype(str).to_numpy()
        levels = tuple(sorted(set(text)))
        if len(levels) < 2:
            raise UserError(
                f"{source}: group column '{group}' has a single level; varying intercepts need at "
                "least two (omit the group setting)."
            )
        index = {lev: i + 1 for i, lev in enumerate(levels)}
        gidx = np.array([index[t] for t in text], dtype=np.int64)
    else:
        levels = ()
        gidx = np.zeros(y.size, dtype=np.int64)

    y_center = float(np.median(y)) if typical_value is None else float(typical_value)
    y_scale = float(np.std(y, ddof=1)) if typical_spread is None else float(typical_spread)
    if not np.isfinite(y_center):
        raise UserError(f"{source}: typical value must be a finite number.")
    if not (np.isfinite(y_scale) and y_scale > 0):
        raise UserError(f"{source}: typical spread must be a positive number.")

    return Design(
        source=source, outcome=outcome, y=y, X=X, coding=tuple(coding),
        group_column=group, group=gidx, group_levels=levels,
        y_center=y_center, y_scale=y_scale, dropped_rows=dropped, table=table,
        data_rows=np.flatnonzero(keep) + 1,
        slopes=tuple(i for i, code in enumerate(coding) if code.source in set(slopes)),
        cens=cens, window=(low, high),
    )


def support_problem(y: np.ndarray, support: str) -> str | None:
    """Why outcome values ``y`` lie outside a candidate's declared support, or None."""
    if support == "real":
        return None
    if support == "positive":
        bad = int((y <= 0).sum())
        return f"{bad} outcome value(s) are zero or negative; this candidate needs y > 0" if bad else None
    if support == "unit":
        bad = int(((y <= 0) | (y >= 1)).sum())
        return f"{bad} outcome value(s) lie outside (0, 1); this candidate needs 0 < y < 1" if bad else None
    if support == "count":
        bad = int(((y < 0) | (y != np.round(y))).sum())
        return f"{bad} outcome value(s) are not whole numbers >= 0; this candidate needs counts" if bad else None
    if support == "binary":
        bad = int((~np.isin(y, (0, 1))).sum())
        return f"{bad} outcome value(s) are neither 0 nor 1; this candidate needs 0/1 outcomes" if bad else None
    raise ValueError(f"unknown support {support!r}")


SUPPORTS = ("real", "positive", "unit", "count", "binary")
