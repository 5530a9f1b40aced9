"""The report's out-of-sample section: the answer first (which candidate predicts best
and how sure that is), the comparison beside its chart, the estimates behind it, and
the reliability of PSIS-LOO as Pareto k bands with the worst observations named by
their row in the data file. Tables only; the numbers come from :mod:`contenders.statistics.compare`.
No matplotlib here (a rerun from the fit store must not load it)."""

from __future__ import annotations

from typing import Sequence

import numpy as np

from contenders.rules import SMALL_DIFFERENCE
from contenders.output import format as fmt
from contenders.output.readings import elpd_method
from contenders.statistics.compare import k_band_counts, k_band_edges, worst_k
from contenders.output.tables import Cell, Table, n

#: The standing of a ranked candidate (compare.standings) in this section's words.
STANDING_WORDS = {
    "best": "best",
    "tied": "tied with the best",
    "close": "too close to tell",
    "uncertain": "order uncertain",
    "worse": "clearly worse",
}

#: What each standing means for the reader, for the answer above the chart.
STANDING_ANSWER = {
    "tied": "Tied with it within Monte Carlo error",
    "close": f"Too close to tell apart from it (less than {SMALL_DIFFERENCE:g} elpd behind)",
    "uncertain": "Behind it, but the order is uncertain (within two SE of the difference)",
    "worse": "Clearly worse (more than two SE and at least {small} elpd behind)",
}

#: Observations listed per candidate as the worst by Pareto k (page and CSV).
WORST_LISTED = 5


def threshold_text(threshold: float) -> str:
    """The Pareto k threshold with every decimal it has, up to four (0.7, 0.6667)."""
    return f"{float(threshold):.4f}".rstrip("0").rstrip(".")


def k_bands(threshold: float) -> list[tuple[str, float, float]]:
    """The Pareto k bands of one estimate (``compare.k_band_edges``) as ``(label, low,
    high)``; the labels carry the exact threshold."""
    def edge(v: float) -> str:
        return threshold_text(v) if v == float(threshold) else f"{v:g}"

    out = []
    for lo, hi in k_band_edges(threshold):
        label = (f"k ≤ {edge(hi)}" if lo == -np.inf else f"k > {edge(lo)}" if hi == np.inf
                 else f"{edge(lo)} < k ≤ {edge(hi)}")
        out.append((label, lo, hi))
    return out


def data_rows(design) -> np.ndarray:
    """Each observation's row in the data file (1 = the line after the header)."""
    rows = getattr(design, "data_rows", None)
    return np.asarray(rows, dtype=int) if rows is not None else np.arange(1, design.N + 1)


def _with_se(value: float, se: float) -> str:
    return f"{fmt.fixed(value, 1)} ({fmt.fixed(se, 1)})"


def _rank(row) -> str:
    return fmt.MISSING if not row else str(row.shared_rank or row.rank)


def _names(labels: Sequence[str]) -> str:
    return ", ".join(labels)


def answer(rows: Sequence, unranked: Sequence[str]) -> list[tuple[str, str]]:
    """The reader's question answered before any number: which candidate predicts new
    observations best, and where each other one stands, grouped by standing; as
    ``(lead words, what follows)`` pairs."""
    if not rows:
        return [("No candidate was ranked", "; the reasons are in the ranking above.")]
    best = rows[0]
    out = [("Best at predicting new observations", f"{best.label} (stacking weight "
            f"{fmt.fixed(best.stacking_weight, 2)}).")]
    for kind in ("tied", "close", "uncertain", "worse"):
        mine = [r for r in rows[1:] if r.standing == kind]
        if not mine:
            continue
        lo, hi = min(r.elpd_diff for r in mine), max(r.elpd_diff for r in mine)
        gap = (f"{fmt.fixed(lo, 1)} elpd behind" if len(mine) == 1 else
               f"{fmt.fixed(lo, 1)} to {fmt.fixed(hi, 1)} elpd behind")
        out.append((STANDING_ANSWER[kind].format(small=fmt.num(SMALL_DIFFERENCE)),
                    f"{_names([r.label for r in mine])} ({gap})."))
    if unranked:
        out.append(("Not ranked (sampler unhealthy; estimates shown greyed)", _names(unranked) + "."))
    return out


