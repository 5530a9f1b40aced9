"""The comparison report: one self-contained HTML page and a CSV file of every table.

``write_report(result, out_dir)`` reads a :class:`contenders.records.RunResult` (it never
changes it) and writes ``report.html`` with figures and styles inline, plus the CSV
files, each to a temporary file in ``out_dir`` renamed into place, so an interrupted
run never leaves half a file. Every number on the page is formatted in Python
(:mod:`.format`); the template (``templates/report.html.j2``) holds layout only and
escapes all text, so column names, labels, file names and Stan code are shown as text.
"""

from __future__ import annotations

import csv
import io
import os
import shlex
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from jinja2 import Environment, FileSystemLoader, StrictUndefined

from contenders.cleanup import write_whole
from contenders.rules import MIN_WEIGHT, SE_FACTOR, SMALL_DIFFERENCE
from contenders.statistics.compare import ComparisonRow
from contenders.statistics.effects import direction
from contenders.output.readings import describe
from contenders.output import readings
from contenders.output import recovery_section
from contenders.output.figure_store import drawn
from contenders.output import format as fmt
from contenders.output.sensitivity import sensitivity_context
from contenders.output import out_of_sample
from contenders.statistics.coefficients import base_name, extremes, group_terms, sizes_of
from contenders.output.tables import (MILD, NEXT_STEP, STATUS_TEXT, Cell, Table, misfits, miss_cell, n, p_cell,
                     reading_cell)
from contenders.statistics.features import StatisticRow, reading as check_reading, unit_of

__all__ = ["write_report", "build_context", "CSV_FILES"]

TEMPLATES = Path(__file__).parent / "templates"

#: At most this many leading candidates get a lineup.
LINEUPS = 3

#: The observed value beyond this share of prior draws is marked in the prior tables.
PRIOR_EDGE = 0.99

SECTIONS = [
    ("verdict", "Verdict"),
    ("cautions", "Cautions"),
    ("ranking", "Ranking"),
    ("prior", "Prior predictive trial"),
    ("health", "Sampler health"),
    ("out-of-sample", "Out-of-sample comparison"),
    ("checks", "Predictive checks"),
    ("effects", "Effects across candidates"),
    ("candidates", "Candidates"),
    ("reproducibility", "Reproducibility"),
]

CSV_FILES = (
    "ranking.csv", "verdict_certainty.csv", "prior_plausibility.csv", "prior_trial.csv",
    "sampler_health.csv", "out_of_sample.csv", "pareto_k_bands.csv", "pareto_k_worst.csv", "predictive_checks.csv", "grouped_checks.csv",
    "loo_pit.csv", "quantiles.csv", "effects.csv", "hyperparameters.csv", "parameters.csv", "run_settings.csv", "candidate_files.csv",
    "sensitivity.csv", "coefficients.csv", "group_effects.csv",
)


# --- writing -----------------------------------------------------------------------------



def _csv_text(table: Table) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(table.csv_headers)
    for row in table.csv_rows:
        writer.writerow([fmt.raw(v) for v in row])
    return buf.getvalue()


def environment() -> Environment:
    """The Jinja2 environment of every page (the report, the calibration page, the batch's
    index): templates from ``TEMPLATES``, escaped, strict about missing names."""
    return Environment(loader=FileSystemLoader(str(TEMPLATES)), autoescape=True,
                       undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)


def write_report(result, out_dir: str | Path, command_line: str | Sequence[str] | None = None) -> Path:
    """Write ``report.html`` and the CSV tables into ``out_dir``; return the page's path.

    ``command_line`` (text or a list of arguments) is shown under Reproducibility when
    given.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    ctx = build_context(result, command_line)
    for table in ctx["csv_tables"]:
        write_whole(out / table.csv_name, _csv_text(table))
    if not result.config.conditions and (out / "grouped_checks.csv").exists():
        (out / "grouped_checks.csv").unlink()   # left by an earlier run with conditions
    if ctx["effects_table"] is None and (out / "effects.csv").exists():
        (out / "effects.csv").unlink()          # left by an earlier run with effects
    html = environment().get_template("report.html.j2").render(**ctx)
    path = out / "report.html"
    write_whole(path, html)
    return path


# --- the page's content -----------------------------------------------------------------

@dataclass
class CandidateView:
    """What the page shows of one candidate, formatted."""

    id: str
    label: str
    about: str
    support: str
    status: str
    status_text: str
    reason: str
    rank: str
    code: str
    code_hash: str
    hyperparameters: Table
    prior: Table | None
    parameters: Table | None
    checks: Table | None
    advice: list[str] = field(default_factory=list)
    fits: list[tuple[str, str]] = field(default_factory=list)   # (link relative to the report, name)
    coefficients: Table | None = None
    coefficients_note: str = ""
    groups_note: str = ""


def _name(r) -> str:
    return f"{r.label} ({r.id})" if r.label != r.id else r.id


def _rows_by_id(result) -> dict[str, ComparisonRow]:
    return {row.id: row for row in result.comparison.rows}


def _ordered(result) -> list:
    """Ranked candidates first (by rank), then unhealthy, failed, skipped (by id)."""
    rows = _rows_by_id(result)
    order = {"unhealthy": 1, "failed": 2, "skipped": 3, "ok": 4}
    ranked = sorted((r for r in result.candidates if r.id in rows), key=lambda r: rows[r.id].rank)
    rest = sorted((r for r in result.candidates if r.id not in rows), key=lambda r: (order[r.status], r.id))
    return ranked + rest


def _with_se(value: float, se: float) -> str:
    return f"{fmt.fixed(value, 1)} ({fmt.fixed(se, 1)})"


def _behind(row) -> str:
    return "best" if row.rank == 1 else _with_se(row.elpd_diff, row.elpd_diff_se)


def _rank(row) -> str:
    """The rank shown: shared by candidates tied within Monte Carlo error ("4–5"), from
    the comparison's one standing rule (``compare.standings``)."""
    if not row:
        return fmt.MISSING
    return str(row.shared_rank or row.rank)


#: How the standing of a ranked candidate reads in the tables (compare.standings).
STANDING_TEXT = {
    "best": "best",
    "tied": "no: tied with the best within Monte Carlo error",
    "close": "no: too close to tell apart (less than {small} elpd behind)",
    "uncertain": "no: the order is uncertain",
    "worse": "yes: clearly worse",
}


