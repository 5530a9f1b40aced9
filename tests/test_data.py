"""Design matrix, grouping and reference scale, checked by hand computation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from contenders.inputs.data import build_design, read_table, support_problem
from contenders.errors import UserError


def _table():
    return pd.DataFrame({
        "rt": [510.0, 620.0, 480.0, 700.0, 655.0, 530.0, 590.0, 610.0, 560.0, 720.0, np.nan, np.inf],
        "load": [1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12],
        "cue": ["on", "off", "on", "off", "on", "off", "on", "off", "on", "on", "on", "off"],
        "who": ["p2", "p1", "p2", "p1", "p3", "p3", "p1", "p2", "p3", "p1", "p2", "p3"],
    })


def test_numeric_predictor_is_centred_and_scaled_by_sample_sd():
    d = build_design(_table(), "rt", ["load"])
    x = np.arange(1, 11, dtype=float)  # rows with missing or infinite outcome are dropped
    np.testing.assert_allclose(d.X[:, 0], (x - x.mean()) / x.std(ddof=1))
    assert d.coding[0].center == pytest.approx(5.5)
    assert d.coding[0].scale == pytest.approx(np.std(x, ddof=1))
    assert d.dropped_rows == 2 and d.N == 10


def test_text_predictor_becomes_centred_indicators_against_first_sorted_level():
    d = build_design(_table(), "rt", ["cue"])
    assert [c.name for c in d.coding] == ["cue[on]"]  # "off" sorts first: reference level
    on = np.array([1, 0, 1, 0, 1, 0, 1, 0, 1, 1], dtype=float)
    np.testing.assert_allclose(d.X[:, 0], on - 0.6)
    assert d.X[:, 0].sum() == pytest.approx(0.0)


def test_group_levels_are_sorted_and_one_based():
    d = build_design(_table(), "rt", group="who")
    assert d.group_levels == ("p1", "p2", "p3")
    assert d.J == 3
    assert d.group.tolist() == [2, 1, 2, 1, 3, 3, 1, 2, 3, 1]
    assert d.stan_inputs()["group"].tolist() == d.group.tolist()


def test_no_group_means_J_zero_and_zero_indices():
    d = build_design(_table(), "rt")
    assert d.J == 0 and d.K == 0 and d.X.shape == (10, 0)
    assert set(d.group.tolist()) == {0}


def test_reference_scale_defaults_to_median_and_sd_and_accepts_user_values():
    d = build_design(_table(), "rt")
    y = np.array([510, 620, 480, 700, 655, 530, 590, 610, 560, 720], dtype=float)
    assert d.y_center == pytest.approx(600.0)  # median of the ten finite values
    assert d.y_scale == pytest.approx(y.std(ddof=1))
    d2 = build_design(_table(), "rt", typical_value=403.0, typical_spread=50.0)
    assert (d2.y_center, d2.y_scale) == (403.0, 50.0)


def test_fit_subset_is_passed_one_based():
    d = build_design(_table(), "rt")
    s = d.stan_inputs(np.array([0, 4]))
    assert s["N_fit"] == 2 and s["fit_idx"].tolist() == [1, 5]
    assert d.stan_inputs(np.arange(0))["N_fit"] == 0
    assert d.stan_inputs()["fit_idx"].tolist() == list(range(1, 11))


@pytest.mark.parametrize("kwargs, message", [
    (dict(outcome="latency"), "outcome column 'latency' not found; the columns are: rt, load, cue, who"),
    (dict(outcome="cue"), "outcome column 'cue' is not numeric"),
    (dict(outcome="rt", predictors=["load", "load2"]), "predictor column 'load2' not found"),
    (dict(outcome="rt", group="nobody"), "group column 'nobody' not found"),
])
def test_bad_columns_are_named(kwargs, message):
    with pytest.raises(UserError, match=message):
        build_design(_table(), **kwargs)


def test_constant_outcome_constant_predictor_single_group_level_and_too_few_rows():
    t = _table()
    t2 = t.assign(rt=600.0)
    with pytest.raises(UserError, match="outcome column 'rt' is constant"):
        build_design(t2, "rt")
    with pytest.raises(UserError, match="predictor column 'k' is constant"):
        build_design(t.assign(k=1.0), "rt", ["k"])
    with pytest.raises(UserError, match="group column 'g' has a single level"):
        build_design(t.assign(g="x"), "rt", group="g")
    with pytest.raises(UserError, match="3 usable observations of 'rt'; at least 10"):
        build_design(t.head(3), "rt")


def test_read_table_errors(tmp_path):
    with pytest.raises(UserError, match="data file not found"):
        read_table(tmp_path / "none.csv")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(UserError, match="the file is empty"):
        read_table(tmp_path / "empty.csv")
    (tmp_path / "latin.csv").write_bytes("rt,name\n1,Jos\xe9\n".encode("latin-1"))
    with pytest.raises(UserError, match="not UTF-8"):
        read_table(tmp_path / "latin.csv")


def test_support_problems():
    y = np.array([0.0, 1.0, 2.5])
    assert support_problem(y, "real") is None
    assert support_problem(y, "positive").startswith("1 outcome value(s) are zero or negative")
    assert support_problem(y, "count").startswith("1 outcome value(s) are not whole numbers")
    assert support_problem(np.array([0.0, 1.0]), "binary") is None


# --- the reference level of a text column ------------------------------------------------

def test_reference_level_chosen_by_the_user_changes_the_indicators():
    """With cue = "on" as the reference, the indicator is for "off" (hand computation:
    4 of the 10 kept rows are "off", so it is centred at 0.4)."""
    d = build_design(_table(), "rt", ["cue"], reference={"cue": "on"})
    assert [c.name for c in d.coding] == ["cue[off]"]
    off = np.array([0, 1, 0, 1, 0, 1, 0, 1, 0, 0], dtype=float)
    np.testing.assert_allclose(d.X[:, 0], off - 0.4)


def test_bad_reference_level_is_one_error_naming_the_column_and_its_levels():
    from contenders.inputs.data import check_reference

    with pytest.raises(UserError) as err:
        check_reference(_table(), {"cue": "maybe"}, ["cue"], (), source="t.csv")
    msg = err.value.message
    assert "t.csv" in msg and "'cue'" in msg and "'maybe'" in msg and "off, on" in msg
    with pytest.raises(UserError, match="neither a predictor nor a condition"):
        check_reference(_table(), {"who": "p1"}, ["cue"], (), source="t.csv")
    with pytest.raises(UserError, match="numeric"):
        check_reference(_table(), {"load": "3"}, ["load"], (), source="t.csv")
    check_reference(_table(), {"who": "p2"}, ["cue"], ("who",))   # a condition column: fine
    with pytest.raises(UserError, match="off, on"):
        build_design(_table(), "rt", ["cue"], reference={"cue": "maybe"})


def test_reference_level_from_toml_and_from_the_flag():
    from pathlib import Path

    from contenders.inputs.config import apply_flags, from_mapping, parse_flag

    cfg = from_mapping({"data": {"reference": {"density": "dense", "cue": "off"}}}, Path("."))
    assert dict(cfg.reference) == {"density": "dense", "cue": "off"}
    flagged = apply_flags(cfg, {"reference": parse_flag("reference", "density=sparse")})
    assert dict(flagged.reference) == {"density": "sparse"}
    with pytest.raises(UserError, match="--reference must look like"):
        parse_flag("reference", "density")
    with pytest.raises(UserError, match="reference"):
        from_mapping({"data": {"reference": {"density": 1.5}}}, Path("."))


def test_a_text_outcome_names_the_first_row_and_value_that_is_not_numeric(tmp_path):
    # through the CSV reader, so that row and line numbers are those of the file
    t = _table().assign(cue=["", "off", "on", "off", "on", "off", "on", "off", "on", "on", "on", "off"])
    path = tmp_path / "t.csv"
    t.to_csv(path, index=False)
    table = read_table(path)   # the empty first cell reads as missing, not as text
    with pytest.raises(UserError) as err:
        build_design(table, "cue", source="t.csv")
    message = err.value.message
    assert "outcome column 'cue' is not numeric: data row 2 (line 3 of the file) holds 'off'" in message
    # the mixed case names the row too
    mixed = table.assign(rt=table.rt.astype(object).where(table.index != 4, "fast"))
    with pytest.raises(UserError, match=r"has 1 non-numeric value\(s\), for example 'fast' "
                                        r"\(data row 5 \(line 6 of the file\) holds 'fast'\)"):
        build_design(mixed, "rt", source="t.csv")
