"""Censoring and truncation: the data side (config, flags, validation, the five contract
inputs, skipping a program that lacks them, the report's note). The Stan-side checks
against SciPy are in tests/test_censoring_families.py and tests/test_censored_fit.py."""
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from contenders.inputs.candidates import check_against_data, discover
from contenders.inputs.config import _convert
from contenders.inputs.data import build_design
from contenders.errors import UserError

HERE = Path(__file__).parent


def table(n=40, seed=5):
    rng = np.random.default_rng(seed)
    y = rng.lognormal(6, 0.4, n)
    c = np.zeros(n, dtype=int)
    c[:5] = 1
    c[5:8] = -1
    return pd.DataFrame({"y": y, "c": c, "x": rng.normal(size=n)})


def test_censoring_and_window_become_the_five_inputs():
    t = table()
    d = build_design(t, "y", ["x"], censored="c", truncate=(1.0, None))
    inputs = d.stan_inputs()
    np.testing.assert_array_equal(inputs["cens"], t["c"].to_numpy())
    assert (inputs["has_lower_limit"], inputs["lower_limit"]) == (1, 1.0)
    assert (inputs["has_upper_limit"], inputs["upper_limit"]) == (0, 0.0)
    assert d.asks_censoring
    plain = build_design(t, "y", ["x"]).stan_inputs()
    assert not np.any(plain["cens"]) and plain["cens"].shape == (40,)
    assert plain["has_lower_limit"] == 0 and plain["has_upper_limit"] == 0
    assert not build_design(t, "y", ["x"]).asks_censoring


def test_truncate_window_parsing():
    assert _convert("truncate", "0:", Path(".")) == (0.0, None)
    assert _convert("truncate", ":3000", Path(".")) == (None, 3000.0)
    assert _convert("truncate", "-2.5:4", Path(".")) == (-2.5, 4.0)
    for bad in ("3", "a:b", "1:2:3", 5):
        with pytest.raises(UserError, match="configuration key 'truncate' must be"):
            _convert("truncate", bad, Path("."))
    with pytest.raises(UserError, match="lower end 4 must be below the upper end 1"):
        _convert("truncate", "4:1", Path("."))


@pytest.mark.parametrize("kwargs, message", [
    ({"censored": "zz"}, r"censoring column 'zz' not found"),
    ({"censored": "x"}, r"censoring column 'x' is also used"),
    ({"truncate": (None, 100.0)}, r"the truncation window :100 excludes \d+ outcome value\(s\)"),
])
def test_bad_censoring_input_is_one_clear_error(kwargs, message):
    with pytest.raises(UserError, match=message):
        build_design(table(), "y", ["x"], **kwargs)


def test_a_censoring_value_other_than_minus_one_zero_one_is_refused():
    t = table()
    t.loc[3, "c"] = 2
    with pytest.raises(UserError, match=r"censoring column 'c' holds '2' at data row 4; its values must be 0"):
        build_design(t, "y", ["x"], censored="c")


@pytest.mark.parametrize("flags, message", [
    (["--censored", "c2"], "censoring column 'c2' holds '7' at data row 1"),
    (["--truncate", ":10"], "the truncation window :10 excludes 40 outcome value(s)"),
    (["--truncate", "x:"], "must be"),
])
def test_bad_censoring_flags_exit_2_with_one_line(tmp_path, flags, message):
    t = table()
    t["c2"] = 7
    t.to_csv(tmp_path / "d.csv", index=False)
    res = subprocess.run([sys.executable, "-m", "contenders.cli", "run", str(tmp_path / "d.csv"), "--outcome", "y",
                          *flags, "--out", str(tmp_path / "o")], capture_output=True, text=True)
    assert res.returncode == 2, res.stderr
    assert message in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1
    assert "Traceback" not in res.stderr and not (tmp_path / "o").exists()


def test_a_program_without_the_inputs_is_skipped_only_when_asked():
    (funnel,) = discover(HERE / "candidates" / "funnel")
    assert "cens" not in funnel.info.inputs
    check_against_data(funnel, build_design(table(), "y", ["x"], censored="c"))
    assert funnel.skip_reason.startswith("censoring or truncation was asked for, but the program does not declare")
    (again,) = discover(HERE / "candidates" / "funnel")
    check_against_data(again, build_design(table(), "y", ["x"]))
    assert again.skip_reason is None


def test_a_left_censoring_point_outside_a_positive_support_skips_that_candidate():
    (funnel,) = discover(HERE / "candidates" / "funnel")
    t = table()
    t.loc[5, "y"] = 0.0                     # row 6 is left-censored (c = -1) at 0: no probability below 0
    d = build_design(t, "y", ["x"], censored="c")
    funnel.support = "positive"
    check_against_data(funnel, d)
    assert funnel.skip_reason == "1 outcome value(s) are zero or negative; this candidate needs y > 0"


def test_the_report_says_how_censored_and_truncated_values_enter_the_checks():
    from contenders.output.report import censoring_note

    t = table()
    assert censoring_note(build_design(t, "y", ["x"])) == ""
    d = build_design(t, "y", ["x"], censored="c", truncate=(0.0, None))
    n_right, n_left = int((t["c"] == 1).sum()), int((t["c"] == -1).sum())
    note = censoring_note(d)
    assert f"Of the {len(t)} observations, {n_right} right-censored" in note
    assert f"and {n_left} left-censored" in note
    assert "censored at the same point" in note and "Kaplan-Meier" in note and "LOO-PIT is drawn uniformly" in note
    assert "truncated to values above 0" in note