def _ranking(result, cands) -> Table:
    rows = _rows_by_id(result)
    extreme = result.config.ppp_extreme
    t = Table("ranking.csv",
              ["Rank", "Candidate", "Status", "elpd (SE)", "Behind the best (SE of difference)",
               "Stacking weight", "Pseudo-BMA+ weight", "Notes and what to do next"],
              csv_headers=["rank", "id", "label", "status", "elpd", "elpd_se", "elpd_behind_best",
                           "elpd_behind_best_se", "stacking_weight", "pseudo_bma_weight", "p_loo",
                           "elpd_mcse", "elpd_method", "tied_with", "misses", "reason", "shared_rank",
                           "standing"],
              numeric=[True, False, False, True, True, True, True, False])
    for r in cands:
        row = rows.get(r.id)
        misses = misfits(r.checks, extreme, result.config.relevant)
        notes = []
        if row:
            if row.tied_with:
                notes.append("tied within Monte Carlo error with " + ", ".join(row.tied_with)
                             + "; the order among them would change with the seed, so they share rank "
                             + _rank(row))
            if misses:
                notes.append("misses " + ", ".join(misses)
                             + ": treat its predictions of these with suspicion (see Predictive checks)")
            if r.prior is not None and r.prior.flagged:
                notes.append(r.prior.message)
            if not notes:
                notes.append("no check flagged")
        else:
            notes.append(r.reason.splitlines()[0] if r.reason else "")
            notes.append(NEXT_STEP.get(r.status, ""))
        cls = {"ok": "ranked", "unhealthy": "unhealthy", "failed": "failed", "skipped": "skipped"}[r.status]
        t.add([
            n(_rank(row)),
            Cell(r.label, "name", r.id),
            Cell(STATUS_TEXT[r.status], "status " + cls),
            n(_with_se(row.elpd_loo, row.elpd_loo_se) if row else fmt.MISSING),
            n(_behind(row) if row else fmt.MISSING),
            n(fmt.fixed(row.stacking_weight, 2) if row else fmt.MISSING),
            n(fmt.fixed(row.pseudo_bma_weight, 2) if row else fmt.MISSING),
            Cell(fmt.sentences(notes), "wrap"),
        ], [
            row.rank if row else None, r.id, r.label, r.status, row.elpd_loo if row else None,
            row.elpd_loo_se if row else None, row.elpd_diff if row else None,
            row.elpd_diff_se if row else None, row.stacking_weight if row else None,
            row.pseudo_bma_weight if row else None, row.p_loo if row else None,
            row.elpd_mcse if row else None, readings.elpd_method(row.elpd_method) if row else None,
            " ".join(row.tied_with) if row else None, "; ".join(misses), r.reason,
            row.shared_rank if row else None, row.standing if row else None,
        ], cls)
    return t


def _certainty(result) -> Table:
    rows = _rows_by_id(result)
    t = Table("verdict_certainty.csv",
              ["Candidate", "elpd (SE)", "Behind the best (SE of difference)", "Told apart from the best?",
               "Stacking weight", "Pseudo-BMA+ weight"],
              csv_headers=["id", "label", "elpd", "elpd_se", "elpd_behind_best", "elpd_behind_best_se",
                           "beyond_two_se", "stacking_weight", "pseudo_bma_weight"],
              numeric=[False, True, True, False, True, True])
    standings = getattr(result.comparison, "standings", {}) or {}
    for cid in result.comparison.preferred:
        row = rows[cid]
        st = standings.get(cid)
        kind = st.kind if st else ("best" if row.rank == 1 else "uncertain")
        beyond = row.rank > 1 and row.elpd_diff > SE_FACTOR * row.elpd_diff_se   # the raw fact, for the CSV
        text = STANDING_TEXT[kind].format(small=fmt.num(SMALL_DIFFERENCE))
        why = readings.standing_why(st) if st is not None else ""
        if why:
            text += f" ({why})"
        t.add([
            Cell(row.label, "name", cid),
            n(_with_se(row.elpd_loo, row.elpd_loo_se)),
            n(_behind(row)),
            Cell(fmt.MISSING if kind == "best" else text),
            n(fmt.fixed(row.stacking_weight, 2)),
            n(fmt.fixed(row.pseudo_bma_weight, 2)),
        ], [cid, row.label, row.elpd_loo, row.elpd_loo_se, row.elpd_diff, row.elpd_diff_se,
            bool(beyond), row.stacking_weight, row.pseudo_bma_weight])
    return t


def _prior_plausibility(result, cands) -> Table:
    t = Table("prior_plausibility.csv",
              ["Candidate", "Prior datasets", "Plausible (inside every bound)", "Datasets with non-finite values",
               "Reading and what to do next"],
              csv_headers=["id", "label", "prior_draws", "plausible_share", "nonfinite_datasets", "flagged",
                           "message", "failing_bounds", "fixable_by_narrower_priors"],
              numeric=[False, True, True, True, False])
    for r in cands:
        p = r.prior
        if p is None:
            t.add([Cell(r.label, "name", r.id), n(fmt.MISSING), n(fmt.MISSING), n(fmt.MISSING),
                   Cell("not run: " + (r.reason.splitlines()[0] if r.reason else r.status), "muted wrap")],
                  [r.id, r.label, None, None, None, None, "not run"], "muted")
            continue
        msg = fmt.sentences([p.message] + ([f"{fmt.integer(p.n_nonfinite)} prior datasets hold infinite or "
                                            "undefined values: the priors allow extreme parameter values; "
                                            "tighten them"] if p.n_nonfinite else []))
        t.add([Cell(r.label, "name", r.id), n(fmt.integer(p.n_draws)),
               n(("◆ " if p.flagged else "") + (fmt.share_against(p.plausible_share, result.config.implausible_share)
                                                 if p.plausible_share is not None else "no bounds set"),
                 "flag" if p.flagged else ""),
               n(fmt.integer(p.n_nonfinite), "flag" if p.n_nonfinite else ""),
               Cell(msg, "wrap")],
              [r.id, r.label, p.n_draws, p.plausible_share, p.n_nonfinite, p.flagged, p.message,
               " ".join(f.statistic for f in getattr(p, "failing", [])) or None,
               " ".join(f"{f.statistic}={'unknown' if f.fixable is None else str(f.fixable).lower()}"
                        for f in getattr(p, "failing", [])) or None],
              "flagged" if p.flagged else "")
    return t


def _prior_long(result, cands) -> Table:
    t = Table("prior_trial.csv", ["Statistic", "Observed", "Prior 5 %", "Prior median", "Prior 95 %",
                                  "Prior draws below observed", "Bound", "Draws inside bound"],
              csv_headers=["id", "statistic", "description", "observed", "prior_mean", "prior_q05",
                           "prior_q50", "prior_q95", "share_below_observed", "bound_low", "bound_high",
                           "share_inside_bound", "missing_draws", "miss", "miss_share_sd"])
    for r in cands:
        if r.prior is None:
            continue
        for row in r.prior.rows:
            b = r.prior.bounds.get(row.statistic)
            t.csv_rows.append([r.id, row.statistic, describe(row.statistic), row.observed,
                               row.mean, row.q05, row.q50, row.q95, row.share_below_observed,
                               b[0] if b else None, b[1] if b else None,
                               r.prior.inside_each.get(row.statistic), row.n_missing,
                               row.miss, row.miss_share_sd])
    return t


def _prior_table(p) -> Table:
    t = Table("", ["Statistic", "Observed", "Prior 5 %", "Prior median", "Prior 95 %",
                   "Prior draws below observed", "Bound", "Draws inside bound"],
              numeric=[False, True, True, True, True, True, True, True])
    for row in p.rows:
        b = p.bounds.get(row.statistic)
        share = row.share_below_observed
        edge = np.isfinite(share) and (share < 1 - PRIOR_EDGE or share > PRIOR_EDGE)
        inside = p.inside_each.get(row.statistic)
        obs, q05, q50, q95 = fmt.alike([row.observed, row.q05, row.q50, row.q95])  # one statistic
        t.add([describe(row.statistic), n(obs), n(q05), n(q50), n(q95),
               n(("◆ " if edge else "") + fmt.share(share), "flag" if edge else ""),
               n(fmt.bound(*b) if b else fmt.MISSING), n(fmt.share(inside) if inside is not None else fmt.MISSING)])
    return t


