"""The words of the statistics' readings, in one place: every sentence written from the
numbers, flags and codes that ``contenders.statistics`` computes (statistic names and
reading words, the LOO-PIT band's and quantile misses' phrases, standings and the
verdict's lead and details, sampler-health problems and advice, the prior trial's
message and advice, power-scaling readings, effects' agreement).

Statistics return numbers and categories (a standing's kind and lift, a reading code, a
finding's code with its values); this module turns them into text, once, so a sentence
changes here and nowhere else. The thresholds the sentences name come from
``contenders.rules``.

The boundary: records that keep text fields get them from here, filled by the run
(``pipeline/runner.py``): ``compare_candidates`` (``statistics.compare.rank_candidates``,
then ``verdict`` into ``Comparison.lead`` and ``details``), ``word_health`` (a
``Health``'s ``problems`` and ``warnings`` from its ``findings``, after each
``fit_with_health``), ``word_prior`` (a ``PriorTrial``'s ``message``) and
``compare_effects`` (each effect's ``title`` and ``sentence``), and, in ``pipeline/calibration.py``,
``word_calibration`` (a ``Calibration``'s ``reason``). An estimate's ``Method`` is
worded where it is shown, by ``elpd_method``; a quick look's verdict starts with
``QUICK_LOOK``.
``sensitivity_summary`` is the summary.json record with each reading's advice.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from contenders.output import format as fmt
from contenders.statistics.checks import leaves_band
from contenders.statistics.compare import (Comparison, ComparisonRow, Standing, Weigh, better_share,
                                          rank_candidates)
from contenders.statistics.effects import agreement_reading, direction, effects_across
from contenders.statistics.features import named_misses, read_rows, unit_of
from contenders.rules import MIN_WEIGHT, PPP_EXTREME, SMALL_DIFFERENCE


# --- statistics and their readings ------------------------------------------------------

#: Plain-language names of the statistics, for reports.
DESCRIPTIONS = {
    "mean": "mean",
    "sd": "standard deviation",
    "min": "minimum",
    "max": "maximum",
    "q05": "5 % quantile",
    "q50": "median",
    "q95": "95 % quantile",
    "skewness": "skewness",
}


def describe(name: str) -> str:
    """The plain-language name of a test statistic: "standard deviation", "share below 300"."""
    if name.startswith("below_"):
        return f"share below {name[6:]}"
    return DESCRIPTIONS.get(name, name)


#: What each reading code of one statistic (``statistics.features.reading``) means, in words.
CHECK_READINGS = {
    "fits": "not detectably off",
    "detectable": "detectably off; no relevant size set",
    "small": "detectably off, but by less than the relevant size",
    "relevant": "off by more than the relevant size",
    "possibly_relevant": "outside the interval by more than the relevant size, but not detectably off",
    "unknown": "no p-value",
}


# --- posterior predictive checks -------------------------------------------------------

def band_method(test: dict) -> str:
    """The LOO-PIT uniformity test's method, in words, from its band's probability
    (``statistics.checks.uniformity_test``): what summary.json's ``loo_pit_test`` and
    loo_pit.csv call its ``method``."""
    return (f"simultaneous {100 * test['band']:g} % band of the LOO-PIT ECDF under uniformity "
            "(Säilynoja, Bürkner & Vehtari 2022)")


def with_band_method(test: dict | None) -> dict | None:
    """``test`` with its ``method`` in words after ``n`` (summary.json's ``loo_pit_test``)."""
    if test is None:
        return None
    out: dict = {}
    for key, value in test.items():
        out[key] = value
        if key == "n":
            out["method"] = band_method(test)
    return out


def band_text(test: dict | None) -> str:
    """Where the LOO-PIT ECDF leaves its band, in words: "above the 99 % band at LOO-PIT
    0.59–0.98; below it at 0.02–0.40"; "" when it stays inside or was not tested."""
    if not leaves_band(test):
        return ""

    def spans(xs):
        return ", ".join(f"{a:.2f}" if a == b else f"{a:.2f}–{b:.2f}" for a, b in xs)

    band = f"{100 * test['band']:g} % band"
    parts = []
    if test["above"]:
        parts.append(f"above the {band} at LOO-PIT {spans(test['above'])}")
    if test["below"]:
        parts.append(("below it" if parts else f"below the {band}") + f" at LOO-PIT {spans(test['below'])}")
    return "; ".join(parts)


def pit_shape_text(shape: Mapping | None) -> str:
    """A plain reading of the LOO-PIT values' shape (``statistics.checks.pit_shape``):
    too many or too few values in the outer tenths means predictive distributions too
    narrow or too wide; a shifted mean means predictions run high or low. Empty when no
    pattern is called (or below ten values)."""
    if not shape:
        return ""
    tails, mean = shape["tails"], shape["mean"]
    notes = []
    if shape["spread"] == "narrow":
        notes.append(f"{100 * tails:.0f} % of observations fall in the outer tenth of their predictive "
                     "distributions (10 % expected): predictions are too narrow; consider a family with "
                     "more spread or heavier tails")
    elif shape["spread"] == "wide":
        notes.append(f"only {100 * tails:.0f} % of observations fall in the outer tenth of their "
                     "predictive distributions (10 % expected): predictions are too wide")
    if shape["centre"] == "high":
        notes.append(f"LOO-PIT values average {mean:.2f} (0.5 expected): observations tend to fall "
                     "below their predictions, which run high")
    elif shape["centre"] == "low":
        notes.append(f"LOO-PIT values average {mean:.2f} (0.5 expected): observations tend to fall "
                     "above their predictions, which run low")
    return "; ".join(notes)


def quantile_misses(rows: Sequence) -> list[str]:
    """Where in the distribution the replicated quantiles miss the observed ones, as
    short phrases: "5–15 % (replicates high)"."""
    out, run = [], []
    for miss, row in [(row.miss, row) for row in rows] + [(None, None)]:
        if run and miss != run[-1].miss:
            a, b = run[0].level, run[-1].level
            span = f"{100 * a:.0f} %" if a == b else f"{100 * a:.0f}–{100 * b:.0f} %"
            out.append(f"{span} ({run[0].miss})")
            run = []
        if miss:
            run.append(row)
    return out


# --- standings and the verdict ----------------------------------------------------------

def standing_why(st: Standing) -> str:
    """Why a candidate's standing comes from another candidate, as a phrase ("" when its
    own difference sets it): "tied within Monte Carlo error with Weibull", or "ranked
    above Gamma, which cannot be separated from the best, so not called clearly worse"."""
    if st.lifted == "tied":
        return "tied within Monte Carlo error with " + ", ".join(st.lifted_by)
    if st.lifted == "above":
        return (f"ranked above {st.lifted_by[0]}, which cannot be separated from the best, "
                "so not called clearly worse")
    return ""


def _place(st: Standing, n: int) -> str:
    """"ranks first", "ranks 3 of 5", "ranks 4–5 of 5 (tied within Monte Carlo error)"."""
    if st.rank == "1":
        return "ranks first"
    return f"ranks {st.rank} of {n}" + (" (tied within Monte Carlo error)" if "–" in st.rank else "")


def _p_is(text: str) -> str:
    """"p = 0.004", or "p < 0.001" when the value is written as a bound."""
    return "p " + text if text[:1] in "<>" else "p = " + text


def _misfit(r, ppp_extreme: float, relevant: Mapping[str, float] | None = None) -> list[str]:
    """Short descriptions of the predictive checks a candidate fails, each with the size
    of its miss (observed minus the nearest end of the replicated 90 % interval). With
    relevant sizes set, a statistic that has one is named only when its miss is larger
    (``features.named_misses``); one without a relevant size is named when detectable."""
    if r.checks is None:
        return []
    out = []
    relevant = relevant or {}
    for row in named_misses(r.checks.rows, ppp_extreme, relevant):
        p = row.p_value
        by = fmt.miss_words(row.miss, row.miss_share_sd, unit_of(row.statistic))
        if by:
            what = f"observed {row.observed:.4g}, {by}"
        else:   # p = Pr(T(y_rep) >= T(y)): near 0, replicates fall short of the observed value
            what = f"replicates {'lower' if p < 0.5 else 'higher'} than the observed {row.observed:.4g}"
        unset = "; no relevant size set" if relevant and row.statistic not in relevant else ""
        out.append(f"{describe(row.statistic)} ({what}; "
                   f"{_p_is(fmt.pvalue_against(p, ppp_extreme, 1 - ppp_extreme))}{unset})")
    where = band_text(r.checks.loo_pit_test)   # the band's level is the run's pit_alpha
    if where:
        out.append(f"calibration (LOO-PIT ECDF {where})")
    return out


def _small_misses(r, ppp_extreme: float, relevant: Mapping[str, float]) -> int:
    """How many of a candidate's statistics are detectably off by less than their
    relevant size (``features.reading`` "small")."""
    if r.checks is None or not relevant:
        return 0
    return sum(code == "small" for code in read_rows(r.checks.rows, ppp_extreme, relevant))


def _relevance_sentence(ranked, misses: dict, ppp_extreme: float, relevant: Mapping[str, float]) -> str:
    """What the named misses were judged against: no relevant sizes (every detectable miss
    is named, however small), or the sizes set and how many smaller misses were left out."""
    if not relevant:
        if not any(misses.values()):
            return ""
        return ("No relevant sizes are set ([checks] relevant), so every detectable miss is named, however "
                "small it is in the outcome's units (with many observations a difference too small to matter "
                "is still detected); set one per statistic to name only the misses that matter.")
    sizes = ", ".join(f"{describe(k)} = {fmt.miss(v, None, unit_of(k)).lstrip('+')}" for k, v in relevant.items())
    small = {r.label: _small_misses(r, ppp_extreme, relevant) for r in ranked}
    left = sum(small.values())
    text = (f"Misses of a statistic with a relevant size ({sizes}) are named only when larger than that "
            "size")
    if left:
        who = _labels([f"{k} {v}" for k, v in small.items() if v])
        text += (f"; {left} detectable but smaller miss{'es are' if left > 1 else ' is'} left out ({who}; "
                 "see Predictive checks)")
    return text + "."


def _behind(row: ComparisonRow) -> str:
    return f"{row.elpd_diff:.1f} behind, SE {row.elpd_diff_se:.1f}"


def _labels(names: Sequence[str]) -> str:
    """"A", "A and B", "A, B and C"."""
    names = list(names)
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def _stacking_sentence(ranked, stack_w, st: dict[str, Standing], rows: dict[str, ComparisonRow]) -> str:
    """Where stacking puts its weight, and in one phrase why a weight surprises: a
    candidate far behind in elpd with a real weight covers observations the best one
    predicts poorly (the mixture uses it for those)."""
    best = ranked[0]
    by_id = {r.id: r for r in ranked}
    top = sorted(((w, rid) for rid, w in stack_w.items() if w >= MIN_WEIGHT), key=lambda t: (-t[0], t[1]))
    parts = []
    for w, rid in top:
        text = f"{by_id[rid].label} ({w:.2f}"
        if rid != best.id and st[rid].kind in ("uncertain", "worse"):
            share = better_share(by_id[rid].oos.pointwise, best.oos.pointwise)
            text += (f", though {rows[rid].elpd_diff:.1f} elpd behind: it predicts "
                     f"{100 * share:.0f} % of the observations better than {best.label}, and the mixture "
                     "uses it for those")
        parts.append(text + ")")
    sentence = ("Stacking, which looks for the mixture of candidates that predicts best, puts its weight on "
                + "; ".join(parts))
    if best.id not in {rid for _, rid in top}:
        sentence += (f"; {best.label} gets less than {MIN_WEIGHT:g}: a mixture of the others predicts better than one "
                     "that adds it (candidates that complement each other can outweigh the single best one)")
    return sentence + "."


def _how_sure(ranked, st: dict[str, Standing], rows: dict[str, ComparisonRow]) -> str:
    """The lead's second sentence: how far behind the others are, group by standing."""
    def are(group) -> str:
        return "is" if len(group) == 1 else "are"

    def span(group) -> str:
        if len(group) == 1:
            row = rows[group[0].id]
            return f"{row.elpd_diff:.1f} elpd behind (SE {row.elpd_diff_se:.1f})"
        lo, hi = (f"{f(rows[r.id].elpd_diff for r in group):.1f}" for f in (min, max))
        return f"{lo} elpd behind" if lo == hi else f"{lo} to {hi} elpd behind"

    parts = []
    others = ranked[1:]
    for kind in ("tied", "close", "uncertain"):
        group = [r for r in others if st[r.id].kind == kind]
        if not group:
            continue
        names = _labels([r.label for r in group])
        if kind == "tied":
            parts.append(f"{names} {are(group)} tied with it within Monte Carlo error (the order would change "
                         "with the seed)")
        elif kind == "close":
            parts.append(f"{names} {are(group)} {span(group)}, too little to separate (below "
                         f"{SMALL_DIFFERENCE:g})")
        else:
            lifted = any(st[r.id].lifted for r in group)
            parts.append(f"{names} {are(group)} {span(group)}, within two SE of the difference"
                         + (" or tied with one that is" if lifted else "") + ": the order is uncertain")
    worse = [r for r in others if st[r.id].kind == "worse"]
    if worse and not parts:
        parts.append(f"{_labels([r.label for r in worse[:1]])}, the next, is {span(worse[:1])}, more than "
                     f"{SMALL_DIFFERENCE:g} elpd and two standard errors of the difference")
        worse = worse[1:]
    if worse:
        parts.append(f"{len(worse)} other{'s are' if len(worse) > 1 else ' is'} clearly worse "
                     f"({min(rows[r.id].elpd_diff for r in worse):.1f} elpd behind or more)")
    return "How sure: " + "; ".join(parts) + "."


def _prior_advice(flagged) -> str:
    """What to do about flagged priors, by what the prior trial found for each failing
    bound (statistics/prior.py): narrower priors can help, or the family itself puts the
    statistic outside the bound and no prior will fix it."""
    def codes(r) -> set:
        return {f.reading for f in (getattr(r.prior, "failing", None) or [])}

    narrow = [r.label for r in flagged if codes(r) & {"narrow_one", "narrow_several"}]
    structure = [r.label for r in flagged if codes(r) and codes(r) <= {"structure"}]
    unread = [r.label for r in flagged if r.label not in narrow and r.label not in structure]
    parts = []
    if narrow:
        parts.append(f"Narrower priors can help {_labels(narrow)}: the prior predictive section names the "
                     "parameter and the range to narrow towards ([hyperparameters.ID])")
    if structure:
        parts.append(f"no narrower prior will fix {_labels(structure)}: the family itself puts the failing "
                     "statistic outside its bound; revisit the bound or the family")
    if unread:
        parts.append(f"for {_labels(unread)}, the prior predictive section shows which statistic is "
                     "implausible; narrow its priors under [hyperparameters.ID] or revisit the bounds")
    return "".join(f" {p[:1].upper()}{p[1:]}." for p in parts)


def verdict(results: Sequence, comparison: Comparison, ppp_extreme: float = PPP_EXTREME,
            relevant: Mapping[str, float] | None = None) -> tuple[list[str], list[str]]:
    """The verdict's sentences: a lead of two or three (what to use, how sure, what
    misses) and the details, most important first.

    A candidate with a posterior predictive p-value below ``ppp_extreme`` or above 1 -
    ``ppp_extreme`` for any statistic (``features.named_misses``), or LOO-PIT values
    whose ECDF leaves the simultaneous band of the run's ``pit_alpha``
    (``checks.leaves_band``), is named as misfitting even when it ranks well.
    ``relevant`` (statistic -> smallest miss that matters, ``[checks] relevant``): a
    statistic that has one is named only when its miss exceeds it, and a sentence says
    what the misses were judged against. ``results`` are the run's candidates;
    ``comparison`` is ``rank_candidates`` of them. Returns ``(lead, details)``.
    """
    by_id = {r.id: r for r in results}
    ranked = [by_id[cid] for cid in comparison.ranking]
    rows, preferred, st = comparison.rows, comparison.preferred, comparison.standings
    lead: list[str] = []
    details: list[str] = []
    if ranked:
        stack_w = {row.id: row.stacking_weight for row in rows}
        bma_w = {row.id: row.pseudo_bma_weight for row in rows}
        best = ranked[0]
        by_row = {row.id: row for row in rows}
        names = {r.id: r.label for r in ranked}
        relevant = dict(relevant or {})
        misses = {r.id: _misfit(r, ppp_extreme, relevant) for r in ranked}

        # --- the lead: what to use, how sure, what misses
        others = [names[cid] for cid in preferred if cid != best.id]
        worse = [r for r in ranked if st[r.id].kind == "worse"]
        if len(ranked) == 1:
            lead.append(f"{best.label} is the only candidate that could be ranked, so there is nothing to "
                        "compare it with; judge it on the predictive checks alone.")
        elif not others:
            lead.append(f"Use {best.label}: it predicts new data best of the {len(ranked)} ranked candidates "
                        "and clearly ahead of every other.")
        else:
            lead.append(f"Consider {best.label} first, together with {_labels(others)}: the data cannot "
                        "separate them by predictive accuracy.")
        if len(ranked) > 1:
            lead.append(_how_sure(ranked, st, by_row))
        missing = [cid for cid in preferred if misses[cid]]
        if missing:
            features = []
            for cid in missing:
                for m in misses[cid]:
                    f = m.split(" (")[0]
                    if f not in features:
                        features.append(f)
            who = ("it" if missing == [best.id] and len(preferred) == 1 else _labels([names[c] for c in missing]))
            lead.append(f"But {who} {'misses' if who == 'it' or len(missing) == 1 else 'miss'} features of "
                        f"the data ({', '.join(features)}); do not trust {'its' if len(missing) == 1 else 'their'} "
                        "predictions of these.")
        elif relevant and any(_small_misses(r, ppp_extreme, relevant) for r in ranked if r.id in preferred):
            lead.append(("It misses no" if len(preferred) == 1 else "None of them misses a") + " feature by more "
                        "than the relevant sizes set ([checks] relevant), though smaller misses are "
                        "detectable; checks can reveal misfit, not prove fit.")
        else:
            lead.append(("It fails no" if len(preferred) == 1 else "None of them fails a") + " predictive check; "
                        "checks can reveal misfit, not prove fit.")

        # --- the details
        tied = [r for r in ranked if st[r.id].kind == "tied"]
        if tied:
            details.append(
                f"{_labels([best.label] + [r.label for r in tied])} predict best, tied within Monte Carlo error "
                f"(elpd {best.oos.elpd_loo:.1f}, SE {best.oos.elpd_loo_se:.1f}; their order would change with the seed, so "
                "they are listed by id).")
        elif len(ranked) == 1:
            details.append(f"{best.label}: elpd {best.oos.elpd_loo:.1f} (SE {best.oos.elpd_loo_se:.1f}).")
        else:
            details.append(
                f"{best.label} predicts best: elpd {best.oos.elpd_loo:.1f} (SE {best.oos.elpd_loo_se:.1f}), "
                f"pseudo-BMA+ weight {bma_w[best.id]:.2f}.")
        if len(ranked) > 1:
            details.append(_stacking_sentence(ranked, stack_w, st, by_row))

        def entry(r) -> str:
            why = standing_why(st[r.id])
            return f"{r.label} ({_behind(by_row[r.id])}{'; ' + why if why else ''})"

        close = [entry(r) for r in ranked if st[r.id].kind == "close"]
        uncertain = [entry(r) for r in ranked if st[r.id].kind == "uncertain"]
        if close:
            details.append(
                f"Within {SMALL_DIFFERENCE:g} elpd of it, too close to tell apart by predictive accuracy: " + "; ".join(close)
                + ". Choose among these on the predictive checks, interpretability and theory.")
        if uncertain:
            details.append("Behind it, but by less than two standard errors of the difference (or not separable "
                           "from one that is), so the order is uncertain: " + "; ".join(uncertain) + ".")
        if worse:
            details.append(f"Clearly worse at prediction (more than {SMALL_DIFFERENCE:g} elpd and two standard errors behind): "
                           + "; ".join(entry(r) for r in worse) + ".")
        lower = []
        for r in ranked:
            if not misses[r.id]:
                continue
            if st[r.id].preferred:
                details.append(f"{r.label} {_place(st[r.id], len(ranked))} but its replicated data miss: "
                               + "; ".join(misses[r.id])
                               + ". Do not trust its predictions of these features; a family that can "
                                 "produce them may do better.")
            else:
                lower.append(f"{r.label} ({', '.join(m.split(' (')[0] for m in misses[r.id])})")
        if lower:
            details.append("Clearly worse candidates whose replicated data also miss features of the data: "
                           + "; ".join(lower) + " (details under Predictive checks).")
        judged = _relevance_sentence(ranked, misses, ppp_extreme, relevant)
        if judged:
            details.append(judged)
    else:
        lead.append("No candidate could be ranked: every candidate was skipped, failed or is unhealthy "
                    "(see below). Fix the problems named there and run again.")
    flagged = [r for r in results if r.prior is not None and r.prior.flagged]
    if flagged:
        details.append(
            "Priors that put most of their mass on implausible datasets (share of prior draws inside every "
            "plausibility bound): " + "; ".join(f"{r.label} {100 * r.prior.plausible_share:.0f} %" for r in flagged)
            + "." + _prior_advice(flagged))
    for r in results:
        reason = (r.reason or "").splitlines()[0] if r.reason else ""
        if r.status == "unhealthy":
            details.append(f"{r.label} is not ranked because the sampler did not converge: {reason.rstrip('.')}.")
        elif r.status == "failed":
            details.append(f"{r.label} could not be run: {reason.rstrip('.')}.")
        elif r.status == "skipped":
            details.append(f"{r.label} was skipped: {reason.rstrip('.')}.")
    return lead, details


#: The first sentence of a quick look's verdict.
QUICK_LOOK = ("Quick look, not a full result: {chains} chains x {draws} draws, no adapt_delta escalation, "
              "R-hat below {rhat:g} and ESS of {ess:g} per chain accepted, PSIS-LOO without refits. Use it to see which candidates are "
              "worth a full run; run again without --quick before drawing conclusions.")


def compare_candidates(results: Sequence, seed: int = 0, ppp_extreme: float = PPP_EXTREME,
                       weigh: Weigh | None = None, relevant: Mapping[str, float] | None = None) -> Comparison:
    """Rank healthy candidates by elpd (``statistics.compare.rank_candidates``, weights
    from ``weigh``) and write the verdict (``verdict``) into the comparison's ``lead``
    and ``details``: the one place where the comparison's numbers become its sentences."""
    comparison = rank_candidates(results, seed, weigh)
    comparison.lead, comparison.details = verdict(results, comparison, ppp_extreme, relevant)
    return comparison


# --- how an elpd was obtained ------------------------------------------------------------

#: Why an unhealthy candidate gets PSIS-LOO without refits (also the end of its reason).
REFITS_SKIPPED = "exact refits skipped, since an unhealthy candidate is not ranked"

#: Why a plain PSIS-LOO makes no refit, by ``Method.plain_because``.
PLAIN_BECAUSE = {"quick": "quick look", "unhealthy": REFITS_SKIPPED}


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'s' if n > 1 else ''}"


