"""Parallel fitting and progress: cores are shared out without oversubscription, the
answer does not depend on how many cores ran it, and the progress lines say what
happens and what remains."""

from __future__ import annotations

import io
import shutil

import numpy as np
import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from contenders.inputs.candidates import builtin_folder
from contenders.inputs.config import RunConfig
from contenders.pipeline.executor import share
from contenders.pipeline.progress import Progress
from contenders.pipeline.runner import run


@given(st.integers(1, 64), st.integers(0, 200))
def test_cores_are_never_oversubscribed(jobs, tasks):
    workers, chains = share(jobs, tasks)
    assert workers >= 1 and chains >= 1
    assert workers * chains <= jobs
    assert workers <= max(1, tasks)
    # every core is used when there are at least as many tasks as cores
    if tasks >= jobs:
        assert workers == jobs and chains == 1


class FakeClock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_progress_lines_and_estimate_of_what_remains():
    clock = FakeClock()
    out = io.StringIO()
    p = Progress(["a", "b", "c", "d"], workers=2, stream=out, live=False, clock=clock)
    p.event("a", "posterior")
    p.event("b", "prior")
    clock.now = 40.0
    p.event("a", "done")
    assert p.remaining() is not None
    clock.now = 60.0
    p.event("b", "out-of-sample: refit 2")
    # hand computation: mean fitted time 40 s; b has spent 60 s (more than the mean, so
    # 10 % of the mean, 4 s, is counted), c and d have not started (40 s each); two workers
    assert p.remaining() == pytest.approx((4 + 40 + 40) / 2)
    lines = out.getvalue().splitlines()
    assert lines[0].split() == ["a", "fitting", "0:00"]
    assert "done  0:40; about 0:42 left" in lines[2]  # b: 40 s spent of 40 -> 4 s; c, d: 40 s; two workers
    assert lines[-1].split()[:4] == ["b", "PSIS-LOO", "(refit", "2)"] and lines[-1].endswith("1:00")
    assert p.footer().strip() == "1 of 4 candidates finished, 1:00 elapsed, about 0:42 left"
    # stored results count as finished but not as measured fitting time
    p.event("c", "stored")
    assert p.fitted_seconds == [40.0]


def test_quiet_progress_prints_nothing_and_live_progress_redraws_in_place():
    out = io.StringIO()
    p = Progress(["a"], quiet=True, stream=out, live=False)
    p.event("a", "posterior")
    p.event("a", "done")
    assert out.getvalue() == ""
    out = io.StringIO()
    p = Progress(["a", "b"], stream=out, live=True, clock=FakeClock())
    p.event("a", "posterior")
    p.event("b", "prior")
    text = out.getvalue()
    assert text.count("\x1b[3F") == 1  # the second drawing moves up over the 3 lines of the first
    assert text.rstrip().endswith("0 of 2 candidates finished, 0:00 elapsed")


def _name(path: str) -> str:
    return path.rsplit("/", 1)[-1]


@pytest.fixture
def small(tmp_path, programs):
    rng = np.random.default_rng(8)
    rt = rng.lognormal(6.1, 0.45, 80)
    rt[5] = 9000.0   # far in the tail: its Pareto k is high for the normal, so it is refitted
    pd.DataFrame({"rt": rt}).to_csv(tmp_path / "d.csv", index=False)
    folder = tmp_path / "cands"
    folder.mkdir()
    for cid in ("lognormal", "normal"):
        shutil.copy(builtin_folder() / f"{cid}.stan", folder / f"{cid}.stan")
    return RunConfig(data=tmp_path / "d.csv", outcome="rt", candidates=folder, chains=2, warmup=200,
                     draws=200, prior_draws=100, engine="pystan",
                     ess_per_chain_min=20, rhat_max=1.05)   # short chains count as healthy, so that
    # refits are run (an unhealthy candidate gets none); loosened limits: common practice for
    # smoke-sized runs, no source


def test_one_core_and_two_cores_give_the_same_answer(small, tmp_path):
    """Also with exact refits, which two cores run as tasks of their own after the
    candidate's trials (each refit's seed depends on its number only)."""
    one = run(small.with_(jobs=1, out=tmp_path / "one"))
    two = run(small.with_(jobs=2, out=tmp_path / "two"))
    refitted = [c for c in two.candidates if c.oos.n_refits]
    assert refitted and 5 in refitted[0].oos.refitted, [c.oos.elpd_method for c in two.candidates]
    assert [c.id for c in one.candidates] == [c.id for c in two.candidates] == ["lognormal", "normal"]
    for a, b in zip(one.candidates, two.candidates):
        assert a.status == b.status
        assert a.oos.elpd_loo == b.oos.elpd_loo and a.oos.elpd_loo_se == b.oos.elpd_loo_se
        np.testing.assert_array_equal(a.oos.pointwise, b.oos.pointwise)
        assert a.health.rhat_max == b.health.rhat_max
    assert one.comparison.ranking == two.comparison.ranking
    refits = sum(c.oos.n_refits for c in two.candidates)
    assert two.fits_sampled == one.fits_sampled == 4 + refits
    for a, b in zip(one.candidates, two.candidates):
        assert a.fit_files == b.fit_files or sorted(map(_name, a.fit_files)) == sorted(map(_name, b.fit_files))
        assert a.refit_divergences == b.refit_divergences
