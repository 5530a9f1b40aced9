"""A rerun whose every result comes from the fit store: the same report and summary as
the run that computed them, without loading ArviZ, SciPy, matplotlib or the engine."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from contenders.statistics.compare import ComparisonRow, Method, OutOfSample, elpd_data, estimate, weights_key
from contenders.output import figure_records, figure_store
from contenders.pipeline.store import FitStore, remembered_weights

SRC = Path(__file__).resolve().parents[1] / "src"
HEAVY = ("arviz", "xarray", "scipy", "matplotlib", "stan", "cmdstanpy")
PSIS = Method("psis", k_threshold=0.7)   # plain PSIS-LOO, no refit

#: Runs the command line in a fresh interpreter and reports the top-level packages loaded.
DRIVER = r"""
import json, sys
from contenders.cli import main
code = main(sys.argv[1:])
print("MODULES " + json.dumps(sorted({m.split(".")[0] for m in sys.modules})))
sys.exit(code)
"""


def _contenders(args: list[str], hash_seed: str) -> set[str]:
    env = dict(os.environ, PYTHONPATH=str(SRC), PYTHONHASHSEED=hash_seed)
    proc = subprocess.run([sys.executable, "-c", DRIVER, *args], env=env, capture_output=True, text=True,
                          timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("MODULES ")][-1]
    return set(json.loads(line[len("MODULES "):]))


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory, programs):
    """The same command twice: first computing everything, then from the fit store. The
    two runs use different string-hash seeds, so nothing may depend on set order."""
    folder = tmp_path_factory.mktemp("warm")
    rng = np.random.default_rng(7)
    n = 80
    cue = np.where(np.arange(n) % 2 == 0, "off", "on")
    rt = rng.lognormal(6.2 - 0.2 * (cue == "on"), 0.35)
    pd.DataFrame({"rt": rt.round(1), "cue": cue}).to_csv(folder / "d.csv", index=False)
    out = folder / "out"
    args = ["run", str(folder / "d.csv"), "--outcome", "rt", "--predictors", "cue", "--conditions", "cue",
            "--only", "lognormal,gamma", "--chains", "2", "--warmup", "200", "--draws", "200",
            "--prior-draws", "100", "--jobs", "1", "--engine", "pystan", "--quiet", "--out", str(out),
            # short chains: looser health rules, so both candidates are ranked and weighted
            "--rhat-max", "1.05", "--ess-per-chain-min", "50"]

    def files():
        return {p.name: p.read_text() for p in sorted(out.glob("*")) if p.is_file()}

    cold_modules = _contenders(args, "1")
    cold = files()
    warm_modules = _contenders(args, "2")
    warm = files()
    return cold, warm, cold_modules, warm_modules, out


def _without_timings(summary: dict) -> dict:
    summary = dict(summary)
    summary.pop("seconds")
    summary.pop("fits")
    return summary


def test_warm_rerun_gives_the_same_summary(two_runs):
    cold, warm, *_ = two_runs
    a, b = json.loads(cold["summary.json"]), json.loads(warm["summary.json"])
    assert a["fits"]["sampled"] == 4 and a["fits"]["from_store"] == 0   # prior + posterior, two candidates
    assert b["fits"]["sampled"] == 0 and b["fits"]["from_store"] == 4
    assert [c["status"] for c in a["candidates"]] == ["ok", "ok"]
    # every number (elpd, SE, weights, p-values, diagnostics, per-candidate seconds) is equal
    assert _without_timings(a) == _without_timings(b)
    # the weights compared above are not a trivial 0 and 1: pseudo-BMA+ spreads them.
    # (Stacking may put all weight on one of two close candidates: with the same code
    # and seeds it did on one machine and not on another.)
    assert 0 < a["candidates"][0]["pseudo_bma_weight"] < 1
    assert sum(c["stacking_weight"] for c in a["candidates"]) == pytest.approx(1)


def _figures(html: str) -> list[str]:
    return re.findall(r"<svg\b.*?</svg>|data:image/png;base64,[A-Za-z0-9+/=]+", html, flags=re.S)


def test_warm_rerun_writes_the_same_report_apart_from_timings(two_runs):
    cold, warm, *_ = two_runs
    figures_cold, figures_warm = _figures(cold["report.html"]), _figures(warm["report.html"])
    assert len(figures_cold) >= 7 + 20   # the grids, and at least one lineup of 20 panels
    assert figures_cold == figures_warm
    lines_cold = cold["report.html"].replace("><", ">\n<").splitlines()
    lines_warm = warm["report.html"].replace("><", ">\n<").splitlines()
    assert len(lines_cold) == len(lines_warm)
    differ = [(x, y) for x, y in zip(lines_cold, lines_warm) if x != y]
    allowed = re.compile(r"run time|^<td>\d+, \d+</td>$|^<td>[\d.]+ (s|min)[\d\s.a-z]*</td>$")
    assert differ and all(allowed.search(x) and allowed.search(y) for x, y in differ), differ
    # the tables: only the run settings hold the run time and the count of stored fits
    assert set(cold) == set(warm)
    for name in cold:
        if name.endswith(".csv") and name != "run_settings.csv":
            assert cold[name] == warm[name], name


def test_warm_rerun_loads_neither_arviz_nor_matplotlib_nor_the_engine(two_runs):
    _, _, cold_modules, warm_modules, out = two_runs
    assert {"arviz", "matplotlib", "scipy", "stan"} <= cold_modules   # the check can see them
    assert not set(HEAVY) & warm_modules, sorted(set(HEAVY) & warm_modules)
    assert list((out / "fits" / "weights").glob("*.pickle"))
    assert len(list((out / "fits" / "figures").glob("*.pickle"))) >= 7


# --- weights from plain estimates -----------------------------------------------------------

def _estimates(rng) -> tuple[dict, dict]:
    """Three normal models of t-distributed data: our estimates and ArviZ's own loo."""
    y = rng.standard_t(4, size=90)
    ours, loos = {}, {}
    for name, (loc, scale) in {"a": (0.0, 1.0), "b": (0.3, 1.6), "c": (-0.2, 0.8)}.items():
        mu = rng.normal(loc, 0.05, size=(2, 300, 1))
        idata = az.from_dict(posterior={"mu": mu[..., 0]},
                             log_likelihood={"log_lik": sps.norm.logpdf(y[None, None, :], mu, scale)})
        ours[name] = estimate(idata, lambda _idx: pytest.fail("no refit expected"))
        loos[name] = az.loo(idata, pointwise=True, var_name="log_lik")
    return ours, loos