def elpd_method(method) -> str:
    """How an elpd was obtained, in words, from a ``statistics.compare.Method`` (its kind
    and counts): "PSIS-LOO with 2 exact refits", "10-fold cross-validation", ... (the
    text of summary.json's ``elpd_method`` and the tables' method column)."""
    kind = method.kind
    if kind == "psis":
        return "PSIS-LOO"
    if kind == "psis_refits":
        return f"PSIS-LOO with {_plural(method.held_out, 'exact refit')}"
    if kind == "psis_plain":
        text = f"PSIS-LOO without refits ({PLAIN_BECAUSE[method.plain_because]})"
        if method.high_k:
            text += (f"; {_plural(method.high_k, 'observation')} with Pareto k above "
                     f"{method.k_threshold:.2f} not refitted, so this elpd may be off")
        return text
    if kind == "kfold":
        return f"{method.held_out}-fold cross-validation"
    if kind == "kfold_for_high_k":
        return (f"{method.held_out}-fold cross-validation ({method.high_k} observations had Pareto k "
                f"above {method.k_threshold:.2f}, more than the {method.refit_cap} exact refits allowed)")
    if kind == "leave_group_out":
        return f"leave-one-group-out ({method.held_out} groups)"
    raise ValueError(f"unknown method kind {kind!r}")


