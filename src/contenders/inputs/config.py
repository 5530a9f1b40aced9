"""Run configuration: a TOML file and command-line flags become one frozen dataclass.

Every key has a documented meaning in README.md ("Configuration"). Unknown keys and
values of the wrong type are errors that name the key and the valid choices.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Mapping

from contenders.errors import UserError
from contenders.statistics import rules

#: Test statistics computed on every dataset (observed, prior and posterior replicates).
DEFAULT_STATISTICS = ("mean", "sd", "min", "max", "q05", "q50", "q95", "skewness")


@dataclass(frozen=True)
class RunConfig:
    """Everything one comparison run needs. Paths are resolved against the folder of
    the configuration file (or the working folder for flags)."""

    data: Path | None = None
    outcome: str | None = None
    predictors: tuple[str, ...] = ()
    group: str | None = None
    conditions: tuple[str, ...] = ()
    slopes: tuple[str, ...] = ()            # predictors with a slope per group
    censored: str | None = None             # censoring column: 0 observed, 1 right-, -1 left-censored
    truncate: tuple[float | None, float | None] = (None, None)   # truncation window, None = open
    reference: Mapping[str, str] = field(default_factory=dict)   # column -> reference level
    typical_value: float | None = None
    typical_spread: float | None = None
    candidates: Path | None = None          # None: the built-in candidates
    only: tuple[str, ...] = ()              # run only these candidate ids
    out: Path = Path("reports/run")
    store: Path | None = None               # stored fits; None: OUT/fits
    chains: int = 4
    warmup: int = 1000
    draws: int = 1000
    prior_draws: int = 1000                 # prior predictive draws, over all chains
    seed: int = 20261201
    adapt_delta: float = 0.8
    escalation: tuple[float, ...] = (0.95, 0.99)
    longer_retry: float = 2.0               # warmup and draws times this on one retry; 1: never
    max_treedepth: int = 10
    jobs: int = 0                           # 0: all cores
    engine: str = "auto"
    thresholds: tuple[float, ...] = ()      # statistics "share of y below t"
    bounds: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    rhat_max: float = rules.RHAT_MAX
    ess_per_chain_min: float = rules.ESS_PER_CHAIN_MIN
    ebfmi_min: float = rules.EBFMI_MIN
    implausible_share: float = rules.IMPLAUSIBLE_SHARE          # flag priors with less plausible mass than this
    check_draws: int = 1000                 # replicated datasets used for the checks
    ppp_extreme: float = rules.PPP_EXTREME               # p-values beyond this (or 1 - it) count as misfit
    relevant: Mapping[str, float] = field(default_factory=dict)   # statistic -> smallest miss that matters
    pit_alpha: float = rules.PIT_ALPHA                 # LOO-PIT band holds a uniform ECDF with prob. 1 - this
    cross_validation: str = "loo"           # loo | kfold | leave_group_out
    refit_cap: int = 10                     # exact refits per candidate before K-fold
    folds: int = 10
    hyperparameters: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    quiet: bool = False
    replicates: int = 0                     # model recovery: datasets per candidate (0: none)
    cluster: str = ""                       # Dask scheduler address; empty: this machine
    quick: bool = False                     # a quick look (QUICK_PROFILE); never a full result

    def with_(self, **changes: Any) -> "RunConfig":
        return replace(self, **changes)


# TOML layout: section -> {key: field name}
_LAYOUT: dict[str, dict[str, str]] = {
    "data": {"file": "data", "outcome": "outcome", "predictors": "predictors", "group": "group",
             "conditions": "conditions", "slopes": "slopes", "censored": "censored", "truncate": "truncate", "reference": "reference", "typical_value": "typical_value",
             "typical_spread": "typical_spread"},
    "candidates": {"folder": "candidates", "only": "only"},
    "sampler": {"chains": "chains", "warmup": "warmup", "draws": "draws",
                "prior_draws": "prior_draws", "seed": "seed", "adapt_delta": "adapt_delta",
                "escalation": "escalation", "longer_retry": "longer_retry", "max_treedepth": "max_treedepth"},
    "checks": {"thresholds": "thresholds", "bounds": "bounds", "check_draws": "check_draws",
               "implausible_share": "implausible_share", "ppp_extreme": "ppp_extreme",
               "relevant": "relevant", "pit_alpha": "pit_alpha"},
    "comparison": {"cross_validation": "cross_validation", "refit_cap": "refit_cap", "folds": "folds"},
    "health": {"rhat_max": "rhat_max", "ess_per_chain_min": "ess_per_chain_min",
               "ebfmi_min": "ebfmi_min"},
    "run": {"out": "out", "store": "store", "jobs": "jobs", "engine": "engine", "quiet": "quiet",
            "cluster": "cluster", "quick": "quick"},
    "recovery": {"replicates": "replicates"},
}
_SECTIONS = tuple(_LAYOUT) + ("hyperparameters",)

_TYPES: dict[str, str] = {
    "data": "path", "outcome": "str", "predictors": "strs", "group": "str", "conditions": "strs", "slopes": "strs", "censored": "str", "truncate": "window", "reference": "levels",
    "typical_value": "float", "typical_spread": "posfloat", "candidates": "path", "only": "strs",
    "out": "path", "store": "path", "chains": "posint", "warmup": "int0", "draws": "posint", "prior_draws": "posint",
    "seed": "int0", "adapt_delta": "prob", "escalation": "probs", "longer_retry": "factor",
    "max_treedepth": "posint",
    "jobs": "int0", "engine": "engine", "thresholds": "floats", "bounds": "bounds",
    "rhat_max": "posfloat", "ess_per_chain_min": "posfloat", "ebfmi_min": "posfloat",
    "implausible_share": "prob", "check_draws": "posint", "quiet": "bool", "ppp_extreme": "prob", "pit_alpha": "prob",
    "relevant": "sizes",
    "cross_validation": "cv", "refit_cap": "int0", "folds": "folds",
    "replicates": "reps",
    "cluster": "address",
    "quick": "bool",
}

_DESCRIBE = {
    "path": "a path in quotes", "str": "text in quotes", "strs": "a list of column names",
    "float": "a number", "posfloat": "a positive number", "factor": "a number >= 1", "posint": "a whole number >= 1",
    "int0": "a whole number >= 0", "prob": "a number strictly between 0 and 1",
    "probs": "a list of numbers strictly between 0 and 1", "floats": "a list of numbers",
    "engine": "one of auto, pystan, cmdstanpy",
    "bounds": "a table statistic = [low, high] (use -inf or inf for an open end)",
    "bool": "true or false",
    "sizes": "a table statistic = size (a positive number in the statistic's units), e.g. {mean = 10.0}",
    "cv": "one of loo, kfold, leave_group_out", "folds": "a whole number >= 2",
    "reps": "0 (no model recovery) or a whole number >= 2",
    "levels": "a table column = \"level\", e.g. {density = \"dense\"}",
    "window": "\"L:U\" with either side empty for an open end, e.g. \"0:\" or \":3000\"",
    "address": "a Dask scheduler address such as tcp://HOST:PORT, or empty for this machine",
}


def _convert(key: str, value: Any, base: Path) -> Any:
    kind = _TYPES[key]

    def bad() -> UserError:
        return UserError(f"configuration key '{key}' must be {_DESCRIBE[kind]}; got {value!r}")

    def num(v: Any) -> float:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise bad()
        return float(v)

    if kind == "path":
        if not isinstance(value, (str, Path)) or not str(value):
            raise bad()
        p = Path(value).expanduser()
        return p if p.is_absolute() else base / p
    if kind == "str":
        if not isinstance(value, str) or not value:
            raise bad()
        return value
    if kind == "strs":
        if isinstance(value, str):
            value = [v.strip() for v in value.split(",") if v.strip()]
        if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) and v for v in value):
            raise bad()
        return tuple(value)
    if kind == "float":
        v = num(value)
        if not math.isfinite(v):
            raise bad()
        return v
    if kind == "posfloat":
        v = num(value)
        if not (math.isfinite(v) and v > 0):
            raise bad()
        return v
    if kind == "factor":
        v = num(value)
        if not (math.isfinite(v) and v >= 1):
            raise bad()
        return v
    if kind in ("posint", "int0"):
        if isinstance(value, bool) or not isinstance(value, int) or value < (1 if kind == "posint" else 0):
            raise bad()
        return int(value)
    if kind == "prob":
        v = num(value)
        if not 0 < v < 1:
            raise bad()
        return v
    if kind == "probs":
        if not isinstance(value, (list, tuple)):
            raise bad()
        vs = tuple(num(v) for v in value)
        if not all(0 < v < 1 for v in vs):
            raise bad()
        return vs
    if kind == "floats":
        if not isinstance(value, (list, tuple)):
            raise bad()
        vs = tuple(num(v) for v in value)
        if not all(math.isfinite(v) for v in vs):
            raise bad()
        return vs
    if kind == "engine":
        if value not in ("auto", "pystan", "cmdstanpy"):
            raise bad()
        return value
    if kind == "cv":
        if value not in ("loo", "kfold", "leave_group_out"):
            raise bad()
        return value
    if kind == "folds":
        if isinstance(value, bool) or not isinstance(value, int) or value < 2:
            raise bad()
        return int(value)
    if kind == "reps":
        if isinstance(value, bool) or not isinstance(value, int) or value < 0 or value == 1:
            raise bad()
        return int(value)
    if kind == "address":
        if not isinstance(value, str) or (value and "://" not in value and ":" not in value):
            raise bad()
        return value.strip()
    if kind == "window":
        if not isinstance(value, str) or value.count(":") != 1:
            raise bad()
        ends = []
        for part in value.split(":"):
            part = part.strip()
            if not part:
                ends.append(None)
                continue
            try:
                v = float(part)
            except ValueError:
                raise bad() from None
            if not math.isfinite(v):
                raise bad()
            ends.append(v)
        low, high = ends
        if low is not None and high is not None and not low < high:
            raise UserError(f"configuration key 'truncate': the lower end {low:g} must be below the upper end {high:g}")
        return (low, high)
    if kind == "levels":
        if not isinstance(value, Mapping):
            raise bad()
        out_levels = {}
        for col, level in value.items():
            if isinstance(level, bool) or not isinstance(level, (str, int)) or str(level) == "":
                raise UserError(f"configuration key 'reference': the level of column '{col}' must be text "
                                f"in quotes, e.g. {col} = \"dense\"; got {level!r}")
            out_levels[str(col)] = str(level)
        return out_levels
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad()
        return value
    if kind == "sizes":
        if not isinstance(value, Mapping):
            raise bad()
        sizes = {}
        for stat, size in value.items():
            if isinstance(size, bool) or not isinstance(size, (int, float)) or not (
                    math.isfinite(size) and size > 0):
                raise UserError(f"configuration key 'relevant': the size for '{stat}' must be a positive number "
                                f"in that statistic's units, e.g. {stat} = 10.0; got {size!r}")
            sizes[str(stat)] = float(size)
        return sizes
    if kind == "bounds":
        if not isinstance(value, Mapping):
            raise bad()
        out = {}
        for stat, pair in value.items():
            if not (isinstance(pair, (list, tuple)) and len(pair) == 2):
                raise UserError(f"configuration bound '{stat}' must be [low, high]; got {pair!r}")
            low, high = num(pair[0]), num(pair[1])
            if not low < high:
                raise UserError(f"configuration bound '{stat}': low {low:g} must be below high {high:g}")
            out[str(stat)] = (low, high)
        return out
    raise AssertionError(kind)  # pragma: no cover


def _check_statistic_names(cfg: RunConfig) -> None:
    known = set(DEFAULT_STATISTICS) | {f"below_{t:g}" for t in cfg.thresholds}
    for stat in cfg.bounds:
        if stat not in known:
            raise UserError(
                f"configuration bound '{stat}' names no statistic; the statistics are: "
                + ", ".join(sorted(known))
            )
    for stat in cfg.relevant:
        if stat not in known:
            raise UserError(
                f"configuration key 'relevant' ([checks] relevant or --relevant): '{stat}' names no statistic; "
                "the statistics are: " + ", ".join(sorted(known))
                + " (a share below T exists only when T is among [checks] thresholds)"
            )


def from_mapping(raw: Mapping[str, Any], base: Path, source: str = "configuration") -> RunConfig:
    """Build a :class:`RunConfig` from parsed TOML (sections as in the README)."""
    values: dict[str, Any] = {}
    for section, content in raw.items():
        if section not in _SECTIONS:
            raise UserError(
                f"{source}: unknown section [{section}]; the sections are: " + ", ".join(_SECTIONS)
            )
        if not isinstance(content, Mapping):
            raise UserError(f"{source}: [{section}] must be a table of key = value lines")
        if section == "hyperparameters":
            for cid, table in content.items():
                if not isinstance(table, Mapping):
                    raise UserError(
                        f"{source}: [hyperparameters.{cid}] must be a table of input = value lines"
                    )
            values["hyperparameters"] = {str(k): dict(v) for k, v in content.items()}
            continue
        for key, value in content.items():
            if key not in _LAYOUT[section]:
                raise UserError(
                    f"{source}: unknown key '{key}' in [{section}]; the keys there are: "
                    + ", ".join(_LAYOUT[section])
                )
            name = _LAYOUT[section][key]
            values[name] = _convert(name, value, base)
    cfg = RunConfig(**values)
    _check_statistic_names(cfg)
    return cfg


def load(path: str | Path) -> RunConfig:
    """Read a TOML configuration file."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: configuration file not found.")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise UserError(f"{path}: not UTF-8 text; save the configuration as UTF-8.") from None
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML ({exc}).") from None
    return from_mapping(raw, path.resolve().parent, source=str(path))


