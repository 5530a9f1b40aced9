"""The report's part on prior sensitivity by power-scaling (tables only; the numbers
come from :mod:`contenders.statistics.sensitivity`)."""

from __future__ import annotations

from typing import Any, Sequence

from contenders.statistics.coefficients import base_name, group_terms, sizes_of
from contenders.rules import SENSITIVITY_K_RELIABLE as K_RELIABLE, SENSITIVITY_THRESHOLD as THRESHOLD
from contenders.output.readings import SENSITIVITY_READINGS as READINGS, sensitivity_problem
from contenders.statistics.sensitivity import ACT_ON
from contenders.output import format as fmt
from contenders.output.tables import Cell, Table, n

#: At most this many parameter names are listed in one cell of the overview.
NAMES_SHOWN = 6


def _names(rows: Sequence, groups: set[str] = frozenset(), J: int = 0) -> str:
    """Parameter names, the group terms of each vector counted rather than listed."""
    names: list[str] = []
    counts: dict[str, int] = {}
    for r in rows:
        base = base_name(r.parameter)
        if base in groups:
            if base not in counts:
                names.append(base)
            counts[base] = counts.get(base, 0) + 1
        else:
            names.append(r.parameter)
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


def _what_to_do(both: str, prior: str, reliable: bool) -> str:
    """One candidate's advice from the names of its parameters pulled both ways and set
    by the prior (``"none"`` when there are none)."""
    todo = []
    if both != "none":
        todo.append(f"Check the priors of {both} against what you meant; if they are right, report the "
                    "result under wider priors too.")
    if prior != "none":
        todo.append(f"Keep the priors of {prior} only if chosen on purpose, and say so; otherwise widen them.")
    if not todo:
        todo.append("Nothing to do: no parameter is set by the prior or pulled both ways.")
    if not reliable:
        todo.append("The values are rough here: before acting, confirm by fitting again with the prior "
                    "in question made wider.")
    return " ".join(todo)


def sensitivity_context(cands: Sequence[Any], J: int = 0, K: int = -1) -> dict[str, Any]:
    """Overview per candidate, the flagged parameters in detail, and the full CSV. Group
    terms (one value per group, ``J`` groups) are folded into one row per reading in
    the detail table; every one stays in the CSV."""
    overview = Table("", ["Candidate", "Parameters", "Pulled both ways (prior against data)",
                          "Set by the prior (data add little)", "Reliability", "What to do"],
                     numeric=[False, True, False, False, False, False])
    detail = Table("", ["Candidate", "Parameter", "Prior sensitivity (range over single chains)",
                        "Likelihood sensitivity (range over single chains)", "Reading and what to do"],
                   numeric=[False, False, True, True, False])
    full = Table("sensitivity.csv", [], csv_headers=[
        "id", "parameter", "prior_sensitivity", "prior_low_one_chain", "prior_high_one_chain",
        "likelihood_sensitivity", "likelihood_low_one_chain", "likelihood_high_one_chain", "reading", "what_to_do",
        "near_threshold", "pareto_k_prior", "pareto_k_likelihood"])
    without = []
    for r in cands:
        s = getattr(r, "sensitivity", None)
        if r.status not in ("ok", "unhealthy"):
            continue
        if s is None:
            without.append(f"{r.label} ({r.id})")
            continue
        if s.error:
            overview.add([Cell(r.label, "name", r.id), n(fmt.MISSING), Cell(sensitivity_problem(s), "wrap muted"), "", "",
                          Cell("Look at the message; the other trials of this candidate are unaffected.", "wrap")])
            continue
        groups = group_terms(sizes_of([row.parameter for row in s.rows]), J, K)
        by = {key: [row for row in s.rows if row.reading == key] for key in READINGS}
        k = max(s.pareto_k.values()) if s.pareto_k else float("nan")
        reliable = (f"reliable (k {fmt.against(k, K_RELIABLE, 2)})" if s.reliable else
                    f"◆ rough: Pareto k {fmt.against(k, K_RELIABLE, 2)}, the importance weights are unreliable")
        both = _names(by["pulled_both_ways"], groups, J)
        prior = _names(by["set_by_prior"], groups, J)
        overview.add([Cell(r.label, "name", r.id), n(fmt.integer(len(s.rows))),
                      Cell(("◆ " if by["pulled_both_ways"] else "") + both,
                           "flag" if by["pulled_both_ways"] else ""),
                      Cell(("◆ " if by["set_by_prior"] else "") + prior, "flag" if by["set_by_prior"] else ""),
                      Cell(reliable, "nowrap" if s.reliable else "flag"),
                      Cell(_what_to_do(both, prior, s.reliable), "wrap")],
                     cls="muted" if r.status == "unhealthy" else "")
        for row in s.rows:
            full.csv_rows.append([r.id, row.parameter, row.prior, *row.prior_range, row.likelihood,
                                  *row.likelihood_range, row.reading, READINGS[row.reading],
                                  row.near_threshold,
                                  s.pareto_k.get("prior"), s.pareto_k.get("likelihood")])
            if base_name(row.parameter) in groups:
                continue
            if row.reading in ACT_ON or row.near_threshold:
                reading = READINGS[row.reading]
                if row.near_threshold:
                    reading += " ◇ Close to the threshold: the reading could change with other draws."
                detail.add([Cell(r.label, "name", r.id), Cell(row.parameter, "code"),
                            n(_value(row.prior, row.prior_range, s.threshold),
                              "flag" if row.prior >= s.threshold else ""),
                            n(_value(row.likelihood, row.likelihood_range, s.threshold)),
                            Cell(reading, "wrap")])
        for base in sorted(groups):
            mine = [row for row in s.rows if base_name(row.parameter) == base]
            for key in READINGS:
                hit = [row for row in mine if row.reading == key and (key in ACT_ON or row.near_threshold)]
                if not hit:
                    continue
                near = sum(row.near_threshold for row in hit)
                reading = READINGS[key] + (f" ◇ {near} close to the threshold." if near else "")
                detail.add([Cell(r.label, "name", r.id),
                            Cell(f"{base}: {len(hit)} of {len(mine)} groups (each in sensitivity.csv)", "code wrap"),
                            n(fmt.interval(min(x.prior for x in hit), max(x.prior for x in hit), 2),
                              "flag" if key in ACT_ON else ""),
                            n(fmt.interval(min(x.likelihood for x in hit), max(x.likelihood for x in hit), 2)),
                            Cell(reading, "wrap")])
    return {"overview": overview, "detail": detail, "csv": full, "without": without,
            "threshold": fmt.num(THRESHOLD), "k_reliable": fmt.num(K_RELIABLE)}
