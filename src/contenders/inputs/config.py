"""Run configuration: a TOML file and command-line flags become one frozen dataclass.

Every key has a documented meaning in README.md ("Configuration"). Unknown keys and
values of the wrong type are errors that name the key and the valid choices. The
settings themselves (kind of value, TOML key, flag, help text, default) are listed once,
in ``contenders.inputs.settings.SETTINGS``; this module checks and converts the values.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, fields, replace
from pathlib import Path
from typing import Any, Mapping

from contenders.errors import UserError
from contenders.inputs.settings import BY_NAME, SECTIONS, SETTINGS, Setting, defaults_from_table
from contenders import rules

#: Test statistics computed on every dataset (observed, prior and posterior replicates).
DEFAULT_STATISTICS = ("mean", "sd", "min", "max", "q05", "q50", "q95", "skewness")


@dataclass(frozen=True)
@defaults_from_table
class RunConfig:
    """Everything one comparison run needs. Paths are resolved against the folder of
    the configuration file (or the working folder for flags). Each field's default, TOML
    key, flag and help text are its entry in ``contenders.inputs.settings.SETTINGS``; the
    order of the fields is the order in which messages list a TOML section's keys."""

    data: Path | None
    outcome: str | None
    predictors: tuple[str, ...]
    group: str | None
    conditions: tuple[str, ...]
    slopes: tuple[str, ...]
    censored: str | None
    truncate: tuple[float | None, float | None]
    reference: Mapping[str, str]
    typical_value: float | None
    typical_spread: float | None
    candidates: Path | None
    only: tuple[str, ...]
    out: Path
    store: Path | None
    chains: int
    warmup: int
    draws: int
    prior_draws: int
    seed: int
    adapt_delta: float
    escalation: tuple[float, ...]
    longer_retry: float
    max_treedepth: int
    jobs: int
    engine: str
    thresholds: tuple[float, ...]
    bounds: Mapping[str, tuple[float, float]]
    rhat_max: float
    ess_per_chain_min: float
    ebfmi_min: float
    check_draws: int
    implausible_share: float
    ppp_extreme: float
    relevant: Mapping[str, float]
    pit_alpha: float
    cross_validation: str
    refit_cap: int
    folds: int
    hyperparameters: Mapping[str, Mapping[str, Any]]
    quiet: bool
    replicates: int
    cluster: str
    quick: bool

    def with_(self, **changes: Any) -> "RunConfig":
        return replace(self, **changes)


def _layout() -> dict[str, dict[str, Setting]]:
    """TOML layout: section -> {key: setting}, each section's keys in RunConfig's field order."""
    layout: dict[str, dict[str, Setting]] = {section: {} for section in SECTIONS if section != "hyperparameters"}
    for f in fields(RunConfig):
        setting = BY_NAME[f.name]
        if setting.key is not None:
            layout[setting.section][setting.key] = setting
    return layout


_LAYOUT = _layout()

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
    kind = BY_NAME[key].kind

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
        if section not in SECTIONS:
            raise UserError(
                f"{source}: unknown section [{section}]; the sections are: " + ", ".join(SECTIONS)
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
            name = _LAYOUT[section][key].name
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
        changes[name] = _convert(name, value, base) if BY_NAME[name].kind else value
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
HELP: dict[str, str] = {s.name: s.help for s in SETTINGS}


def section_of(name: str) -> str:
    """The TOML section and key a setting lives under, as ``[section] key``."""
    return BY_NAME[name].where


def parse_flag(name: str, text: str) -> Any:
    """A command-line value as the TOML value it spells, for the named setting."""
    kind = BY_NAME[name].kind if name in BY_NAME else None
    if kind in ("path", "str", "engine", "cv", "address", "window"):
        return text
    if kind in ("strs",):
        return [v.strip() for v in text.split(",") if v.strip()]
    if kind in ("floats", "probs"):
        try:
            return [_number(v) for v in text.split(",") if v.strip()]
        except ValueError:
            raise UserError(f"{_flag(name)} must be {_DESCRIBE[kind]}; got {text!r}") from None
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
        raise UserError(f"{_flag(name)} must be {_DESCRIBE[kind]}; got {text!r}") from None


def _flag(name: str) -> str:
    """The command-line flag of a setting, for messages."""
    setting = BY_NAME.get(name)
    return setting.flag if setting and setting.flag else "--" + name.replace("_", "-")


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