def _health(result, cands) -> tuple[Table, list[tuple[str, str, list[str]]]]:
    cfg = result.config
    t = Table("sampler_health.csv",
              ["Candidate", "Status", "Largest R-hat", "Smallest bulk ESS", "Smallest tail ESS",
               "Divergent transitions", "Max tree depth hits", "E-BFMI per chain", "adapt_delta runs"],
              csv_headers=["id", "label", "status", "rhat_max", "rhat_worst_parameter", "ess_bulk_min",
                           "ess_tail_min", "ess_worst_parameter", "divergences", "treedepth_hits", "ebfmi",
                           "adapt_delta", "attempts", "problems", "warnings"],
              numeric=[False, False, True, True, True, True, True, True, False])
    advice = []
    for r in cands:
        h = r.health
        cls = {"ok": "ranked", "unhealthy": "unhealthy", "failed": "failed", "skipped": "skipped"}[r.status]
        if h is None:
            t.add([Cell(r.label, "name", r.id), Cell(STATUS_TEXT[r.status], "status " + cls)]
                  + [n(fmt.MISSING, "muted")] * 6 + [Cell("not sampled", "muted")],
                  [r.id, r.label, r.status] + [None] * 12, "muted")
            continue
        chains = max(len(h.ebfmi), 1)
        ess_min = cfg.ess_per_chain_min * chains
        rbad = not np.isfinite(h.rhat_max) or h.rhat_max >= cfg.rhat_max
        bbad = h.ess_bulk_min < ess_min
        tbad = h.ess_tail_min < ess_min
        ebad = any(v < cfg.ebfmi_min for v in h.ebfmi)
        first = h.attempts[0].draws if h.attempts else 0
        longer = [" (longer: " + fmt.integer(getattr(a, "draws", 0)) + " draws)"
                  if getattr(a, "draws", 0) and getattr(a, "draws", 0) != first else "" for a in h.attempts]
        runs = " → ".join(f"{a.adapt_delta:g}{more}: {a.divergences} div." for a, more in zip(h.attempts, longer))
        t.add([
            Cell(r.label, "name", r.id),
            Cell(STATUS_TEXT[r.status], "status " + cls),
            n(("◆ " if rbad else "") + fmt.against(h.rhat_max, cfg.rhat_max, 3)
              + (f" ({h.rhat_worst})" if h.rhat_worst else ""), "flag" if rbad else ""),
            n(("◆ " if bbad else "") + fmt.against(h.ess_bulk_min, ess_min, 0), "flag" if bbad else ""),
            n(("◆ " if tbad else "") + fmt.against(h.ess_tail_min, ess_min, 0), "flag" if tbad else ""),
            n(("◆ " if h.divergences else "") + fmt.integer(h.divergences), "flag" if h.divergences else ""),
            n(("◇ " if h.treedepth_hits else "") + fmt.integer(h.treedepth_hits),
              "watch" if h.treedepth_hits else ""),
            n(("◆ " if ebad else "") + ", ".join(fmt.against(v, cfg.ebfmi_min, 2) for v in h.ebfmi),
              "flag" if ebad else ""),
            Cell(runs),
        ], [r.id, r.label, r.status, h.rhat_max, h.rhat_worst, h.ess_bulk_min, h.ess_tail_min, h.ess_worst,
            h.divergences, h.treedepth_hits, " ".join(repr(float(v)) for v in h.ebfmi), h.adapt_delta,
            "; ".join(f"adapt_delta {a.adapt_delta:g}"
                      + (f", warmup {a.warmup}, draws {a.draws}" if getattr(a, "draws", 0) else "")
                      + f": {a.divergences} divergences, {a.seconds:.2f} s"
                      + (f" (and {getattr(a, 'wait_seconds', 0.0):.2f} s waiting for a core)"
                         if getattr(a, "wait_seconds", 0.0) else "")
                      for a in h.attempts),
            "; ".join(h.problems), "; ".join(h.warnings)], cls)
        items = [fmt.sentence(p) for p in h.problems] + [fmt.sentence(w) for w in h.warnings]
        if r.refit_divergences:
            items.append(f"The exact refits for out-of-sample comparison had {r.refit_divergences} divergent "
                         "transitions: the refitted observations' elpd may be off; treat it with caution "
                         "or reparameterise.")
        if items:
            advice.append((r.label, r.id, items))
    return t, advice


def _matrix_cell(row: StatisticRow, extreme: float, relevant) -> Cell:
    """A p-value of the matrix with the miss below it when the observed value lies outside
    the replicated 90 % interval; a detectable miss within its relevant size is marked ◇."""
    cell = p_cell(row.p_value, extreme)
    code = check_reading(row.p_value, row.miss, (relevant or {}).get(row.statistic), extreme)
    if code == "small":
        cell = n("◇ " + cell.text.lstrip("◆ "), "watch")
    size = row.miss
    if size is not None and np.isfinite(size) and size != 0:
        cell.sub = "miss " + fmt.miss(size, row.miss_share_sd, unit_of(row.statistic))
    return cell


def _check_matrix(result, cands, pick) -> tuple[list[str], list[list[Cell]]]:
    """p-values with statistics as rows and candidates as columns; ``pick`` returns the
    rows of one candidate's checks."""
    extreme = result.config.ppp_extreme
    relevant = result.config.relevant
    first = pick(cands[0].checks)
    observed = fmt.alike([row.observed for row in first])   # one column, one count of decimals
    body = []
    for k, row in enumerate(first):
        cells = [Cell(describe(row.statistic)), n(observed[k])]
        for r in cands:
            rr = pick(r.checks)
            cells.append(_matrix_cell(rr[k], extreme, relevant) if k < len(rr) else n(fmt.MISSING))
        body.append(cells)
    return [r.label for r in cands], body


#: Columns of the miss and its reading in the check CSV files.
MISS_CSV = ["miss", "miss_share_sd", "relevant", "reading"]


def _miss_raw(row: StatisticRow, extreme: float, relevant) -> list:
    size = (relevant or {}).get(row.statistic)
    return [row.miss, row.miss_share_sd, size,
            check_reading(row.p_value, row.miss, size, extreme)]


def _checks_long(result, cands) -> Table:
    t = Table("predictive_checks.csv", [],
              csv_headers=["id", "statistic", "description", "observed", "replicated_mean", "replicated_q05",
                           "replicated_q50", "replicated_q95", "p_value", "beyond_extreme"] + MISS_CSV)
    extreme = result.config.ppp_extreme
    for r in cands:
        for row in r.checks.rows:
            p = row.p_value
            t.csv_rows.append([r.id, row.statistic, describe(row.statistic), row.observed, row.mean,
                               row.q05, row.q50, row.q95, p,
                               bool(np.isfinite(p) and (p < extreme or p > 1 - extreme))]
                              + _miss_raw(row, extreme, result.config.relevant))
    return t