def test_weights_from_plain_estimates_equal_arviz_compare_on_its_own_loo(rng, tmp_path, monkeypatch):
    """Reference: ArviZ's ``compare`` on the ELPDData its own ``loo`` returns (stacking:
    Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13(3); pseudo-BMA+ with the
    Bayesian bootstrap, same paper). The plain estimates must give exactly its numbers."""
    ours, loos = _estimates(rng)
    stacked = az.compare(loos, ic="loo", method="stacking")
    bma = az.compare(loos, ic="loo", method="BB-pseudo-BMA", seed=3)
    for store in (None, FitStore(tmp_path)):
        stack_w, bma_w, diffs = remembered_weights(store)(ours, seed=3)
        for cid in ours:
            assert stack_w[cid] == float(stacked.loc[cid, "weight"])
            assert bma_w[cid] == float(bma.loc[cid, "weight"])
            assert diffs[cid] == (float(stacked.loc[cid, "elpd_diff"]), float(stacked.loc[cid, "dse"]))
    rebuilt = elpd_data(ours["b"])
    for field in ("elpd_loo", "se", "p_loo", "n_samples", "n_data_points", "warning", "scale", "good_k"):
        assert rebuilt[field] == pytest.approx(loos["b"][field]), field
    np.testing.assert_array_equal(rebuilt["loo_i"].values, loos["b"]["loo_i"].values)
    # the second call with the store reads the stored answer: ArviZ is not asked again
    monkeypatch.setattr(az, "compare", lambda *a, **k: pytest.fail("weights recomputed"))
    assert remembered_weights(FitStore(tmp_path))(ours, seed=3)[0] == {c: float(stacked.loc[c, "weight"]) for c in ours}