def comparison_tables(result, cands) -> tuple[Table, Table]:
    """The comparison shown beside its chart (rank, candidate, how far behind the best,
    standing, weights) and the estimates behind it; the first carries the CSV
    ``out_of_sample.csv`` with every column, in the same order."""
    rows = {row.id: row for row in result.comparison.rows}
    rd = data_rows(result.design)
    side = Table("out_of_sample.csv",
                 ["Rank", "Candidate", "Behind the best (SE)", "Standing", "Stacking weight", "Pseudo-BMA+ weight"],
                 csv_headers=["rank", "id", "label", "status", "elpd_behind_best", "elpd_behind_best_se", "standing",
                              "stacking_weight", "pseudo_bma_weight", "elpd", "elpd_se", "p_loo", "elpd_mcse",
                              "elpd_psis_before_refits", "pareto_k_max", "pareto_k_threshold", "n_high_k",
                              "n_refits", "refitted_data_rows", "method"],
                 numeric=[True, False, True, False, True, True])
    estimates = Table("", ["Candidate", "elpd (SE)", "p_loo", "MC SE of elpd", "Largest Pareto k",
                           "k above the threshold", "Method"],
                      numeric=[False, True, True, True, True, True, False])
    for r in sorted((c for c in cands if c.oos is not None),
                    key=lambda c: (c.id not in rows, rows[c.id].rank if c.id in rows else 0)):
        o, row = r.oos, rows.get(r.id)
        kind = row.standing if row else ""
        if row:
            # one line per row (no id below the name), so the rows sit close to the chart's
            side.add([n(_rank(row)), Cell(r.label, "candidate", r.id),
                      n("best" if kind == "best" else _with_se(row.elpd_diff, row.elpd_diff_se)),
                      Cell(STANDING_WORDS.get(kind, kind), f"standing {kind}"),
                      n(fmt.fixed(row.stacking_weight, 2)), n(fmt.fixed(row.pseudo_bma_weight, 2))])
        high = o.n_high_pareto_k
        estimates.add([
            Cell(r.label + ("" if row else " (not ranked: sampler unhealthy)"), "name", r.id),
            n(_with_se(o.elpd_loo, o.elpd_loo_se)), n(fmt.fixed(o.p_loo, 1)), n(fmt.fixed(o.elpd_mcse, 2)),
            n(fmt.against(o.pareto_k_max, o.k_threshold, 2),
              "watch" if np.isfinite(o.pareto_k_max) and o.pareto_k_max > o.k_threshold else ""),
            n(("◇ " if high else "") + str(high), "watch" if high else ""),
            Cell(elpd_method(o.elpd_method), "wrap"),
        ], cls="" if row else "muted")
        side.csv_rows.append([
            row.rank if row else None, r.id, r.label, r.status,
            row.elpd_diff if row else None, row.elpd_diff_se if row else None, kind or None,
            row.stacking_weight if row else None, row.pseudo_bma_weight if row else None,
            o.elpd_loo, o.elpd_loo_se, o.p_loo, o.elpd_mcse, o.elpd_psis, o.pareto_k_max, o.k_threshold, high, o.n_refits,
            " ".join(str(int(rd[i])) for i in o.refitted), elpd_method(o.elpd_method)])
    return side, estimates


def pareto_k_tables(result, cands) -> tuple[Table, Table, bool]:
    """Pareto k bands per candidate (page and ``pareto_k_bands.csv``), the worst
    observations by data row (``pareto_k_worst.csv``), and whether every candidate's
    threshold is the same (then the band headers carry it)."""
    rd = data_rows(result.design)
    with_k = [r for r in cands if r.oos is not None]
    thresholds = {float(r.oos.k_threshold) for r in with_k}
    shared = len(thresholds) == 1
    heads = ([b[0] for b in k_bands(next(iter(thresholds)))] if shared
             else ["k ≤ 0.5", "0.5 < k ≤ the threshold", "k above the threshold"])
    bands = Table("pareto_k_bands.csv",
                  ["Candidate", *heads] + ([] if shared else ["Threshold"])
                  + ["Refitted exactly (data rows)", f"Worst {WORST_LISTED} observations (data row: k)"],
                  csv_headers=["id", "label", "band", "k_above", "k_at_most", "observations", "threshold"],
                  numeric=[False] + [True] * len(heads) + ([] if shared else [True]) + [False, False])
    worst_t = Table("pareto_k_worst.csv", [],
                    csv_headers=["id", "label", "place", "data_row", "observation", "pareto_k", "threshold",
                                 "above_threshold", "refitted"])
    for r in with_k:
        o = r.oos
        k = np.asarray(o.pareto_k, dtype=float)
        bl = k_bands(o.k_threshold)
        counts = k_band_counts(k, o.k_threshold)
        for (label, lo, hi), c in zip(bl, counts):
            bands.csv_rows.append([r.id, r.label, label, None if not np.isfinite(lo) else lo,
                                   None if not np.isfinite(hi) else hi, c, o.k_threshold])
        refit = set(int(i) for i in o.refitted)
        ws = worst_k(k, WORST_LISTED)
        for place, i in enumerate(ws, 1):
            worst_t.csv_rows.append([r.id, r.label, place, int(rd[i]), i + 1, float(k[i]), o.k_threshold,
                                     bool(k[i] > o.k_threshold), i in refit])
        if np.isnan(k).all():
            cells = [n(fmt.MISSING) for _ in heads]
            listed = "no Pareto k: elpd from held-out fits"
        else:
            cells = [n(fmt.integer(c), "watch" if j == len(counts) - 1 and c else "")
                     for j, c in enumerate(counts)]
            if len(cells) < len(heads):          # a threshold at or below 0.5: no middle band
                cells.insert(1, n(fmt.MISSING))
            listed = "; ".join(("◇ " if k[i] > o.k_threshold else "") + f"{int(rd[i])}: {'∞' if np.isinf(k[i]) else fmt.fixed(k[i], 2)}"
                               for i in ws)
        bands.add([Cell(r.label, "name", r.id), *cells]
                  + ([] if shared else [n(threshold_text(o.k_threshold))])
                  + [Cell(", ".join(str(int(rd[i])) for i in sorted(refit)) or "none", "wrap"),
                     Cell(listed, "wrap")],
                  cls="" if r.status == "ok" else "muted")
    return bands, worst_t, shared