def _grouped_long(result, cands) -> Table:
    t = Table("grouped_checks.csv", [],
              csv_headers=["id", "condition", "level", "statistic", "description", "observed",
                           "replicated_mean", "replicated_q05", "replicated_q50", "replicated_q95", "p_value"]
              + MISS_CSV)
    for r in cands:
        for cond, levels in r.checks.grouped.items():
            for level, rows in levels.items():
                for row in rows:
                    t.csv_rows.append([r.id, cond, str(level), row.statistic, describe(row.statistic),
                                       row.observed, row.mean, row.q05, row.q50, row.q95,
                                       row.p_value]
                                      + _miss_raw(row, result.config.ppp_extreme, result.config.relevant))
    return t


def _check_table(checks, extreme: float, relevant=None) -> Table:
    t = Table("", ["Statistic", "Observed", "Replicated median", "Replicated 90 % interval",
                   "Miss beyond the interval (share of SD)", "Posterior predictive p", "Reading"],
              numeric=[False, True, True, True, True, True, False])
    for row in checks.rows:   # one statistic per row: its values share one count of decimals
        obs, q50, q05, q95 = fmt.alike([row.observed, row.q50, row.q05, row.q95])
        t.add([describe(row.statistic), n(obs), n(q50), n(f"{q05} to {q95}"), miss_cell(row),
               p_cell(row.p_value, extreme), reading_cell(row, extreme, relevant)])
    return t


def _pit_table(cands) -> Table:
    """The LOO-PIT band test per candidate: inside or not, where the ECDF leaves the band."""
    from contenders.output.readings import band_text, pit_shape_text
    from contenders.statistics.checks import leaves_band, pit_shape

    t = Table("loo_pit.csv", ["Candidate", "ECDF inside the band", "Where it leaves the band",
                              "Reading and what to do next"],
              csv_headers=["id", "label", "band", "inside", "points", "outside_points", "above", "below",
                           "largest_gap", "method", "reading"],
              numeric=[False, False, False, False])
    for r in cands:
        test = r.checks.loo_pit_test
        flagged = leaves_band(test)
        reading = pit_shape_text(pit_shape(r.checks.loo_pit))
        if flagged and not reading:
            reading = "the LOO-PIT values depart from uniform; look at the figure for where"
        if not reading:
            reading = "no clear pattern; this does not show the candidate is right"
        inside = test.get("inside")
        shown = "not tested" if inside is None else ("◆ no" if flagged else "yes")
        where = band_text(test)
        if where:
            where = (where[0].upper() + where[1:] + f" ({test['outside_points']} of {test['points']} points, "
                     f"at most {fmt.fixed(test['largest_gap'], 3)} outside)")

        def spans(xs):
            return " ".join(f"{a:g}-{b:g}" for a, b in xs)

        t.add([Cell(r.label, "name", r.id), Cell(shown, "flag" if flagged else ""), Cell(where or "—", "wrap"),
               Cell(fmt.sentence(reading), "wrap")],
              [r.id, r.label, test.get("band"), inside, test.get("points"), test.get("outside_points"),
               spans(test.get("above", [])), spans(test.get("below", [])), test.get("largest_gap"),
               readings.band_method(test) if "band" in test else None, reading],
              "flagged" if flagged else "")
    return t


def _quantile_table(cands) -> Table:
    """Where each candidate's replicated quantiles miss the observed ones; the CSV has
    every level of every candidate."""
    from contenders.output.readings import quantile_misses

    t = Table("quantiles.csv", ["Candidate", "Observed quantiles outside the replicated 95 % interval"],
              csv_headers=["id", "label", "level", "observed", "replicated_median", "lower_95", "upper_95",
                           "lower_50", "upper_50", "share_replicated_at_or_above", "miss"])
    for r in cands:
        rows = getattr(r.checks, "quantiles", [])
        misses = quantile_misses(rows)
        # listed, not flagged: 19 pointwise intervals miss now and then by chance
        t.add([Cell(r.label, "name", r.id), Cell("; ".join(misses) if misses else "none of the 19 levels", "wrap")])
        for q in rows:
            t.csv_rows.append([r.id, r.label, q.level, q.observed, q.median, q.lower, q.upper,
                               q.lower50, q.upper50, q.share_above, q.miss])
    return t


def _effect_units(e, outcome: str) -> str:
    return f"{outcome} per unit of {e.column}" if e.kind == "slope" else outcome


def _estimate(mean: float, lo: float, hi: float, decimals: int | None = None) -> str:
    if decimals is None:
        return f"{fmt.num(mean)} ({fmt.interval(lo, hi)})"
    return (f"{fmt.fixed(mean, decimals)} ({fmt.fixed(lo, decimals)} to {fmt.fixed(hi, decimals)})")


READING_TEXT = {"agree": "agree", "depends": "◆ depends on the candidate",
                "single": "one candidate carries the weight", "none": "no ranked candidate"}


def _effects_table(result, effects) -> Table:
    """Candidates as rows (ranked first, by elpd), effects as columns: the mean of each
    replicated effect with its 95 % interval, ◇ where the observed value lies outside;
    the observed value first, the stacking-weighted mix and the reading last. Effects
    are few and candidates many, so this way round the table fits the page's width.
    The CSV keeps one row per effect and candidate."""
    outcome = result.design.outcome
    heads: list[tuple[str, str, str, Any]] = []   # id, label, status, weight
    for e in effects:
        for row in e.rows:
            if row.id not in [h[0] for h in heads]:
                heads.append((row.id, row.label, row.status, row.weight))
    t = Table("effects.csv",
              ["Candidate", "Stacking weight"] + [f"{e.title} ({_effect_units(e, outcome)})" for e in effects],
              csv_headers=["effect", "description", "kind", "column", "level", "reference", "units", "id",
                           "label", "status", "rank", "stacking_weight", "observed", "replicated_mean",
                           "replicated_q025", "replicated_q975", "direction", "observed_inside",
                           "n_draws", "n_missing", "reading"],
              numeric=[False, True] + [True] * len(effects))
    digits = []
    for e in effects:
        c = e.combined
        same = [e.observed] + [v for row in e.rows if row.n_draws for v in (row.mean, row.lower, row.upper)]
        same += [c.mean, c.lower, c.upper] if c else []
        digits.append(fmt.decimals(same))   # one effect per column: its values share one count of decimals
    t.add([Cell("Observed in the data"), n("")] + [n(fmt.fixed(e.observed, d)) for e, d in zip(effects, digits)],
          cls="observed")
    for cid, label, status, weight in heads:
        ranked = weight is not None
        cells = [Cell(label, "name", cid), n(fmt.fixed(weight, 2) if ranked else "not ranked", "" if ranked else "muted")]
        for e, d in zip(effects, digits):
            row = {r.id: r for r in e.rows}.get(cid)
            if row is None or not row.n_draws:
                cells.append(n(fmt.MISSING, "muted"))
                continue
            outside = row.observed_inside is False
            cells.append(n(("◇ " if outside else "") + _estimate(row.mean, row.lower, row.upper, d),
                           ("watch " if outside else "") + ("" if ranked else "muted")))
        t.add(cells, cls="" if ranked else "muted")
    t.add([Cell("Stacking-weighted mix"), n("")]
          + [n(_estimate(e.combined.mean, e.combined.lower, e.combined.upper, d) if e.combined
               else fmt.MISSING) for e, d in zip(effects, digits)], cls="combined")
    t.add([Cell("Do the weighted candidates agree?"), n("")]
          + [Cell(READING_TEXT[e.reading], "flag" if e.reading == "depends" else "") for e in effects],
          cls="flagged" if any(e.reading == "depends" for e in effects) else "")
    for e in effects:
        c = e.combined
        units = _effect_units(e, outcome)
        common = [e.key, e.title, e.kind, e.column, e.level, e.reference, units]
        for row in e.rows:
            t.csv_rows.append(common + [row.id, row.label, row.status, row.rank, row.weight,
                                        e.observed, row.mean, row.lower, row.upper, row.direction,
                                        row.observed_inside, row.n_draws, row.n_missing, e.reading])
        if c:
            t.csv_rows.append(common + ["stacking_combined", "stacking-weighted mix", None, None, None,
                                        e.observed, c.mean, c.lower, c.upper,
                                        direction(c.lower, c.upper),
                                        bool(c.lower <= e.observed <= c.upper), c.n_draws, 0,
                                        e.reading])
    return t


