"""Simulation-based calibration: the ranks of true parameter values among posterior
draws, and the tests of their uniformity (the study that simulates and fits the
datasets is :mod:`contenders.pipeline.calibration`).

A dataset ``y_s`` is simulated from parameters ``theta_s`` drawn from a candidate's
prior; the candidate is fitted to ``y_s``, and the rank of each true parameter value
among ``L`` posterior draws thinned evenly from the fit is taken. If the program's
likelihood, its ``y_rep`` and its priors agree and the sampler is accurate, every rank
is uniform on ``0..L`` (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
"Validating Bayesian inference algorithms with simulation-based calibration",
arXiv:1804.06788, Theorem 1; Modrák, Moon, Kim, Bürkner, Huurre, Faltejsková, Gelman
& Vehtari 2023, "Simulation-based calibration checking for Bayesian computation: the
choice of test quantities shapes sensitivity", Bayesian Analysis).

Uniformity is tested per scalar parameter in two ways, each at level ``alpha / P``
for ``P`` scalar parameters (Bonferroni), so a correct candidate is wrongly flagged
with probability at most about ``2 alpha``:

* Pearson's chi-square test of the ranks counted in ``B`` bins of (nearly) equal width,
  with ``B`` the smaller of 20 and a fifth of the ranked simulations, so that at least
  five ranks are expected per bin (common practice, no source for the bin rule);
* the simultaneous band of the empirical distribution function of the scaled ranks
  (Säilynoja, Bürkner & Vehtari 2022, "Graphical test for discrete uniformity and its
  applications in goodness-of-fit evaluation and multiple sample comparison",
  Statistics and Computing 32, 32), computed by ArviZ's
  ``arviz.stats.ecdf_utils.ecdf_confidence_band`` (the "optimized" method).

Numbers and the verdict's status only: the verdict's sentence (``Calibration.reason``)
is written from them by ``contenders.output.readings.calibration_reason``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import scipy.stats as sps

from contenders.rules import CALIBRATION_ALPHA

#: Overall level of the calibration verdict (split over parameters and the two tests).
ALPHA = CALIBRATION_ALPHA

#: Posterior draws kept per fit (ranks run from 0 to this); Talts et al. use 100.
KEPT_DRAWS = 99

#: Fewer ranked simulations than this give no verdict.
MIN_RANKED = 10

#: Most bins of the chi-square test.
MAX_BINS = 20


# --- pure functions ----------------------------------------------------------------------

def rank_of(true: np.ndarray, draws: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Rank of each true value among the draws: the number of draws below it, ties
    (possible only for stuck chains) broken at random.

    Parameters
    ----------
    true : numpy.ndarray
        The true values, shape (P,).
    draws : numpy.ndarray
        Posterior draws, shape (L, P).
    rng : numpy.random.Generator
        Breaks ties: a value tied with ``t`` draws gets a rank drawn uniformly from the
        ``t + 1`` ranks it could take.

    Returns
    -------
    numpy.ndarray
        Integer ranks in 0..L, shape (P,).

    References
    ----------
    Talts, Betancourt, Simpson, Vehtari & Gelman (2018), "Validating Bayesian inference
    algorithms with simulation-based calibration", arXiv:1804.06788 (the rank statistic;
    Theorem 1: its uniformity on 0..L).
    """
    true = np.asarray(true, dtype=float)
    draws = np.asarray(draws, dtype=float)
    below = (draws < true).sum(axis=0)
    ties = (draws == true).sum(axis=0)
    return below + rng.integers(0, ties + 1)


