"""The settings of a run, in one table: each setting's kind of value, where it lives in
the TOML configuration, its command-line flag, its help text, its default, and whether
it enters the stored trial-results key.

Everything else is derived from ``SETTINGS``: the defaults of ``RunConfig`` and the TOML
layout with its type checks (``contenders.inputs.config``), the flags of ``contenders
run``, ``recovery``, ``calibrate`` and ``batch`` (``contenders.cli``), and the settings
hashed into ``trials_key`` (``contenders.pipeline.store``). A new setting is one entry
here plus its field (name and type) in ``RunConfig``; a mismatch between the two stops
the import.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from contenders import rules

#: The TOML sections, in the order messages list them. A section's keys are listed in
#: the order of their fields in ``RunConfig``.
SECTIONS = ("data", "candidates", "sampler", "checks", "comparison", "health", "run", "recovery",
            "hyperparameters")


@dataclass(frozen=True)
class Setting:
    """One run setting: ``Setting(name, kind, section, key, flag, metavar, default,
    help=...)`` and the keywords below.

    ``name`` is its field in ``RunConfig``.
    ``kind`` names the check of its values (``contenders.inputs.config._convert``; None:
    checked where it is used, as the hyperparameters are against each candidate).
    ``section`` and ``key`` place it in the TOML file (key None: one table per candidate,
    ``[hyperparameters.ID] NAME``). ``flag`` is its command-line option (None: none in
    the table; the data file is each command's own argument) with ``metavar`` and
    ``aliases``; ``action`` is argparse's (``store``: a value, parsed as the TOML value it
    spells). ``help_names_key``: the help ends with the TOML key it sets.
    ``enters_trials_key``: a change recomputes a candidate's stored trial results (a
    true/false setting enters only when true, so keys made before it existed stay
    valid). Settings that shape the data passed to a program (outcome, predictors, group,
    slopes, censoring, truncation, typical value and spread, hyperparameters) do not
    enter as settings: they enter the key through that data.
    """

    name: str
    kind: str | None
    section: str
    key: str | None
    flag: str | None
    metavar: str | None
    default: Any
    help: str = field(kw_only=True)
    enters_trials_key: bool = field(default=False, kw_only=True)
    aliases: tuple[str, ...] = field(default=(), kw_only=True)
    action: str = field(default="store", kw_only=True)
    help_names_key: bool = field(default=True, kw_only=True)

    @property
    def where(self) -> str:
        """Its place in the TOML file, as ``[section] key``."""
        return f"[{self.section}] {self.key}" if self.key else f"[{self.section}.ID] NAME"


#: Every setting of a run, in the order ``contenders run --help`` shows their flags.
SETTINGS: tuple[Setting, ...] = (
    Setting("data", "path", "data", "file", None, None, None,
            help="CSV data file with a header row"),
    Setting("outcome", "str", "data", "outcome", "--outcome", "COL", None,
            help="column holding the outcome"),
    Setting("predictors", "strs", "data", "predictors", "--predictors", "A,B", (),
            help="predictor columns, comma-separated (numeric: centred and scaled; text: indicators)"),
    Setting("group", "str", "data", "group", "--group", "COL", None,
            help="grouping column for varying intercepts (participants, items, machines)"),
    Setting("slopes", "strs", "data", "slopes", "--slopes", "A,B", (),
            help="predictors whose slope varies by group (each group's deviation, correlated with its intercept), "
                 "comma-separated; each must be among the predictors, and a group column is needed"),
    Setting("censored", "str", "data", "censored", "--censored", "COL", None,
            help="censoring column: 0 observed, 1 right-censored at the value (true value larger), -1 "
                 "left-censored at the value (true value smaller)"),
    Setting("truncate", "window", "data", "truncate", "--truncate", "L:U", (None, None),
            help="truncation window L:U of the outcome, either side may be empty (e.g. 0: or :3000)"),
    Setting("conditions", "strs", "data", "conditions", "--conditions", "A,B", (),
            enters_trials_key=True, aliases=("--condition",),
            help="columns whose levels get their own predictive checks, comma-separated"),
    Setting("reference", "levels", "data", "reference", "--reference", "COL=LEVEL,...", {},
            enters_trials_key=True,
            help="reference level of a text predictor or condition column, e.g. density=dense,cue=off (default: "
                 "the first level in sorted order); coefficients and effects are each level minus the reference"),
    Setting("typical_value", "float", "data", "typical_value", "--typical-value", "X", None,
            help="typical value of the outcome for default priors (default: its median)"),
    Setting("typical_spread", "posfloat", "data", "typical_spread", "--typical-spread", "X", None,
            help="typical spread of the outcome for default priors (default: its SD)"),
    Setting("candidates", "path", "candidates", "folder", "--candidates", "DIR", None,
            help="folder of .stan candidate files (default: the built-in candidates)"),
    Setting("only", "strs", "candidates", "only", "--only", "ID,ID", (),
            help="run only these candidate ids, comma-separated"),
    Setting("out", "path", "run", "out", "--out", "DIR", Path("reports/run"),
            help="output folder for report.html, summary.json and tables"),
    Setting("store", "path", "run", "store", "--store", "DIR", None,
            help="folder of stored fits, reused by later runs (default: OUT/fits)"),
    Setting("chains", "posint", "sampler", "chains", "--chains", "N", 4,
            enters_trials_key=True,
            help="Markov chains per fit"),
    Setting("warmup", "int0", "sampler", "warmup", "--warmup", "N", 1000,
            enters_trials_key=True,
            help="warmup iterations per chain"),
    Setting("draws", "posint", "sampler", "draws", "--draws", "N", 1000,
            enters_trials_key=True,
            help="kept draws per chain"),
    Setting("prior_draws", "posint", "sampler", "prior_draws", "--prior-draws", "N", 1000,
            enters_trials_key=True,
            help="prior predictive draws in all (over all chains)"),
    Setting("seed", "int0", "sampler", "seed", "--seed", "N", 20261201,
            enters_trials_key=True,
            help="random seed of every fit"),
    Setting("jobs", "int0", "run", "jobs", "--jobs", "N", 0,
            help="cores the run may use: programs compiled, candidates fitted side by side and chains at once (0: "
                 "all cores)"),
    Setting("engine", "engine", "run", "engine", "--engine", "NAME", "auto",
            help="Stan engine: auto (CmdStanPy when CmdStan is installed, else PyStan), pystan, cmdstanpy"),
    Setting("adapt_delta", "prob", "sampler", "adapt_delta", "--adapt-delta", "P", 0.8,
            enters_trials_key=True,
            help="Stan's target acceptance rate for the first fit"),
    Setting("escalation", "probs", "sampler", "escalation", "--escalation", "P,P", (0.95, 0.99),
            enters_trials_key=True,
            help="higher adapt_delta values tried in turn after divergent transitions"),
    Setting("longer_retry", "factor", "sampler", "longer_retry", "--longer-retry", "F", 2.0,
            enters_trials_key=True,
            help="when R-hat or ESS falls just short (R-hat below 1.05, ESS at least its floor divided by this, no "
                 "divergent transitions), fit once more with warmup and draws times this (1: never)"),
    Setting("max_treedepth", "posint", "sampler", "max_treedepth", "--max-treedepth", "N", 10,
            enters_trials_key=True,
            help="Stan's maximum tree depth"),
    Setting("thresholds", "floats", "checks", "thresholds", "--thresholds", "T,T", (),
            enters_trials_key=True, aliases=("--threshold",),
            help="extra statistics: share of observations below each value, comma-separated"),
    Setting("bounds", "bounds", "checks", "bounds", "--bounds", "STAT=LOW:HIGH,...", {},
            enters_trials_key=True,
            help="plausibility bounds for the prior trial, e.g. mean=150:5000,min=100:inf"),
    Setting("rhat_max", "posfloat", "health", "rhat_max", "--rhat-max", "X", rules.RHAT_MAX,
            enters_trials_key=True,
            help="R-hat must be below this"),
    Setting("ess_per_chain_min", "posfloat", "health", "ess_per_chain_min", "--ess-per-chain-min", "X", rules.ESS_PER_CHAIN_MIN,
            enters_trials_key=True,
            help="bulk and tail ESS must exceed this many per chain"),
    Setting("ebfmi_min", "posfloat", "health", "ebfmi_min", "--ebfmi-min", "X", rules.EBFMI_MIN,
            enters_trials_key=True,
            help="E-BFMI below this flags a chain"),
    Setting("implausible_share", "prob", "checks", "implausible_share", "--implausible-share", "P", rules.IMPLAUSIBLE_SHARE,
            enters_trials_key=True,
            help="flag candidates whose share of plausible prior draws is below this"),
    Setting("check_draws", "posint", "checks", "check_draws", "--check-draws", "N", 1000,
            enters_trials_key=True,
            help="replicated datasets used for the predictive checks"),
    Setting("ppp_extreme", "prob", "checks", "ppp_extreme", "--ppp-extreme", "P", rules.PPP_EXTREME,
            enters_trials_key=True,
            help="posterior predictive p-values below this or above 1 minus this count as misfit"),
    Setting("relevant", "sizes", "checks", "relevant", "--relevant", "STAT=SIZE,...", {},
            help="smallest miss that matters per statistic, in its units (outcome units; a share for below_T), "
                 "e.g. mean=10,min=50: the verdict then names only misses larger than this"),
    Setting("pit_alpha", "prob", "checks", "pit_alpha", "--pit-alpha", "P", rules.PIT_ALPHA,
            enters_trials_key=True,
            help="LOO-PIT values count as miscalibrated when their ECDF leaves the simultaneous 1 - this band"),
    Setting("cross_validation", "cv", "comparison", "cross_validation", "--cross-validation", "METHOD", "loo",
            enters_trials_key=True,
            help="loo (PSIS-LOO, exact refits, K-fold above the cap), kfold, or leave_group_out"),
    Setting("refit_cap", "int0", "comparison", "refit_cap", "--refit-cap", "N", 10,
            enters_trials_key=True,
            help="exact leave-one-out refits per candidate before falling back to K-fold"),
    Setting("folds", "folds", "comparison", "folds", "--folds", "K", 10,
            enters_trials_key=True,
            help="number of folds K for K-fold cross-validation"),
    Setting("replicates", "reps", "recovery", "replicates", "--replicates", "R", 0,
            help="model recovery: datasets simulated from each ranked candidate, each fitted by every candidate "
                 "(0: none with run; recovery uses 20)"),
    Setting("cluster", "address", "run", "cluster", "--cluster", "tcp://HOST:PORT", "",
            help="run the fits on an existing Dask cluster at this scheduler address, e.g. tcp://HOST:PORT "
                 "(default: worker processes on this machine)"),
    Setting("hyperparameters", None, "hyperparameters", None, "--hyper", "ID.NAME=VALUE", {},
            action="append",
            help="prior hyperparameter overrides, e.g. lognormal.sigma_scale=0.5 (repeatable)"),
    Setting("quiet", "bool", "run", "quiet", "--quiet", None, False,
            action="store_true", help_names_key=False,
            help="print nothing but errors"),
    Setting("quick", "bool", "run", "quick", "--quick", None, False,
            enters_trials_key=True, action="store_true",
            help="a quick look: 4 chains x 250 draws (250 warmup), 200 prior draws, no adapt_delta escalation or "
                 "longer retry, R-hat below 1.05 and ESS of 25 per chain accepted, PSIS-LOO without refits; marked "
                 "'quick look' in the verdict, written to reports/quick unless --out is given, never over a full "
                 "run's output; flags given with it still win"),
)

#: The settings by name.
BY_NAME: dict[str, Setting] = {s.name: s for s in SETTINGS}


def defaults_from_table(cls: type) -> type:
    """Give every annotated field of ``cls`` (a class about to become a dataclass) its
    default from ``SETTINGS`` (a fresh copy per instance for a mapping), and refuse a
    field without a setting or a setting without a field."""
    names = list(cls.__annotations__)
    missing = [n for n in names if n not in BY_NAME]
    extra = [s.name for s in SETTINGS if s.name not in names]
    if missing or extra or len(set(names)) != len(names):
        raise TypeError(f"{cls.__name__} and SETTINGS differ: fields without a setting {missing}, "
                        f"settings without a field {extra}")
    for name in names:
        default = BY_NAME[name].default
        if isinstance(default, dict):
            setattr(cls, name, field(default_factory=lambda d=default: dict(d)))
        else:
            setattr(cls, name, field(default=default))
    return cls