def _hyper_table(r) -> Table:
    t = Table("", ["Input", "Value used"], numeric=[False, True])
    for k, v in r.hyperparameters.items():
        t.add([Cell(k, "code"), n(fmt.num(v, 6) if isinstance(v, (int, float)) and not isinstance(v, bool)
                                  else str(v))])
    return t


def _group_names(r, design) -> set[str]:
    """Base names of a candidate's group-level parameters (one value per group)."""
    names = [row.parameter for row in r.health.table] if r.health is not None else []
    return group_terms(sizes_of(names), design.J, design.K)


def _param_table(h, groups: set[str] = frozenset(), design=None) -> Table:
    """Posterior summaries; coefficients are named by their predictor, and the group
    terms (one value per group) are folded into one row with their worst diagnostics."""
    t = Table("", ["Parameter", "Mean", "SD", "5 %", "95 %", "R-hat", "Bulk ESS", "Tail ESS"],
              numeric=[False] + [True] * 7)
    names = {f"coef[{k + 1}]": c.name for k, c in enumerate(design.coding)} if design is not None else {}
    folded: dict[str, tuple[int, list]] = {}   # base name -> (its row in the table, its elements)
    for row in h.table:
        base = base_name(row.parameter)
        if base in groups:
            if base not in folded:
                t.add([])   # placeholder, filled below at the first row's position
                folded[base] = (len(t.rows) - 1, [])
            folded[base][1].append(row)
            continue
        label = row.parameter + (f" ({names[row.parameter]})" if row.parameter in names else "")
        t.add([Cell(label, "code"), n(fmt.num(row.mean)), n(fmt.num(row.sd, 2)),
               n(fmt.num(row.q05)), n(fmt.num(row.q95)), n(fmt.fixed(row.rhat, 3)),
               n(fmt.integer(row.ess_bulk)), n(fmt.integer(row.ess_tail))])
    for base, (slot, rows) in folded.items():
        column = design.group_column if design is not None else "the group column"
        t.rows[slot] = [
            Cell(f"{base}[1] … {base}[{len(rows)}] ({len(rows)} groups of {column}; summarised below, "
                 "every one in parameters.csv)", "code wrap"),
            n(fmt.MISSING, "muted"), n(fmt.MISSING, "muted"), n(fmt.MISSING, "muted"), n(fmt.MISSING, "muted"),
            n("largest " + fmt.fixed(max(r.rhat for r in rows), 3)),
            n("smallest " + fmt.integer(min(r.ess_bulk for r in rows))),
            n("smallest " + fmt.integer(min(r.ess_tail for r in rows)))]
    return t


def _estimate95(values) -> str:
    mean, lo, hi = values
    return f"{fmt.num(mean)} ({fmt.interval(lo, hi)})"


def _coefficient_table(c) -> Table | None:
    """One candidate's coefficients: named, internal value and the value in the
    outcome's units (ratio per unit under a log link), each with its 95 % interval."""
    if c is None or not c.rows:
        return None
    t = Table("", ["Coefficient", "Internal (centred and scaled)", "In the outcome's units", "Meaning"],
              numeric=[False, True, True, False])
    for r in c.rows:
        t.add([Cell(f"{r.name} ({r.parameter})", "code"), n(_estimate95(r.internal)),
               n(_estimate95(r.value) if c.link else fmt.MISSING, "" if c.link else "muted"),
               Cell(r.units or "link not known", "wrap" if c.link else "wrap muted")])
    return t


def _coefficients_note(c) -> str:
    if c is None or not c.rows:
        return ""
    if not c.link:
        return f"Only the internal values: {c.reason}."
    if c.link == "log":
        return (f"Log link: exp(linear predictor) is the {c.sets}. A coefficient in the outcome's units is the "
                f"ratio by which one unit of the predictor (or the level against the reference) multiplies "
                f"{c.moves}; the intercept row is the {c.sets} at the predictors' zero, for a group at the "
                "centre of the group distribution. Internal: per SD of a numeric predictor, on the log scale.")
    return (f"Identity link: the linear predictor is the {c.sets}. A coefficient in the outcome's units is the "
            f"change of {c.moves} per unit of the predictor (or between the level and the reference); the "
            "intercept row is the value at the predictors' zero, for a group at the centre of the group "
            "distribution. Internal: per SD of a numeric predictor.")


def _groups_note(c) -> str:
    """The group terms in one paragraph: count, SD parameter, the extreme groups."""
    if c is None or not c.groups:
        return ""
    text = f"{len(c.groups)} groups of {c.group_column} ({c.group_parameter}[1] … {c.group_parameter}[{len(c.groups)}])"
    if c.group_sd is not None:
        unit = f" {c.outcome}" if c.link == "identity" else (" on the log scale" if c.link == "log" else "")
        text += f"; their SD {c.group_sd_parameter} is {_estimate95(c.group_sd)}{unit}"
    for s in getattr(c, "slopes", []):
        text += (f"; the groups' slopes on {s.name} vary with SD {s.parameter} "
                 f"{_estimate95(s.per_unit)}" + (f" ({s.units})" if s.units else "")
                 + (f", correlated with their intercepts at {_estimate95(s.correlation)}"
                    if np.isfinite(s.correlation[0]) else ""))
    low, high = extremes(c)
    known = bool(c.link) and np.isfinite(c.groups[0].offset[0])

    def one(g) -> str:
        if known and c.link == "log":
            return f"{g.level} (×{fmt.num(g.value[0])}, {fmt.interval(g.value[1], g.value[2])})"
        if known:
            return f"{g.level} ({fmt.num(g.offset[0])} {c.outcome}, {fmt.interval(g.offset[1], g.offset[2])})"
        return f"{g.level} ({c.group_parameter} {fmt.num(g.internal[0])})"

    what = ("offset from the typical group, as a ratio" if known and c.link == "log" else
            "offset from the typical group" if known else "internal value")
    if low:
        text += (f". Lowest, with their {what} and 95 % interval: " + "; ".join(one(g) for g in low)
                 + ". Highest: " + "; ".join(one(g) for g in high))
    return text + ". Every group is in group_effects.csv."


