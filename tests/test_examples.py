"""``contenders example``: the README's two invented datasets, written only into a
folder of the user's own, and generated as their docstrings say."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from contenders import examples

ROOT = Path(__file__).resolve().parents[1]


def test_shifts_has_the_stated_design_and_correlated_slopes():
    d = examples.shifts()
    assert len(d) == 480 and d["operator"].nunique() == 20 and sorted(d["shift"].unique()) == list(range(8))
    assert (d.groupby(["operator", "shift"]).size() == 3).all()
    # per operator, least-squares slope of log rt on shift (exact computation, NumPy):
    # the mean slope near the generating 0.045 per shift, and operators who start slow
    # slow down faster (generating correlation about 0.5; here at least 0.2)
    fits = d.assign(log_rt=np.log(d["rt_ms"])).groupby("operator").apply(
        lambda g: pd.Series(np.polyfit(g["shift"], g["log_rt"], 1), index=["slope", "start"]), include_groups=False)
    assert fits["slope"].mean() == pytest.approx(0.045, abs=0.01)
    assert np.corrcoef(fits["slope"], fits["start"])[0, 1] > 0.2


def test_seals_censored_weibull_recovers_its_shape_with_scipy():
    d = examples.seals()
    assert len(d) == 240 and set(d["still_running"]) == {0, 1}
    assert 0.25 < d["still_running"].mean() < 0.5
    # SciPy's censored maximum-likelihood fit (SciPy docs: scipy.stats.CensoredData,
    # rv_continuous.fit) of coolant A's seals recovers the generating shape 1.8 and
    # scale 1500 h within 3 standard errors (from memory: with complete data the SEs are
    # about 0.78 shape / sqrt(n) and 1.05 scale / (shape sqrt(n)), from the Weibull
    # information matrix; with about 90 failures of 120 taken here as 0.15 and 100 h)
    a = d[d["coolant"] == "A"]
    data = stats.CensoredData.right_censored(a["hours"].to_numpy(), a["still_running"].to_numpy().astype(bool))
    shape, _, scale = stats.weibull_min.fit(data, floc=0)
    assert abs(shape - 1.8) < 3 * 0.15 and abs(scale - 1500) < 3 * 100, (shape, scale)
    # ignoring the censoring underestimates the scale (the bias the tool's --censored removes)
    _, _, naive = stats.weibull_min.fit(a["hours"].to_numpy(), floc=0)
    assert naive < scale - 100


def test_example_writes_into_a_folder_of_ones_own_and_refuses_the_tools_folders(tmp_path):
    run = lambda *a: subprocess.run([sys.executable, "-m", "contenders.cli", "example", *a],   # noqa: E731
                                    capture_output=True, text=True)
    res = run("seals", "--folder", str(tmp_path / "mine"))
    assert res.returncode == 0, res.stderr
    assert pd.read_csv(tmp_path / "mine" / "seals.csv").shape == (240, 4)
    assert "--censored still_running" in res.stdout
    for own in ("stan", "demo_data", "reports/x", "src/contenders"):
        before = sorted(p.name for p in (ROOT / own.split("/")[0]).iterdir()) if (ROOT / own.split("/")[0]).exists() else None
        res = run("shifts", "--folder", str(ROOT / own))
        assert res.returncode == 2 and "inside the tool's own folder" in res.stderr, (own, res.stderr)
        assert "Traceback" not in res.stderr
        after = sorted(p.name for p in (ROOT / own.split("/")[0]).iterdir()) if (ROOT / own.split("/")[0]).exists() else None
        assert before == after
