"""Invented datasets for the batch and cluster tests, and one local batch run shared by
both test files within a session.

The generating processes (stated here, drawn with NumPy's generator, seed 20261211):

* ``a_fast.csv``: 90 latencies, lognormal with log-mean 6.3 and log-SD 0.6 (strongly
  right-skewed; the lognormal candidate should predict clearly better than the normal);
* ``b_slow.csv``: 90 latencies, normal with mean 650 and SD 60 (coefficient of variation
  0.09, where a lognormal is nearly a normal: the two should not be told apart);
* ``c_broken.csv``: 90 values of the same process in a column named ``latency``, not
  ``rt`` (the run must list it with its reason);
* ``d_fast_again.csv``: the same bytes as ``a_fast.csv`` (its run must come from the
  shared fit store).
"""

from __future__ import annotations

import atexit
import functools
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from contenders.inputs.config import RunConfig

N = 90
#: Short chains for tests; R-hat and ESS limits loosened to match (common practice for
#: smoke-sized runs, no source): 2 chains x 200 draws cannot show ESS 100 per chain reliably.
SETTINGS = dict(outcome="rt", only=("lognormal", "normal"), chains=2, warmup=200, draws=200,
                prior_draws=100, check_draws=200, rhat_max=1.05, ess_per_chain_min=40.0,
                engine="pystan", seed=20261211, quiet=True)


def write_datasets(folder: Path) -> list[Path]:
    rng = np.random.default_rng(20261211)
    folder.mkdir(parents=True, exist_ok=True)
    fast = pd.DataFrame({"rt": np.round(rng.lognormal(6.3, 0.6, N), 1)})
    fast.to_csv(folder / "a_fast.csv", index=False)
    pd.DataFrame({"rt": np.round(rng.normal(650.0, 60.0, N), 1)}).to_csv(folder / "b_slow.csv", index=False)
    pd.DataFrame({"latency": np.round(rng.normal(650.0, 60.0, N), 1)}).to_csv(folder / "c_broken.csv", index=False)
    shutil.copyfile(folder / "a_fast.csv", folder / "d_fast_again.csv")
    return sorted(folder.glob("*.csv"))


def config(out: Path, **changes) -> RunConfig:
    return RunConfig(out=out, **{**SETTINGS, **changes})


@functools.lru_cache(maxsize=None)
def local_batch():
    """One batch through the local executor (two worker processes), run once per session:
    ``(datasets folder, BatchResult)``."""
    from contenders.pipeline.batch import run_batch

    root = Path(tempfile.mkdtemp(prefix="contenders-batch-test-"))
    atexit.register(shutil.rmtree, root, True)
    folder = root / "data"
    write_datasets(folder)
    return folder, run_batch(config(root / "local", jobs=2), [folder])