def test_weights_key_changes_with_any_input(rng):
    ours, _ = _estimates(rng)
    key = weights_key(ours, seed=3)
    assert weights_key(dict(ours), seed=3) == key
    assert weights_key(ours, seed=4) != key
    assert weights_key(dict(reversed(list(ours.items()))), seed=3) != key   # order is part of the input
    nudged = dict(ours)
    pw = ours["c"].pointwise.copy()
    pw[5] = np.nextafter(pw[5], 0)
    nudged["c"] = OutOfSample(**{**ours["c"].__dict__, "pointwise": pw})
    assert weights_key(nudged, seed=3) != key


# --- figures ----------------------------------------------------------------------------------

def test_stored_figure_is_the_figure_drawn_afresh(tmp_path):
    from contenders.output import figures

    nan = float("nan")
    rows = [ComparisonRow(rank, cid, cid.upper(), nan, nan, nan, d, dse, nan, nan, nan, 0, 0, PSIS, nan,
                          standing=standing)
            for rank, cid, d, dse, standing in ((1, "a", 0.0, 0.0, "best"), (2, "b", 3.5, 1.2, "uncertain"))]
    store = FitStore(tmp_path)
    start = figure_records.NEXT_ID[0]
    fresh = figures.elpd_differences(rows)
    after = figure_records.NEXT_ID[0]
    figure_records.NEXT_ID[0] = start
    first = figure_store.drawn(store, "elpd_differences", rows)     # drawn, then stored
    assert figure_records.NEXT_ID[0] == after
    figure_records.NEXT_ID[0] = start
    again = figure_store.drawn(store, "elpd_differences", rows)     # read back
    assert figure_records.NEXT_ID[0] == after                        # ids advance as if drawn
    assert str(fresh.html) == str(first.html) == str(again.html)
    assert len(list((tmp_path / "figures").glob("*.pickle"))) == 1
    changed = [replace(rows[0]), replace(rows[1], elpd_diff_se=1.3)]
    assert figure_store.figure_key("elpd_differences", (changed,), {}, start) != \
        figure_store.figure_key("elpd_differences", (rows,), {}, start)
    assert figure_store.figure_key("elpd_differences", (rows,), {}, start + 1) != \
        figure_store.figure_key("elpd_differences", (rows,), {}, start)


def test_figure_keys_tell_numpy_scalars_by_value():
    key = lambda *args: figure_store.figure_key("f", args, {}, 1)  # noqa: E731
    assert key(np.float64(0.1), np.bool_(True), np.int64(3)) == key(0.1, True, 3)
    assert key(np.float64(0.1)) != key(np.nextafter(0.1, 1))
    assert key(np.arange(3)) != key(np.arange(3).astype(float))   # dtype is part of the input


def test_unknown_argument_types_are_drawn_not_stored(tmp_path):
    class Opaque:
        pass

    with pytest.raises(figure_store.Unhashable):
        figure_store.figure_key("elpd_differences", (Opaque(),), {}, 1)


# --- the engine, unloaded ------------------------------------------------------------------

def test_lazy_engine_reports_the_pystan_engines_version(engine):
    from contenders.engines.lazy import LazyEngine

    lazy = LazyEngine("pystan")
    assert lazy.name == "pystan" and lazy._engine is None
    assert lazy.version() == engine.version()


def test_no_cmdstan_is_recognised_without_importing_cmdstanpy(tmp_path):
    """Reference: CmdStanPy's own lookup (``cmdstanpy.cmdstan_path``) in the same
    environment: no $CMDSTAN and no ~/.cmdstan."""
    env = {k: v for k, v in os.environ.items() if k != "CMDSTAN"}
    env.update(HOME=str(tmp_path), PYTHONPATH=str(SRC))
    code = ("import sys\nfrom contenders.engines import cmdstan_available\nok, why = cmdstan_available()\n"
            "print(ok, 'cmdstanpy' in sys.modules)\nimport cmdstanpy\ntry:\n    cmdstanpy.cmdstan_path()\n"
            "    print('found')\nexcept ValueError:\n    print('not found')\n")
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["False", "False", "not", "found"]