def _fit_links(r, out) -> list[tuple[str, str]]:
    """Stored fits of a candidate as links relative to the report's folder."""
    links = []
    for path in getattr(r, "fit_files", []) or []:
        p = Path(path)
        try:
            href = os.path.relpath(p.resolve(), Path(out).resolve())
        except ValueError:  # another drive
            href = p.resolve().as_uri()
        links.append((Path(href).as_posix(), p.name))
    return links


def _candidate_views(result, cands) -> list[CandidateView]:
    rows = _rows_by_id(result)
    views = []
    for r in cands:
        advice = []
        if r.status in NEXT_STEP:
            advice.append(NEXT_STEP[r.status])
        views.append(CandidateView(
            id=r.id, label=r.label, about=r.about, support=r.support, status=r.status,
            status_text=STATUS_TEXT[r.status], reason=r.reason,
            rank=_rank(rows.get(r.id)),
            code=r.code, code_hash=r.code_hash, hyperparameters=_hyper_table(r),
            prior=_prior_table(r.prior) if r.prior is not None else None,
            parameters=(_param_table(r.health, _group_names(r, result.design), result.design)
                        if r.health is not None and r.health.table else None),
            checks=(_check_table(r.checks, result.config.ppp_extreme, result.config.relevant)
                    if r.checks is not None else None),
            advice=advice, fits=_fit_links(r, result.out),
            coefficients=_coefficient_table(getattr(r, "coefficients", None)),
            coefficients_note=_coefficients_note(getattr(r, "coefficients", None)),
            groups_note=_groups_note(getattr(r, "coefficients", None)),
        ))
    return views


def _coefficient_csvs(cands) -> list[Table]:
    """coefficients.csv (every candidate's coefficients on both scales) and
    group_effects.csv (every group's term and offset)."""
    coefs = _long_csv("coefficients.csv", [
        "id", "label", "link", "linear_predictor_sets", "parameter", "name", "column", "level", "reference",
        "predictor_center", "predictor_scale", "internal_mean", "internal_q025", "internal_q975", "units",
        "mean", "q025", "q975", "reason"], [])
    groups = _long_csv("group_effects.csv", [
        "id", "label", "link", "column", "level", "parameter", "internal_mean", "internal_q025", "internal_q975",
        "offset_mean", "offset_q025", "offset_q975", "outcome_scale_mean", "outcome_scale_q025",
        "outcome_scale_q975"], [])
    for r in cands:
        c = getattr(r, "coefficients", None)
        if c is None:
            continue
        for row in c.rows:
            coefs.csv_rows.append([r.id, r.label, c.link or None, c.sets or None, row.parameter, row.name,
                                   row.column, row.level, row.reference, row.center, row.scale,
                                   *row.internal, row.units or None, *row.value, c.reason or None])
        for g in c.groups:
            groups.csv_rows.append([r.id, r.label, c.link or None, c.group_column, g.level, g.parameter,
                                    *g.internal, *g.offset, *g.value])
    return [coefs, groups]


def _long_csv(name: str, headers: list[str], rows: list[list[Any]]) -> Table:
    return Table(name, [], csv_headers=headers, csv_rows=rows)


def _settings(result, command_line) -> Table:
    cfg, d = result.config, result.design
    t = Table("run_settings.csv", ["Setting", "Value"], csv_headers=["setting", "value"])

    def add(key: str, shown: str, raw: Any) -> None:
        t.add([key, shown], [key, raw])

    add("data file", str(cfg.data) if cfg.data else fmt.MISSING, cfg.data)
    add("data SHA-256", result.data_hash or fmt.MISSING, result.data_hash)
    add("outcome column", d.outcome, d.outcome)
    add("observations used", fmt.integer(d.N), d.N)
    add("rows dropped (outcome missing or not finite)", fmt.integer(d.dropped_rows), d.dropped_rows)
    if d.asks_censoring:
        n_right, n_left = int((d.censoring == 1).sum()), int((d.censoring == -1).sum())
        add("censored observations (right, left; they enter the statistics at their censoring points)",
            f"{fmt.integer(n_right)}, {fmt.integer(n_left)}", f"{n_right} {n_left}")
        lo, hi = d.window
        add("truncation window", f"{'' if lo is None else fmt.num(lo, 4)}:{'' if hi is None else fmt.num(hi, 4)}"
            if d.window != (None, None) else "none", f"{lo} {hi}")
    add("predictor columns", ", ".join(cfg.predictors) or "none", " ".join(cfg.predictors))
    add("predictor coding", "; ".join(f"{c.name}: centre {fmt.num(c.center, 4)}, scale {fmt.num(c.scale, 4)}"
                                      for c in d.coding) or "none",
        "; ".join(f"{c.name}: center {c.center!r} scale {c.scale!r}" for c in d.coding))
    add("group column", d.group_column or "none", d.group_column)
    add("condition columns", ", ".join(cfg.conditions) or "none", " ".join(cfg.conditions))
    add("reference scale (y_center, y_scale)", f"{fmt.num(d.y_center, 4)}, {fmt.num(d.y_scale, 4)}",
        f"{d.y_center!r} {d.y_scale!r}")
    add("candidates folder", str(cfg.candidates) if cfg.candidates else "built-in candidates",
        cfg.candidates or "built-in")
    add("engine", result.engine, result.engine)
    add("seed", str(cfg.seed), cfg.seed)
    add("chains, warmup, draws", ", ".join(fmt.integer(v) for v in (cfg.chains, cfg.warmup, cfg.draws)),
        f"{cfg.chains} {cfg.warmup} {cfg.draws}")
    add("prior predictive draws", fmt.integer(cfg.prior_draws), cfg.prior_draws)
    add("adapt_delta and escalation", f"{cfg.adapt_delta:g}, then " + (", ".join(f"{v:g}" for v in cfg.escalation)
                                                                         or "none"),
        " ".join(f"{v:g}" for v in (cfg.adapt_delta, *cfg.escalation)))
    add("max_treedepth", str(cfg.max_treedepth), cfg.max_treedepth)
    add("health thresholds", f"R-hat below {cfg.rhat_max:g}; ESS at least {cfg.ess_per_chain_min:g} per chain; "
                             f"E-BFMI at least {cfg.ebfmi_min:g}",
        f"rhat_max={cfg.rhat_max!r} ess_per_chain_min={cfg.ess_per_chain_min!r} ebfmi_min={cfg.ebfmi_min!r}")
    add("replicated datasets used by the checks", fmt.integer(cfg.check_draws), cfg.check_draws)
    add("extreme posterior predictive p-value", f"below {cfg.ppp_extreme:g} or above {1 - cfg.ppp_extreme:g}",
        cfg.ppp_extreme)
    add("relevant sizes of a miss", ", ".join(f"{k} {v:g}" for k, v in cfg.relevant.items()) or "none set",
        " ".join(f"{k}={v:g}" for k, v in cfg.relevant.items()))
    add("LOO-PIT band", f"simultaneous {100 * (1 - cfg.pit_alpha):g} % (pit_alpha {cfg.pit_alpha:g})", cfg.pit_alpha)
    add("cross-validation", f"{cfg.cross_validation}; at most {cfg.refit_cap} exact refits; {cfg.folds} folds",
        f"{cfg.cross_validation} refit_cap={cfg.refit_cap} folds={cfg.folds}")
    add("plausibility bounds", "; ".join(f"{describe(k)}: {fmt.bound(*v)}" for k, v in cfg.bounds.items())
        or "none", "; ".join(f"{k}: {v[0]!r} {v[1]!r}" for k, v in cfg.bounds.items()))
    add("implausible prior share flagged below", fmt.share(cfg.implausible_share), cfg.implausible_share)
    add("thresholds for shares below", ", ".join(f"{v:g}" for v in cfg.thresholds) or "none",
        " ".join(f"{v!r}" for v in cfg.thresholds))
    for name, version in result.versions.items():
        add(f"version of {name}", str(version), version)
    sampled, reused = getattr(result, "fits_sampled", None), getattr(result, "fits_reused", None)
    if sampled is not None and reused is not None:
        add("fits sampled in this run, and reused from the fit store", f"{sampled}, {reused}",
            f"{sampled} {reused}")
    add("run time", fmt.seconds(result.seconds), result.seconds)
    if command_line:
        line = command_line if isinstance(command_line, str) else shlex.join(list(command_line))
        add("command line", line, line)
    return t


