"""Out-of-sample comparison: PSIS-LOO with exact refits, K-fold, weights, ranking and standings.

Numbers, flags and standings only: the verdict's sentences are written from them by
``contenders.output.readings``; the thresholds are in ``contenders.rules``.

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
from typing import Callable, Sequence

import numpy as np

# ArviZ and SciPy are imported inside the functions that compute with them: a rerun
# whose results all come from the fit store (see ``weights``) never needs them.

from contenders.rules import PARETO_K_GOOD, SE_FACTOR, SMALL_DIFFERENCE, TIE_MCSE_FACTOR


#: Every kind of ``Method``: plain PSIS-LOO (no Pareto k above the threshold); PSIS-LOO
#: with exact refits of the high-k observations; PSIS-LOO without refits (a quick look or
#: an unhealthy fit); K-fold asked for; K-fold because more observations had high k than
#: the refits allowed; leave-one-group-out.
METHOD_KINDS = ("psis", "psis_refits", "psis_plain", "kfold", "kfold_for_high_k", "leave_group_out")

#: Why a ``psis_plain`` estimate makes no refit: a quick look, or an unhealthy fit (never
#: ranked, so its refits would decide nothing).
PLAIN_BECAUSE = ("quick", "unhealthy")


@dataclass(frozen=True)
class Method:
    """How an elpd was obtained, as a kind (one of :data:`METHOD_KINDS`) and its counts;
    the words are written by ``contenders.output.readings.elpd_method``."""

    kind: str
    held_out: int = 0                  # folds (K-fold), groups (leave-one-group-out) or exact refits
    high_k: int = 0                    # observations with Pareto k above ``k_threshold``
    k_threshold: float = float("nan")
    refit_cap: int = 0                 # the exact refits allowed (``kfold_for_high_k``)
    plain_because: str = ""            # one of :data:`PLAIN_BECAUSE` (``psis_plain``)


@dataclass
class OutOfSample:
    """Estimated expected log predictive density of one candidate.

    The fields carry the names of the keys of ``summary.json`` that report them
    (``elpd_loo``, ``elpd_loo_se``, ``p_loo``, ``elpd_method``, ``elpd_mcse``,
    ``pareto_k_max``, ``n_high_pareto_k``, ``n_refits``), here and in ``ComparisonRow``.
    """

    elpd_loo: float
    elpd_loo_se: float
    p_loo: float                  # effective number of parameters: lppd - elpd
    pointwise: np.ndarray         # elpd of each observation
    pareto_k: np.ndarray          # PSIS shape estimate per observation (NaN for K-fold only)
    k_threshold: float
    elpd_method: Method           # how the elpd was obtained
    refitted: list[int] = field(default_factory=list)  # 0-based observations refitted exactly
    n_refits: int = 0
    elpd_psis: float = float("nan")                     # plain PSIS-LOO before any refit
    elpd_mcse: float = float("nan")                     # Monte Carlo SE of elpd (chains as batches)
    n_samples: int = 0                                  # posterior draws behind the PSIS estimate

    @property
    def pareto_k_max(self) -> float:
        k = self.pareto_k[np.isfinite(self.pareto_k)]
        return float(k.max()) if k.size else float("nan")

    @property
    def n_high_pareto_k(self) -> int:
        return int((self.pareto_k > self.k_threshold).sum())


def log_mean_exp(log_lik: np.ndarray, axis: int = 0) -> np.ndarray:
    """log of the mean of exp(x) along an axis, computed stably.

    Parameters
    ----------
    log_lik : numpy.ndarray
        Log values (for example log-likelihood draws, draws on axis 0).
    axis : int
        The axis to average over.

    Returns
    -------
    numpy.ndarray
        ``logsumexp(log_lik, axis) - log(n)`` (SciPy's ``logsumexp``).
    """
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
    """Fold number (0..k-1) of each observation.

    With ``strata`` every fold receives an (almost) equal share of each stratum: members
    of a stratum are shuffled and dealt to the folds in turn, starting where the previous
    stratum stopped.

    Parameters
    ----------
    n : int
        Number of observations.
    k : int
        Number of folds.
    strata : numpy.ndarray, optional
        Each observation's stratum (for example its group).
    seed : int
        Seed of the shuffle.

    Returns
    -------
    numpy.ndarray
        Integer fold of each observation, shape (n,).
    """
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
    return {"elpd_loo_se": float(np.sqrt(n * np.var(pointwise))), "p_loo": float(lppd - pointwise.sum())}


def elpd_data(e: OutOfSample):
    """The ArviZ ``ELPDData`` of one estimate, built from its plain fields.

    Parameters
    ----------
    e : OutOfSample
        The estimate.

    Returns
    -------
    arviz.ELPDData
        elpd, SE, p, draws, pointwise values, Pareto k, scale ``log`` and the k threshold,
        as ``arviz.compare`` reads them.
    """
    import xarray as xr
    from arviz.stats.stats_utils import ELPDData

    n = e.pointwise.size
    obs = np.arange(n)
    return ELPDData(
        data=[float(e.elpd_loo), float(e.elpd_loo_se), float(e.p_loo), int(e.n_samples), n, False,
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
    method: Method
    base: dict
    refitted: list[int] = field(default_factory=list)

    def finish(self, held_out: Sequence[np.ndarray] = ()) -> OutOfSample:
        """The estimate, with each refit's held-out values in place of the PSIS ones.

        Parameters
        ----------
        held_out : sequence of numpy.ndarray
            Per refit of ``fits``, in order, its ``log_lik`` draws of the held-out
            observations, shape (S, held out).

        Returns
        -------
        OutOfSample
            elpd (sum of the pointwise values), its SE and p (Vehtari, Gelman & Gabry
            2017, as ArviZ's ``loo`` computes them), and the Monte Carlo SE from the
            batches of draws (batch means; common practice, no source).
        """
        if len(held_out) != len(self.fits):
            raise ValueError(f"{len(self.fits)} refits planned, {len(held_out)} results given")
        pointwise, per_chain = self.pointwise.copy(), self.per_chain.copy()
        for (_fitted, idx), draws in zip(self.fits, held_out):
            draws = np.asarray(draws, dtype=float).reshape(-1, idx.size)
            pointwise[idx] = log_mean_exp(draws)
            per_chain[:, idx] = log_mean_exp(draws.reshape(self.n_chains, -1, idx.size), axis=1)
        t = _totals(pointwise, self.lppd)
        return OutOfSample(float(pointwise.sum()), t["elpd_loo_se"], t["p_loo"], pointwise, elpd_method=self.method,
                           refitted=list(self.refitted), n_refits=len(self.fits),
                           elpd_mcse=_chain_mcse(per_chain.sum(axis=1)), **self.base)


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
    plain_because: str = "quick",
) -> Plan:
    """PSIS-LOO of one candidate and the refits the estimate needs (see ``estimate``).

    Parameters
    ----------
    idata : arviz.InferenceData
        The fit, with ``log_lik`` (chain, draw, obs) in ``log_likelihood``.
    strategy : str
        ``loo``, ``kfold``, ``leave_group_out`` or ``psis`` (PSIS-LOO as it is, no refit).
    refit_cap : int
        Most exact refits before the estimate falls back to K-fold.
    folds : int
        Folds of K-fold.
    groups : numpy.ndarray, optional
        Each observation's group (leave-one-group-out; strata of the folds).
    seed : int
        Seed of the folds.
    plain_because : str
        Why ``psis`` makes no refit: ``quick`` or ``unhealthy`` (:data:`PLAIN_BECAUSE`),
        kept in the estimate's ``Method``.

    Returns
    -------
    Plan
        The refits to run (fitted and held-out observations), the ``Method`` (kind and
        counts) and what ``Plan.finish`` needs to complete the estimate.

    References
    ----------
    Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, 1413-1432 (PSIS-LOO,
    exact refits and K-fold); Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72)
    (the Pareto k threshold, ArviZ's ``good_k``).
    """
    if plain_because not in PLAIN_BECAUSE:
        raise ValueError(f"plain_because must be one of {PLAIN_BECAUSE}, not {plain_because!r}")
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

    def held_out(fold_of: np.ndarray, method: Method) -> Plan:
        fits = [(np.flatnonzero(fold_of != f), np.flatnonzero(fold_of == f)) for f in np.unique(fold_of)]
        return Plan(fits, np.full(n, np.nan), np.full((n_chains, n), np.nan), lppd, n_chains, method, base)

    if strategy == "leave_group_out":
        if groups is None:
            raise ValueError("leave-one-group-out needs a group column")
        return held_out(np.asarray(groups), Method("leave_group_out", held_out=len(np.unique(groups))))
    if strategy == "kfold":
        return held_out(make_folds(n, folds, groups, seed), Method("kfold", held_out=folds))
    high = np.flatnonzero(k > threshold)
    if strategy == "psis":   # a quick look or an unhealthy fit: PSIS-LOO as it is, never a refit
        return Plan([], psis, by_chain, lppd, n_chains,
                    Method("psis_plain", high_k=int(high.size), k_threshold=threshold,
                           plain_because=plain_because), base)
    if high.size == 0:
        return Plan([], psis, by_chain, lppd, n_chains, Method("psis", k_threshold=threshold), base)
    if high.size > refit_cap:
        return held_out(make_folds(n, folds, groups, seed),
                        Method("kfold_for_high_k", held_out=folds, high_k=int(high.size),
                               k_threshold=threshold, refit_cap=refit_cap))
    everyone = np.arange(n)
    fits = [(everyone[everyone != i], np.array([i])) for i in high]
    return Plan(fits, psis, by_chain, lppd, n_chains,
                Method("psis_refits", held_out=int(high.size), high_k=int(high.size), k_threshold=threshold),
                base, refitted=[int(i) for i in high])


def estimate(
    idata,
    refit: RefitFn,
    strategy: str = "loo",
    refit_cap: int = 10,
    folds: int = 10,
    groups: np.ndarray | None = None,
    seed: int = 0,
) -> OutOfSample:
    """elpd of one candidate, its refits run here one after the other.

    Parameters
    ----------
    idata : arviz.InferenceData
        The fit, with ``log_lik``.
    refit : callable
        ``refit(fitted)`` returns log_lik draws (S, N) of a fit to the 0-based
        observations ``fitted``.
    strategy : str
        ``loo``: PSIS-LOO, observations whose Pareto k exceeds the threshold refitted
        exactly with that observation held out, up to ``refit_cap``, above it K-fold;
        ``kfold``: K-fold for every candidate; ``leave_group_out``: each level of
        ``groups`` held out in turn (predicting new groups, a different quantity).
    refit_cap, folds, groups, seed
        See ``plan_estimate``.

    Returns
    -------
    OutOfSample
        elpd, SE, p, pointwise values, Pareto k, method, refits and Monte Carlo SE.

    References
    ----------
    Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, 1413-1432.
    """
    plan = plan_estimate(idata, strategy, refit_cap, folds, groups, seed)
    return plan.finish([refit(fitted)[:, idx] for fitted, idx in plan.fits])


def k_band_edges(threshold: float) -> list[tuple[float, float]]:
    """The Pareto k bands of one estimate, each ``(low, high)`` with ``low < k <= high``.

    Parameters
    ----------
    threshold : float
        The estimate's own threshold, min(1 - 1/log10 S, 0.7) for S draws.

    Returns
    -------
    list of (float, float)
        Three bands split at ``rules.PARETO_K_GOOD`` (0.5) and the threshold, or two
        when the threshold is at or below 0.5; the outer edges are -inf and inf.

    References
    ----------
    Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance sampling",
    JMLR 25(72), Section 3: below 0.5 the estimate converges quickly; above the
    threshold it is unreliable.
    """
    t, good = float(threshold), PARETO_K_GOOD
    if t <= good:
        return [(-np.inf, t), (t, np.inf)]
    return [(-np.inf, good), (good, t), (t, np.inf)]


def k_band_counts(pareto_k: np.ndarray, threshold: float) -> list[int]:
    """Observations in each band of :func:`k_band_edges`.

    Parameters
    ----------
    pareto_k : ndarray
        One Pareto k per observation; NaN where there is none (K-fold), inf where the
        tail fit failed.
    threshold : float
        The estimate's threshold.

    Returns
    -------
    list of int
        Counts per band, lowest first; a NaN is in no band, an inf in the top one.
    """
    k = np.asarray(pareto_k, dtype=float)
    k = k[~np.isnan(k)]
    return [int(((k > lo) & (k <= hi)).sum()) for lo, hi in k_band_edges(threshold)]


def worst_k(pareto_k: np.ndarray, count: int) -> list[int]:
    """The observations with the largest Pareto k.

    Parameters
    ----------
    pareto_k : ndarray
        One Pareto k per observation (NaN: none, inf: the tail fit failed).
    count : int
        How many to return at most.

    Returns
    -------
    list of int
        0-based observations, largest k first (an inf first, a NaN never; ties in
        observation order).
    """
    k = np.asarray(pareto_k, dtype=float)
    order = np.argsort(-np.where(np.isnan(k), -np.inf, k), kind="stable")
    return [int(i) for i in order if not np.isnan(k[i])][:count]


@dataclass
class ComparisonRow:
    """One ranked candidate of the comparison. Its fields carry the names of the keys
    of ``summary.json`` that report them; the CSV files name three of them for their
    readers (``contenders.output.report``: ``elpd_se``, ``elpd_behind_best``,
    ``elpd_behind_best_se``)."""

    rank: int                     # place in the ranking, 1 = best (see shared_rank for ties)
    id: str
    label: str
    elpd_loo: float
    elpd_loo_se: float
    p_loo: float
    elpd_diff: float              # elpd behind the best (ArviZ's ``compare``), >= 0
    elpd_diff_se: float           # SE of the paired difference
    stacking_weight: float
    pseudo_bma_weight: float
    pareto_k_max: float
    n_high_pareto_k: int
    n_refits: int
    elpd_method: Method
    elpd_mcse: float
    tied_with: list[str] = field(default_factory=list)  # ids tied within Monte Carlo error
    standing: str = ""            # Standing.kind
    shared_rank: str = ""         # Standing.rank ("2–3" for a tie)


@dataclass
class Comparison:
    """The ranking and the verdict. ``lead`` is two or three sentences (what to use, how
    sure that is, what the preferred candidates miss); ``details`` every other sentence,
    most important first; ``verdict`` both, lead first. ``rank_candidates`` leaves
    ``lead`` and ``details`` empty; ``contenders.output.readings.compare_candidates``
    fills them (``readings.verdict``)."""

    ranking: list[str]
    rows: list[ComparisonRow]     # per ranked candidate, best first
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
    """SHA-256 of everything ``arviz.compare`` reads of the given estimates.

    Parameters
    ----------
    estimates : dict of str to OutOfSample
        The estimates compared, in order.
    seed : int
        Seed of the Bayesian bootstrap.

    Returns
    -------
    str
        Hex digest of ids, elpd, SE, p, draws, pointwise values, the seed and the
        installed ArviZ version: equal keys give equal weights.
    """
    from importlib.metadata import version

    h = hashlib.sha256(f"weights {WEIGHTS_FORMAT}|arviz {version('arviz')}|seed {seed}".encode())
    for cid, e in estimates.items():
        h.update(f"|{cid}|{e.elpd_loo!r}|{e.elpd_loo_se!r}|{e.p_loo!r}|{int(e.n_samples)}|".encode())
        pointwise = np.ascontiguousarray(np.asarray(e.pointwise, dtype=np.float64))
        h.update(str(pointwise.shape).encode())
        h.update(pointwise.tobytes())
    return h.hexdigest()


def weights(estimates: dict[str, OutOfSample], seed: int = 0) -> tuple[dict, dict, dict]:
    """Stacking weights, pseudo-BMA+ weights and the differences to the best.

    A run keeps the answer in its fit store (``contenders.pipeline.store.remembered_weights``,
    keyed by ``weights_key``), so a rerun from the fit store does not import ArviZ.

    Parameters
    ----------
    estimates : dict of str to OutOfSample
        Candidate id -> estimate.
    seed : int
        Seed of the Bayesian bootstrap of the pseudo-BMA+ weights.

    Returns
    -------
    tuple of dict
        ``(stacking, pseudo_bma, diffs)``: id -> weight, id -> weight and id ->
        ``(elpd_diff, dse)`` (ArviZ's ``compare``).

    References
    ----------
    Yao, Vehtari, Simpson & Gelman (2018), "Using stacking to average Bayesian
    predictive distributions", Bayesian Analysis 13(3).
    """
    if len(estimates) == 1:
        (cid,) = estimates
        return {cid: 1.0}, {cid: 1.0}, {cid: (0.0, 0.0)}
    import arviz as az

    objs = {cid: elpd_data(e) for cid, e in estimates.items()}
    stacked = az.compare(objs, ic="loo", method="stacking")
    bma = az.compare(objs, ic="loo", method="BB-pseudo-BMA", seed=seed)
    diffs = {cid: (float(stacked.loc[cid, "elpd_diff"]), float(stacked.loc[cid, "dse"])) for cid in objs}
    return ({cid: float(stacked.loc[cid, "weight"]) for cid in objs},
            {cid: float(bma.loc[cid, "weight"]) for cid in objs}, diffs)


#: How ``rank_candidates`` obtains the weights: ``weights`` itself, or the same answer
#: remembered (``contenders.pipeline.store.remembered_weights``).
Weigh = Callable[[dict, int], tuple]


def order_with_ties(ranked: list) -> list:
    """Sort by elpd, best first, with ties within Monte Carlo error.

    Candidates whose elpd differ by at most ``rules.TIE_MCSE_FACTOR`` combined Monte
    Carlo SE of the two estimates are tied (their order would change with the seed) and
    are listed in id order within the tie.

    Parameters
    ----------
    ranked : list
        Candidate results with ``id`` and ``oos`` (elpd, mcse); they are not changed.

    Returns
    -------
    ordered : list
        The same results, ordered.
    tied_with : dict of str to list of str
        Per id, the ids of the others in its tie (empty when it is alone).
    """
    ordered = sorted(ranked, key=lambda r: -r.oos.elpd_loo)
    tiers: list[list] = []
    for r in ordered:
        if tiers:
            prev = tiers[-1][-1]
            gap = prev.oos.elpd_loo - r.oos.elpd_loo
            noise = TIE_MCSE_FACTOR * np.sqrt(np.nan_to_num(prev.oos.elpd_mcse) ** 2 + np.nan_to_num(r.oos.elpd_mcse) ** 2)
            if gap <= noise:
                tiers[-1].append(r)
                continue
        tiers.append([r])
    tied_with = {r.id: [o.id for o in tier if o is not r] for tier in tiers for r in tier}
    return [r for tier in tiers for r in sorted(tier, key=lambda r: r.id)], tied_with


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
    ``lifted``: why the kind comes from another candidate, not from its own difference:
    ``"tied"`` (tied within Monte Carlo error with the candidates ``lifted_by``, labels)
    or ``"above"`` (ranked above ``lifted_by[0]``, which cannot be separated from the
    best, so not called clearly worse); ``""`` when its own difference sets it. The
    words are ``contenders.output.readings.standing_why``."""

    kind: str
    rank: str
    position: int
    tied_with: list[str] = field(default_factory=list)
    lifted: str = ""
    lifted_by: list[str] = field(default_factory=list)

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


def standings(rows: Sequence[ComparisonRow]) -> dict[str, Standing]:
    """The standing of every ranked candidate, the one rule every sentence and table reads.

    Each candidate's own standing follows from its difference to the best (below
    ``rules.SMALL_DIFFERENCE`` elpd: close; below ``rules.SE_FACTOR`` SE of the paired
    difference: uncertain). Candidates tied within Monte Carlo error share the most
    favourable standing among them and one rank (their order would change with the
    seed). A candidate is clearly worse only when every candidate ranked below it is too:
    one ranked above a candidate that cannot be separated from the best is not called
    clearly worse either.

    Parameters
    ----------
    rows : sequence of ComparisonRow
        The comparison's rows, best first, candidates tied within Monte Carlo error next
        to each other; ``id``, ``label``, ``elpd_diff``, ``elpd_diff_se`` and
        ``tied_with`` are read.

    Returns
    -------
    dict of str to Standing
        Candidate id -> its standing (kind, shared rank, position, ties, lift).

    References
    ----------
    Sivula, Magnusson, Matamoros & Vehtari (2025), Bayesian Analysis, arXiv:2008.10296
    (small differences); the factor 2 is common practice, no source.
    """
    rows = list(rows)
    if not rows:
        return {}
    best = rows[0].id
    tiers: list[list[ComparisonRow]] = []
    for row in rows:
        if tiers and row.id in tiers[-1][0].tied_with:
            tiers[-1].append(row)
        else:
            tiers.append([row])
    labels = {row.id: row.label for row in rows}
    own = {}
    for pos, row in enumerate(rows, 1):
        own[row.id] = _own_kind(pos, best in row.tied_with, float(row.elpd_diff), float(row.elpd_diff_se))
    out: dict[str, Standing] = {}
    below: list[str] = []        # ids of not-clearly-worse candidates ranked below, nearest first
    start = len(rows)
    for tier in reversed(tiers):
        start -= len(tier)
        first, last = start + 1, start + len(tier)
        rank = str(first) if first == last else f"{first}–{last}"
        kinds = [STANDINGS.index(own[r.id]) for r in tier]
        kind = STANDINGS[min(kinds)]
        lifted_by = ""
        if kind == "worse" and below:
            kind, lifted_by = "uncertain", below[0]
        for pos, r in enumerate(tier, first):
            k = "best" if pos == 1 else ("tied" if kind == "best" else kind)
            lifted, by = "", []
            if STANDINGS.index(own[r.id]) > STANDINGS.index(k) and k != "tied":
                mates = [m.id for m in tier if m is not r and own[m.id] == kind]
                if mates:
                    lifted, by = "tied", [labels[m] for m in mates]
                else:
                    lifted, by = "above", [labels[lifted_by]]
            out[r.id] = Standing(k, rank, pos, [m.id for m in tier if m is not r], lifted, by)
        if kind != "worse":
            below.insert(0, tier[0].id)
    return out


def better_share(pointwise: np.ndarray, best_pointwise: np.ndarray) -> float:
    """Share of observations whose out-of-sample density one candidate predicts better
    than the best one does.

    Parameters
    ----------
    pointwise : numpy.ndarray
        Pointwise elpd of the candidate, shape (N,).
    best_pointwise : numpy.ndarray
        Pointwise elpd of the best candidate, same shape.

    Returns
    -------
    float
        Share of the observations (both values finite) where ``pointwise`` is higher;
        NaN when none is finite.
    """
    a, b = np.asarray(pointwise, dtype=float), np.asarray(best_pointwise, dtype=float)
    ok = np.isfinite(a) & np.isfinite(b)
    return float(np.mean(a[ok] > b[ok])) if ok.any() else float("nan")


def rank_candidates(results: Sequence, seed: int = 0, weigh: Weigh | None = None) -> Comparison:
    """Rank the healthy candidates by elpd: rows, standings and the preferred candidates.

    Rules (see ``standings``, the one rule every sentence and table reads): a
    difference below ``rules.SMALL_DIFFERENCE`` elpd is small (Sivula et al.); a
    difference within ``rules.SE_FACTOR`` SE of the paired difference is uncertain
    (common practice, no source); candidates tied within Monte Carlo error share one
    standing and one rank (``order_with_ties``); unhealthy, failed and skipped
    candidates are not ranked. The verdict's words are written by
    ``contenders.output.readings.verdict``; here ``lead`` and ``details`` stay empty.

    Parameters
    ----------
    results : sequence of CandidateResult
        Every candidate of the run; those with status ``"ok"`` and an out-of-sample
        estimate (``oos``) are ranked; they are not changed.
    seed : int
        Seed of the Bayesian bootstrap of the pseudo-BMA+ weights.
    weigh : callable, optional
        ``(estimates, seed) -> (stacking, pseudo_bma, diffs)``; ``weights`` when not given.

    Returns
    -------
    Comparison
        ``ranking`` (ids, best first), ``rows`` (a ``ComparisonRow`` per ranked
        candidate: elpd, SE, p, difference to the best and its SE, weights, Pareto k,
        method, Monte Carlo SE, standing and shared rank), ``preferred`` (ids of the candidates not
        clearly worse) and ``standings``.

    References
    ----------
    Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, 1413-1432 (elpd and
    its SE); Yao, Vehtari, Simpson & Gelman (2018), Bayesian Analysis 13(3) (stacking
    and pseudo-BMA+ weights); Sivula, Magnusson, Matamoros & Vehtari (2025), Bayesian
    Analysis, arXiv:2008.10296 (small differences).
    """
    ranked = [r for r in results if r.status == "ok" and r.oos is not None]
    rows: list[ComparisonRow] = []
    preferred: list[str] = []
    st: dict[str, Standing] = {}
    if ranked:
        est = {r.id: r.oos for r in ranked}
        stack_w, bma_w, diffs = (weigh or weights)(est, seed)
        ranked, tied_with = order_with_ties(ranked)
        for pos, r in enumerate(ranked, 1):
            d, dse = diffs[r.id]
            rows.append(ComparisonRow(
                pos, r.id, r.label, r.oos.elpd_loo, r.oos.elpd_loo_se, r.oos.p_loo, d, dse,
                stack_w[r.id], bma_w[r.id], r.oos.pareto_k_max, r.oos.n_high_pareto_k, r.oos.n_refits,
                r.oos.elpd_method, r.oos.elpd_mcse, tied_with[r.id]))
        st = standings(rows)
        for row in rows:
            row.standing = st[row.id].kind
            row.shared_rank = st[row.id].rank
        preferred = [r.id for r in ranked if st[r.id].preferred]
    return Comparison([row.id for row in rows], rows, [], preferred, [], st)