# --- coefficients in the outcome's units ------------------------------------------------

def _per(row) -> str:
    """What one coefficient or slope SD is per: "per unit of x", "cue = on against off"."""
    if row.level is None:
        return f"per unit of {row.column}"
    return f"{row.column} = {row.level} against {row.reference}"


def _at(at: Sequence) -> str:
    return ", ".join(f"{column} = {value}" for column, value in at)


def word_coefficients(c):
    """The units of each coefficient and group slope SD and the intercept's name, in
    words, from a ``statistics.coefficients.Coefficients`` (its link, outcome and each
    row's kind, column and levels): "y per unit of x", "ratio, cue = on against off",
    "intercept at x = 0, cue = off"; none without a known link. Returns ``c`` (or None)."""
    if c is None:
        return None
    log = c.link == "log"
    for row in c.rows:
        if row.kind == "intercept":
            where = _at(row.at)
            row.name = f"intercept at {where}"
            row.units = f"{c.outcome} ({c.sets} at {where})" if c.link else ""
            continue
        what, numeric = _per(row), row.kind == "numeric"
        if not c.link:
            row.units = ""
        elif log:
            row.units = f"ratio {what}" if numeric else f"ratio, {what}"
        else:
            row.units = f"{c.outcome} {what}" if numeric else f"{c.outcome}, {what}"
    for s in c.slopes:
        per = _per(s)
        s.units = "" if not c.link else (f"log scale, {per}" if log else f"{c.outcome} {per}")
    return c


