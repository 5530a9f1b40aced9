"""Discover candidate programs, read their headers and check them against the contract.

A candidate is one ``.stan`` file; its stem is its id. The first block comment of the
file holds a TOML header::

    /*
    [candidate]
    label   = "Shifted lognormal"
    about   = "one line on what the family describes"
    support = "positive"        # real | positive | unit | count | binary

    [candidate.defaults]         # default values of the prior hyperparameters
    shift_a = 2.0
    */

The program's declared inputs, parameters and generated quantities are read from the
Stan compiler's own ``--info`` report, never by pattern-matching the Stan code.
"""

from __future__ import annotations

import hashlib
import json
import re
import subprocess
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from contenders.inputs.data import SUPPLIED_INPUTS, SUPPORTS, Design, support_problem
from contenders.errors import UserError

#: Inputs a program must declare so that one compiled program serves every mode.
REQUIRED_INPUTS = ("N", "y", "N_fit", "fit_idx")
#: Generated quantities a program must produce, one value per observation.
REQUIRED_OUTPUTS = ("log_lik", "y_rep")

_HEADER_RE = re.compile(r"\A\s*(?://[^\n]*\n\s*)*/\*(.*?)\*/", re.DOTALL)


@dataclass(frozen=True)
class StanInfo:
    """What the Stan compiler reports about a program (``stanc --info``)."""

    inputs: Mapping[str, Mapping[str, Any]]
    parameters: Mapping[str, Mapping[str, Any]]
    transformed_parameters: Mapping[str, Mapping[str, Any]]
    generated_quantities: Mapping[str, Mapping[str, Any]]

    @classmethod
    def from_json(cls, text: str) -> "StanInfo":
        raw = json.loads(text)
        return cls(
            inputs=raw.get("inputs", {}),
            parameters=raw.get("parameters", {}),
            transformed_parameters=raw.get("transformed parameters", {}),
            generated_quantities=raw.get("generated quantities", {}),
        )

    @property
    def hyperparameters(self) -> tuple[str, ...]:
        return tuple(n for n in self.inputs if n not in SUPPLIED_INPUTS)


@dataclass
class Candidate:
    """One candidate program and what is known about it.

    ``problems`` lists contract violations (the candidate cannot run); ``skip_reason``
    says why a valid candidate does not fit this dataset (for example its support).
    """

    id: str
    path: Path
    code: str
    label: str = ""
    about: str = ""
    support: str = "real"
    defaults: dict[str, Any] = field(default_factory=dict)
    info: StanInfo | None = None
    problems: list[str] = field(default_factory=list)
    skip_reason: str | None = None

    @property
    def code_hash(self) -> str:
        return hashlib.sha256(self.code.encode()).hexdigest()

    @property
    def valid(self) -> bool:
        return not self.problems

    @property
    def parameter_names(self) -> tuple[str, ...]:
        if self.info is None:
            return ()
        return tuple(self.info.parameters) + tuple(self.info.transformed_parameters)

    def hyperparameter_values(self, overrides: Mapping[str, Any] | None = None) -> dict[str, Any]:
        """Value of every prior hyperparameter: run configuration, else header default.

        Raises :class:`UserError` naming the candidate and the input when neither
        gives one.
        """
        overrides = dict(overrides or {})
        assert self.info is not None, "call check_contract first"
        values: dict[str, Any] = {}
        for name in self.info.hyperparameters:
            if name in overrides:
                values[name] = overrides.pop(name)
            elif name in self.defaults:
                values[name] = self.defaults[name]
            else:
                raise UserError(_missing_hyper_message(self, name))
        if overrides:
            raise UserError(
                f"{self.path.name}: hyperparameter override(s) {', '.join(sorted(overrides))} are not "
                f"inputs of candidate '{self.id}'; its hyperparameters are: "
                + (", ".join(self.info.hyperparameters) or "(none)")
            )
        return values


def _missing_hyper_message(c: Candidate, name: str) -> str:
    return (
        f"{c.path.name}: input '{name}' of candidate '{c.id}' has no value; give it a default "
        f"under [candidate.defaults] in the file's header, or set it in the run configuration "
        f"under [hyperparameters.{c.id}]."
    )


