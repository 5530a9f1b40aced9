"""The longer retry of a posterior fit that falls just short on R-hat or ESS
(statistics/posterior.py ``fit_with_health``, ``just_short``), with a fake engine whose
draws are made with NumPy, so no Stan program is compiled. R-hat and ESS are ArviZ's
(rank-normalised split R-hat and bulk/tail ESS: Vehtari, Gelman, Simpson, Carpenter &
Buerkner 2021, Bayesian Analysis 16(2)); the retry's margins (R-hat below 1.05, ESS at
least its floor divided by the factor) are common practice, no source."""

from dataclasses import replace

import arviz as az
import numpy as np
import pytest

from contenders.inputs.config import QUICK_PROFILE, RunConfig, load
from contenders.engines.base import Draws, Program, SamplerSettings
from contenders.errors import UserError
from contenders.output.readings import word_health
from contenders.statistics.posterior import fit_with_health


class FakeEngine:
    """Draws of one parameter ``mu``: independent normal draws per chain, with chain 1
    moved by ``shift(settings)`` (chains that disagree give a high R-hat), and
    ``divergent(settings)`` divergent transitions."""

    name = "fake"

    def __init__(self, shift, divergent=lambda s: 0):
        self.shift, self.divergent, self.calls = shift, divergent, []

    def sample(self, program, data, settings):
        self.calls.append(settings)
        rng = np.random.default_rng(settings.seed + settings.draws)
        shape = (settings.chains, settings.draws)
        mu = rng.normal(size=shape)
        mu[0] += self.shift(settings)
        diverging = np.zeros(shape, dtype=bool)
        diverging.flat[: self.divergent(settings)] = True
        idata = az.from_dict(posterior={"mu": mu},
                             sample_stats={"diverging": diverging, "tree_depth": np.full(shape, 3),
                                           "energy": rng.normal(size=shape)})
        return Draws(idata, "fake", 0.0, 0.5, settings)


PROGRAM = Program("toy", "", None, 0.0, True)
SETTINGS = SamplerSettings(chains=4, warmup=1000, draws=1000, seed=11)


def rhat_of(shift: float, draws: int = 1000) -> float:
    engine = FakeEngine(lambda s: shift)
    d = engine.sample(PROGRAM, {}, replace(SETTINGS, draws=draws))
    return float(az.rhat(d.idata, method="rank")["mu"])


# a shift of chain 1 that puts ArviZ's R-hat just above 1.01 at 1,000 draws per chain
SHORT = 0.4


def test_the_fake_chains_are_just_short_then_far_off():
    # the preconditions the tests below rely on, measured with ArviZ
    assert 1.01 < rhat_of(SHORT) < 1.05
    assert rhat_of(0.0, 2000) < 1.01
    assert rhat_of(1.0) > 1.05


def test_a_fit_just_short_on_rhat_is_fitted_again_longer_and_passes():
    # the longer fit's chains agree (the shift was chance in the short one)
    engine = FakeEngine(lambda s: SHORT if s.draws == 1000 else 0.0)
    draws, health = fit_with_health(engine, PROGRAM, {}, SETTINGS, ["mu"], (0.95, 0.99), 2.0)
    word_health(health)
    assert [(s.warmup, s.draws, s.adapt_delta) for s in engine.calls] == [(1000, 1000, 0.8), (2000, 2000, 0.8)]
    assert health.healthy and health.draws == 2000 and health.warmup == 2000
    assert draws.settings.draws == 2000
    assert [(a.warmup, a.draws) for a in health.attempts] == [(1000, 1000), (2000, 2000)]
    assert health.rhat_max < 1.01
    assert health.warnings[0].startswith("fitted again with 2000 warmup iterations and 2000 draws per chain "
                                         "(instead of 1000 and 1000), since the first fit fell just short (R-hat")
    assert health.warnings[0].endswith("the longer fit passes")


def test_a_longer_fit_that_still_fails_is_said_so_and_not_retried_again():
    # just short at 1,000 draws, further off at 2,000 (chains that really disagree)
    engine = FakeEngine(lambda s: SHORT if s.draws == 1000 else 0.6)
    health = word_health(fit_with_health(engine, PROGRAM, {}, SETTINGS, ["mu"], (0.95, 0.99), 2.0)[1])
    assert len(engine.calls) == 2
    assert not health.healthy and health.draws == 2000
    assert health.warnings[0].endswith("the longer fit does not pass either")


@pytest.mark.parametrize("shift, divergent, longer", [
    (1.0, 0, 2.0),        # far off: R-hat above 1.05
    (SHORT, 0, 1.0),      # retry turned off
    (SHORT, 5, 2.0),      # divergent transitions left after the escalation
])
def test_no_longer_retry_when_far_off_turned_off_or_divergent(shift, divergent, longer):
    engine = FakeEngine(lambda s: shift, lambda s: divergent)
    _draws, health = fit_with_health(engine, PROGRAM, {}, SETTINGS, ["mu"], (0.95, 0.99), longer)
    assert all(s.draws == 1000 for s in engine.calls)
    assert len(engine.calls) == (3 if divergent else 1)   # the adapt_delta escalation, then stop
    assert not health.healthy and health.draws == 1000


def test_ess_far_below_its_floor_is_not_retried():
    # 1,000 draws over 4 chains give ESS near 4,000; a floor of 2,500 per chain (10,000)
    # is more than twice that, so doubling the draws cannot be expected to reach it
    engine = FakeEngine(lambda s: 0.0)
    _draws, health = fit_with_health(engine, PROGRAM, {}, SETTINGS, ["mu"], (), 2.0, ess_per_chain_min=2500.0)
    assert len(engine.calls) == 1 and not health.healthy
    engine = FakeEngine(lambda s: 0.0)   # a floor of 1,500 per chain (6,000) is within reach
    _draws, health = fit_with_health(engine, PROGRAM, {}, SETTINGS, ["mu"], (), 2.0, ess_per_chain_min=1500.0)
    assert len(engine.calls) == 2 and engine.calls[1].draws == 2000 and health.healthy


def test_longer_retry_in_the_configuration(tmp_path):
    assert RunConfig().longer_retry == 2.0 and QUICK_PROFILE["longer_retry"] == 1.0
    f = tmp_path / "run.toml"
    f.write_text("[sampler]\nlonger_retry = 1.5\n")
    assert load(f).longer_retry == 1.5
    f.write_text("[sampler]\nlonger_retry = 0.5\n")
    with pytest.raises(UserError, match=r"configuration key 'longer_retry' must be a number >= 1; got 0.5"):
        load(f)