# --- model recovery ---------------------------------------------------------------------

def fit_problem(candidate: str, status: str, reason: str = "") -> str:
    """One fit of a recovery replicate that failed or is unhealthy, in words (recovery.json's
    ``fit_problems``): "far: unhealthy (R-hat 1.2)"."""
    return f"{candidate}: {status}{' (' + reason + ')' if reason else ''}"


def left_out_text(x) -> str:
    """A run candidate that takes no part in model recovery (a
    ``statistics.recovery.LeftOut``), and why, in words (recovery.json's and the section's
    ``left_out``): "Normal (normal): unhealthy: R-hat 1.2 ..."; the why is the first line
    of the candidate's own status reason, or that its stored posterior fit is missing."""
    why = x.reason.splitlines()[0] if x.reason else "its stored posterior fit is missing"
    return f"{x.label} ({x.candidate}): {x.status}: {why}" if x.status != "ok" else f"{x.label} ({x.candidate}): {why}"


def recovery_too_few(ranked: int) -> str:
    """Why model recovery cannot run: fewer than two ranked candidates with a stored fit."""
    return (f"model recovery needs at least two ranked candidates with a stored posterior fit; "
            f"this run has {ranked}")


# --- simulation-based calibration -------------------------------------------------------

def simulation_note(simulation: int, non_finite: int = 0, message: str = "") -> str:
    """One simulated dataset of a calibration study that gave no ranks (calibration.json's
    ``not_fitted`` and ``fit_failures``, and the page): its 1-based number and either the
    count of values that are not finite or the first line (300 characters at most) of
    the support check's or the fit's message."""
    if non_finite:
        return f"simulation {simulation}: {non_finite} non-finite values"
    return f"simulation {simulation}: {str(message).splitlines()[0][:300] if message else ''}"