def apply_flags(cfg: RunConfig, flags: Mapping[str, Any], base: Path | None = None) -> RunConfig:
    """Override configuration fields with command-line values (``None`` = not given)."""
    base = base or Path(os.getcwd())
    names = {f.name for f in fields(RunConfig)}
    changes = {}
    for name, value in flags.items():
        if value is None:
            continue
        if name not in names:
            raise UserError(f"unknown setting '{name}'")
        changes[name] = _convert(name, value, base) if name in _TYPES else value
    cfg = replace(cfg, **changes)
    _check_statistic_names(cfg)
    return cfg


#: The settings of a quick look (``--quick``): a quarter of the default draws, no
#: escalation of adapt_delta, PSIS-LOO without refits. Four chains stay, since R-hat needs
#: them; R-hat from 1,000 draws varies by about +-0.005 between seeds (measured here: 1.005
#: to 1.012 for well-behaved candidates), so a quick look accepts R-hat below 1.05 (the
#: older rule of thumb; common practice, no source) instead of 1.01. The ESS floor is cut
#: by the same quarter as the draws, to 25 per chain (100 over four chains): at the full
#: run's 100 per chain, the demo's quick look left 8 of its 10 candidates unhealthy (bulk
#: ESS 246 to 365 of 1,000 draws) and ranked only the other two, which said more about
#: the short chains than about the candidates. Flags given beside ``--quick`` still win.
QUICK_PROFILE: dict[str, Any] = {"chains": 4, "warmup": 250, "draws": 250, "prior_draws": 200,
                                 "escalation": (), "longer_retry": 1.0, "rhat_max": rules.RHAT_FAR,
                                 "ess_per_chain_min": 25.0}