def bins_for(n_ranked: int, kept: int) -> int:
    """Bins of the chi-square test: at least five ranks expected in each, at most
    :data:`MAX_BINS`, at most ``kept + 1`` (one per possible rank), never fewer than two.

    Parameters
    ----------
    n_ranked : int
        Ranked simulations.
    kept : int
        Posterior draws kept per fit (ranks run 0..kept).

    Returns
    -------
    int
        ``max(2, min(MAX_BINS, n_ranked // 5, kept + 1))``.

    References
    ----------
    Five expected counts per bin: common practice for Pearson's test, no source.
    """
    return int(max(2, min(MAX_BINS, n_ranked // 5, kept + 1)))


def chi_square_uniformity(ranks: np.ndarray, kept: int, bins: int) -> tuple[float, float, list[int], list[int]]:
    """Pearson's chi-square test that ranks are uniform on 0..kept.

    The ranks are counted in ``bins`` bins of nearly equal width; the expected count of
    a bin is proportional to the number of possible ranks in it, so unequal widths are
    exact.

    Parameters
    ----------
    ranks : numpy.ndarray
        Integer ranks in 0..kept.
    kept : int
        Posterior draws kept per fit.
    bins : int
        Bins to count the ranks in (see ``bins_for``).

    Returns
    -------
    statistic : float
        Pearson's chi-square statistic (SciPy's ``chisquare``).
    p_value : float
        Its p-value, with ``len(edges) - 2`` degrees of freedom.
    counts : list of int
        Ranks in each bin.
    edges : list of int
        Rank boundaries: bin ``b`` holds ranks ``edges[b] <= r < edges[b + 1]``.

    References
    ----------
    Talts et al. (2018), arXiv:1804.06788 (the histogram of ranks, uniform under correct
    calibration); the test itself is Pearson's, computed by ``scipy.stats.chisquare``.
    """
    ranks = np.asarray(ranks, dtype=int)
    edges = np.unique(np.round(np.linspace(0, kept + 1, bins + 1)).astype(int))
    counts = np.histogram(ranks, bins=edges)[0]
    expected = ranks.size * np.diff(edges) / (kept + 1)
    stat, p = sps.chisquare(counts, expected)
    return float(stat), float(p), counts.tolist(), edges.tolist()


def ecdf_points(n_ranked: int, kept: int) -> np.ndarray:
    """Where the ECDF of the scaled ranks ``(r + 1) / (kept + 1)`` is evaluated.

    Parameters
    ----------
    n_ranked : int
        Ranked simulations (N).
    kept : int
        Posterior draws kept per fit.

    Returns
    -------
    numpy.ndarray
        At most ``n_ranked`` interior rank boundaries ``k / (kept + 1)``, increasing, so
        the uniform distribution function there is exactly ``k / (kept + 1)``.

    References
    ----------
    Säilynoja, Bürkner & Vehtari (2022), Statistics and Computing 32, 32 (the ECDF
    evaluated at K <= N points).
    """
    k = np.unique(np.round(np.linspace(0, kept + 1, min(n_ranked, kept + 1) + 1)).astype(int))[1:-1]
    return k / (kept + 1)


def ecdf_band(n_ranked: int, kept: int, prob: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The simultaneous band of the ECDF of uniform scaled ranks.

    Parameters
    ----------
    n_ranked : int
        Ranked simulations.
    kept : int
        Posterior draws kept per fit.
    prob : float
        Simultaneous coverage of the band.

    Returns
    -------
    z : numpy.ndarray
        The points of ``ecdf_points``.
    lower, upper : numpy.ndarray
        The band's limits at ``z``.

    References
    ----------
    Säilynoja, Bürkner & Vehtari (2022), "Graphical test for discrete uniformity and its
    applications in goodness-of-fit evaluation and multiple sample comparison",
    Statistics and Computing 32, 32; computed by ArviZ's ``ecdf_confidence_band``
    (the "optimized" method).
    """
    from arviz.stats.ecdf_utils import ecdf_confidence_band

    z = ecdf_points(n_ranked, kept)
    lower, upper = ecdf_confidence_band(n_ranked, z, z, prob=prob, method="optimized")
    return z, np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)


def ecdf_of_ranks(ranks: np.ndarray, kept: int, z: np.ndarray) -> np.ndarray:
    """ECDF of the scaled ranks ``(r + 1) / (kept + 1)`` at ``z``.

    Parameters
    ----------
    ranks : numpy.ndarray
        Integer ranks in 0..kept.
    kept : int
        Posterior draws kept per fit.
    z : numpy.ndarray
        Where to evaluate (``ecdf_points``).

    Returns
    -------
    numpy.ndarray
        The share of scaled ranks at or below each ``z``.

    References
    ----------
    Säilynoja, Bürkner & Vehtari (2022), Statistics and Computing 32, 32 (the scaled
    ranks' ECDF).
    """
    u = np.sort((np.asarray(ranks, dtype=float) + 1) / (kept + 1))
    return np.searchsorted(u, z + 1e-12, side="right") / u.size


# --- results -----------------------------------------------------------------------------

@dataclass
class ParameterRanks:
    """Ranks of one scalar parameter over the ranked simulations and their tests."""

    parameter: str
    ranks: list[int]
    bins: int
    counts: list[int]
    edges: list[int]
    chi_square: float
    p_value: float
    outside_band: bool           # the ECDF leaves the simultaneous band somewhere
    flagged: bool


@dataclass
class Unranked:
    """A simulated dataset that gave no ranks: not fitted (some values not finite, or
    outside the candidate's support) or its fit failed."""

    simulation: int              # 1-based
    kind: str                    # non_finite | outside_support | fit_failed
    non_finite: int = 0          # values that are not finite (kind non_finite)
    message: str = ""            # the support check's or the failed fit's message


@dataclass
class Calibration:
    """Simulation-based calibration of one candidate."""

    id: str
    label: str
    status: str                              # passed | failed | inconclusive | not run
    reason: str = ""                         # in words (output.readings.calibration_reason)
    simulations: int = 0                     # asked for
    kept_draws: int = KEPT_DRAWS             # L: ranks run 0..L
    ranked: int = 0                          # simulations whose fit gave ranks
    unhealthy: int = 0                       # of the ranked: fits with sampler problems
    low_ess: int = 0                         # of the ranked: smallest bulk ESS below L
    fit_failures: list[Unranked] = field(default_factory=list)   # worded by output.readings.unranked_text
    not_fitted: list[Unranked] = field(default_factory=list)     # in simulation order
    implausible: int = 0                     # simulated datasets outside [checks.bounds]
    prior_divergences: int = 0
    alpha: float = ALPHA
    level: float = ALPHA                     # per parameter and test: alpha / (2 P)
    parameters: list[ParameterRanks] = field(default_factory=list)

    @property
    def flagged(self) -> list[ParameterRanks]:
        return [p for p in self.parameters if p.flagged]


def flat_names(post, names: Sequence[str]) -> list[str]:
    """Scalar names in the order of ``values.reshape(draws, -1)``.

    Parameters
    ----------
    post : xarray.Dataset
        A posterior (or prior) group, dimensions (chain, draw, ...).
    names : sequence of str
        The parameters to name.

    Returns
    -------
    list of str
        ``mu``, ``coef[1]``, ``coef[2]``, ... (indices 1-based, as in Stan).
    """
    out = []
    for name in names:
        shape = post[name].shape[2:]
        if not shape:
            out.append(name)
        else:
            out.extend(f"{name}[{','.join(str(i + 1) for i in idx)}]" for idx in np.ndindex(shape))
    return out


def stack_parameters(post, names: Sequence[str]) -> np.ndarray:
    """The named parameters as one matrix.

    Parameters
    ----------
    post : xarray.Dataset
        A posterior (or prior) group, dimensions (chain, draw, ...).
    names : sequence of str
        The parameters to stack.

    Returns
    -------
    numpy.ndarray
        Shape (chain * draw, P), chain-major, columns in the order of ``flat_names``.
    """
    m = post.sizes["chain"] * post.sizes["draw"]
    return np.concatenate([np.asarray(post[n].values, dtype=float).reshape(m, -1) for n in names], axis=1)


def judge(cal: Calibration, theta: np.ndarray, kept_by_sim: dict[int, np.ndarray], names: Sequence[str],
          seed: int) -> Calibration:
    """Ranks, tests and the verdict of one candidate's simulation-based calibration.

    Parameters
    ----------
    cal : Calibration
        The candidate's record; its ``ranked``, ``level``, ``parameters`` and ``status``
        are filled here (``reason`` is not: see
        ``contenders.output.readings.calibration_reason``).
    theta : numpy.ndarray
        True parameter values of every simulation, shape (S, P).
    kept_by_sim : dict of int to numpy.ndarray
        The kept posterior draws of each ranked simulation, ``{s: (L, P)}``.
    names : sequence of str
        The P scalar names (``flat_names``).
    seed : int
        Seed of the random tie-breaking of ranks.

    Returns
    -------
    Calibration
        ``cal``, with ``status`` ``inconclusive`` (no simulation ranked, or fewer than
        :data:`MIN_RANKED`), ``failed`` (some parameter's ranks fail the chi-square
        test or leave the ECDF band, each at level ``alpha / (2 P)``) or ``passed``.

    References
    ----------
    Talts, Betancourt, Simpson, Vehtari & Gelman (2018), arXiv:1804.06788 (ranks of the
    true values, uniform under correct calibration); Säilynoja, Bürkner & Vehtari
    (2022), Statistics and Computing 32, 32 (the simultaneous ECDF band); Bonferroni's
    split of ``alpha`` over parameters and tests (common practice, no source).
    """
    rng = np.random.default_rng(seed)
    sims = sorted(kept_by_sim)
    cal.ranked = len(sims)
    if not sims:
        cal.status = "inconclusive"
        return cal
    ranks = np.array([rank_of(theta[s], kept_by_sim[s], rng) for s in sims])   # (n, P)
    n, p = ranks.shape
    cal.level = cal.alpha / (2 * p)
    bins = bins_for(n, cal.kept_draws)
    z, lower, upper = ecdf_band(n, cal.kept_draws, 1 - cal.level) if n >= 2 else (None, None, None)
    for j, name in enumerate(names):
        stat, pval, counts, edges = chi_square_uniformity(ranks[:, j], cal.kept_draws, bins)
        outside = False
        if z is not None:
            f = ecdf_of_ranks(ranks[:, j], cal.kept_draws, z)
            outside = bool(np.any((f < lower - 1e-12) | (f > upper + 1e-12)))
        cal.parameters.append(ParameterRanks(name, ranks[:, j].astype(int).tolist(), bins, counts, edges, stat,
                                             pval, outside, bool(pval < cal.level or outside)))
    if n < MIN_RANKED:
        cal.status = "inconclusive"
    elif cal.flagged:
        cal.status = "failed"
    else:
        cal.status = "passed"
    return cal


