"""How much each parameter's posterior moves when the prior or the likelihood is
power-scaled.

Method: Kallioinen, Paananen, Bürkner & Vehtari (2023), "Detecting and diagnosing
prior and likelihood sensitivity with power-scaling", Statistics and Computing 34, 57
(arXiv:2107.14054). The prior (or the likelihood) is raised to a power alpha near 1;
the posterior under that change is approximated without refitting by importance
weights ``w_s ∝ p(theta_s)^(alpha - 1)`` (Pareto-smoothed, PSIS: Vehtari, Simpson,
Gelman, Yao & Gabry 2024, "Pareto smoothed importance sampling", JMLR 25(72)), and the
sensitivity of a parameter is the derivative, at alpha = 1, of the cumulative
Jensen-Shannon distance between its weighted and unweighted draws (a finite difference
at alpha = 1/(1 + delta) and 1 + delta, delta = 0.01). The paper's rule of thumb
flags values of at least 0.05.

The diagnostic itself is ArviZ's (:func:`arviz.psens`); this module supplies the log
prior (the program's ``lprior`` generated quantity) and the summed ``log_lik``, adds
the Pareto k of the importance weights (the paper's reliability check: above 0.7 the
weights are not trustworthy) and reads each parameter's pair of values as the paper
does, in this project's codes (``_reading``, :data:`READING_CODES`; their sentences are
``contenders.output.readings.SENSITIVITY_READINGS``):

* ``pulled_both_ways``: prior and likelihood sensitivity both at least 0.05; the prior
  and the data pull the parameter in different directions (the paper's sign of a
  conflict between them);
* ``set_by_prior``: prior sensitivity at least 0.05, likelihood sensitivity below; the
  prior sets the parameter and the data add little (the paper's strong prior with a
  weak likelihood);
* ``led_by_data``: likelihood sensitivity at least 0.05, prior sensitivity below; the
  data decide the parameter, the case the paper calls unproblematic;
* ``steady``: both below 0.05; the posterior barely moves either way (the paper makes
  no reading of this; here it only says that nothing needs doing).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from contenders.statistics.posterior import flatten
from contenders.rules import SENSITIVITY_DELTA, SENSITIVITY_K_RELIABLE, SENSITIVITY_THRESHOLD

#: The paper's threshold for a sensitivity worth a look (``rules.SENSITIVITY_THRESHOLD``).
THRESHOLD = SENSITIVITY_THRESHOLD

#: Finite-difference step of the derivative (``rules.SENSITIVITY_DELTA``).
DELTA = SENSITIVITY_DELTA

#: Pareto k above this: the importance weights, and so the diagnostic, are unreliable
#: (``rules.SENSITIVITY_K_RELIABLE``).
K_RELIABLE = SENSITIVITY_K_RELIABLE

#: Every reading code (``""``: not computed); the sentence of each, which says what to do, is
#: ``contenders.output.readings.SENSITIVITY_READINGS``.
READING_CODES = ("pulled_both_ways", "set_by_prior", "led_by_data", "steady", "")

#: The readings that ask the user to act.
ACT_ON = ("pulled_both_ways", "set_by_prior")


@dataclass
class SensitivityRow:
    """Power-scaling sensitivity of one scalar parameter."""

    parameter: str
    prior: float                      # the diagnostic on all draws, prior scaled
    likelihood: float                 # and likelihood scaled
    prior_range: tuple[float, float]  # lowest and highest over chains computed one chain at a time:
    likelihood_range: tuple[float, float]   # a rough view of the Monte Carlo spread (single chains run higher)
    reading: str                      # one of READING_CODES
    near_threshold: bool              # a single-chain range crosses the threshold: the reading could change


@dataclass
class Sensitivity:
    """Power-scaling sensitivity of one candidate's posterior: a ``SensitivityRow`` per
    scalar parameter; ``pareto_k`` gives the largest Pareto k of the importance weights
    per component."""

    rows: list[SensitivityRow] = field(default_factory=list)
    pareto_k: dict[str, float] = field(default_factory=dict)
    threshold: float = THRESHOLD
    n_draws: int = 0
    error: str = ""                     # the exception that stopped it: "TypeName: message"

    @property
    def reliable(self) -> bool:
        return all(np.isfinite(k) and k <= K_RELIABLE for k in self.pareto_k.values())

    @property
    def flagged(self) -> list[SensitivityRow]:
        return [row for row in self.rows if row.reading in ACT_ON]


def power_scale_log_weights(log_component: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
    """Importance weights for power-scaling one component of the posterior.

    Parameters
    ----------
    log_component : numpy.ndarray
        The component's (prior or likelihood) log density at each posterior draw.
    alpha : float
        The power.

    Returns
    -------
    tuple
        ``(log_weights, pareto_k)``: normalised ``log w_s = (alpha - 1) log p(theta_s)``,
        Pareto-smoothed with ArviZ's ``psislw``, and the Pareto k of the weights.

    References
    ----------
    Kallioinen, Paananen, Bürkner & Vehtari (2023), Statistics and Computing 34, 57,
    section 2.3; Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72) (PSIS).
    """
    import arviz as az

    log_component = np.asarray(log_component, dtype=float).reshape(-1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # a high k is returned and reported, not hidden
        lw, k = az.psislw((alpha - 1.0) * log_component)
    return np.asarray(lw, dtype=float), float(np.asarray(k))


def power_scaled_mean(values: np.ndarray, log_component: np.ndarray, alpha: float) -> tuple[float, float]:
    """The posterior mean of ``values`` after power-scaling one component by ``alpha``.

    Parameters
    ----------
    values : numpy.ndarray
        A quantity at each posterior draw.
    log_component : numpy.ndarray
        The component's log density at each draw.
    alpha : float
        The power.

    Returns
    -------
    tuple
        ``(mean, pareto_k)``, estimated with the smoothed importance weights
        (``power_scale_log_weights``).
    """
    lw, k = power_scale_log_weights(log_component, alpha)
    w = np.exp(lw - lw.max())
    return float(np.sum(w * np.asarray(values, dtype=float).reshape(-1)) / np.sum(w)), k


def _reading(prior: float, likelihood: float, threshold: float) -> str:
    """The reading code (one of :data:`READING_CODES`) of one parameter's pair of values."""
    if not (np.isfinite(prior) and np.isfinite(likelihood)):
        return ""
    if prior >= threshold:
        return "pulled_both_ways" if likelihood >= threshold else "set_by_prior"
    return "led_by_data" if likelihood >= threshold else "steady"


