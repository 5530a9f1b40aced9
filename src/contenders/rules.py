"""The thresholds and rules that decide what a run calls a problem, each defined once.

Every other module (the statistics, the run configuration's defaults, the report's
tables and sentences) imports its threshold from here, so a rule changes in one place.
Each constant names its source, or says "common practice, no source" for a rule of
thumb and "our own rule, no source" for one this project made.

Constants only: importing this module loads nothing else.
"""

from __future__ import annotations

# --- sampler health ---------------------------------------------------------------------

#: Rank-normalised split R-hat must be below this. Vehtari, Gelman, Simpson, Carpenter &
#: Bürkner (2021), "Rank-normalization, folding, and localization: an improved R-hat for
#: assessing convergence of MCMC", Bayesian Analysis 16(2).
RHAT_MAX = 1.01

#: Bulk and tail ESS must be at least this many per chain (same paper: 100 per chain).
ESS_PER_CHAIN_MIN = 100.0

#: E-BFMI of a chain below this is flagged. Betancourt (2016), "Diagnosing suboptimal
#: cotangent disintegrations in Hamiltonian Monte Carlo", arXiv:1604.00695.
EBFMI_MIN = 0.3

#: R-hat at or above this is far off, not just short: a fit is not retried with longer
#: chains; a quick look accepts R-hat below it (the older rule of thumb for R-hat;
#: common practice, no source).
RHAT_FAR = 1.05

# --- prior predictive trial -------------------------------------------------------------

#: Priors are flagged when fewer than this share of prior predictive datasets lie inside
#: every plausibility bound (our own rule, no source).
IMPLAUSIBLE_SHARE = 0.5

# --- posterior predictive checks --------------------------------------------------------

#: A posterior predictive p-value below this or above 1 minus this is "detectably off"
#: (common practice, no source).
PPP_EXTREME = 0.01

#: The LOO-PIT ECDF band holds the ECDF of uniform values with probability 1 minus this,
#: simultaneously over all evaluation points (Säilynoja, Bürkner & Vehtari 2022,
#: "Graphical test for discrete uniformity and its applications in goodness-of-fit
#: evaluation and multiple sample comparison", Statistics and Computing 32:32; the level
#: 0.01 is common practice, no source).
PIT_ALPHA = 0.01

# --- out-of-sample comparison -----------------------------------------------------------

#: An elpd difference below this is small, and the normal approximation of its
#: uncertainty is then poor: Sivula, Magnusson, Matamoros & Vehtari (2025), "Uncertainty
#: in Bayesian leave-one-out cross-validation based model comparison", Bayesian Analysis
#: (arXiv:2008.10296).
SMALL_DIFFERENCE = 4.0

#: A difference within this many standard errors is uncertain (the two-SE rule; common
#: practice, no source for the factor 2). Also the two-SE rule of the LOO-PIT notes and
#: of model recovery's "clear" winner.
SE_FACTOR = 2

#: Two estimates whose elpd differ by at most this many combined Monte Carlo SE are tied:
#: their order would change with the seed (common practice, no source).
TIE_MCSE_FACTOR = 2

#: Below this Pareto k the PSIS estimate converges quickly (the lower band edge of the
#: report's Pareto k table): Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto
#: smoothed importance sampling", JMLR 25(72), section 3.
PARETO_K_GOOD = 0.5

#: Above this Pareto k importance weights are unreliable whatever the number of draws;
#: the threshold of a PSIS-LOO estimate with S draws is min(1 - 1 / log10(S), 0.7) (same
#: paper, section 3; computed by ArviZ's ``loo`` as ``good_k`` and read from there).
PARETO_K_MAX = 0.7

#: Candidates with a stacking weight below this are not named in the stacking sentence
#: and do not count when asking whether candidates agree on an effect (common practice,
#: no source).
MIN_WEIGHT = 0.05

# --- power-scaling sensitivity ----------------------------------------------------------

#: A power-scaling sensitivity of at least this is worth a look: Kallioinen, Paananen,
#: Bürkner & Vehtari (2023), "Detecting and diagnosing prior and likelihood sensitivity
#: with power-scaling", Statistics and Computing 34, 57 (arXiv:2107.14054).
SENSITIVITY_THRESHOLD = 0.05

#: Finite-difference step of the sensitivity derivative (same paper, and ArviZ's default).
SENSITIVITY_DELTA = 0.01

#: Pareto k of the power-scaling importance weights above this: the weights, and so the
#: diagnostic, are unreliable (same paper, after Vehtari et al. 2024's 0.7).
SENSITIVITY_K_RELIABLE = PARETO_K_MAX

# --- simulation studies -------------------------------------------------------------------

#: Overall level of the calibration verdict of ``contenders calibrate``, split over the
#: parameters and the two tests (Bonferroni); our choice, matching the LOO-PIT band's.
CALIBRATION_ALPHA = 0.01

#: Model recovery: a rival winning at least this share of another candidate's replicates
#: confuses them (our own threshold, no source).
CONFUSED = 0.2
