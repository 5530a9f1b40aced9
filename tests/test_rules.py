"""The thresholds of rules.py against their sources, and the split between
statistics (numbers and codes) and output/readings.py (their words)."""

from __future__ import annotations

import ast
from pathlib import Path

import arviz as az
import numpy as np
import pytest

from contenders.inputs.config import RunConfig
from contenders import rules

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "contenders"


@pytest.mark.parametrize("draws", [100, 400, 4000])
def test_pareto_k_threshold_is_arviz_good_k(draws):
    # min(1 - 1 / log10(S), 0.7): Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto
    # smoothed importance sampling", JMLR 25(72), section 3; ArviZ's loo as the reference
    rng = np.random.default_rng(draws)
    ll = rng.normal(-1.0, 0.3, (1, draws, 20))
    idata = az.from_dict(posterior={"mu": rng.normal(size=(1, draws))}, log_likelihood={"log_lik": ll})
    good_k = float(az.loo(idata, pointwise=True)["good_k"])
    assert good_k == pytest.approx(min(1 - 1 / np.log10(draws), rules.PARETO_K_MAX))


def test_run_defaults_are_the_rules():
    # the configuration's defaults are the rules' constants, not copies of their values
    cfg = RunConfig()
    assert (cfg.rhat_max, cfg.ess_per_chain_min, cfg.ebfmi_min) == (1.01, 100.0, 0.3)
    assert (cfg.ppp_extreme, cfg.pit_alpha, cfg.implausible_share) == (0.01, 0.01, 0.5)
    assert cfg.rhat_max is rules.RHAT_MAX and cfg.ppp_extreme is rules.PPP_EXTREME


def test_statistics_write_no_words():
    # statistics/ returns numbers, flags and codes; sentences are output/readings.py's
    for path in sorted((PACKAGE / "statistics").glob("*.py")):
        tree = ast.parse(path.read_text())
        imported = [n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module]
        imported += [a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names]
        assert not [m for m in imported if m.startswith("contenders.output")], path.name
