"""The candidate contract: headers, declared inputs and outputs, support, and that one
broken file never stops the others from loading."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from contenders.inputs.candidates import (
    builtin_folder, check_against_data, check_outputs, discover, inputs_for, load_candidate,
    parse_header,
)
from contenders.inputs.data import build_design
from contenders.errors import UserError

GOOD = (builtin_folder() / "lognormal.stan").read_text()


def _write(folder: Path, name: str, code: str) -> Path:
    path = folder / f"{name}.stan"
    path.write_text(code)
    return path


@pytest.fixture
def folder(tmp_path):
    shutil.copy(builtin_folder() / "normal.stan", tmp_path / "normal.stan")
    return tmp_path


def test_builtins_all_keep_the_contract(builtins):
    assert sorted(builtins) == sorted([
        "normal", "lognormal", "shifted_lognormal", "exgaussian", "gamma", "weibull",
        "inverse_gaussian", "student_t", "skew_normal", "lognormal_contaminated",
    ])
    for c in builtins.values():
        assert c.valid, c.problems
        assert c.label and c.about
        assert set(c.info.hyperparameters) == set(c.defaults), c.id
        assert {"log_lik", "y_rep", "lprior"} <= set(c.info.generated_quantities)


def test_header_is_parsed_as_toml():
    header, problems = parse_header(GOOD, "lognormal.stan")
    assert problems == []
    assert header["label"] == "Lognormal"
    assert header["support"] == "positive"
    assert header["defaults"]["intercept_sd"] == 1.5


def test_missing_header_and_bad_support_are_named():
    _, problems = parse_header("data { int N; }", "x.stan")
    assert "no header" in problems[0]
    _, problems = parse_header('/*\n[candidate]\nlabel = "x"\nsupport = "posative"\n*/', "x.stan")
    assert "'posative' is not one of real, positive, unit, count, binary" in problems[0]


def test_file_without_log_lik_is_rejected_and_others_still_load(folder):
    _write(folder, "no_loglik", GOOD.replace("vector[N] log_lik;", "vector[N] log_lik_other;")
           .replace("log_lik[n] =", "log_lik_other[n] ="))
    cands = {c.id: c for c in discover(folder)}
    assert cands["normal"].valid
    bad = cands["no_loglik"]
    assert not bad.valid
    assert "no_loglik.stan: no generated quantity 'log_lik'" in bad.problems[0]


def test_syntax_error_is_reported_with_compiler_message_and_others_still_load(folder):
    _write(folder, "broken", GOOD.replace("real<lower=0> sigma;\n}", "real<lower=0> sigma\n}"))
    cands = {c.id: c for c in discover(folder)}
    assert cands["normal"].valid
    msg = cands["broken"].problems[0]
    assert msg.startswith("broken.stan: the Stan compiler rejects the program")
    assert "Syntax error" in msg


def test_unknown_input_without_default_names_candidate_input_and_fix(folder, rng):
    _write(folder, "needs_more", GOOD.replace("real<lower=0> sigma_scale;\n",
                                              "real<lower=0> sigma_scale;\n  real extra_knob;\n"))
    c = load_candidate(folder / "needs_more.stan")
    assert c.valid  # statically fine: the run configuration may still supply it
    design = build_design(_table(rng), "rt")
    check_against_data(c, design)
    assert c.problems == [
        "needs_more.stan: input 'extra_knob' of candidate 'needs_more' has no value; give it a "
        "default under [candidate.defaults] in the file's header, or set it in the run "
        "configuration under [hyperparameters.needs_more]."
    ]
    ok = load_candidate(folder / "needs_more.stan")
    check_against_data(ok, design, {"extra_knob": 3.0})
    assert ok.valid
    assert inputs_for(ok, design, overrides={"extra_knob": 3.0})["extra_knob"] == 3.0


def test_default_for_an_undeclared_input_is_a_problem(folder):
    _write(folder, "stray_default", GOOD.replace("sigma_scale    = 1.0", "sigma_scale    = 1.0\nsigmascale = 2.0"))
    c = load_candidate(folder / "stray_default.stan")
    assert any("names sigmascale, which the program does not declare" in p for p in c.problems)


def test_missing_fit_subset_inputs_are_a_problem(folder):
    code = GOOD.replace("  int<lower=0, upper=N> N_fit;\n  array[N_fit] int<lower=1, upper=N> fit_idx;\n", "")
    code = code.replace("vector[N_fit] eta = linear_predictor(intercept, X[fit_idx], coef, group[fit_idx],",
                        "vector[N] eta = linear_predictor(intercept, X, coef, group,")
    code = code.replace("Z[fit_idx], slope_z", "Z, slope_z")
    code = code.replace("y[fit_idx] ~ lognormal(eta, sigma);", "y ~ lognormal(eta, sigma);")
    # the censoring helpers take the subset as an argument: rename it there, and give
    # them every observation where the program used fit_idx
    code = code.replace("array[] int fit_idx", "array[] int subset").replace("size(fit_idx)", "size(subset)")
    code = code.replace("count_kind(cens, fit_idx, kind)", "count_kind(cens, subset, kind)")
    code = code.replace("cens[fit_idx[i]]", "cens[subset[i]]").replace("within fit_idx", "within the subset")
    code = code.replace("fit_idx", "linspaced_int_array(N, 1, N)").replace("1:N_fit", "1:N")
    assert "fit_idx" not in code and "N_fit" not in code.replace("vector[N_fit]", "")
    _write(folder, "no_subset", code)
    c = load_candidate(folder / "no_subset.stan")
    assert any("does not declare the input 'N_fit'" in p for p in c.problems)


def test_positive_candidate_is_skipped_on_negative_data_with_reason(builtins, rng):
    t = _table(rng)
    t.loc[3, "rt"] = -5.0
    design = build_design(t, "rt")
    c = load_candidate(builtins["lognormal"].path)
    check_against_data(c, design)
    assert c.valid
    assert c.skip_reason == "1 outcome value(s) are zero or negative; this candidate needs y > 0"
    n = load_candidate(builtins["normal"].path)
    check_against_data(n, design)
    assert n.skip_reason is None


def test_empty_and_missing_candidate_folders_are_user_errors(tmp_path):
    with pytest.raises(UserError, match="no .stan files"):
        discover(tmp_path)
    with pytest.raises(UserError, match="candidates folder not found"):
        discover(tmp_path / "nope")


def test_ids_differing_only_in_case_clash(folder):
    # the folder is refused with one message naming both files, rather than one of the
    # two (whichever sorts later) being marked invalid
    _write(folder, "Normal", (folder / "normal.stan").read_text())
    with pytest.raises(UserError) as err:
        discover(folder)
    assert "Normal.stan and normal.stan have ids that differ only in case" in err.value.message
    assert "rename or remove one" in err.value.message
    (folder / "Normal.stan").unlink()
    assert all(c.valid for c in discover(folder) if c.id == "normal")


def test_y_rep_of_wrong_length_is_caught_before_sampling(engine, tmp_path, rng):
    """Needs one compile of a deliberately wrong program (y_rep of length N - 1)."""
    code = GOOD.replace("array[N] real y_rep;", "array[N - 1] real y_rep;").replace(
        "y_rep = lognormal_rng(eta, sigma);", "y_rep = lognormal_rng(eta[2:N], sigma);").replace(
        "      y_rep[n] = censor_like(y_rep[n], cens[n], y[n]);\n", "")
    path = _write(tmp_path, "short_rep", code)
    c = load_candidate(path)
    assert c.valid, c.problems
    design = build_design(_table(rng), "rt")
    program = engine.compile(c)
    check_outputs(c, engine, program, design)
    assert c.problems == [
        f"short_rep.stan: generated quantity 'y_rep' has length {design.N - 1}, but there are "
        f"N = {design.N} observations; declare it with length N and fill it for every "
        "observation, whatever the fit subset."
    ]


def test_builtins_pass_the_output_check(engine, programs, builtins):
    from contenders.inputs.candidates import example_design

    for cid, program in programs.items():
        c = load_candidate(builtins[cid].path)
        check_outputs(c, engine, program, example_design(c.support))
        assert c.valid, c.problems


def _table(rng, n=30):
    import pandas as pd

    return pd.DataFrame({"rt": rng.lognormal(6, 0.4, n), "cond": np.tile(["a", "b"], n // 2)})