def _files(result, cands) -> Table:
    """Seconds per candidate: sampling in each trial, the time its fits waited for a free
    core while other candidates' chains held them all (not part of a trial's seconds),
    and the total from start to end of its work."""
    t = Table("candidate_files.csv", ["Candidate", "Program SHA-256", "Prior", "Posterior", "Refits",
                                      "Waiting for a core", "Total"],
              csv_headers=["id", "label", "status", "code_sha256", "seconds_prior", "seconds_posterior",
                           "seconds_refits", "seconds_waiting", "seconds_total"],
              numeric=[False, False, True, True, True, True, True])
    for r in cands:
        s = r.seconds
        parts = [s[k] for k in ("prior", "posterior", "refits") if k in s]
        waits = [s[k] for k in ("prior_wait", "posterior_wait", "refits_wait") if k in s]
        wait = sum(waits) if waits else None
        total = s.get("total", sum(parts) + (wait or 0.0) if parts else None)
        t.add([Cell(r.label, "name", r.id), Cell(r.code_hash, "hash"), n(fmt.seconds(s.get("prior"))),
               n(fmt.seconds(s.get("posterior"))), n(fmt.seconds(s.get("refits"))), n(fmt.seconds(wait)),
               n(fmt.seconds(total))],
              [r.id, r.label, r.status, r.code_hash, s.get("prior"), s.get("posterior"), s.get("refits"), wait,
               total])
    return t


def _store(result):
    """The run's fit store (``RunResult.store``), which also keeps drawn figures (see
    :mod:`.figure_store`); None: figures are drawn and not kept."""
    return getattr(result, "store", None)


def censoring_note(d) -> str:
    """What the predictive checks and lineups do with censored and truncated observations
    (empty when neither was asked for)."""
    if not d.asks_censoring:
        return ""
    parts = []
    n_right, n_left = int((d.censoring == 1).sum()), int((d.censoring == -1).sum())
    if n_right or n_left:
        kinds = []
        if n_right:
            kinds.append(f"{fmt.integer(n_right)} right-censored (the true value is larger)")
        if n_left:
            kinds.append(f"{fmt.integer(n_left)} left-censored (the true value is smaller)")
        parts.append(f"Of the {fmt.integer(d.N)} observations, {' and '.join(kinds)}. They enter every "
                     "statistic, figure and lineup panel at their censoring points, and each candidate's "
                     "replicate of such an observation is censored at the same point. An observed value's "
                     "own censoring time is unknown, so for the checks its replicate is censored at a time "
                     "drawn from the censoring times' distribution (the Kaplan-Meier estimate with the "
                     "censorings as events), given that it exceeds the observed value; this assumes, as the "
                     "likelihood does, that censoring does not depend on the outcome. A censored value's "
                     "LOO-PIT is drawn uniformly over the range its censoring allows.")
    lo, hi = d.window
    if d.window != (None, None):
        side = (f"from {fmt.num(lo, 4)} to {fmt.num(hi, 4)}" if lo is not None and hi is not None
                else f"above {fmt.num(lo, 4)}" if lo is not None else f"below {fmt.num(hi, 4)}")
        parts.append(f"The data were truncated to values {side}: every candidate's likelihood is conditioned "
                     "on that window and its replicates are drawn inside it.")
    return " ".join(parts)


def _lineups(result, cands) -> list[dict]:
    by_id = {r.id: r for r in cands}
    out = []
    for k, cid in enumerate(result.comparison.preferred[:LINEUPS]):
        r = by_id.get(cid)
        if r is None or r.y_rep_sample is None:
            continue
        lu = drawn(_store(result), "lineup", result.design.y, r.y_rep_sample,
                   seed=int(result.config.seed) + 7919 * (k + 1))
        if lu is None:
            continue
        out.append({"id": r.id, "label": r.label, "panels": lu.panels, "answer": lu.answer,
                    "n_replicates": int(r.y_rep_sample.shape[0]),
                    "range": f"{fmt.num(lu.edges[0], 4)} to {fmt.num(lu.edges[-1], 4)}"})
    return out


