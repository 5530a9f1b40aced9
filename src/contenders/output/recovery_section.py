"""The report's model-recovery section (shown when ``contenders recovery`` ran, or
``[recovery] replicates`` was set): what was simulated, the plain reading, the two
recovery matrices with Monte Carlo intervals and the fits that had problems. Numbers
are formatted here; ``templates/recovery.html.j2`` lays them out. The analysis itself
is :mod:`contenders.statistics.recovery` (Wilson & Collins 2019, eLife 8:e49547)."""

from __future__ import annotations

from typing import Any

from contenders.statistics.recovery import NO_DECISION, Matrix, Recovery
from contenders.output.readings import left_out_text
from contenders.output import format as fmt
from contenders.output.tables import Cell, Table, n

ANCHOR, TITLE = "recovery", "Model recovery"


def nav(result) -> list[tuple[str, str]]:
    """The section's entry in the page's table of contents (none without an analysis)."""
    return [(ANCHOR, TITLE)] if getattr(result, "recovery", None) is not None else []


def verdict(result) -> list[str]:
    """Sentences for the verdict box: the pairs the design cannot separate."""
    rec: Recovery | None = getattr(result, "recovery", None)
    if rec is None or rec.by_elpd is None:
        return []
    picked = [s for s in rec.reading if s.startswith(("With this design", "Data simulated from"))] \
        or rec.reading[:1]
    picked += [s for s in rec.reading if "most wins were within two standard errors" in s]
    return [f"Model recovery ({rec.replicates} simulated datasets per candidate; see Model recovery): "
            + s[0].lower() + s[1:] for s in picked]


def _matrix_table(mat: Matrix, rec: Recovery, rule: str, clear: dict[str, int] | None) -> Table:
    labels = rec.labels
    heads = ["Data simulated from"] + [f"won by {labels.get(m, m)}" for m in mat.ids] + ["no decision"]
    numeric = [False] + [True] * (len(mat.ids) + 1)
    if clear is not None:
        heads.append("clear wins (lead beyond 2 SE)")
        numeric.append(True)
    t = Table("recovery_matrix.csv", heads, numeric=numeric)
    for g in mat.ids:
        row: list[Cell] = [Cell(labels.get(g, g), "name", g)]
        for m in list(mat.ids) + [NO_DECISION]:
            c = mat.cells[g][m]
            text = (f"{c.wins}/{c.n} · {fmt.fixed(c.share, 2)} "
                    f"({fmt.fixed(c.low, 2)}–{fmt.fixed(c.high, 2)})")
            cls = ""
            if m not in (g, NO_DECISION) and c.share >= rec.threshold:
                text, cls = "◆ " + text, "flag"
            elif m == NO_DECISION and c.wins:
                text, cls = "◇ " + text, "watch"
            elif m == NO_DECISION:
                cls = "muted"
            row.append(n(text, cls))
        if clear is not None:
            decided = sum(1 for r in rec.runs if r.generator == g and r.winner is not None)
            row.append(n(f"{clear[g]} of {decided}"))
        t.add(row, cls=rule)
    return t


def _problems(rec: Recovery) -> Table | None:
    t = Table("recovery.json", ["Candidate fitted", "datasets", "healthy", "unhealthy", "failed",
                                "outside its support (not fitted)", "Pareto k above threshold"],
              numeric=[False, True, True, True, True, True, True])
    if not any(f.status != "ok" or f.high_k for f in rec.fits):
        return None
    for m in rec.ids:
        mine = [f for f in rec.fits if f.candidate == m]
        count = lambda s: sum(f.status == s for f in mine)  # noqa: E731
        t.add([Cell(rec.labels.get(m, m), "name", m), n(str(len(mine))), n(str(count("ok"))),
               n(str(count("unhealthy")), "watch" if count("unhealthy") else ""),
               n(str(count("failed")), "flag" if count("failed") else ""),
               n(str(count("outside_support"))),
               n(str(sum(1 for f in mine if f.high_k)))])
    return t


def context(result) -> dict[str, Any] | None:
    """What the section shows, formatted; None when no recovery analysis was run."""
    rec: Recovery | None = getattr(result, "recovery", None)
    if rec is None:
        return None
    base = {"anchor": ANCHOR, "title": TITLE, "reason": rec.reason,
            "left_out": [left_out_text(x) for x in rec.left_out],
            "replicates": str(rec.replicates), "threshold": fmt.share(rec.threshold),
            "level": fmt.share(rec.level)}
    if rec.by_elpd is None:
        return base
    clear = {g: sum(1 for r in rec.runs if r.generator == g and r.winner is not None and r.clear)
             for g in rec.ids}
    undecided_fits = sum(f.status in ("failed", "unhealthy") for f in rec.fits)
    high_k = sum(1 for f in rec.fits if f.high_k)
    return {
        **base,
        "reading": list(rec.reading),
        "names": ", ".join(rec.labels.get(m, m) for m in rec.ids),
        "n_generating": str(len(rec.ids)),
        "n_fits": fmt.integer(rec.n_fits),
        "stored_before": fmt.integer(rec.stored_before) if rec.stored_before else "",
        "estimated": fmt.seconds(rec.estimated_seconds),
        "took": fmt.seconds(rec.seconds),
        "workers": str(rec.workers),
        "observed_winner": rec.labels.get(rec.observed_winner, rec.observed_winner or ""),
        "by_elpd": _matrix_table(rec.by_elpd, rec, "elpd", clear),
        "by_weight": _matrix_table(rec.by_weight, rec, "weight", None),
        "problems": _problems(rec),
        "undecided_fits": fmt.integer(undecided_fits),
        "high_k": fmt.integer(high_k),
    }