def unranked_text(u) -> str:
    """A ``statistics.calibration.Unranked`` record in words (``simulation_note``): what
    calibration.json's ``not_fitted`` and ``fit_failures`` and the page list."""
    return simulation_note(u.simulation, u.non_finite if u.kind == "non_finite" else 0, u.message)


def calibration_reason(cal) -> str:
    """The verdict of one candidate's simulation-based calibration, in words, from its
    ``status``, ``ranked``, flagged parameters and unhealthy fits as
    ``statistics.calibration.judge`` left them (what the page, calibration.json and the
    command print as ``reason``)."""
    from contenders.statistics.calibration import MIN_RANKED   # loads SciPy: only when worded

    n = cal.ranked
    if n == 0:
        return "no simulated dataset could be fitted; see the counts below"
    if cal.status == "inconclusive":
        return (f"only {n} simulated datasets gave ranks (at least {MIN_RANKED} are needed for a "
                "verdict); run more simulations")
    if cal.status == "failed":
        flagged = cal.flagged
        worst = min(flagged, key=lambda q: q.p_value)
        return (f"the ranks of {', '.join(q.parameter for q in flagged[:5])}"
                f"{' and more' if len(flagged) > 5 else ''} are not uniform (smallest chi-square p = "
                f"{worst.p_value:.2g}): fits of the program's own simulated data do not recover the parameters "
                "they were simulated with. Check that y_rep is drawn from the same distribution as the "
                "likelihood and log_lik, with the same parameters, and that the priors in the model block "
                "are the ones the program describes"
                + ("; some fits also had sampler problems, which can cause this too" if cal.unhealthy else ""))
    return (f"no departure from uniform ranks found in {n} simulations; this cannot prove the "
            "program right, and small errors need more simulations to show")