def build_context(result, command_line: str | Sequence[str] | None = None) -> dict[str, Any]:
    """Everything the template shows, formatted; tables carry their CSV rows too."""
    cfg, d = result.config, result.design
    cands = _ordered(result)
    by_id = {r.id: r for r in cands}
    rows = _rows_by_id(result)
    with_prior = [r for r in cands if r.prior is not None]
    with_checks = [r for r in cands if r.checks is not None]
    with_oos = [r for r in cands if r.oos is not None]

    ranking = _ranking(result, cands)
    certainty = _certainty(result)
    prior_plausibility_table = _prior_plausibility(result, cands)
    prior_long = _prior_long(result, cands)
    health, health_advice = _health(result, cands)
    oos, oos_estimates = out_of_sample.comparison_tables(result, cands)
    k_bands, k_worst, k_shared = out_of_sample.pareto_k_tables(result, cands)
    rows_of_data = out_of_sample.data_rows(d)
    refitted = [(r.label, ", ".join(str(int(rows_of_data[i])) for i in r.oos.refitted))
                for r in with_oos if r.oos.refitted]
    settings = _settings(result, command_line)
    files = _files(result, cands)
    views = _candidate_views(result, cands)
    sensitivity = sensitivity_context(cands, d.J, d.K)

    stats = [row.statistic for row in with_prior[0].prior.rows] if with_prior else []
    observed = {row.statistic: row.observed for row in with_prior[0].prior.rows} if with_prior else {}

    store = _store(result)
    figs: dict[str, Any] = {
        "elpd": drawn(store, "elpd_differences", result.comparison.rows),
        "prior": drawn(store, "prior_grid", [(r.label, r.prior) for r in with_prior], stats, observed),
        "pareto": drawn(store, "pareto_k_worst", [(r.label, r.oos, rows_of_data) for r in with_oos]),
        "density": drawn(store, "replicate_density_grid", d.y, [(r.label, r.y_rep_sample) for r in with_checks],
                       outcome=d.outcome),
        "stats": drawn(store, "statistic_grid", [(r.label, r.checks) for r in with_checks], cfg.ppp_extreme),
        "pit": drawn(store, "loo_pit_grid", [(r.label, r.checks) for r in with_checks]),
        "quantiles": drawn(store, "quantile_grid", [(r.label, r.checks) for r in with_checks], outcome=d.outcome),
    }

    checks_long = _checks_long(result, with_checks)
    matrix = None
    grouped = []
    pit = None
    quantiles = None
    grouped_long = None
    if with_checks:
        heads, body = _check_matrix(result, with_checks, lambda c: c.rows)
        matrix = {"heads": heads, "ids": [r.id for r in with_checks], "body": body}
        for cond in with_checks[0].checks.grouped:
            levels = with_checks[0].checks.grouped[cond]
            blocks = []
            for level in levels:
                h, b = _check_matrix(result, with_checks,
                                     lambda c, cond=cond, level=level: c.grouped.get(cond, {}).get(level, []))
                blocks.append({"level": str(level), "body": b,
                               "n": int(np.sum(d.table[cond].astype(str).to_numpy() == str(level)))
                               if d.table is not None and cond in d.table else None})
            grouped.append({"condition": cond, "blocks": blocks})
        grouped_long = _grouped_long(result, with_checks)
        pit = _pit_table(with_checks)
        quantiles = _quantile_table(with_checks)

    lineups = _lineups(result, cands)

    effects = result.effects   # compared once, by the runner
    effects_table = _effects_table(result, effects) if effects else None
    figs["effects"] = drawn(store, "effects_across", effects, {e.key: _effect_units(e, d.outcome) for e in effects})

    preferred = [{"id": cid, "label": by_id[cid].label} for cid in result.comparison.preferred if cid in by_id]
    n_status = {s: sum(r.status == s for r in cands) for s in ("ok", "unhealthy", "failed", "skipped")}
    counts = ", ".join(f"{v} {k if k != 'ok' else 'ranked'}" for k, v in n_status.items() if v)

    csv_tables = [ranking, certainty, prior_plausibility_table, prior_long, health, oos, k_bands, k_worst,
                  checks_long, pit, quantiles, settings, files]
    csv_tables.append(sensitivity["csv"])
    if cfg.conditions and grouped_long is not None:
        csv_tables.append(grouped_long)
    if effects_table is not None:
        csv_tables.append(effects_table)
    csv_tables.append(_long_csv("hyperparameters.csv", ["id", "input", "value"],
                                [[r.id, k, v] for r in cands for k, v in r.hyperparameters.items()]))
    csv_tables.append(_long_csv(
        "parameters.csv", ["id", "parameter", "mean", "sd", "q05", "q95", "rhat", "ess_bulk", "ess_tail"],
        [[r.id, row.parameter, row.mean, row.sd, row.q05, row.q95, row.rhat,
          row.ess_bulk, row.ess_tail] for r in cands if r.health is not None for row in r.health.table]))
    csv_tables.extend(_coefficient_csvs(cands))
    csv_tables = [t for t in csv_tables if t is not None]

    data_name = Path(str(cfg.data)).name if cfg.data else "data"
    recovery_verdict = recovery_section.verdict(result)   # model recovery's sentences, after the verdict's
    return {
        "title": f"Candidate models for {d.outcome}",
        "data_name": data_name,
        "outcome": d.outcome,
        "n_obs": fmt.integer(d.N),
        "dropped": fmt.integer(d.dropped_rows) if d.dropped_rows else "",
        "predictors": ", ".join(cfg.predictors),
        "group": d.group_column or "",
        "conditions": list(cfg.conditions),
        "n_candidates": len(cands),
        "counts": counts,
        "engine": result.engine,
        "run_time": fmt.seconds(result.seconds) + (
            f"; {result.fits_reused} of {result.fits_reused + result.fits_sampled} fits loaded from the fit store"
            if getattr(result, "fits_reused", 0) else ""),
        "sections": SECTIONS + recovery_section.nav(result),
        "verdict": list(result.comparison.verdict) + recovery_verdict,
        "verdict_lead": list(getattr(result.comparison, "lead", result.comparison.verdict[:1])),
        "verdict_details": (list(getattr(result.comparison, "details", result.comparison.verdict[1:]))
                            + recovery_verdict),
        "recovery": recovery_section.context(result),
        "preferred": preferred,
        "any_ranked": bool(rows),
        "ranking": ranking,
        "certainty": certainty,
        "prior_plausibility_table": prior_plausibility_table,
        "bounds": [(describe(k), fmt.bound(*v)) for k, v in cfg.bounds.items()],
        "implausible_share": fmt.share(cfg.implausible_share),
        "prior_edge": fmt.share(PRIOR_EDGE),
        "prior_draws": fmt.integer(cfg.prior_draws),
        "sensitivity": sensitivity,
        "health": health,
        "health_advice": health_advice,
        "health_rules": {
            "rhat": fmt.limit(cfg.rhat_max),
            "ess": fmt.limit(cfg.ess_per_chain_min),
            "ebfmi": fmt.limit(cfg.ebfmi_min),
            "treedepth": str(cfg.max_treedepth),
        },
        "oos": oos,
        "oos_estimates": oos_estimates,
        "oos_answer": out_of_sample.answer(
            result.comparison.rows, [r.label for r in with_oos if r.id not in rows]),
        "k_bands": k_bands,
        "k_threshold_shared": (out_of_sample.threshold_text(with_oos[0].oos.k_threshold)
                               if with_oos and k_shared else ""),
        "worst_listed": str(out_of_sample.WORST_LISTED),
        "refitted": refitted,
        "refit_cap": str(cfg.refit_cap),
        "ppp_extreme": fmt.num(cfg.ppp_extreme),
        "small_difference": fmt.num(SMALL_DIFFERENCE),
        "mild_low": fmt.num(MILD[0]),
        "mild_high": fmt.num(MILD[1]),
        "ppp_extreme_high": fmt.num(1 - cfg.ppp_extreme),
        "relevant": ", ".join(f"{describe(k)} = {fmt.miss(v, None, unit_of(k)).lstrip('+')}"
                              for k, v in cfg.relevant.items()),
        "matrix": matrix,
        "grouped": grouped,
        "pit": pit,
        "quantiles": quantiles,
        "pit_band": f"{100 * (1 - cfg.pit_alpha):g} %",
        "pit_alpha": fmt.num(cfg.pit_alpha),
        "lineups": lineups,
        "censoring_note": censoring_note(d),
        "effects_table": effects_table,
        "effect_sentences": [e.sentence for e in effects],
        "effects_min_weight": fmt.num(MIN_WEIGHT),
        "candidates": views,
        "settings": settings,
        "files": files,
        "figures": figs,
        "csv_tables": csv_tables,
        "csv_names": [t.csv_name for t in csv_tables],
        "command_line": (command_line if isinstance(command_line, str) or command_line is None
                         else shlex.join(list(command_line))),
    }