def parse_header(code: str, filename: str) -> tuple[dict[str, Any], list[str]]:
    """Read the TOML header from the first block comment; return (table, problems)."""
    match = _HEADER_RE.match(code)
    if not match:
        return {}, [
            f"{filename}: no header; start the file with a block comment holding a "
            "[candidate] table with label and support (see the README's candidate contract)."
        ]
    try:
        header = tomllib.loads(match.group(1))
    except tomllib.TOMLDecodeError as exc:
        return {}, [f"{filename}: the header comment is not valid TOML ({exc})."]
    table = header.get("candidate")
    if not isinstance(table, dict):
        return {}, [f"{filename}: the header has no [candidate] table; add one with label and support."]
    problems = []
    known = {"label", "about", "support", "defaults"}
    unknown = sorted(set(table) - known)
    if unknown:
        problems.append(
            f"{filename}: unknown header key(s) {', '.join(unknown)}; the keys are: {', '.join(sorted(known))}."
        )
    if not isinstance(table.get("label", ""), str) or not isinstance(table.get("about", ""), str):
        problems.append(f"{filename}: header keys label and about must be text in quotes.")
    support = table.get("support")
    if support is None:
        problems.append(f"{filename}: the header has no support; add support = one of {', '.join(SUPPORTS)}.")
    elif support not in SUPPORTS:
        problems.append(f"{filename}: support = {support!r} is not one of {', '.join(SUPPORTS)}.")
    defaults = table.get("defaults", {})
    if not isinstance(defaults, dict):
        problems.append(f"{filename}: [candidate.defaults] must be a table of name = value lines.")
    return table, problems


def stanc_path() -> Path:
    """The Stan compiler used for ``--info``: the one shipped in httpstan's wheel,
    else the one of a CmdStan installation."""
    try:
        import httpstan

        path = Path(httpstan.__file__).parent / "stanc"
        if path.exists():
            return path
    except ImportError:  # pragma: no cover - pystan is a dependency
        pass
    try:  # pragma: no cover - depends on the machine
        import cmdstanpy

        path = Path(cmdstanpy.cmdstan_path()) / "bin" / "stanc"
        if path.exists():
            return path
    except Exception:
        pass
    raise RuntimeError("no Stan compiler (stanc) found: install pystan, or CmdStan for cmdstanpy")


def stanc_info(path: Path) -> tuple[StanInfo | None, str | None]:
    """Run ``stanc --info`` on a file; return (info, None) or (None, compiler message)."""
    proc = subprocess.run(
        [str(stanc_path()), "--info", str(path.name)],
        capture_output=True, text=True, cwd=path.parent, timeout=60,
    )
    if proc.returncode != 0:
        return None, (proc.stderr or proc.stdout).strip()
    return StanInfo.from_json(proc.stdout), None


def check_contract(c: Candidate) -> None:
    """Fill ``c.info`` and append every static contract violation to ``c.problems``."""
    name = c.path.name
    info, error = stanc_info(c.path)
    if info is None:
        c.problems.append(f"{name}: the Stan compiler rejects the program:\n{error}")
        return
    c.info = info
    for required in REQUIRED_INPUTS:
        if required not in info.inputs:
            c.problems.append(
                f"{name}: the program does not declare the input '{required}'; every candidate "
                "declares N, y, N_fit and fit_idx and uses y[fit_idx] in its likelihood."
            )
    for out in REQUIRED_OUTPUTS:
        spec = info.generated_quantities.get(out)
        if spec is None:
            c.problems.append(
                f"{name}: no generated quantity '{out}'; declare '{out}' with one value per "
                "observation (length N) in generated quantities."
            )
        elif spec.get("dimensions") != 1:
            c.problems.append(
                f"{name}: generated quantity '{out}' must be a vector or one-dimensional array of "
                f"length N, not {spec.get('dimensions')}-dimensional."
            )
    unknown_defaults = sorted(set(c.defaults) - set(info.hyperparameters))
    if unknown_defaults:
        c.problems.append(
            f"{name}: [candidate.defaults] names {', '.join(unknown_defaults)}, which the program does "
            "not declare as data inputs; remove them or declare them in the data block."
        )


def load_candidate(path: Path) -> Candidate:
    """Read one file, parse its header and check it against the contract."""
    path = Path(path)
    try:
        code = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        c = Candidate(id=path.stem, path=path, code="")
        c.problems.append(f"{path.name}: not UTF-8 text; save the file as UTF-8.")
        return c
    c = Candidate(id=path.stem, path=path, code=code)
    header, problems = parse_header(code, path.name)
    c.problems.extend(problems)
    c.label = str(header.get("label") or path.stem)
    c.about = str(header.get("about") or "")
    if header.get("support") in SUPPORTS:
        c.support = header["support"]
    if isinstance(header.get("defaults"), dict):
        c.defaults = dict(header["defaults"])
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", c.id):
        c.problems.append(
            f"{path.name}: the file name must be a plain id (letters, digits, underscores, "
            "starting with a letter); rename the file."
        )
    check_contract(c)
    return c