def word_calibration(cal):
    """``cal.reason`` from ``calibration_reason``, after ``statistics.calibration.judge``;
    returns ``cal``."""
    cal.reason = calibration_reason(cal)
    return cal


# --- sampler health ---------------------------------------------------------------------

def health_text(finding: Mapping) -> str:
    """One finding of ``statistics.posterior.diagnose`` or ``fit_with_health`` in words:
    what is wrong and what to do (a value beside its threshold shows the side it is on,
    ``format.against``)."""
    f = finding
    code = f["code"]
    if code == "rhat_nan":
        return "R-hat could not be computed for some parameters (constant draws: the chains are stuck)"
    if code == "rhat":
        return (f"R-hat {fmt.against(f['value'], f['limit'], 3)} for {f['parameter']} is not below "
                f"{fmt.limit(f['limit'])}: chains disagree; run longer (more warmup and draws) or reparameterise")
    if code == "ess":
        return (f"effective sample size {fmt.against(f['value'], f['limit'], 0)} for {f['parameter']} is below "
                f"{fmt.limit(f['limit'])} ({fmt.limit(f['per_chain'])} per chain): increase draws")
    if code == "divergences":
        return (f"{f['count']} divergent transitions at adapt_delta {f['adapt_delta']}: the posterior "
                "has regions the sampler cannot explore; reparameterise or use stronger priors")
    if code == "ebfmi":
        return (f"E-BFMI below {fmt.limit(f['limit'])} in chain(s) "
                + ", ".join(f"{i} ({fmt.against(v, f['limit'], 2)})" for i, v in zip(f["chains"], f["values"]))
                + ": the sampler moves poorly between energy levels; reparameterise (group effects, where the "
                  "candidate has them, in non-centred form) or give scale parameters priors away from zero")
    if code == "treedepth":
        return (f"{f['count']} iterations hit the maximum tree depth {f['max_treedepth']}: sampling is "
                "inefficient; raise max_treedepth or reparameterise")
    if code == "longer":
        return (f"fitted again with {f['warmup']} warmup iterations and {f['draws']} draws per chain (instead of "
                f"{f['first_warmup']} and {f['first_draws']}), since the first fit fell just short ("
                + "; ".join(health_text(p).split(":")[0] for p in f["short"])
                + ("); the longer fit passes" if f["passes"] else "); the longer fit does not pass either"))
    if code == "escalated":
        record = "; ".join(f"adapt_delta {delta}: {n} divergences" for delta, n in f["attempts"])
        return f"refitted after divergent transitions ({record})"
    raise ValueError(f"unknown sampler-health finding {code!r}")