#: Where a quick look writes when no output folder is given (a full run's is reports/run).
QUICK_OUT = Path("reports/quick")


def quick_profile(cfg: RunConfig) -> RunConfig:
    """``cfg`` as a quick look: ``QUICK_PROFILE`` over the file's sampler settings, and
    ``reports/quick`` as the output folder unless one was set."""
    changes = dict(QUICK_PROFILE, quick=True)
    if cfg.out == RunConfig().out:
        changes["out"] = QUICK_OUT
    return replace(cfg, **changes)


#: One line per setting: used for ``--help`` and the README's configuration reference.
HELP: dict[str, str] = {
    "data": "CSV data file with a header row",
    "outcome": "column holding the outcome",
    "predictors": "predictor columns, comma-separated (numeric: centred and scaled; text: indicators)",
    "group": "grouping column for varying intercepts (participants, items, machines)",
    "conditions": "columns whose levels get their own predictive checks, comma-separated",
    "slopes": ("predictors whose slope varies by group (each group's deviation, correlated with its intercept), "
               "comma-separated; each must be among the predictors, and a group column is needed"),
    "censored": ("censoring column: 0 observed, 1 right-censored at the value (true value larger), "
                 "-1 left-censored at the value (true value smaller)"),
    "truncate": "truncation window L:U of the outcome, either side may be empty (e.g. 0: or :3000)",
    "reference": "reference level of a text predictor or condition column, e.g. density=dense,cue=off "
                 "(default: the first level in sorted order); coefficients and effects are each level "
                 "minus the reference",
    "typical_value": "typical value of the outcome for default priors (default: its median)",
    "typical_spread": "typical spread of the outcome for default priors (default: its SD)",
    "candidates": "folder of .stan candidate files (default: the built-in candidates)",
    "only": "run only these candidate ids, comma-separated",
    "out": "output folder for report.html, summary.json and tables",
    "store": "folder of stored fits, reused by later runs (default: OUT/fits)",
    "chains": "Markov chains per fit",
    "warmup": "warmup iterations per chain",
    "draws": "kept draws per chain",
    "prior_draws": "prior predictive draws in all (over all chains)",
    "seed": "random seed of every fit",
    "adapt_delta": "Stan's target acceptance rate for the first fit",
    "escalation": "higher adapt_delta values tried in turn after divergent transitions",
    "longer_retry": ("when R-hat or ESS falls just short (R-hat below 1.05, ESS at least its floor divided by "
                     "this, no divergent transitions), fit once more with warmup and draws times this (1: never)"),
    "max_treedepth": "Stan's maximum tree depth",
    "jobs": "cores the run may use: programs compiled, candidates fitted side by side and chains at once (0: all cores)",
    "engine": "Stan engine: auto (CmdStanPy when CmdStan is installed, else PyStan), pystan, cmdstanpy",
    "thresholds": "extra statistics: share of observations below each value, comma-separated",
    "bounds": "plausibility bounds for the prior trial, e.g. mean=150:5000,min=100:inf",
    "rhat_max": "R-hat must be below this",
    "ess_per_chain_min": "bulk and tail ESS must exceed this many per chain",
    "ebfmi_min": "E-BFMI below this flags a chain",
    "implausible_share": "flag candidates whose share of plausible prior draws is below this",
    "check_draws": "replicated datasets used for the predictive checks",
    "ppp_extreme": "posterior predictive p-values below this or above 1 minus this count as misfit",
    "relevant": ("smallest miss that matters per statistic, in its units (outcome units; a share for below_T), "
                 "e.g. mean=10,min=50: the verdict then names only misses larger than this"),
    "pit_alpha": "LOO-PIT values count as miscalibrated when their ECDF leaves the simultaneous 1 - this band",
    "cross_validation": "loo (PSIS-LOO, exact refits, K-fold above the cap), kfold, or leave_group_out",
    "refit_cap": "exact leave-one-out refits per candidate before falling back to K-fold",
    "folds": "number of folds K for K-fold cross-validation",
    "hyperparameters": "prior hyperparameter overrides, e.g. lognormal.sigma_scale=0.5 (repeatable)",
    "quiet": "print nothing but errors",
    "replicates": "model recovery: datasets simulated from each ranked candidate, each fitted by every "
                  "candidate (0: none with run; recovery uses 20)",
    "cluster": "run the fits on an existing Dask cluster at this scheduler address, e.g. tcp://HOST:PORT "
               "(default: worker processes on this machine)",
    "quick": "a quick look: 4 chains x 250 draws (250 warmup), 200 prior draws, no adapt_delta escalation or longer retry, "
             "R-hat below 1.05 and ESS of 25 per chain accepted, PSIS-LOO without refits; marked 'quick look' in the verdict, written to "
             "reports/quick unless --out is given, never over a full run's output; flags given with it still win",
}


