"""The tables of the report, each built once for the page (formatted text) and once
for its CSV file (raw numbers). The template only lays them out."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from contenders.output.readings import CHECK_READINGS as READINGS, describe
from contenders.statistics.features import named_misses, reading, unit_of
from contenders.output import format as fmt

STATUS_TEXT = {
    "ok": "✓ ranked",
    "unhealthy": "⚠ unhealthy, not ranked",
    "failed": "✗ failed",
    "skipped": "– skipped",
}

#: What to do about a candidate that could not be ranked, by status.
NEXT_STEP = {
    "failed": "Fix the problem named here in the candidate's .stan file and run again.",
    "skipped": "No action needed unless you expected this family to apply to these data.",
    "unhealthy": "Follow the advice under Sampler health, run again, and only then compare it.",
}


#: Posterior predictive p-values outside this range are marked as worth a look (◇), a
#: milder mark than ``ppp_extreme``'s ◆ (common practice, no source).
MILD = (0.025, 0.975)


@dataclass
class Cell:
    text: str
    cls: str = ""            # num | flag | watch | muted | good | wrap
    title: str = ""          # hover text, for example the full value
    sub: str = ""            # a second, smaller line (the miss under a p-value)


@dataclass
class Table:
    """One table of the page and its CSV file."""

    csv_name: str
    headers: list[str]
    rows: list[list[Cell]] = field(default_factory=list)
    row_cls: list[str] = field(default_factory=list)
    csv_headers: list[str] = field(default_factory=list)
    csv_rows: list[list[Any]] = field(default_factory=list)
    numeric: list[bool] = field(default_factory=list)   # per display column: right-aligned

    def add(self, cells: Sequence[Cell | str], raw: Sequence[Any] | None = None, cls: str = "") -> None:
        self.rows.append([c if isinstance(c, Cell) else Cell(str(c)) for c in cells])
        self.row_cls.append(cls)
        if raw is not None:
            self.csv_rows.append(list(raw))

    @property
    def empty(self) -> bool:
        return not self.rows


def n(text: str, cls: str = "") -> Cell:
    """A numeric cell (right-aligned, tabular figures)."""
    return Cell(text, ("num " + cls).strip())


def p_cell(p: float, strong: float, mild: tuple[float, float] = MILD) -> Cell:
    """A posterior predictive p-value, marked ◆ beyond ``strong`` (or 1 - strong) and
    ◇ outside the ``mild`` range."""
    text = fmt.pvalue(p) if p is None or not np.isfinite(p) else fmt.pvalue_against(p, strong, 1 - strong)
    if p is None or not np.isfinite(p):
        return n(text, "muted")
    if p < strong or p > 1 - strong:
        return n("◆ " + text, "flag")
    if not mild[0] <= p <= mild[1]:
        return n("◇ " + text, "watch")
    return n(text)


def misfits(checks, strong: float, relevant=None) -> list[str]:
    """Plain names of the checks a candidate fails (p beyond ``strong``, LOO-PIT ECDF
    outside its band, tested at the run's ``pit_alpha``); with relevant sizes, as the
    verdict names them (``features.named_misses``)."""
    if checks is None:
        return []
    out = [describe(r.statistic) for r in named_misses(checks.rows, strong, relevant)]
    from contenders.statistics.checks import leaves_band

    if leaves_band(checks.loo_pit_test):
        out.append("LOO-PIT calibration")
    return out


#: The reading of a statistic as a table shows it: a mark and words (readings.CHECK_READINGS).
READING_CELL = {
    "fits": ("", ""),
    "detectable": ("◆ ", "flag"),
    "small": ("◇ ", "watch"),
    "relevant": ("◆ ", "flag"),
    "possibly_relevant": ("◇ ", "watch"),
    "unknown": ("", "muted"),
}


def reading_cell(row, strong: float, relevant=None) -> Cell:
    """The reading of one check row (p, miss, relevant size) as a marked cell."""
    size = (relevant or {}).get(row.statistic)
    code = reading(row.p_value, row.miss, size, strong)
    mark, cls = READING_CELL[code]
    text = READINGS[code]
    if size is not None and code in ("small", "relevant", "possibly_relevant"):
        text += f" ({fmt.miss(size, None, unit_of(row.statistic)).lstrip('+')})"
    return Cell(mark + text, ("wrap " + cls).strip())


def miss_cell(row) -> Cell:
    """The miss beyond the replicated 90 % interval, signed, with its share of the SD."""
    size = row.miss
    return n(fmt.miss(size, row.miss_share_sd, unit_of(row.statistic)),
             "muted" if size == 0 else "")