def power_scaling(idata, parameters: Sequence[str], lprior: str = "lprior",
                  log_lik: str = "log_lik", threshold: float = THRESHOLD) -> Sensitivity | None:
    """Prior and likelihood power-scaling sensitivity of every parameter.

    A failure of the computation is returned in ``error`` (the exception's type and
    message; worded by ``contenders.output.readings.sensitivity_problem``), never
    raised, so it cannot stop the candidate's other trials.

    Parameters
    ----------
    idata : arviz.InferenceData
        The fit; needs the program's joint log prior density ``lprior`` as a posterior
        variable and the pointwise ``log_lik``.
    parameters : sequence of str
        Parameters to read (those present in the posterior; vectors are flattened,
        1-based; matrix-valued ones are left out).
    lprior, log_lik : str
        Names of the log prior and the pointwise log-likelihood.
    threshold : float
        Sensitivity worth a look (``rules.SENSITIVITY_THRESHOLD``).

    Returns
    -------
    Sensitivity or None
        Per parameter the diagnostic on all draws, its range over single chains and the
        reading code; the Pareto k of the weights per component. ``None`` when the
        program has no ``lprior``.

    References
    ----------
    Kallioinen, Paananen, Bürkner & Vehtari (2023), "Detecting and diagnosing prior and
    likelihood sensitivity with power-scaling", Statistics and Computing 34, 57
    (arXiv:2107.14054); computed with ArviZ's ``psens``.
    """
    import arviz as az
    import xarray as xr

    post = idata.posterior
    if lprior not in post:
        return None
    try:
        # matrix-valued parameters (group slopes, a correlation's Cholesky factor with its
        # fixed elements) are left out, as the group terms' prior is their SDs' business
        names = [p for p in parameters if p in post and p != lprior and post[p].size > 0 and post[p].ndim <= 3]
        # the likelihood component is the sum of log_lik over observations at each draw
        # (ArviZ sums it the same way); summed here once, ArviZ makes no copies of the
        # whole pointwise array (1.9 GB more at 4,000 draws x 20,000 observations)
        pointwise = idata.log_likelihood[log_lik]
        values = np.asarray(pointwise.values, dtype=float)
        total = xr.DataArray(values.reshape(values.shape[0], values.shape[1], -1).sum(axis=-1),
                             dims=("chain", "draw"),
                             coords={d: pointwise.coords[d] for d in ("chain", "draw") if d in pointwise.coords})
        base = az.InferenceData(posterior=post[names], log_likelihood=xr.Dataset({log_lik: total}),
                                log_prior=xr.Dataset({lprior: post[lprior]}))
        n_chains = post.sizes["chain"]

        def sens(data) -> dict[str, dict[str, float]]:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return {comp: flatten(az.psens(data, component=comp, delta=DELTA), names)
                        for comp in ("prior", "likelihood")}

        pooled = sens(base)
        per_chain = [sens(base.isel(chain=[i])) for i in range(n_chains)] if n_chains > 1 else []
        rows = []
        for name in pooled["prior"]:
            ranges = {}
            for comp in ("prior", "likelihood"):
                vals = [c[comp][name] for c in per_chain]
                ranges[comp] = (min(vals), max(vals)) if vals else (np.nan, np.nan)
            prior, likelihood = pooled["prior"][name], pooled["likelihood"][name]
            rows.append(SensitivityRow(name, prior, likelihood, ranges["prior"], ranges["likelihood"],
                                       _reading(prior, likelihood, threshold),
                                       any(lo < threshold <= hi for lo, hi in ranges.values())))
        components = {
            "prior": np.asarray(post[lprior].values, dtype=float).reshape(-1),
            "likelihood": np.asarray(total.values, dtype=float).reshape(-1),
        }
        pareto_k = {comp: max(power_scale_log_weights(values, alpha)[1]
                              for alpha in (1 / (1 + DELTA), 1 + DELTA))
                    for comp, values in components.items()}
        return Sensitivity(rows, pareto_k, threshold, int(components["prior"].size))
    except Exception as exc:   # reported on the page; the candidate's other trials go on
        return Sensitivity(error=f"{type(exc).__name__}: {exc}",
                           threshold=threshold)