def word_health(health):
    """Write a ``Health`` record's ``problems`` and ``warnings`` from its ``findings``
    (in their order) and return the record: the one place where sampler health becomes
    words. The run calls it on every fit (``pipeline/runner.py``)."""
    health.problems = [health_text(f) for f in health.findings if f["severity"] == "problem"]
    health.warnings = [health_text(f) for f in health.findings if f["severity"] == "warning"]
    return health


# --- prior predictive trial -------------------------------------------------------------

def bound_sentence(r) -> str:
    """One reading of a failing bound (``statistics.prior.read_bound``) in words: where the
    draws fall and what to do about it (used in the prior trial's message)."""
    what = describe(r.statistic)
    side = []
    if r.below > 0:
        side.append(f"{100 * r.below:.0f} % below {r.low:g}")
    if r.above > 0:
        side.append(f"{100 * r.above:.0f} % above {r.high:g}")
    if r.nonfinite > 0:
        side.append(f"{100 * r.nonfinite:.0f} % not finite")
    if np.isinf(r.high):
        where = f"at least {r.low:g}"
    elif np.isinf(r.low):
        where = f"at most {r.high:g}"
    else:
        where = f"inside {r.low:g} to {r.high:g}"
    text = f"{what}: {100 * r.inside:.0f} % of prior draws {where}"
    if side:
        text += " (" + ", ".join(side) + ")"
    lo, hi = r.best_range or (np.nan, np.nan)
    if r.fixable is True:
        text += (f"; narrower priors can fix this: of the prior draws with {r.best_parameter} between "
                 f"{lo:.3g} and {hi:.3g} (a tenth of them), {100 * r.best_share:.0f} % are plausible (inside every "
                 "bound), so narrow "
                 f"the prior on {r.best_parameter} toward that range (this candidate's [hyperparameters] in "
                 "the configuration)")
    elif r.reading == "narrow_several":
        text += (f"; no one prior fixes this alone: the best tenth of one parameter's prior draws "
                 f"({r.best_parameter} between {lo:.3g} and {hi:.3g}) gives {100 * r.best_share:.0f} % "
                 "plausible datasets; narrow several of this candidate's priors together ([hyperparameters] in "
                 "the configuration) and run again")
    elif r.reading == "structure":
        text += (f"; narrower priors will not fix this: in no tenth of any parameter's prior draws are more "
                 f"than {100 * r.best_share:.0f} % plausible (best: {r.best_parameter} between {lo:.3g} and "
                 f"{hi:.3g}), so the family's structure, not the width of its priors, puts the {what} there; "
                 "check that this bound applies to this family, and judge it on the posterior checks")
    else:
        text += "; tighten this candidate's priors (its [hyperparameters] in the configuration) or check the bound"
    return text


def prior_message(trial) -> str:
    """The prior predictive trial's finding in words: the share of plausible prior
    datasets and, when flagged, the reading of each failing bound (``bound_sentence``)."""
    share = trial.plausible_share
    if share is None:
        return "no plausibility bounds configured; compare the prior statistics with the observed ones"
    if trial.flagged:
        return (f"only {100 * share:.0f} % of prior draws give plausible data; "
                + "; ".join(bound_sentence(r) for r in trial.failing))
    return f"{100 * share:.0f} % of prior draws give data inside every plausibility bound"


def word_prior(trial):
    """Write a ``PriorTrial``'s ``message`` (``prior_message``) and return the record; the
    run calls it on every prior trial (``pipeline/runner.py``)."""
    trial.message = prior_message(trial)
    return trial


# --- power-scaling sensitivity ----------------------------------------------------------

#: Every power-scaling reading code (``statistics.sensitivity.READING_CODES``) with the
#: sentence the report shows, which says what to do.
SENSITIVITY_READINGS = {
    "pulled_both_ways": "Pulled both ways: the prior and the data push it in different directions. "
                        "Check that the prior's centre and width say what you meant; if they do, the data "
                        "disagree with it, so show the result under a wider prior as well.",
    "set_by_prior": "Set by the prior: the data add little about it. Keep the prior only if it was chosen "
                    "on purpose and say so when reporting; otherwise widen it, or collect data that "
                    "inform this parameter.",
    "led_by_data": "Led by the data: the prior hardly matters. Nothing to do.",
    "steady": "Steady: barely moves when either the prior or the data are scaled. Nothing to do.",
    "": "Not computed (a non-finite value). Nothing to read.",
}


def sensitivity_problem(s) -> str:
    """Why power-scaling could not be computed, in words, from the exception a
    ``Sensitivity`` records (``error``); ``""`` when it was computed."""
    return f"power-scaling could not be computed: {s.error}" if s.error else ""


def sensitivity_summary(s) -> dict | None:
    """The JSON-ready record of one candidate's sensitivity (``summary.json``), each
    parameter's reading with what to do about it (``SENSITIVITY_READINGS``)."""
    if s is None:
        return None
    return {
        "threshold": s.threshold, "draws": s.n_draws, "pareto_k": s.pareto_k, "reliable": s.reliable,
        "problem": sensitivity_problem(s) or None,
        "parameters": [{"parameter": r.parameter, "prior": r.prior, "likelihood": r.likelihood,
                        "prior_chain_range": list(r.prior_range),
                        "likelihood_chain_range": list(r.likelihood_range),
                        "near_threshold": r.near_threshold,
                        "reading": r.reading or None,
                        "what_to_do": SENSITIVITY_READINGS[r.reading] if r.reading else None} for r in s.rows],
    }


