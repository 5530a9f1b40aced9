"""The report's part on prior sensitivity by power-scaling (tables only; the numbers
come from :mod:`contenders.trials.sensitivity`)."""

from __future__ import annotations

from typing import Any, Sequence

from ..trials.sensitivity import K_RELIABLE, READINGS, THRESHOLD
from . import format as fmt
from .tables import Cell, Table, n

#: At most this many parameter names are listed in one cell of the overview.
NAMES_SHOWN = 6


def _names(rows: Sequence[dict]) -> str:
    names = [r["parameter"] for r in rows]
    if not names:
        return "none"
    more = len(names) - NAMES_SHOWN
    return ", ".join(names[:NAMES_SHOWN]) + (f" and {more} more" if more > 0 else "")


def _value(x: float, rng: tuple[float, float], threshold: float | None = None) -> str:
    """A sensitivity with its single-chain range; beside ``threshold`` with the digits that
    show on which side of it the value lies."""
    text = fmt.num(x, 2) if threshold is None else fmt.against(x, threshold, fmt.decimals([x], 2))
    if all(v == v for v in rng):   # not NaN: more than one chain
        text += f" ({fmt.num(rng[0], 2)} to {fmt.num(rng[1], 2)})"
    return text


def sensitivity_context(cands: Sequence[Any]) -> dict[str, Any]:
    """Overview per candidate, the flagged parameters in detail, and the full CSV."""
    overview = Table("", ["Candidate", "Parameters", "Possible prior-data conflict", "Prior decides, data weak",
                          "Reliability"],
                     numeric=[False, True, False, False, False])
    detail = Table("", ["Candidate", "Parameter", "Prior sensitivity (range over single chains)",
                        "Likelihood sensitivity (range over single chains)", "Reading"],
                   numeric=[False, False, True, True, False])
    full = Table("sensitivity.csv", [], csv_headers=[
        "id", "parameter", "prior_sensitivity", "prior_low_one_chain", "prior_high_one_chain",
        "likelihood_sensitivity", "likelihood_low_one_chain", "likelihood_high_one_chain", "reading",
        "near_threshold", "pareto_k_prior", "pareto_k_likelihood"])
    without = []
    for r in cands:
        s = getattr(r, "sensitivity", None)
        if r.status not in ("ok", "unhealthy"):
            continue
        if s is None:
            without.append(f"{r.label} ({r.id})")
            continue
        if s.problem:
            overview.add([Cell(r.label, "name", r.id), n(fmt.MISSING), Cell(s.problem, "wrap muted"), "", ""])
            continue
        by = {key: [row for row in s.rows if row["reading"] == key] for key in READINGS}
        k = max(s.pareto_k.values()) if s.pareto_k else float("nan")
        reliable = (f"Pareto k {fmt.against(k, K_RELIABLE, 2)}: reliable" if s.reliable else
                    f"◆ Pareto k {fmt.against(k, K_RELIABLE, 2)} above {fmt.num(K_RELIABLE)}: the importance weights are "
                    "unreliable; read the values as rough")
        overview.add([Cell(r.label, "name", r.id), n(fmt.integer(len(s.rows))),
                      Cell(("◆ " if by["conflict"] else "") + _names(by["conflict"]),
                           "wrap flag" if by["conflict"] else "wrap"),
                      Cell(("◆ " if by["prior_dominates"] else "") + _names(by["prior_dominates"]),
                           "wrap flag" if by["prior_dominates"] else "wrap"),
                      Cell(reliable, "wrap" if s.reliable else "wrap flag")],
                     cls="muted" if r.status == "unhealthy" else "")
        for row in s.rows:
            full.csv_rows.append([r.id, row["parameter"], row["prior"], *row["prior_range"], row["likelihood"],
                                  *row["likelihood_range"], row["reading"], row["near_threshold"],
                                  s.pareto_k.get("prior"), s.pareto_k.get("likelihood")])
            if row["reading"] in ("conflict", "prior_dominates") or row["near_threshold"]:
                reading = READINGS[row["reading"]] or "the data decide it"
                if row["near_threshold"]:
                    reading += "; ◇ close to the threshold: the reading could change with other draws"
                detail.add([Cell(r.label, "name", r.id), Cell(row["parameter"], "code"),
                            n(_value(row["prior"], row["prior_range"], s.threshold),
                              "flag" if row["prior"] >= s.threshold else ""),
                            n(_value(row["likelihood"], row["likelihood_range"], s.threshold)),
                            Cell(reading, "wrap")])
    return {"overview": overview, "detail": detail, "csv": full, "without": without,
            "threshold": fmt.num(THRESHOLD), "k_reliable": fmt.num(K_RELIABLE)}
