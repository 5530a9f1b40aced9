"""Bad input, failing candidates and interruption: one clear message naming the file,
column, key or candidate; no traceback for user errors; nothing lost."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings, strategies as hs

from contenders.inputs.candidates import builtin_folder
from contenders.inputs.config import RunConfig, from_mapping
from contenders.inputs.data import build_design, read_table
from contenders.errors import UserError
from contenders.pipeline.runner import run

HERE = Path(__file__).parent
EXE = [sys.executable, "-m", "contenders.cli"]


def cli(*args):
    return subprocess.run([*EXE, *map(str, args)], capture_output=True, text=True, timeout=1200)


@pytest.fixture
def data(tmp_path):
    rng = np.random.default_rng(5)
    table = pd.DataFrame({
        "rt": rng.lognormal(6, 0.4, 40), "cue": np.tile(["off", "on"], 20),
        "who": np.repeat(["a", "b", "c", "d"], 10), "load": rng.normal(size=40),
    })
    path = tmp_path / "d.csv"
    table.to_csv(path, index=False)
    return path, table


# --- each bad input gives one clear line through the real entry point -------------

def _bad_cases(tmp_path: Path, good: Path, table: pd.DataFrame):
    def write(name, frame=None, text=None, raw=None):
        p = tmp_path / name
        if frame is not None:
            frame.to_csv(p, index=False)
        elif text is not None:
            p.write_text(text)
        else:
            p.write_bytes(raw)
        return p

    return [
        ("missing data file", [tmp_path / "nope.csv", "--outcome", "rt"], "nope.csv: data file not found"),
        ("empty file", [write("empty.csv", text=""), "--outcome", "rt"], "the file is empty"),
        ("not UTF-8", [write("latin.csv", raw="rt,name\n1,Jos\xe9\n".encode("latin-1")), "--outcome", "rt"],
         "not UTF-8 text"),
        ("not a CSV table", [write("pic.csv", raw=b"\x89PNG\r\n\x1a\n\x00\x00"), "--outcome", "rt"], "not UTF-8 text"),
        ("outcome missing", [good, "--outcome", "latency"], "outcome column 'latency' not found"),
        ("non-numeric outcome", [good, "--outcome", "cue"], "outcome column 'cue' is not numeric"),
        ("some text in the outcome", [write("mixed.csv", table.assign(rt=table.rt.astype(object).where(
            table.index != 3, "fast"))), "--outcome", "rt"], "has 1 non-numeric value(s), for example 'fast'"),
        ("constant outcome", [write("const.csv", table.assign(rt=500.0)), "--outcome", "rt"],
         "outcome column 'rt' is constant"),
        ("too few rows", [write("few.csv", table.head(5)), "--outcome", "rt"],
         "5 usable observations of 'rt'; at least 10 are needed"),
        ("group with one level", [good, "--outcome", "rt", "--group", "one"], "group column 'one' not found"),
        ("group with one level (present)", [write("g1.csv", table.assign(one="x")), "--outcome", "rt",
                                            "--group", "one"], "group column 'one' has a single level"),
        ("predictor with missing values", [write("pm.csv", table.assign(load=table.load.where(table.index != 2))),
                                           "--outcome", "rt", "--predictors", "load"],
         "predictor column 'load' has 1 missing value(s)"),
        ("constant predictor", [write("pc.csv", table.assign(load=1.0)), "--outcome", "rt", "--predictors", "load"],
         "predictor column 'load' is constant"),
        ("condition column missing", [good, "--outcome", "rt", "--condition", "colour"],
         "condition column 'colour' not found"),
        ("candidates folder missing", [good, "--outcome", "rt", "--candidates", tmp_path / "none"],
         "candidates folder not found"),
        ("unknown candidate in --only", [good, "--outcome", "rt", "--only", "lognormall"],
         "candidate(s) lognormall not in"),
        ("hyperparameters for an unknown candidate", [good, "--outcome", "rt", "--hyper", "lognormall.sigma_scale=1"],
         "[hyperparameters.lognormall] names no candidate in the run"),
        ("hyperparameter a candidate does not have", [good, "--outcome", "rt", "--only", "lognormal", "--hyper",
                                                      "lognormal.sigmascale=1"],
         "is not a hyperparameter of candidate 'lognormal' (lognormal.stan); did you mean sigma_scale?"),
        ("output folder that cannot be written", [good, "--outcome", "rt", "--out", good / "sub"],
         "cannot create the output folder"),
        ("leave-one-group-out without a group", [good, "--outcome", "rt", "--cross-validation", "leave_group_out"],
         "leave_group_out needs a group column"),
        ("bad number", [good, "--outcome", "rt", "--draws", "lots"], "--draws must be a whole number >= 1"),
        ("adapt_delta out of range", [good, "--outcome", "rt", "--adapt-delta", "1.5"],
         "configuration key 'adapt_delta' must be a number strictly between 0 and 1"),
    ]


def test_twenty_bad_inputs_each_give_one_clear_line(tmp_path, data):
    good, table = data
    cases = _bad_cases(tmp_path, good, table)
    assert len(cases) >= 20
    for name, args, message in cases:
        res = cli("run", *args, "--out" if "--out" not in args else "--quiet",
                  *([tmp_path / "out"] if "--out" not in args else []))
        if message is None:  # reported per candidate, not as a run error: see the next test
            continue
        assert res.returncode == 2, (name, res.stdout, res.stderr)
        err = res.stderr.strip()
        assert len(err.splitlines()) == 1 and "Traceback" not in err, (name, err)
        assert message in err, (name, err)


def test_bad_configuration_files(tmp_path, data):
    good, _ = data
    cases = {
        "unknown section": ("[dataa]\nfile = 'd.csv'\n", "unknown section [dataa]; the sections are: data"),
        "misspelled key": ("[data]\noutcom = 'rt'\n", "unknown key 'outcom' in [data]; the keys there are: file"),
        "wrong type": ("[sampler]\nchains = '4'\n", "configuration key 'chains' must be a whole number >= 1"),
        "invalid TOML": ("[data\n", "not valid TOML"),
        "bad bounds": ("[checks.bounds]\nmean = [5000, 150]\n", "low 5000 must be below high 150"),
    }
    for name, (text, message) in cases.items():
        path = tmp_path / "c.toml"
        path.write_text(text)
        res = cli("run", good, "--outcome", "rt", "--config", path)
        assert res.returncode == 2 and message in res.stderr, (name, res.stderr)
        assert "Traceback" not in res.stderr


# --- failing candidates never stop the others -------------------------------------

def test_failing_candidates_are_reported_and_the_others_run(tmp_path, data, programs):
    good, _ = data
    folder = tmp_path / "cands"
    shutil.copytree(HERE / "candidates" / "broken", folder)
    (folder / "syntax_error.stan").write_text(
        (folder / "normal.stan").read_text().replace("real<lower=0> sigma;\n}", "real<lower=0> sigma\n}"))
    shutil.copy(builtin_folder() / "lognormal.stan", folder / "lognormal.stan")
    (folder / "needs_knob.stan").write_text(
        (folder / "lognormal.stan").read_text().replace("real<lower=0> sigma_scale;\n",
                                                        "real<lower=0> sigma_scale;\n  real knob;\n"))
    bad = pd.read_csv(good)
    bad.loc[0, "rt"] = -3.0
    bad.to_csv(tmp_path / "neg.csv", index=False)
    cfg = RunConfig(data=tmp_path / "neg.csv", outcome="rt", candidates=folder, out=tmp_path / "out", chains=2,
                    warmup=150, draws=150, prior_draws=100, engine="pystan", jobs=2)
    result = run(cfg)
    by = {c.id: c for c in result.candidates}
    assert by["normal"].status in ("ok", "unhealthy") and by["normal"].oos is not None
    assert by["lognormal"].status == "skipped"
    assert "1 outcome value(s) are zero or negative" in by["lognormal"].reason
    assert by["init_fails"].status == "failed" and "Initialization failed" in by["init_fails"].reason
    assert by["raises_when_fitted"].status == "failed"
    assert "deliberate failure inside the program" in by["raises_when_fitted"].reason
    assert by["raises_when_fitted"].reason.startswith("posterior:")
    assert by["syntax_error"].status == "failed" and "Syntax error" in by["syntax_error"].reason
    assert by["needs_knob"].status == "skipped"  # positive support on negative data comes first
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert {c["id"]: c["status"] for c in summary["candidates"]}["init_fails"] == "failed"
    report = (tmp_path / "out" / "report.html")
    if report.exists():
        text = report.read_text()
        assert "deliberate failure inside the program" in text


def test_failed_run_never_overwrites_an_existing_report(tmp_path, data, programs):
    good, _ = data
    out = tmp_path / "out"
    # relaxed health thresholds, so that two short chains are ranked (a run that ranks
    # nothing exits with 3)
    ok = cli("run", good, "--outcome", "rt", "--only", "lognormal", "--out", out, "--chains", 2, "--warmup", 150,
             "--draws", 150, "--prior-draws", 100, "--engine", "pystan", "--quiet", "--ess-per-chain-min", 20,
             "--rhat-max", 1.05)
    assert ok.returncode == 0, ok.stderr
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    failed = cli("run", good, "--outcome", "latency", "--out", out, "--engine", "pystan")
    assert failed.returncode == 2
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert after == before
    assert not [p for p in out.iterdir() if p.name.endswith(".tmp")]


# --- property-based: the loader and the configuration parser -----------------------

cells = hs.one_of(hs.none(), hs.floats(allow_nan=True, allow_infinity=True), hs.integers(-10**6, 10**6),
                  hs.text(max_size=5), hs.booleans())


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=hs.lists(hs.tuples(cells, cells, cells), min_size=0, max_size=30),
       names=hs.lists(hs.text(min_size=1, max_size=6), min_size=3, max_size=3, unique=True),
       outcome=hs.integers(0, 2), predictor=hs.integers(0, 3), group=hs.integers(0, 3))
def test_arbitrary_tables_give_a_design_or_a_user_error(tmp_path, rows, names, outcome, predictor, group):
    path = tmp_path / "t.csv"
    pd.DataFrame(rows, columns=names).to_csv(path, index=False)
    try:
        table = read_table(path)
        cols = [str(c) for c in table.columns]
        preds = [cols[predictor]] if predictor < len(cols) and predictor != outcome else []
        grp = cols[group] if group < len(cols) and group not in (outcome, predictor) else None
        design = build_design(table, cols[outcome] if outcome < len(cols) else "x", preds, grp)
    except UserError as exc:
        assert exc.message and "\n" not in exc.message
        return
    assert np.all(np.isfinite(design.y)) and design.N >= 10
    assert np.all(np.isfinite(design.X))
    assert design.y_scale > 0


toml_values = hs.recursive(
    hs.one_of(hs.none(), hs.booleans(), hs.integers(-5, 5000), hs.floats(allow_nan=True), hs.text(max_size=8)),
    lambda inner: hs.one_of(hs.lists(inner, max_size=3), hs.dictionaries(hs.text(max_size=6), inner, max_size=3)),
    max_leaves=6,
)
sections = hs.sampled_from(["data", "candidates", "sampler", "checks", "health", "run", "comparison",
                            "hyperparameters", "extra"])
keys = hs.sampled_from(["file", "outcome", "predictors", "chains", "draws", "seed", "adapt_delta", "escalation",
                        "bounds", "thresholds", "engine", "jobs", "rhat_max", "folds", "cross_validation",
                        "quiet", "lognormal", "nonsense"])


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=hs.dictionaries(sections, hs.dictionaries(keys, toml_values, max_size=4), max_size=4))
def test_arbitrary_configurations_give_a_config_or_a_user_error(tmp_path, raw):
    try:
        cfg = from_mapping(raw, tmp_path)
    except UserError as exc:
        assert exc.message
        return
    assert cfg.chains >= 1 and 0 < cfg.adapt_delta < 1
    assert all(low < high for low, high in cfg.bounds.values())


def test_ctrl_c_keeps_finished_fits_and_the_rerun_resumes(tmp_path, data, programs):
    """A real interrupt (SIGINT, as Ctrl-C sends) to the command while it runs."""
    import signal
    import time

    import arviz as az

    good, _ = data
    out = tmp_path / "out"
    args = [*EXE, "run", str(good), "--outcome", "rt", "--only", "gamma,lognormal,weibull", "--out", str(out),
            "--chains", "2", "--warmup", "300", "--draws", "300", "--prior-draws", "100", "--engine", "pystan"]
    scratch = tmp_path / "scratch"   # the run's temporary directory
    scratch.mkdir()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=dict(os.environ, TMPDIR=str(scratch)))
    deadline = time.time() + 300
    while time.time() < deadline and len(list((out / "fits").glob("*.nc"))) < 2:
        time.sleep(0.2)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 130, err
    assert "interrupted; every fit finished so far is kept in the fit store" in err
    kept = sorted((out / "fits").glob("*.nc"))
    assert len(kept) >= 2
    for path in kept:  # whole files only
        assert "posterior" in az.from_netcdf(path).groups()
    assert not list((out / "fits").glob(".*.tmp"))
    assert not list(scratch.glob("contenders_chains_*")), "a stopped worker left its chains' folder"
    assert not (out / "report.html").exists()
    again = subprocess.run(args, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["fits"]["from_store"] >= len(kept)


def test_a_candidate_whose_compile_fails_is_failed_at_that_stage_and_the_others_run(tmp_path, data, programs,
                                                                                   monkeypatch):
    # a program that the static check (stanc --info) accepts but whose build fails (the
    # C++ compiler, a full disk): the engine's compile raises, as it does for those
    from contenders.engines.base import SamplingError
    from contenders.engines.pystan_engine import PyStanEngine
    from contenders.pipeline.runner import run_with_programs

    good, _ = data
    folder = tmp_path / "cands"
    folder.mkdir()
    shutil.copy(builtin_folder() / "normal.stan", folder / "normal.stan")
    shutil.copy(builtin_folder() / "normal.stan", folder / "builds_badly.stan")
    message = "builds_badly.stan: compiling failed:\nsomething the C++ compiler said"
    real = PyStanEngine.compile

    def compile(self, candidate):
        if candidate.id == "builds_badly":
            raise SamplingError(message)
        return real(self, candidate)

    monkeypatch.setattr(PyStanEngine, "compile", compile)
    cfg = RunConfig(data=good, outcome="rt", candidates=folder, out=tmp_path / "out", chains=2,
                    warmup=150, draws=150, prior_draws=100, engine="pystan", jobs=1)
    result, ran = run_with_programs(cfg)
    by = {c.id: c for c in result.candidates}
    assert by["builds_badly"].status == "failed" and by["builds_badly"].stage == "compile"
    assert by["builds_badly"].reason == message
    assert by["normal"].status in ("ok", "unhealthy") and by["normal"].oos is not None
    assert ran.candidates["builds_badly"].problems == []   # the candidate itself is left as read
    assert "builds_badly" not in ran.compiled
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    failed = next(c for c in summary["candidates"] if c["id"] == "builds_badly")
    assert failed["status"] == "failed" and failed["reason"] == message


def test_check_lists_a_candidate_whose_compile_fails_with_the_compilers_words(tmp_path, programs, monkeypatch,
                                                                             capsys):
    from contenders import cli
    from contenders.engines.base import SamplingError
    from contenders.engines.pystan_engine import PyStanEngine

    folder = tmp_path / "cands"
    folder.mkdir()
    shutil.copy(builtin_folder() / "normal.stan", folder / "normal.stan")
    shutil.copy(builtin_folder() / "normal.stan", folder / "builds_badly.stan")
    real = PyStanEngine.compile

    def compile(self, candidate):
        if candidate.id == "builds_badly":
            raise SamplingError("builds_badly.stan: compiling failed:\nsomething the C++ compiler said")
        return real(self, candidate)

    monkeypatch.setattr(PyStanEngine, "compile", compile)
    args = cli.build_parser().parse_args(["check", "--candidates", str(folder), "--engine", "pystan", "--jobs", "1"])
    assert cli.cmd_check(args) == 1
    out = capsys.readouterr().out
    assert "ok       normal\n" in out
    assert ("invalid  builds_badly\n         builds_badly.stan: compiling failed:\n"
            "         something the C++ compiler said\n") in out
    assert "1 of 2 candidates pass" in out