# --- effects across candidates ----------------------------------------------------------

def _g(x: float) -> str:
    """Three significant digits, all digits before the point kept."""
    if x is None or not np.isfinite(x):
        return "undefined"
    if x == 0:
        return "0"
    decimals = max(0, 2 - int(math.floor(math.log10(abs(x)))))
    return f"{x:.{decimals}f}"


def _iv(lo: float, hi: float) -> str:
    return f"{_g(lo)} to {_g(hi)}"


@dataclass
class Agreement:
    reading: str        # agree | depends | single | none
    sentence: str


def agreement(title: str, rows: Sequence, observed: float, combined=None,
              min_weight: float = MIN_WEIGHT) -> Agreement:
    """Whether the healthy candidates with non-negligible weight reach the same
    conclusion about one effect (``statistics.effects.agreement_reading``), as a cautious
    sentence.

    ``rows`` hold, per candidate, ``label``, ``weight`` (stacking weight; None when
    not ranked), ``lower`` and ``upper`` (95 % interval). Candidates agree when every
    pair of intervals overlaps (the largest lower end is at most the smallest upper
    end) and every interval falls on the same side of zero (all above, all below, or
    all including it); otherwise the conclusion depends on the choice. Rows with weight
    below ``min_weight`` or without an interval are left out."""
    facts = agreement_reading(rows, observed, min_weight)
    use, misses = facts["use"], facts["misses"]
    miss = (f" The observed value ({_g(observed)}) lies outside the 95 % interval of "
            + ", ".join(misses) + ": replicated data from "
            + ("that candidate do" if len(misses) == 1 else "those candidates do")
            + " not reproduce this effect, so treat its estimate with suspicion.") if misses else ""
    if not use:
        return Agreement("none", f"{title}: no ranked candidate has a stacking weight of at least "
                                 f"{min_weight:g}, so there is nothing to compare.")
    if len(use) == 1:
        r = use[0]
        return Agreement("single", (
            f"{title}: only {r.label} carries a stacking weight of at least {min_weight:g} "
            f"({r.weight:.2f}); its 95 % interval is {_iv(r.lower, r.upper)} "
            f"({direction(r.lower, r.upper)}). With a single candidate in play there is no "
            "agreement to check; look at the other candidates' intervals before relying on it." + miss))
    names = ", ".join(f"{r.label} ({r.weight:.2f})" for r in use)
    sides = set(facts["sides"])
    comb = (f" (stacking-weighted combination {_g(combined.mean)}, 95 % interval "
            f"{_iv(combined.lower, combined.upper)})") if combined else ""
    if facts["reading"] == "agree":
        side = sides.pop()
        if side == "includes zero":
            what = ("agree only in that none of them separates this effect from zero: every 95 % interval "
                    "includes zero")
            after = ("The data leave the direction open under each of these candidates; that is not "
                     "evidence that the effect is absent.")
        else:
            what = f"agree: every 95 % interval lies {side}"
            after = ("The conclusion does not hinge on the choice among these candidates; that is not "
                     "proof of the effect, since all of them may share the same blind spots.")
        return Agreement("agree", (
            f"{title}: the {len(use)} candidates with stacking weight of at least {min_weight:g} "
            f"({names}) {what}, and the intervals overlap{comb}. {after}" + miss))
    parts = "; ".join(f"{r.label} {_iv(r.lower, r.upper)} ({direction(r.lower, r.upper)})"
                      for r in use)
    why = []
    if len(sides) > 1:
        why.append("the intervals fall on different sides of zero")
    if not facts["overlap"]:
        why.append("not all intervals overlap")
    return Agreement("depends", (
        f"{title}: the conclusion depends on the choice of candidate, because "
        + " and ".join(why) + f" (95 % intervals: {parts}){comb}. Report the effect under each of "
        "these candidates, or settle the choice of candidate on other grounds first." + miss))


#: The words of each kind of effect (``statistics.effects.KINDS``).
EFFECT_KINDS = {"mean_difference": "difference in mean", "median_difference": "difference in median",
                "slope": "least-squares slope"}


def effect_title(e) -> str:
    """An effect's plain description from its kind, column and levels (an ``Effect`` or an
    ``EffectAcross``): "cue: on minus off, difference in mean", "load: least-squares slope"."""
    if e.kind == "slope":
        return f"{e.column}: {EFFECT_KINDS['slope']}"
    return f"{e.column}: {e.level} minus {e.reference}, {EFFECT_KINDS[e.kind]}"


def compare_effects(results: Sequence, comparison_rows: Sequence, seed: int = 0,
                    min_weight: float = MIN_WEIGHT) -> list:
    """Each effect across candidates (``statistics.effects.effects_across``) with its
    title (``effect_title``) and its agreement sentence (``agreement``) written into
    ``title`` and ``sentence``."""
    effects = effects_across(results, comparison_rows, seed, min_weight)
    for e in effects:
        e.title = effect_title(e)
        e.sentence = agreement(e.title, e.rows, e.observed, e.combined, min_weight).sentence
    return effects
