"""Out-of-sample comparison: PSIS-LOO with exact refits, K-fold, weights and a verdict.

Sources:

* PSIS-LOO, elpd, its SE and p_loo: Vehtari, Gelman & Gabry (2017), "Practical
  Bayesian model evaluation using leave-one-out cross-validation and WAIC", Statistics
  and Computing 27, 1413-1432; computed with ArviZ's ``loo``.
* The Pareto k threshold min(1 - 1 / log10(S), 0.7) for S draws: Vehtari, Simpson,
  Gelman, Yao & Gabry (2024), "Pareto smoothed importance sampling", JMLR 25(72)
  (ArviZ's ``good_k``).
* Stacking weights: Yao, Vehtari, Simpson & Gelman (2018), "Using stacking to average
  Bayesian predictive distributions", Bayesian Analysis 13(3); pseudo-BMA+ weights with
  the Bayesian bootstrap, same paper; both computed with ArviZ's ``compare``.
* A difference in elpd below 4 is small, and the normal approximation of its
  uncertainty is then poor: Sivula, Magnusson, Matamoros & Vehtari (2025),
  "Uncertainty in Bayesian leave-one-out cross-validation based model comparison",
  Bayesian Analysis (arXiv:2008.10296).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import numpy as np

# ArviZ and SciPy are imported inside the functions that compute with them: a rerun
# whose results all come from the fit store (see ``weights``) never needs them.

from contenders.statistics.rules import MIN_WEIGHT, PPP_EXTREME, SE_FACTOR, SMALL_DIFFERENCE, TIE_MCSE_FACTOR


@dataclass
class OutOfSample:
    """Estimated expected log predictive density of one candidate."""

    elpd: float
    se: float
    p: float                      # effective number of parameters: lppd - elpd
    pointwise: np.ndarray         # elpd of each observation
    pareto_k: np.ndarray          # PSIS shape estimate per observation (NaN for K-fold only)
    k_threshold: float
    method: str                   # how the elpd was obtained, in words
    refitted: list[int] = field(default_factory=list)  # 0-based observations refitted exactly
    n_refits: int = 0
    elpd_psis: float = float("nan")                     # plain PSIS-LOO before any refit
    mcse: float = float("nan")                          # Monte Carlo SE of elpd (chains as batches)
    n_samples: int = 0                                  # posterior draws behind the PSIS estimate

    @property
    def k_max(self) -> float:
        k = self.pareto_k[np.isfinite(self.pareto_k)]
        return float(k.max()) if k.size else float("nan")

    @property
    def n_high_k(self) -> int:
        return int((self.pareto_k > self.k_threshold).sum())


def log_mean_exp(log_lik: np.ndarray, axis: int = 0) -> np.ndarray:
    """log of the mean of exp(x) along ``axis``, computed stably."""
    from scipy.special import logsumexp

    n = log_lik.shape[axis]
    return logsumexp(log_lik, axis=axis) - np.log(n)


def _batches(draws_per_chain: int) -> int:
    """Batches per chain for the Monte Carlo SE: two halves when each holds at least
    100 draws, else the whole chain."""
    return 2 if draws_per_chain >= 200 and draws_per_chain % 2 == 0 else 1


def _chain_mcse(per_chain_totals: np.ndarray) -> float:
    """Monte Carlo SE of an elpd total from its value computed on each batch of draws
    alone (each chain, or each half of a chain): SE = SD across batches /
    sqrt(batches), the batch-means estimate (common practice, no source for the
    choice of batches)."""
    t = np.asarray(per_chain_totals, dtype=float)
    if t.size < 2 or not np.all(np.isfinite(t)):
        return float("nan")
    return float(t.std(ddof=1) / np.sqrt(t.size))


def _psis_by_chain(log_lik: np.ndarray) -> np.ndarray:
    """PSIS-LOO pointwise elpd computed on each chain alone; ``log_lik`` is (C, S, N)."""
    import arviz as az
    from scipy.special import logsumexp

    out = []
    for ll in log_lik:
        lw, _ = az.psislw(-ll.T)
        out.append(logsumexp(lw + ll.T, axis=1))
    return np.asarray(out)


def make_folds(n: int, k: int, strata: np.ndarray | None = None, seed: int = 0) -> np.ndarray:
    """Fold number (0..k-1) of each observation. With ``strata`` every fold receives
    an (almost) equal share of each stratum: members of a stratum are shuffled and
    dealt to the folds in turn, starting where the previous stratum stopped."""
    rng = np.random.default_rng(seed)
    folds = np.empty(n, dtype=np.int64)
    if strata is None:
        order = rng.permutation(n)
        folds[order] = np.arange(n) % k
        return folds
    start = 0
    for level in np.unique(strata):
        members = rng.permutation(np.flatnonzero(strata == level))
        folds[members] = (start + np.arange(members.size)) % k
        start = (start + members.size) % k
    return folds


def _totals(pointwise: np.ndarray, lppd: float) -> dict:
    """SE of the elpd (sqrt(N) times the SD of the pointwise values, as ArviZ's ``loo``
    computes it after Vehtari, Gelman & Gabry 2017) and p = lppd - elpd."""
    n = pointwise.size
    return {"se": float(np.sqrt(n * np.var(pointwise))), "p": float(lppd - pointwise.sum())}


def elpd_data(e: OutOfSample):
    """The ArviZ ``ELPDData`` of one estimate, built from its plain fields (for
    ``arviz.compare``, which reads elpd, SE, p, the pointwise values, the warning flag
    and the scale)."""
    import xarray as xr
    from arviz.stats.stats_utils import ELPDData

    n = e.pointwise.size
    obs = np.arange(n)
    return ELPDData(
        data=[float(e.elpd), float(e.se), float(e.p), int(e.n_samples), n, False,
              xr.DataArray(np.asarray(e.pointwise, dtype=float), dims=["obs"], coords={"obs": obs},
                           name="loo_i"),
              xr.DataArray(np.asarray(e.pareto_k, dtype=float), dims=["obs"], coords={"obs": obs}),
              "log", float(e.k_threshold)],
        index=["elpd_loo", "se", "p_loo", "n_samples", "n_data_points", "warning", "loo_i", "pareto_k",
               "scale", "good_k"],
    )


RefitFn = Callable[[np.ndarray], np.ndarray]
"""Given 0-based indices of the observations to fit, returns log_lik draws (S, N)."""


@dataclass
class Plan:
    """An out-of-sample estimate up to its refits: ``fits`` lists, for each refit still to
    run, the 0-based observations to fit and those held out. ``finish`` takes each
    refit's ``log_lik`` draws of its held-out observations, (S, held out), in the same
    order, so the refits can run anywhere (one after the other, or as separate tasks on
    the run's executor) and only those columns travel back."""

    fits: list[tuple[np.ndarray, np.ndarray]]
    pointwise: np.ndarray            # PSIS values, replaced where refits give exact ones
    per_chain: np.ndarray            # the same per batch of draws (for the MC SE)
    lppd: float
    n_chains: int
    method: str
    base: dict
    refitted: list[int] = field(default_factory=list)

    def finish(self, held_out: Sequence[np.ndarray] = ()) -> OutOfSample:
        if len(held_out) != len(self.fits):
            raise ValueError(f"{len(self.fits)} refits planned, {len(held_out)} results given")
        pointwise, per_chain = self.pointwise.copy(), self.per_chain.copy()
        for (_fitted, idx), draws in zip(self.fits, held_out):
            draws = np.asarray(draws, dtype=float).reshape(-1, idx.size)
            pointwise[idx] = log_mean_exp(draws)
            per_chain[:, idx] = log_mean_exp(draws.reshape(self.n_chains, -1, idx.size), axis=1)
        t = _totals(pointwise, self.lppd)
        return OutOfSample(float(pointwise.sum()), t["se"], t["p"], pointwise, method=self.method,
                           refitted=list(self.refitted), n_refits=len(self.fits),
                           mcse=_chain_mcse(per_chain.sum(axis=1)), **self.base)


#: Most log_lik values (draws x observations) handed to ArviZ's PSIS-LOO at once. PSIS
#: treats each observation on its own, so splitting the observations into blocks gives
#: the same values; it bounds the memory of the copies ArviZ makes (several of the
#: block's size): one block of 4,000 draws x 20,000 observations took 3 GB more.
LOO_BLOCK_VALUES = 20_000_000


def _blocks(n: int, draws: int) -> list[slice]:
    size = max(1, LOO_BLOCK_VALUES // max(1, draws))
    return [slice(start, min(n, start + size)) for start in range(0, n, size)]


def _observations(idata, block: slice):
    """``idata`` restricted to some observations of ``log_lik`` (posterior kept whole: ArviZ
    computes the relative efficiency from it)."""
    if block.start == 0 and block.stop == idata.log_likelihood["log_lik"].shape[-1]:
        return idata
    import arviz as az

    dim = idata.log_likelihood["log_lik"].dims[-1]
    return az.InferenceData(posterior=idata.posterior,
                            log_likelihood=idata.log_likelihood[["log_lik"]].isel({dim: block}))


def _relative_efficiency(idata) -> float:
    """ESS / draws of the posterior, computed once for all blocks exactly as ``arviz.loo``
    computes it when not given (the mean of every parameter's mean-ESS, over the draws)."""
    import arviz as az

    post = idata.posterior
    if post.sizes["chain"] == 1:
        return 1.0
    ess = az.ess(post, method="mean")
    values = np.hstack([ess[v].values.flatten() for v in ess.data_vars])
    return float(values.mean() / (post.sizes["chain"] * post.sizes["draw"]))


def plan_estimate(
    idata,
    strategy: str = "loo",
    refit_cap: int = 10,
    folds: int = 10,
    groups: np.ndarray | None = None,
    seed: int = 0,
    why_plain: str = "quick look",
) -> Plan:
    """PSIS-LOO of one candidate and the refits the estimate needs (see ``estimate``).
    With ``strategy`` "psis" there are none; ``why_plain`` says why in the method."""
    import warnings

    import arviz as az

    chains_ll = np.asarray(idata.log_likelihood["log_lik"].values, dtype=float)
    n = chains_ll.shape[-1]
    n_chains = chains_ll.shape[0] * _batches(chains_ll.shape[1])
    log_lik = chains_ll.reshape(-1, n)
    blocks = _blocks(n, log_lik.shape[0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ArviZ warns on high k; handled below, not ignored
        reff = _relative_efficiency(idata) if len(blocks) > 1 else None
        parts = [az.loo(_observations(idata, block), pointwise=True, var_name="log_lik", reff=reff)
                 for block in blocks]
        by_chain = np.concatenate([_psis_by_chain(chains_ll[..., block].reshape(n_chains, -1, block.stop - block.start))
                                   for block in blocks], axis=1)
    lppd = float(sum(log_mean_exp(log_lik[:, block]).sum() for block in blocks))
    del log_lik, chains_ll
    psis = np.concatenate([np.asarray(p["loo_i"].values, dtype=float) for p in parts])
    k = np.concatenate([np.asarray(p["pareto_k"].values, dtype=float) for p in parts])
    threshold = float(parts[0]["good_k"])
    base = dict(pareto_k=k, k_threshold=threshold,
                elpd_psis=float(sum(float(p["elpd_loo"]) for p in parts)),
                n_samples=int(parts[0]["n_samples"]))

    def held_out(fold_of: np.ndarray, label: str) -> Plan:
        fits = [(np.flatnonzero(fold_of != f), np.flatnonzero(fold_of == f)) for f in np.unique(fold_of)]
        return Plan(fits, np.full(n, np.nan), np.full((n_chains, n), np.nan), lppd, n_chains, label, base)

    if strategy == "leave_group_out":
        if groups is None:
            raise ValueError("leave-one-group-out needs a group column")
        return held_out(np.asarray(groups), f"leave-one-group-out ({len(np.unique(groups))} groups)")
    if strategy == "kfold":
        return held_out(make_folds(n, folds, groups, seed), f"{folds}-fold cross-validation")
    high = np.flatnonzero(k > threshold)
    if strategy == "psis":   # a quick look or an unhealthy fit: PSIS-LOO as it is, never a refit
        method = f"PSIS-LOO without refits ({why_plain})"
        if high.size:
            method += (f"; {high.size} observation{'s' if high.size > 1 else ''} with Pareto k above "
                       f"{threshold:.2f} not refitted, so this elpd may be off")
        return Plan([], psis, by_chain, lppd, n_chains, method, base)
    if high.size == 0:
        return Plan([], psis, by_chain, lppd, n_chains, "PSIS-LOO", base)
    if high.size > refit_cap:
        plan = held_out(make_folds(n, folds, groups, seed), f"{folds}-fold cross-validation")
        plan.method += (f" ({high.size} observations had Pareto k above {threshold:.2f}, more "
                        f"than the {refit_cap} exact refits allowed)")
        return plan
    everyone = np.arange(n)
    fits = [(everyone[everyone != i], np.array([i])) for i in high]
    return Plan(fits, psis, by_chain, lppd, n_chains,
                f"PSIS-LOO with {high.size} exact refit{'s' if high.size > 1 else ''}", base,
                refitted=[int(i) for i in high])


def estimate(
    idata,
    refit: RefitFn,
    strategy: str = "loo",
    refit_cap: int = 10,
    folds: int = 10,
    groups: np.ndarray | None = None,
    seed: int = 0,
) -> OutOfSample:
    """elpd of one candidate.

    ``strategy`` ``loo``: PSIS-LOO; observations whose Pareto k exceeds the threshold
    are refitted exactly with that observation held out, up to ``refit_cap``; above
    the cap the whole estimate falls back to K-fold. ``kfold``: K-fold for every
    candidate. ``leave_group_out``: each level of ``groups`` held out in turn
    (predicting new groups, a different quantity from LOO). ``refit(fitted)`` returns
    log_lik draws (S, N) of a fit to the observations ``fitted``; here the refits run
    one after the other (the runner sends them to its executor instead).
    """
    plan = plan_estimate(idata, strategy, refit_cap, folds, groups, seed)
    return plan.finish([refit(fitted)[:, idx] for fitted, idx in plan.fits])


@dataclass
class Comparison:
    """The ranking and the verdict. ``lead`` is two or three sentences (what to use, how
    sure that is, what the preferred candidates miss); ``details`` every other sentence,
    most important first; ``verdict`` both, lead first."""

    ranking: list[str]
    rows: list[dict]              # per ranked candidate, best first
    lead: list[str]
    preferred: list[str]
    details: list[str] = field(default_factory=list)
    standings: dict[str, "Standing"] = field(default_factory=dict)

    @property
    def verdict(self) -> list[str]:
        return list(self.lead) + list(self.details)


#: Bumped whenever the stored weights change meaning (see ``weights``).
WEIGHTS_FORMAT = 1


def weights_key(estimates: dict[str, OutOfSample], seed: int = 0) -> str:
    """SHA-256 of everything ``arviz.compare`` reads of the given estimates (ids in
    order, elpd, SE, p, draws, pointwise values), the seed of the Bayesian bootstrap and
    the installed ArviZ version: equal keys give equal weights."""
    from importlib.metadata import version

    h = hashlib.sha256(f"weights {WEIGHTS_FORMAT}|arviz {version('arviz')}|seed {seed}".encode())
    for cid, e in estimates.items():
        h.update(f"|{cid}|{e.elpd!r}|{e.se!r}|{e.p!r}|{int(e.n_samples)}|".encode())
        pointwise = np.ascontiguousarray(np.asarray(e.pointwise, dtype=np.float64))
        h.update(str(pointwise.shape).encode())
        h.update(pointwise.tobytes())
    return h.hexdigest()


def weights(estimates: dict[str, OutOfSample], seed: int = 0, store=None) -> tuple[dict, dict, dict]:
    """Stacking weights, pseudo-BMA+ weights (Bayesian bootstrap) and the ArviZ table
    (elpd_diff, dse) for the given candidates.

    With ``store`` (a :class:`contenders.pipeline.store.FitStore`) the answer is read from it
    when these exact estimates were compared before (``weights_key``), and stored
    otherwise, so a rerun from the fit store does not import ArviZ."""
    if len(estimates) == 1:
        (cid,) = estimates
        return {cid: 1.0}, {cid: 1.0}, {cid: (0.0, 0.0)}
    key = weights_key(estimates, seed) if store is not None else ""
    if store is not None:
        found = store.load_value("weights", key)
        if found is not None:
            return found
    import arviz as az

    objs = {cid: elpd_data(e) for cid, e in estimates.items()}
    stacked = az.compare(objs, ic="loo", method="stacking")
    bma = az.compare(objs, ic="loo", method="BB-pseudo-BMA", seed=seed)
    diffs = {cid: (float(stacked.loc[cid, "elpd_diff"]), float(stacked.loc[cid, "dse"])) for cid in objs}
    answer = ({cid: float(stacked.loc[cid, "weight"]) for cid in objs},
              {cid: float(bma.loc[cid, "weight"]) for cid in objs}, diffs)
    if store is not None:
        store.save_value("weights", key, answer)
    return answer


def order_with_ties(ranked: list) -> list:
    """Sort by elpd, best first; candidates whose elpd differ by less than twice the
    combined Monte Carlo SE of the two estimates are tied (their order would change
    with the seed) and are listed in id order within the tie."""
    ordered = sorted(ranked, key=lambda r: -r.oos.elpd)
    tiers: list[list] = []
    for r in ordered:
        if tiers:
            prev = tiers[-1][-1]
            gap = prev.oos.elpd - r.oos.elpd
            noise = TIE_MCSE_FACTOR * np.sqrt(np.nan_to_num(prev.oos.mcse) ** 2 + np.nan_to_num(r.oos.mcse) ** 2)
            if gap <= noise:
                tiers[-1].append(r)
                continue
        tiers.append([r])
    for tier in tiers:
        for r in tier:
            r.tied_with = [o.id for o in tier if o is not r]
    return [r for tier in tiers for r in sorted(tier, key=lambda r: r.id)]


#: The standings of a ranked candidate, most favourable first.
STANDINGS = ("best", "tied", "close", "uncertain", "worse")


@dataclass
class Standing:
    """Where one ranked candidate stands against the best, the one rule that every
    sentence of the verdict and every table reads.

    ``kind``: ``best``; ``tied`` (with the best, within Monte Carlo error); ``close``
    (less than 4 elpd behind); ``uncertain`` (behind by less than two SE of the paired
    difference, or not separable from a candidate that is); ``worse`` (clearly worse:
    more than 4 elpd and two SE behind, and so is every candidate ranked below it).
    ``rank``: its place, shared by candidates tied within Monte Carlo error ("4–5").
    ``why``: a phrase when the kind comes from another candidate, not from its own
    difference (for example "tied within Monte Carlo error with Weibull")."""

    kind: str
    rank: str
    position: int
    tied_with: list[str] = field(default_factory=list)
    why: str = ""

    @property
    def preferred(self) -> bool:
        return self.kind != "worse"


def _own_kind(position: int, tied_with_best: bool, diff: float, diff_se: float) -> str:
    if position == 1:
        return "best"
    if tied_with_best:
        return "tied"
    if diff < SMALL_DIFFERENCE:
        return "close"
    if diff < SE_FACTOR * diff_se:
        return "uncertain"
    return "worse"


def standings(rows: Sequence[dict]) -> dict[str, Standing]:
    """The standing of every ranked candidate from the comparison's rows (best first,
    candidates tied within Monte Carlo error next to each other, each row with ``id``,
    ``label``, ``elpd_diff``, ``elpd_diff_se`` and ``tied_with``).

    One rule: each candidate's own standing follows from its difference to the best
    (below 4 elpd: close, Sivula et al.; below two SE of the paired difference:
    uncertain, common practice, no source for the factor 2). Candidates tied within
    Monte Carlo error share the most favourable standing among them and one rank (their
    order would change with the seed). A candidate is clearly worse only when every
    candidate ranked below it is too: one ranked above a candidate that cannot be
    separated from the best is not called clearly worse either."""
    rows = list(rows)
    if not rows:
        return {}
    best = rows[0]["id"]
    tiers: list[list[dict]] = []
    for row in rows:
        if tiers and row["id"] in tiers[-1][0]["tied_with"]:
            tiers[-1].append(row)
        else:
            tiers.append([row])
    labels = {row["id"]: row.get("label", row["id"]) for row in rows}
    own = {}
    for pos, row in enumerate(rows, 1):
        own[row["id"]] = _own_kind(pos, best in row["tied_with"], float(row["elpd_diff"]),
                                   float(row["elpd_diff_se"]))
    out: dict[str, Standing] = {}
    below: list[str] = []        # ids of not-clearly-worse candidates ranked below, nearest first
    start = len(rows)
    for tier in reversed(tiers):
        start -= len(tier)
        first, last = start + 1, start + len(tier)
        rank = str(first) if first == last else f"{first}–{last}"
        kinds = [STANDINGS.index(own[r["id"]]) for r in tier]
        kind = STANDINGS[min(kinds)]
        lifted_by = ""
        if kind == "worse" and below:
            kind, lifted_by = "uncertain", below[0]
        for pos, r in enumerate(tier, first):
            k = "best" if pos == 1 else ("tied" if kind == "best" else kind)
            why = ""
            if STANDINGS.index(own[r["id"]]) > STANDINGS.index(k) and k != "tied":
                mates = [m["id"] for m in tier if m is not r and own[m["id"]] == kind]
                if mates:
                    why = "tied within Monte Carlo error with " + ", ".join(labels[m] for m in mates)
                else:
                    why = (f"ranked above {labels[lifted_by]}, which cannot be separated from the best, "
                           "so not called clearly worse")
            out[r["id"]] = Standing(k, rank, pos, [m["id"] for m in tier if m is not r], why)
        if kind != "worse":
            below.insert(0, tier[0]["id"])
    return out


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
    (``statistics.named_misses``); one without a relevant size is named when detectable."""
    from contenders.output.format import miss_words, pvalue_against
    from contenders.statistics.features import describe, named_misses, unit_of

    if r.checks is None:
        return []
    out = []
    relevant = relevant or {}
    for row in named_misses(r.checks.rows, ppp_extreme, relevant):
        p = row["p_value"]
        by = miss_words(row.get("miss", float("nan")), row.get("miss_share_sd"), unit_of(row["statistic"]))
        if by:
            what = f"observed {row['observed']:.4g}, {by}"
        else:   # p = Pr(T(y_rep) >= T(y)): near 0, replicates fall short of the observed value
            what = f"replicates {'lower' if p < 0.5 else 'higher'} than the observed {row['observed']:.4g}"
        unset = "; no relevant size set" if relevant and row["statistic"] not in relevant else ""
        out.append(f"{describe(row['statistic'])} ({what}; "
                   f"{_p_is(pvalue_against(p, ppp_extreme, 1 - ppp_extreme))}{unset})")
    from contenders.statistics.checks import band_text

    where = band_text(r.checks.loo_pit_test)   # the band's level is the run's pit_alpha
    if where:
        out.append(f"calibration (LOO-PIT ECDF {where})")
    return out


def _small_misses(r, ppp_extreme: float, relevant: Mapping[str, float]) -> int:
    """How many of a candidate's statistics are detectably off by less than their
    relevant size (``statistics.reading`` "small")."""
    from contenders.statistics.features import read_rows

    if r.checks is None or not relevant:
        return 0
    return sum(code == "small" for code in read_rows(r.checks.rows, ppp_extreme, relevant))


def _relevance_sentence(ranked, misses: dict, ppp_extreme: float, relevant: Mapping[str, float]) -> str:
    """What the named misses were judged against: no relevant sizes (every detectable miss
    is named, however small), or the sizes set and how many smaller misses were left out."""
    from contenders.output.format import miss
    from contenders.statistics.features import describe, unit_of

    if not relevant:
        if not any(misses.values()):
            return ""
        return ("No relevant sizes are set ([checks] relevant), so every detectable miss is named, however "
                "small it is in the outcome's units (with many observations a difference too small to matter "
                "is still detected); set one per statistic to name only the misses that matter.")
    sizes = ", ".join(f"{describe(k)} = {miss(v, None, unit_of(k)).lstrip('+')}" for k, v in relevant.items())
    small = {r.label: _small_misses(r, ppp_extreme, relevant) for r in ranked}
    left = sum(small.values())
    text = (f"Misses of a statistic with a relevant size ({sizes}) are named only when larger than that "
            "size")
    if left:
        who = _labels([f"{k} {v}" for k, v in small.items() if v])
        text += (f"; {left} detectable but smaller miss{'es are' if left > 1 else ' is'} left out ({who}; "
                 "see Predictive checks)")
    return text + "."


def _behind(row: dict) -> str:
    return f"{row['elpd_diff']:.1f} behind, SE {row['elpd_diff_se']:.1f}"


def _labels(names: Sequence[str]) -> str:
    """"A", "A and B", "A, B and C"."""
    names = list(names)
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def _better_share(r, best) -> float:
    """Share of observations whose out-of-sample density candidate ``r`` predicts better
    than ``best`` does (pointwise elpd higher)."""
    a, b = np.asarray(r.oos.pointwise, dtype=float), np.asarray(best.oos.pointwise, dtype=float)
    ok = np.isfinite(a) & np.isfinite(b)
    return float(np.mean(a[ok] > b[ok])) if ok.any() else float("nan")


def _stacking_sentence(ranked, stack_w, st: dict[str, Standing], rows: dict[str, dict]) -> str:
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
            share = _better_share(by_id[rid], best)
            text += (f", though {rows[rid]['elpd_diff']:.1f} elpd behind: it predicts "
                     f"{100 * share:.0f} % of the observations better than {best.label}, and the mixture "
                     "uses it for those")
        parts.append(text + ")")
    sentence = ("Stacking, which looks for the mixture of candidates that predicts best, puts its weight on "
                + "; ".join(parts))
    if best.id not in {rid for _, rid in top}:
        sentence += (f"; {best.label} gets less than {MIN_WEIGHT:g}: a mixture of the others predicts better than one "
                     "that adds it (candidates that complement each other can outweigh the single best one)")
    return sentence + "."


def _how_sure(ranked, st: dict[str, Standing], rows: dict[str, dict]) -> str:
    """The lead's second sentence: how far behind the others are, group by standing."""
    def are(group) -> str:
        return "is" if len(group) == 1 else "are"

    def span(group) -> str:
        if len(group) == 1:
            row = rows[group[0].id]
            return f"{row['elpd_diff']:.1f} elpd behind (SE {row['elpd_diff_se']:.1f})"
        lo, hi = (f"{f(rows[r.id]['elpd_diff'] for r in group):.1f}" for f in (min, max))
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
            lifted = any(st[r.id].why for r in group)
            parts.append(f"{names} {are(group)} {span(group)}, within two SE of the difference"
                         + (" or tied with one that is" if lifted else "") + ": the order is uncertain")
    worse = [r for r in others if st[r.id].kind == "worse"]
    if worse and not parts:
        parts.append(f"{_labels([r.label for r in worse[:1]])}, the next, is {span(worse[:1])}, more than "
                     f"{SMALL_DIFFERENCE:g} elpd and two standard errors of the difference")
        worse = worse[1:]
    if worse:
        parts.append(f"{len(worse)} other{'s are' if len(worse) > 1 else ' is'} clearly worse "
                     f"({min(rows[r.id]['elpd_diff'] for r in worse):.1f} elpd behind or more)")
    return "How sure: " + "; ".join(parts) + "."


def _prior_advice(flagged) -> str:
    """What to do about flagged priors, by what the prior trial found for each failing
    bound (statistics/prior.py): narrower priors can help, or the family itself puts the
    statistic outside the bound and no prior will fix it."""
    def readings(r) -> set:
        return {f.get("reading") for f in (getattr(r.prior, "failing", None) or [])}

    narrow = [r.label for r in flagged if readings(r) & {"narrow_one", "narrow_several"}]
    structure = [r.label for r in flagged if readings(r) and readings(r) <= {"structure"}]
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


def compare_candidates(results: Sequence, seed: int = 0, ppp_extreme: float = PPP_EXTREME,
                       store=None,
                       relevant: Mapping[str, float] | None = None) -> Comparison:
    """Rank healthy candidates by elpd and write the verdict.

    Rules (see ``standings``, the one rule every sentence and table reads): a
    difference below 4 elpd is small (Sivula et al.); a difference within two SE of the
    paired difference is uncertain (common practice, no source, for the factor 2);
    candidates tied within Monte Carlo error share one standing and one rank; a
    candidate with a posterior predictive p-value below ``ppp_extreme`` or above 1 -
    ``ppp_extreme`` for any statistic, or LOO-PIT values whose ECDF leaves the
    simultaneous band of the run's ``pit_alpha`` (``checks.uniformity_test``), is
    named as misfitting even when it ranks well (the p-value threshold is common
    practice, no source); unhealthy, failed and skipped candidates are not ranked.
    ``store``: see ``weights``. ``relevant`` (statistic -> smallest miss that
    matters, ``[checks] relevant``): a statistic that has one is named only when its miss
    exceeds it, and a sentence says what the misses were judged against.

    The verdict comes as a lead of two or three sentences (what to use, how sure,
    what misses) and the details.
    """
    ranked = [r for r in results if r.status == "ok" and r.oos is not None]
    lead: list[str] = []
    details: list[str] = []
    rows: list[dict] = []
    preferred: list[str] = []
    st: dict[str, Standing] = {}
    if ranked:
        est = {r.id: r.oos for r in ranked}
        stack_w, bma_w, diffs = weights(est, seed, store)
        ranked = order_with_ties(ranked)
        best = ranked[0]
        for pos, r in enumerate(ranked, 1):
            d, dse = diffs[r.id]
            rows.append({
                "rank": pos, "id": r.id, "label": r.label, "elpd": r.oos.elpd, "se": r.oos.se,
                "p": r.oos.p, "elpd_diff": d, "elpd_diff_se": dse, "stacking_weight": stack_w[r.id],
                "pseudo_bma_weight": bma_w[r.id], "pareto_k_max": r.oos.k_max,
                "n_high_k": r.oos.n_high_k, "n_refits": r.oos.n_refits, "method": r.oos.method,
                "mcse": r.oos.mcse, "tied_with": list(r.tied_with),
            })
        st = standings(rows)
        by_row = {row["id"]: row for row in rows}
        for row in rows:
            row["standing"] = st[row["id"]].kind
            row["shared_rank"] = st[row["id"]].rank
        preferred = [r.id for r in ranked if st[r.id].preferred]
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
                f"(elpd {best.oos.elpd:.1f}, SE {best.oos.se:.1f}; their order would change with the seed, so "
                "they are listed by id).")
        elif len(ranked) == 1:
            details.append(f"{best.label}: elpd {best.oos.elpd:.1f} (SE {best.oos.se:.1f}).")
        else:
            details.append(
                f"{best.label} predicts best: elpd {best.oos.elpd:.1f} (SE {best.oos.se:.1f}), "
                f"pseudo-BMA+ weight {bma_w[best.id]:.2f}.")
        if len(ranked) > 1:
            details.append(_stacking_sentence(ranked, stack_w, st, by_row))

        def entry(r) -> str:
            why = st[r.id].why
            return f"{r.label} ({_behind(by_row[r.id])}{'; ' + why if why else ''})"

        close = [entry(r) for r in ranked if st[r.id].kind == "close"]
        uncertain = [entry(r) for r in ranked if st[r.id].kind == "uncertain"]
        if close:
            details.append(
                "Within 4 elpd of it, too close to tell apart by predictive accuracy: " + "; ".join(close)
                + ". Choose among these on the predictive checks, interpretability and theory.")
        if uncertain:
            details.append("Behind it, but by less than two standard errors of the difference (or not separable "
                           "from one that is), so the order is uncertain: " + "; ".join(uncertain) + ".")
        if worse:
            details.append("Clearly worse at prediction (more than 4 elpd and two standard errors behind): "
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
    return Comparison([row["id"] for row in rows], rows, lead, preferred, details, st)
