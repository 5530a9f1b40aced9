"""Model recovery's words and files: the reading of the recovery matrix, and
``recovery.json`` and ``recovery.csv`` (the statistics are in statistics/recovery.py,
the study in pipeline/recovery.py)."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any, Mapping

from contenders.cleanup import write_whole
from contenders.output.readings import fit_problem, left_out_text
from contenders.rules import CONFUSED
from contenders.statistics.recovery import NO_DECISION, Matrix, Recovery


def reading(matrix: Matrix, labels: Mapping[str, str], observed_winner: str | None = None,
            threshold: float = CONFUSED, clear: Mapping[str, tuple[int, int]] | None = None) -> list[str]:
    """Plain-language sentences: which pairs this design cannot tell apart, which data
    are often taken for another candidate's, how the observed winner fares, and (given
    ``clear``: generating id -> (clear wins, decided datasets)) where fewer than half of
    the wins were clear."""
    ids = matrix.ids
    name = lambda m: labels.get(m, m)  # noqa: E731
    out: list[str] = []
    both, one_way = [], []
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            ab, ba = matrix.share(a, b), matrix.share(b, a)
            if ab >= threshold and ba >= threshold:
                both.append((a, b, ab, ba))
            elif ab >= threshold:
                one_way.append((a, b, ab, ba))
            elif ba >= threshold:
                one_way.append((b, a, ba, ab))
    for a, b, ab, ba in both:
        ca, cb = matrix.cells[a][b], matrix.cells[b][a]
        out.append(f"With this design, {name(a)} and {name(b)} cannot be told apart: {name(b)} wins "
                   f"{ca.wins} of {ca.n} datasets simulated from {name(a)}, and {name(a)} wins {cb.wins} "
                   f"of {cb.n} simulated from {name(b)}. A difference in elpd between them on the observed "
                   "data says little about which process produced them.")
    for a, b, ab, ba in one_way:
        ca, cb = matrix.cells[a][b], matrix.cells[b][a]
        out.append(f"Data simulated from {name(a)} are often better predicted by {name(b)} ({ca.wins} of "
                   f"{ca.n}); the reverse happened in {cb.wins} of {cb.n}. A win of {name(b)} over "
                   f"{name(a)} on the observed data is therefore weak evidence against {name(a)}.")
    undecided = sum(matrix.cells[g][NO_DECISION].wins for g in ids)
    if not both and not one_way:
        out.append((f"Among the simulated datasets that reached a decision, no rival won {100 * threshold:.0f} % "
                    "or more of any candidate's datasets, but too many had no decision to conclude that the "
                    "design tells the candidates apart." if undecided else
                    f"No rival won {100 * threshold:.0f} % or more of the datasets simulated from any "
                    "candidate: with this design the candidates can be told apart, within the "
                    "uncertainty of the intervals shown."))
    if observed_winner in matrix.cells:
        row = matrix.cells[observed_winner]
        own = row[observed_winner]
        rivals = [f"{name(m)} {row[m].wins}" for m in ids if m != observed_winner and row[m].wins]
        out.append(
            f"If {name(observed_winner)}, the winner on the observed data, were the true process, it would "
            f"win {own.wins} of {own.n} simulated datasets ({own.share:.2f}; 95 % interval "
            f"{own.low:.2f} to {own.high:.2f})"
            + (f"; rivals won: {', '.join(rivals)}" if rivals else "; no rival won any")
            + (f"; {row[NO_DECISION].wins} had no decision" if row[NO_DECISION].wins else "") + ".")
    narrow = [g for g, (k, decided) in (clear or {}).items() if decided and k < decided / 2]
    if narrow:
        out.append("On data simulated from " + ", ".join(name(g) for g in narrow) + ", most wins were within two "
                   "standard errors of the paired elpd difference: one dataset of this size rarely separates the "
                   "candidates clearly, whichever wins.")
    if undecided:
        total = sum(matrix.cells[g][NO_DECISION].n for g in ids)
        out.append(f"{undecided} of {total} simulated datasets had no decision because a fit failed or did "
                   "not converge; see the table of fit problems.")
    return out


# --- records -----------------------------------------------------------------------------

def _finite(v: float) -> float | None:
    return float(v) if v is not None and math.isfinite(v) else None


def matrix_rows(rec: Recovery) -> list[dict[str, Any]]:
    """Long rows of both matrices (for CSV and JSON)."""
    rows = []
    for rule, mat in (("elpd", rec.by_elpd), ("stacking_weight", rec.by_weight)):
        if mat is None:
            continue
        for g in mat.ids:
            for m, cell in mat.cells[g].items():
                rows.append({"rule": rule, "generating": g, "winner": m, "wins": cell.wins,
                             "replicates": cell.n, "share": _finite(cell.share),
                             "low": cell.low, "high": cell.high})
    return rows


def summary(rec: Recovery) -> dict[str, Any]:
    """Everything of the analysis as JSON-ready values."""
    return {
        "method": "model recovery (Wilson & Collins 2019, eLife 8:e49547, rule 6)",
        "candidates": rec.ids, "replicates": rec.replicates, "observed_winner": rec.observed_winner,
        "interval": f"{100 * rec.level:.0f} % Wilson score", "confused_threshold": rec.threshold,
        "reason": rec.reason, "left_out": [left_out_text(x) for x in rec.left_out], "reading": rec.reading,
        "fits": rec.n_fits, "fits_stored_before": rec.stored_before,
        "estimated_seconds": _finite(rec.estimated_seconds), "seconds": rec.seconds, "workers": rec.workers,
        "matrix": matrix_rows(rec),
        "datasets": [{"generating": r.generator, "replicate": r.index + 1, "posterior_draw": r.draw,
                      "winner_elpd": r.winner, "clear_win": r.clear, "lead": _finite(r.lead),
                      "lead_se": _finite(r.lead_se), "winner_stacking_weight": r.weight_winner,
                      "stacking_weights": r.weights, "elpd": {k: _finite(v) for k, v in r.elpd.items()},
                      "outside_support": r.excluded, "fit_problems": [fit_problem(*bad) for bad in r.bad_fits]} for r in rec.runs],
        "fit_details": [{"generating": f.generator, "replicate": f.replicate + 1, "candidate": f.candidate,
                         "status": f.status, "reason": f.reason, "elpd_loo": _finite(f.elpd),
                         "elpd_loo_se": _finite(f.se), "pareto_k_max": _finite(f.k_max),
                         "n_high_pareto_k": f.high_k, "seconds": f.seconds} for f in rec.fits],
    }


def write(rec: Recovery, out: str | Path) -> list[Path]:
    """Write ``recovery.json`` and ``recovery_matrix.csv`` into ``out`` (each to a
    temporary file, then renamed)."""
    import csv
    import io

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    buf = io.StringIO()
    names = ["rule", "generating", "winner", "wins", "replicates", "share", "low", "high"]
    writer = csv.DictWriter(buf, fieldnames=names, lineterminator="\n")
    writer.writeheader()
    writer.writerows(matrix_rows(rec))
    for name, text in (("recovery.json", json.dumps(summary(rec), indent=2)),
                       ("recovery_matrix.csv", buf.getvalue())):
        written.append(write_whole(out / name, text))
    return written