def discover(folder: str | Path) -> list[Candidate]:
    """All candidates in a folder, sorted by id. Raises :class:`UserError` when the
    folder is missing, holds no ``.stan`` file, or holds two files whose ids differ only
    in case."""
    folder = Path(folder)
    if not folder.is_dir():
        raise UserError(f"{folder}: candidates folder not found; give a folder of .stan files.")
    paths = sorted(folder.glob("*.stan"))
    if not paths:
        raise UserError(f"{folder}: no .stan files in the candidates folder; add at least one candidate.")
    seen: dict[str, Path] = {}
    for path in paths:
        key = path.stem.lower()
        if key in seen:   # neither is the candidate: refuse the folder rather than pick one
            raise UserError(
                f"{folder}: {seen[key].name} and {path.name} have ids that differ only in case, and ids ignore "
                "case (reports, the fit store and some file systems could not tell them apart); rename or "
                "remove one."
            )
        seen[key] = path
    import concurrent.futures as cf

    # each file is checked by a run of the Stan compiler (``stanc --info``, a few hundredths
    # of a second each): run them side by side
    with cf.ThreadPoolExecutor(max_workers=min(8, len(paths))) as pool:
        loaded = list(pool.map(load_candidate, paths))
    return loaded


def check_against_data(c: Candidate, design: Design, overrides: Mapping[str, Any] | None = None) -> None:
    """Set ``skip_reason`` when the data lie outside the candidate's support, and record a
    problem when a hyperparameter has no value or the outcome type does not match."""
    if not c.valid:
        return
    reason = support_problem(design.y, c.support)
    if reason:
        c.skip_reason = reason   # the reason alone: "skipped" is the status, shown beside it
        return
    # censoring points are outcome values: one at or below a family's support (a left-censoring
    # point <= 0 for a positive family, which holds no probability) skips it by the check above
    assert c.info is not None
    if c.info.inputs["y"].get("type") == "int" and not np.all(design.y == np.round(design.y)):
        c.skip_reason = "the program declares an integer outcome but the outcome has fractions"
        return
    if design.slopes and not {"Kz", "Z"} <= set(c.info.inputs):
        # never fitted without the slopes asked for: it would answer another question
        c.skip_reason = ("slopes per group were asked for, but the program does not declare the inputs "
                         "Kz and Z that carry them (see the README's contract table)")
        return
    if design.asks_censoring and not {"cens", "has_lower_limit", "lower_limit", "has_upper_limit",
                                      "upper_limit"} <= set(c.info.inputs):
        c.skip_reason = ("censoring or truncation was asked for, but the program does not declare the inputs "
                         "cens, has_lower_limit, lower_limit, has_upper_limit and upper_limit (see the README)")
        return
    try:
        c.hyperparameter_values(overrides)
    except UserError as exc:
        c.problems.append(exc.message)


@dataclass(frozen=True)
class Link:
    """How a built-in maps its linear predictor ``eta = intercept + X * coef (+ group
    term)`` to the outcome: ``kind`` is ``identity`` (eta is in the outcome's units) or
    ``log`` (exp(eta) is); ``sets`` names the quantity eta (or exp(eta)) is, and
    ``moves`` what a coefficient moves, with every other parameter held fixed."""

    kind: str
    sets: str
    moves: str


#: The link of every built-in, read from its program in ``stan/`` (the comment at the top
#: of each file and its likelihood line). With the other parameters fixed, a change in
#: eta shifts the whole distribution under an identity link and scales it under a log
#: link (for the gamma, Weibull and inverse Gaussian because their shape, or CV, is one
#: parameter for all observations).
BUILTIN_LINKS: dict[str, Link] = {
    "normal": Link("identity", "mean", "the mean"),
    "student_t": Link("identity", "location (the mean when nu > 1)", "the location"),
    "skew_normal": Link("identity", "location (not the mean)", "the location and the mean alike"),
    "exgaussian": Link("identity", "mean of the normal part (the mean is this plus tau)",
                       "the mean"),
    "lognormal": Link("log", "median", "every quantile (and the mean)"),
    "shifted_lognormal": Link("log", "median of the outcome minus the shift",
                              "every quantile of the outcome minus the shift"),
    "lognormal_contaminated": Link("log", "median of the lognormal part",
                                   "every quantile of the lognormal part (not the guesses)"),
    "gamma": Link("log", "mean", "the mean (and every quantile)"),
    "weibull": Link("log", "scale (the 63rd percentile)", "every quantile (and the mean)"),
    "inverse_gaussian": Link("log", "mean", "the mean (and every quantile)"),
}


