"""The report's part on prior sensitivity by power-scaling (tables only; the numbers
come from :mod:`contenders.trials.sensitivity`)."""

from __future__ import annotations

from typing import Any, Sequence

from ..trials.coefficients import base_name, group_terms, sizes_of
from ..trials.sensitivity import K_RELIABLE, READINGS, THRESHOLD
from . import format as fmt
from .tables import Cell, Table, n

#: At most this many parameter names are listed in one cell of the overview.
NAMES_SHOWN = 6


def _names(rows: Sequence[dict], groups: set[str] = frozenset(), J: int = 0) -> str:
    """Parameter names, the group terms of each vector counted rather than listed."""
    names: list[str] = []
    counts: dict[str, int] = {}
    for r in rows:
        base = base_name(r["parameter"])
        if base in groups:
            if base not in counts:
                names.append(base)
            counts[base] = counts.get(base, 0) + 1
        else:
            names.append(r["parameter"])
    names = [f"{x} ({counts[x]} of {J} groups)" if x in counts else x for x in names]
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


def sensitivity_context(cands: Sequence[Any], J: int = 0, K: int = -1) -> dict[str, Any]:
    """Overview per candidate, the flagged parameters in detail, and the full CSV. Group
    terms (one value per group, ``J`` groups) are folded into one row per reading in
    the detail table; every one stays in the CSV."""
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
        groups = group_terms(sizes_of([row["parameter"] for row in s.rows]), J, K)
        by = {key: [row for row in s.rows if row["reading"] == key] for key in READINGS}
        k = max(s.pareto_k.values()) if s.pareto_k else float("nan")
        reliable = (f"Pareto k {fmt.against(k, K_RELIABLE, 2)}: reliable" if s.reliable else
                    f"◆ Pareto k {fmt.against(k, K_RELIABLE, 2)} above {fmt.num(K_RELIABLE)}: the importance weights are "
                    "unreliable; read the values as rough")
        overview.add([Cell(r.label, "name", r.id), n(fmt.integer(len(s.rows))),
                      Cell(("◆ " if by["conflict"] else "") + _names(by["conflict"], groups, J),
                           "wrap flag" if by["conflict"] else "wrap"),
                      Cell(("◆ " if by["prior_dominates"] else "") + _names(by["prior_dominates"], groups, J),
                           "wrap flag" if by["prior_dominates"] else "wrap"),
                      Cell(reliable, "wrap" if s.reliable else "wrap flag")],
                     cls="muted" if r.status == "unhealthy" else "")
        for row in s.rows:
            full.csv_rows.append([r.id, row["parameter"], row["prior"], *row["prior_range"], row["likelihood"],
                                  *row["likelihood_range"], row["reading"], row["near_threshold"],
                                  s.pareto_k.get("prior"), s.pareto_k.get("likelihood")])
            if base_name(row["parameter"]) in groups:
                continue
            if row["reading"] in ("conflict", "prior_dominates") or row["near_threshold"]:
                reading = READINGS[row["reading"]] or "the data decide it"
                if row["near_threshold"]:
                    reading += "; ◇ close to the threshold: the reading could change with other draws"
                detail.add([Cell(r.label, "name", r.id), Cell(row["parameter"], "code"),
                            n(_value(row["prior"], row["prior_range"], s.threshold),
                              "flag" if row["prior"] >= s.threshold else ""),
                            n(_value(row["likelihood"], row["likelihood_range"], s.threshold)),
                            Cell(reading, "wrap")])
        for base in sorted(groups):
            mine = [row for row in s.rows if base_name(row["parameter"]) == base]
            for key in ("conflict", "prior_dominates", ""):
                hit = [row for row in mine if row["reading"] == key and (key or row["near_threshold"])]
                if not hit:
                    continue
                near = sum(row["near_threshold"] for row in hit)
                reading = (READINGS[key] or "the data decide them") + (
                    f"; ◇ {near} close to the threshold" if near else "")
                detail.add([Cell(r.label, "name", r.id),
                            Cell(f"{base}: {len(hit)} of {len(mine)} groups (each in sensitivity.csv)", "code wrap"),
                            n(fmt.interval(min(x["prior"] for x in hit), max(x["prior"] for x in hit), 2),
                              "flag" if key else ""),
                            n(fmt.interval(min(x["likelihood"] for x in hit), max(x["likelihood"] for x in hit), 2)),
                            Cell(reading, "wrap")])
    return {"overview": overview, "detail": detail, "csv": full, "without": without,
            "threshold": fmt.num(THRESHOLD), "k_reliable": fmt.num(K_RELIABLE)}
