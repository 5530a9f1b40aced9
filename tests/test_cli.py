"""The command line through its real entry point, the scaffold and the demo data."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from contenders import demo
from contenders.inputs.candidates import builtin_folder

EXE = [sys.executable, "-m", "contenders.cli"]
#: Health thresholds that 2 short chains can meet: a run that ranks nothing exits with 3, so
#: tests of a run's outputs relax them (the defaults are for full runs).
RELAXED = ["--ess-per-chain-min", 20, "--rhat-max", 1.05]


def cli(*args, cwd=None):
    return subprocess.run([*EXE, *map(str, args)], capture_output=True, text=True, cwd=cwd, timeout=1200)


@pytest.fixture
def small(tmp_path):
    rng = np.random.default_rng(9)
    n = 60
    pd.DataFrame({"rt": rng.lognormal(6.2, 0.4, n), "cue": np.tile(["off", "on"], n // 2)}).to_csv(
        tmp_path / "small.csv", index=False)
    return tmp_path / "small.csv"


def test_list_shows_the_ten_builtins():
    res = cli("list")
    assert res.returncode == 0
    for cid in ("normal", "lognormal", "shifted_lognormal", "exgaussian", "gamma", "weibull",
                "inverse_gaussian", "student_t", "skew_normal", "lognormal_contaminated"):
        assert cid in res.stdout
    assert "10 of 10 candidates keep the contract" in res.stdout
    assert cli().stdout == res.stdout  # the bare command lists too


def test_quick_run_end_to_end_writes_outputs(small, tmp_path, programs):
    out = tmp_path / "out"
    res = cli("run", small, "--outcome", "rt", "--predictors", "cue", "--condition", "cue",
              "--only", "lognormal,normal", "--out", out, "--chains", 2, "--warmup", 200, "--draws", 200,
              "--prior-draws", 200, "--engine", "pystan", "--bounds", "mean=150:5000,min=50:inf",
              "--hyper", "lognormal.sigma_scale=0.5", *RELAXED)
    assert res.returncode == 0, res.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert [c["id"] for c in summary["candidates"]] == ["lognormal", "normal"]
    assert summary["candidates"][0]["hyperparameters"]["sigma_scale"] == 0.5
    assert set(summary["ranking"]) <= {"lognormal", "normal"}
    assert (out / "report.html").stat().st_size > 10_000
    assert "report:" in res.stdout


def test_a_run_that_ranks_nothing_exits_3_writes_the_report_and_spends_no_refits(small, tmp_path, programs):
    """Every candidate unhealthy (an ESS floor no short chain reaches): the report is still
    written, the exit status is 3, and K-fold, which would refit twice per candidate, is
    not run for them."""
    out = tmp_path / "out"
    res = cli("run", small, "--outcome", "rt", "--only", "lognormal", "--out", out, "--chains", 2,
              "--warmup", 150, "--draws", 150, "--prior-draws", 100, "--engine", "pystan",
              "--ess-per-chain-min", 100000, "--cross-validation", "kfold", "--folds", 2)
    assert res.returncode == 3, res.stderr
    assert "no candidate was ranked (1 unhealthy)" in res.stderr and "exit status 3" in res.stderr
    assert (out / "report.html").stat().st_size > 10_000
    summary = json.loads((out / "summary.json").read_text())
    assert summary["ranking"] == []
    (c,) = summary["candidates"]
    assert c["status"] == "unhealthy" and "(100,000 per chain)" in c["reason"]   # thousands separated
    assert c["reason"].endswith("exact refits skipped, since an unhealthy candidate is not ranked")
    assert c["n_refits"] == 0 and "refits skipped" in c["elpd_method"] and "fold" not in c["elpd_method"]
    # the prior draws and the posterior fit(s) of the adapt_delta escalation, no fold refits
    assert summary["fits"]["sampled"] == 1 + len(c["adapt_delta_attempts"])
    report = (out / "report.html").read_text()
    assert "exact refits skipped" in report
    # the timing lines keep waiting for a free core apart from each trial's seconds
    assert {"prior", "prior_wait", "posterior", "posterior_wait", "total"} <= set(c["seconds"])
    assert c["seconds"]["prior_wait"] == 0.0   # one candidate on its own never waits for another's chains
    assert "Waiting for a core" in report
    assert "lognormal: unhealthy:" in res.stdout and "exact refits skipped" in res.stdout
    # --help documents the status
    assert "3 when the report was written but no candidate was ranked" in " ".join(cli("run", "--help").stdout.split())


@pytest.mark.parametrize("args, message", [
    (["--outcome", "latency"], "outcome column 'latency' not found; the columns are: rt, cue"),
    (["--outcome", "rt", "--chains", "two"], "--chains must be a whole number >= 1; got 'two'"),
    (["--outcome", "rt", "--engine", "stanny"], "configuration key 'engine' must be one of auto, pystan, cmdstanpy"),
    (["--outcome", "rt", "--bounds", "median=1:2"], "configuration bound 'median' names no statistic"),
])
def test_user_errors_are_one_line_without_traceback(small, tmp_path, args, message):
    res = cli("run", small, "--out", tmp_path / "o", *args)
    assert res.returncode == 2
    assert message in res.stderr
    assert "Traceback" not in res.stderr and len(res.stderr.strip().splitlines()) == 1


def test_a_misspelt_hyperparameter_stops_before_any_fitting_naming_the_valid_ones(small, tmp_path):
    out = tmp_path / "o"
    res = cli("run", small, "--outcome", "rt", "--out", out, "--hyper", "lognormal.sigmascale=1")
    assert res.returncode == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert ("[hyperparameters.lognormal] sigmascale (--hyper lognormal.sigmascale=...) is not a hyperparameter "
            "of candidate 'lognormal' (lognormal.stan); did you mean sigma_scale?") in err
    # the valid names, as the header of stan/lognormal.stan declares them
    assert "Its hyperparameters are: intercept_sd, coef_sd, group_sd_scale, sigma_scale; nothing was fitted" in err
    assert res.stdout == "" and not out.exists()   # stopped before the output folder or any compile
    # the same in a configuration file, and in a batch (stops before the first dataset)
    cfg = tmp_path / "c.toml"
    cfg.write_text('[hyperparameters.gamma]\nshape_scal = 2.0\n')
    res = cli("batch", small, "--outcome", "rt", "--config", cfg, "--out", tmp_path / "b")
    assert res.returncode == 2 and "shape_scal" in res.stderr and "is not a hyperparameter of candidate 'gamma'" in res.stderr
    assert not (tmp_path / "b" / "small").exists()


def test_bad_configuration_key_and_empty_candidates_folder(small, tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[data]\nfile = "small.csv"\noutcome = "rt"\n\n[sampler]\nchain = 2\n')
    res = cli("run", "--config", cfg)
    assert res.returncode == 2
    assert "unknown key 'chain' in [sampler]; the keys there are: chains, warmup" in res.stderr
    cfg.write_text('[data]\nfile = "small.csv"\noutcome = "rt"\n[run\n')
    assert "not valid TOML" in cli("run", "--config", cfg).stderr
    (tmp_path / "empty").mkdir()
    res = cli("run", small, "--outcome", "rt", "--candidates", tmp_path / "empty", "--out", tmp_path / "o")
    assert res.returncode == 2
    assert "no .stan files in the candidates folder" in res.stderr


def test_scaffolded_candidate_passes_check_and_can_be_fitted(small, tmp_path, engine):
    folder = tmp_path / "mine"
    res = cli("new", "my_family", "--candidates", folder, "--label", "My family")
    assert res.returncode == 0, res.stderr
    assert cli("new", "my_family", "--candidates", folder).returncode == 2  # never overwrites
    res = cli("check", "--candidates", folder)
    assert res.returncode == 0, res.stdout + res.stderr
    assert "ok       my_family" in res.stdout
    res = cli("run", small, "--outcome", "rt", "--candidates", folder, "--out", tmp_path / "o", "--chains", 2,
              "--warmup", 200, "--draws", 200, "--prior-draws", 100, "--engine", "pystan", "--quiet", *RELAXED)
    assert res.returncode == 0, res.stderr
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["candidates"][0]["label"] == "My family"
    assert summary["candidates"][0]["elpd_loo"] is not None


def _folder_state(folder):
    import hashlib

    return {f.name: hashlib.sha256(f.read_bytes()).hexdigest() for f in sorted(folder.iterdir())}


def test_new_writes_where_the_user_stands_and_never_into_the_builtin_folder(tmp_path):
    before = _folder_state(builtin_folder())
    here = tmp_path / "empty"
    here.mkdir()
    res = cli("new", "my_candidate", cwd=here)
    assert res.returncode == 0, res.stderr
    assert (here / "my_candidate.stan").is_file()
    assert str((here / "my_candidate.stan").resolve()) in res.stdout
    assert "contenders check my_candidate --candidates ." in res.stdout
    # a second call refuses and leaves the file as it was
    text = (here / "my_candidate.stan").read_text()
    res = cli("new", "my_candidate", "--label", "Other", cwd=here)
    assert res.returncode == 2 and "already exists" in res.stderr and "nothing was overwritten" in res.stderr
    assert (here / "my_candidate.stan").read_text() == text
    # an id that differs only in case from an existing file is refused, and the older
    # file stays as it was (and valid)
    res = cli("new", "My_Candidate", cwd=here)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "my_candidate.stan already exists, and ids ignore case, so 'My_Candidate' would clash" in res.stderr
    assert sorted(p.name for p in here.iterdir()) == ["my_candidate.stan"]
    assert (here / "my_candidate.stan").read_text() == text
    # --candidates FOLDER is created if missing
    res = cli("new", "other_one", "--candidates", "sub/folder", cwd=here)
    assert res.returncode == 0, res.stderr
    assert (here / "sub" / "folder" / "other_one.stan").is_file()
    assert "contenders check other_one --candidates sub/folder" in res.stdout
    # the built-in folder is refused, whether named or stood in
    res = cli("new", "stray", "--candidates", builtin_folder(), cwd=here)
    assert res.returncode == 2 and "built-in candidates folder" in res.stderr
    res = cli("new", "stray", cwd=builtin_folder())
    assert res.returncode == 2 and "built-in candidates folder" in res.stderr
    assert _folder_state(builtin_folder()) == before


def test_quick_look_is_marked_never_stored_as_a_full_result_and_never_over_one(small, tmp_path, engine):
    out = tmp_path / "q"
    res = cli("run", small, "--outcome", "rt", "--only", "lognormal", "--quick", "--out", out, "--engine", "pystan")
    assert res.returncode == 0, res.stderr
    assert res.stdout.count("Quick look, not a full result: 4 chains x 250 draws, no adapt_delta escalation, "
                            "R-hat below 1.05 and ESS of 25 per chain accepted") == 1
    summary = json.loads((out / "summary.json").read_text())
    assert summary["profile"] == "quick look"
    assert summary["verdict"].startswith("Quick look, not a full result")
    assert (summary["sampler"]["chains"], summary["sampler"]["warmup"], summary["sampler"]["draws"]) == (4, 250, 250)
    c = summary["candidates"][0]
    assert c["status"] == "ok" and c["elpd_method"].startswith("PSIS-LOO without refits (quick look)")
    assert c["n_refits"] == 0 and c["adapt_delta_attempts"][0]["adapt_delta"] == 0.8
    assert "Quick look" in (out / "report.html").read_text()
    # flags given with --quick win; a full run on the same store does not read the quick result back
    res = cli("run", small, "--outcome", "rt", "--only", "lognormal", "--quick", "--draws", 300, "--out", out,
              "--engine", "pystan", "--quiet")
    assert res.returncode == 0, res.stderr
    assert json.loads((out / "summary.json").read_text())["sampler"]["draws"] == 300
    full = tmp_path / "full"
    res = cli("run", small, "--outcome", "rt", "--only", "lognormal", "--out", full, "--store", out / "fits",
              "--warmup", 250, "--draws", 300, "--prior-draws", 200, "--escalation", "0.95", "--rhat-max", 1.05,
              "--engine", "pystan", "--quiet")
    assert res.returncode == 0, res.stderr
    summary = json.loads((full / "summary.json").read_text())
    assert summary["profile"] == "full" and not summary["verdict"].startswith("Quick look")
    assert not summary["candidates"][0]["elpd_method"].startswith("PSIS-LOO without refits")
    # a quick look never writes over a full run's output
    res = cli("run", small, "--outcome", "rt", "--only", "lognormal", "--quick", "--out", full, "--engine", "pystan")
    assert res.returncode == 2 and "holds the output of a full run" in res.stderr


def test_demo_generator_is_reproducible_and_documented(tmp_path):
    a = demo.generate()
    assert a.equals(demo.generate())
    assert not a.equals(demo.generate(seed=demo.SEED + 1))
    assert a.shape == (30 * 48, 5)
    assert (a.groupby(["participant", "density", "cue"]).size() == 12).all()
    cfg = demo.write(tmp_path)
    first = (tmp_path / "icon_search.csv").read_bytes()
    demo.write(tmp_path)
    assert (tmp_path / "icon_search.csv").read_bytes() == first
    assert cfg.name == "demo.toml" and (tmp_path / "README.md").exists()
    # the shipped copy in demo_data/ is the generator's output
    shipped = builtin_folder().parent / "demo_data" / "icon_search.csv"
    if shipped.exists():
        assert shipped.read_bytes() == first


def test_demo_process_parameters_are_recovered_by_the_true_family(tmp_path, programs):
    """Recovery with a known process: the demo generator without fast guesses and without
    the interaction is an additive shifted lognormal, the shifted_lognormal candidate.
    Each true value must lie within 3 posterior SDs of the posterior mean (common
    practice, no source). Coefficients are per centred indicator: 'density[sparse]' is
    -0.30 and 'cue[on]' is -0.20; with centred indicators the intercept is
    log(420) + 0.5 * 0.30 - 0.5 * 0.20."""
    from contenders.inputs.config import RunConfig
    from contenders.pipeline.runner import run

    demo.generate(guess_rate=0.0, interaction=0.0).to_csv(tmp_path / "d.csv", index=False)
    cfg = RunConfig(data=tmp_path / "d.csv", outcome="rt_ms", predictors=("density", "cue"), group="participant",
                    only=("shifted_lognormal",), out=tmp_path / "o", chains=4, warmup=500, draws=500,
                    prior_draws=100, engine="pystan", cross_validation="loo", refit_cap=0)
    c = run(cfg).candidates[0]
    rows = {r.parameter: r for r in c.health.table}
    truth = {"shift": 230.0, "sigma": 0.40, "group_sd[1]": 0.15, "coef[1]": 0.20 * -1.0,
             "coef[2]": -0.30, "intercept": np.log(420) + 0.15 - 0.10}
    # X columns in the order of the predictors: cue[on] comes from "cue", density[sparse] from "density"
    names = [p.name for p in __import__("contenders.pipeline.runner", fromlist=["load_design"]).load_design(cfg).coding]
    assert names == ["density[sparse]", "cue[on]"]
    truth["coef[1]"], truth["coef[2]"] = -0.30, -0.20
    for name, value in truth.items():
        r = rows[name]
        assert abs(r.mean - value) < 3 * r.sd, (name, r, value)


def test_readme_documents_every_configuration_key_and_both_commands():
    from contenders.inputs.config import HELP, section_of

    readme = (builtin_folder().parent / "README.md").read_text()
    for name in HELP:
        assert f"`{section_of(name)}`" in readme, name
    assert 'pip install -e ".[test]" && contenders demo' in readme
    ci = (builtin_folder().parent / ".ci" / "run").read_text()
    assert ". .venv/bin/activate && python -m pytest -q" in readme
    assert ". .venv/bin/activate && python -m pytest -q" in ci


def test_a_reader_that_stops_early_gets_no_traceback():
    # `contenders list | head -1`: the reader closes the pipe before the listing is
    # written. The command must stop quietly (status 141, as a shell reports SIGPIPE;
    # common practice, no source), not print Python's BrokenPipeError.
    child = subprocess.Popen([sys.executable, "-c",
                              "import sys, time; time.sleep(1.0); from contenders.cli import main; "
                              "sys.exit(main(['list']))"],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    child.stdout.close()
    err = child.stderr.read().decode()
    assert child.wait(timeout=120) == 141, err
    assert "Traceback" not in err and "BrokenPipeError" not in err, err


def test_quick_profile_cuts_the_ess_floor_with_the_draws():
    # A quarter of the draws, so a quarter of the ESS floor: at 100 per chain the demo's
    # quick look (4 x 250 draws) left 8 of 10 candidates unhealthy on ESS alone (measured:
    # bulk ESS 246 to 365, below 400) and ranked the other two as if they were the best.
    from contenders.inputs.config import RunConfig, quick_profile

    full = RunConfig()
    quick = quick_profile(full)
    assert quick.draws == full.draws // 4 and quick.ess_per_chain_min == full.ess_per_chain_min / 4 == 25.0
    assert quick.rhat_max == 1.05 and quick.chains == 4