def link_of(c: "Candidate") -> tuple[Link | None, str]:
    """The link of a candidate and, when it is not known, why: only an unchanged built-in
    program has a known link (a user's program may map its linear predictor in any way)."""
    link = BUILTIN_LINKS.get(c.id)
    if link is None:
        return None, ("not a built-in program, so how its linear predictor maps to the outcome is not "
                      "known: only the internal values are shown")
    shipped = builtin_folder() / f"{c.id}.stan"
    try:
        same = shipped.read_text(encoding="utf-8") == c.code
    except OSError:
        same = False
    if not same:
        return None, (f"its program differs from the built-in '{c.id}', so its link is not known: only the "
                      "internal values are shown")
    return link, ""


def builtin_folder() -> Path:
    """The folder of built-in candidates shipped with the source tree (``stan/``)."""
    return Path(__file__).resolve().parents[3] / "stan"


def inputs_for(
    c: Candidate,
    design: Design,
    fit_idx: np.ndarray | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The complete data of one run of a candidate: the inputs it declares among those
    the runner supplies (for the given fit subset), plus its hyperparameters."""
    assert c.info is not None, "call check_contract first"
    supplied = design.stan_inputs(fit_idx)
    if c.info.inputs["y"].get("type") == "int":
        supplied["y"] = np.round(supplied["y"]).astype(np.int64)
    data = {k: v for k, v in supplied.items() if k in c.info.inputs}
    data.update(c.hyperparameter_values(overrides))
    return data


def skip_reason_on(c: Candidate, design: Design, overrides: Mapping[str, Any] | None = None) -> str | None:
    """Why ``c`` would be skipped on ``design`` (``check_against_data`` run on a copy of
    it, as ``c`` stood before any skip reason), or None; ``c`` itself is left as it is.
    For a study that fits one candidate to several datasets."""
    import copy

    probe = copy.copy(c)
    probe.skip_reason, probe.problems = None, list(c.problems)
    check_against_data(probe, design, overrides)
    return probe.skip_reason


def check_outputs(c: Candidate, engine, program, design: Design, seed: int = 1) -> None:
    """Evaluate the program once at random initial values with an empty fit subset and
    record a problem unless ``log_lik`` and ``y_rep`` each hold N finite-or-infinite
    numbers. No sampling is done."""
    from contenders.errors import SamplingError

    try:
        draw = engine.single_draw(program, inputs_for(c, design, np.arange(0)), seed)
    except SamplingError as exc:
        c.problems.append(f"{c.path.name}: {exc}")
        return
    except UserError as exc:
        c.problems.append(exc.message)
        return
    for out in REQUIRED_OUTPUTS:
        got = np.asarray(draw.get(out, np.zeros(0))).reshape(-1).size
        if got != design.N:
            c.problems.append(
                f"{c.path.name}: generated quantity '{out}' has length {got}, but there are "
                f"N = {design.N} observations; declare it with length N and fill it for every "
                "observation, whatever the fit subset."
            )


def example_design(support: str, n: int = 24, seed: int = 7) -> Design:
    """A small made-up dataset with one numeric predictor and two groups, used to check
    candidates when no data are given."""
    import pandas as pd

    from contenders.inputs.data import build_design

    rng = np.random.default_rng(seed)
    draws = {
        "real": lambda: rng.normal(0.0, 1.0, n),
        "positive": lambda: rng.lognormal(6.0, 0.4, n),
        "unit": lambda: rng.beta(2.0, 3.0, n),
        "count": lambda: rng.poisson(4.0, n).astype(float),
        "binary": lambda: rng.integers(0, 2, n).astype(float),
    }
    table = pd.DataFrame({"y": draws[support](), "x": rng.normal(size=n), "g": np.tile(["a", "b"], n // 2)})
    return build_design(table, "y", ["x"], "g", source="example data")