def section_of(name: str) -> str:
    """The TOML section and key a setting lives under, as ``[section] key``."""
    if name == "hyperparameters":
        return "[hyperparameters.ID] NAME"
    for section, keys in _LAYOUT.items():
        for key, field_name in keys.items():
            if field_name == name:
                return f"[{section}] {key}"
    raise KeyError(name)


def parse_flag(name: str, text: str) -> Any:
    """A command-line value as the TOML value it spells, for the named setting."""
    kind = _TYPES.get(name)
    if kind in ("path", "str", "engine", "cv", "address", "window"):
        return text
    if kind in ("strs",):
        return [v.strip() for v in text.split(",") if v.strip()]
    if kind in ("floats", "probs"):
        try:
            return [_number(v) for v in text.split(",") if v.strip()]
        except ValueError:
            raise UserError(f"--{name.replace('_', '-')} must be {_DESCRIBE[kind]}; got {text!r}") from None
    if kind == "levels":
        levels = {}
        for part in filter(None, (p.strip() for p in text.split(","))):
            col, eq, level = part.partition("=")
            if not eq or not col.strip() or not level.strip():
                raise UserError(f"--reference must look like density=dense,cue=off; got {part!r}")
            levels[col.strip()] = level.strip()
        return levels
    if kind == "bounds":
        out = {}
        for part in filter(None, (p.strip() for p in text.split(","))):
            try:
                stat, rng = part.split("=")
                low, high = rng.split(":")
                out[stat.strip()] = [_number(low), _number(high)]
            except ValueError:
                raise UserError(f"--bounds must look like mean=150:5000,min=100:inf; got {part!r}") from None
        return out
    if kind == "sizes":
        out = {}
        for part in filter(None, (p.strip() for p in text.split(","))):
            try:
                stat, size = part.split("=")
                out[stat.strip()] = _number(size)
            except ValueError:
                raise UserError(f"--relevant must look like mean=10,min=50; got {part!r}") from None
        return out
    if kind == "bool":
        return text.lower() in ("1", "true", "yes")
    try:
        return _number(text)
    except ValueError:
        raise UserError(f"--{name.replace('_', '-')} must be {_DESCRIBE[kind]}; got {text!r}") from None


def _number(text: str) -> int | float:
    text = text.strip()
    try:
        return int(text)
    except ValueError:
        return float(text)


def parse_hyper_flags(items: list[str]) -> dict[str, dict[str, Any]]:
    """``ID.NAME=VALUE`` items -> ``{ID: {NAME: VALUE}}``."""
    out: dict[str, dict[str, Any]] = {}
    for item in items:
        try:
            key, value = item.split("=", 1)
            cid, name = key.split(".", 1)
            number: Any = _number(value)
        except ValueError:
            raise UserError(f"--hyper must look like ID.NAME=NUMBER, e.g. lognormal.sigma_scale=0.5; got {item!r}") from None
        out.setdefault(cid.strip(), {})[name.strip()] = number
    return out
