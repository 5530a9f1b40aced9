"""The settings table (contenders.inputs.settings.SETTINGS) against what is derived from
it: RunConfig's fields and defaults, the TOML layout, the command-line flags of the
commands that run a comparison, and the trials key."""

from __future__ import annotations

import math
from dataclasses import fields
from pathlib import Path

import pytest

from contenders.cli import _config_from_args, build_parser
from contenders.errors import UserError
from contenders.inputs.config import RunConfig, from_mapping, load
from contenders.inputs.settings import BY_NAME, SECTIONS, SETTINGS

CASES = Path(__file__).resolve().parent / "unchanged" / "cases"

#: One value per kind of setting, three ways: as typed after its flag, as written in the
#: TOML file, and as RunConfig holds it (paths relative to the folder of the file, which is
#: also the working folder here). None of them is a default, so a key or flag that were
#: ignored would fail.
SAMPLES = {
    "path": ("some/dir", '"some/dir"', lambda base: base / "some" / "dir"),
    "str": ("col_a", '"col_a"', "col_a"),
    "strs": ("mean,sd", '["mean", "sd"]', ("mean", "sd")),
    "float": ("2.5", "2.5", 2.5),
    "posfloat": ("0.25", "0.25", 0.25),
    "factor": ("1.5", "1.5", 1.5),
    "posint": ("3", "3", 3),
    "int0": ("7", "7", 7),
    "prob": ("0.2", "0.2", 0.2),
    "probs": ("0.9,0.97", "[0.9, 0.97]", (0.9, 0.97)),
    "floats": ("1,2.5", "[1, 2.5]", (1.0, 2.5)),
    "engine": ("pystan", '"pystan"', "pystan"),
    "bounds": ("mean=1:5,min=0:inf", "{mean = [1, 5], min = [0, inf]}",
               {"mean": (1.0, 5.0), "min": (0.0, math.inf)}),
    "sizes": ("mean=10,sd=2.5", "{mean = 10, sd = 2.5}", {"mean": 10.0, "sd": 2.5}),
    "levels": ("density=dense,cue=off", '{density = "dense", cue = "off"}', {"density": "dense", "cue": "off"}),
    "cv": ("kfold", '"kfold"', "kfold"),
    "folds": ("5", "5", 5),
    "reps": ("4", "4", 4),
    "address": ("tcp://10.0.0.1:8786", '"tcp://10.0.0.1:8786"', "tcp://10.0.0.1:8786"),
    "window": ("0:3000", '"0:3000"', (0.0, 3000.0)),
    "bool": (None, "true", True),
}


def _expected(setting, base: Path):
    value = SAMPLES[setting.kind][2]
    return value(base) if callable(value) else value


def test_every_runconfig_field_has_one_setting_and_every_setting_a_field():
    names = [f.name for f in fields(RunConfig)]
    assert len(names) == len(set(names)) == 44
    assert sorted(names) == sorted(s.name for s in SETTINGS)
    assert len(BY_NAME) == len(SETTINGS)                    # no name twice in the table
    flags = [f for s in SETTINGS if s.flag for f in (s.flag, *s.aliases)]
    assert len(flags) == len(set(flags))
    places = [(s.section, s.key) for s in SETTINGS if s.key]
    assert len(places) == len(set(places))
    assert all(s.section in SECTIONS for s in SETTINGS)


def test_runconfig_defaults_are_the_table_defaults_and_mappings_are_not_shared():
    cfg = RunConfig()
    for s in SETTINGS:
        assert getattr(cfg, s.name) == s.default, s.name
    # recorded from the code before the settings table (the dataclass's own defaults then)
    assert (cfg.chains, cfg.warmup, cfg.draws, cfg.prior_draws, cfg.seed) == (4, 1000, 1000, 1000, 20261201)
    assert (cfg.adapt_delta, cfg.escalation, cfg.longer_retry, cfg.out) == (0.8, (0.95, 0.99), 2.0, Path("reports/run"))
    assert (cfg.rhat_max, cfg.ess_per_chain_min, cfg.ebfmi_min, cfg.check_draws) == (1.01, 100.0, 0.3, 1000)
    other = RunConfig()
    assert other.bounds is not cfg.bounds and other.hyperparameters is not cfg.hyperparameters
    assert other.bounds is not BY_NAME["bounds"].default


def test_every_kind_has_a_sample():
    assert {s.kind for s in SETTINGS if s.kind} == set(SAMPLES)


@pytest.mark.parametrize("setting", [s for s in SETTINGS if s.key], ids=lambda s: s.name)
def test_every_toml_key_reaches_its_field(setting, tmp_path):
    path = tmp_path / "run.toml"
    path.write_text(f"[{setting.section}]\n{setting.key} = {SAMPLES[setting.kind][1]}\n")
    cfg = load(path)
    expected = _expected(setting, tmp_path)
    assert getattr(cfg, setting.name) == expected
    assert expected != setting.default
    assert setting.where == f"[{setting.section}] {setting.key}"
    # every other field keeps its default
    assert cfg == RunConfig().with_(**{setting.name: expected})


def _from_cli(argv):
    return _config_from_args(build_parser().parse_args(argv), None)


@pytest.mark.parametrize("setting", [s for s in SETTINGS if s.flag and s.key], ids=lambda s: s.name)
def test_each_flag_gives_the_value_of_its_toml_key(setting, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "run.toml").write_text(f"[{setting.section}]\n{setting.key} = {SAMPLES[setting.kind][1]}\n")
    from_file = _from_cli(["run", "--config", str(tmp_path / "run.toml")])
    text = SAMPLES[setting.kind][0]
    for flag in (setting.flag, *setting.aliases):
        from_flag = _from_cli(["run", flag] if text is None else ["run", flag, text])
        assert from_flag == from_file, flag
        assert getattr(from_flag, setting.name) == _expected(setting, tmp_path)


def test_hyper_flag_gives_the_value_of_its_toml_table(tmp_path):
    (tmp_path / "run.toml").write_text("[hyperparameters.lognormal]\nsigma_scale = 0.5\n")
    from_file = _from_cli(["run", "--config", str(tmp_path / "run.toml")])
    from_flag = _from_cli(["run", "--hyper", "lognormal.sigma_scale=0.5"])
    assert from_flag.hyperparameters == from_file.hyperparameters == {"lognormal": {"sigma_scale": 0.5}}
    assert BY_NAME["hyperparameters"].where == "[hyperparameters.ID] NAME"


@pytest.mark.parametrize("command", ["run", "recovery", "calibrate", "batch"])
def test_the_commands_that_run_a_comparison_share_every_flag(command):
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command").choices[command]
    dests = {a.dest: a for a in sub._actions}
    for s in SETTINGS:
        if s.flag:
            assert dests[s.name].option_strings == [s.flag, *s.aliases], s.name
            assert dests[s.name].metavar == s.metavar


def test_unknown_key_messages_list_each_section_in_the_recorded_order():
    # A section's keys are listed in RunConfig's field order; these messages were recorded
    # from the code before the settings table, where each section's keys were listed by hand.
    expected = {
        "data": "file, outcome, predictors, group, conditions, slopes, censored, truncate, reference, "
                "typical_value, typical_spread",
        "candidates": "folder, only",
        "sampler": "chains, warmup, draws, prior_draws, seed, adapt_delta, escalation, longer_retry, max_treedepth",
        "checks": "thresholds, bounds, check_draws, implausible_share, ppp_extreme, relevant, pit_alpha",
        "comparison": "cross_validation, refit_cap, folds",
        "health": "rhat_max, ess_per_chain_min, ebfmi_min",
        "run": "out, store, jobs, engine, quiet, cluster, quick",
        "recovery": "replicates",
    }
    for section, keys in expected.items():
        with pytest.raises(UserError) as err:
            from_mapping({section: {"nokey": 1}}, Path("."))
        assert err.value.message == (f"configuration: unknown key 'nokey' in [{section}]; "
                                     f"the keys there are: {keys}")
    with pytest.raises(UserError) as err:
        from_mapping({"nosuch": {}}, Path("."))
    assert err.value.message == ("configuration: unknown section [nosuch]; the sections are: data, candidates, "
                                 "sampler, checks, comparison, health, run, recovery, hyperparameters")


def test_trials_and_fit_keys_of_a_fixed_configuration_are_the_recorded_ones(monkeypatch):
    # The hex values were recorded from the code before the settings table (commit 0d84940),
    # for the configuration of tests/unchanged/cases/icons.toml, with the package version,
    # the trials format and the engine line pinned so that only the inputs and the settings
    # enter: a change here means stored trial results (or fits) of every user would be
    # recomputed. The quick look's key differs from the full run's (quick enters when true).
    import contenders
    from contenders.inputs.candidates import inputs_for
    from contenders.inputs.config import quick_profile
    from contenders.pipeline import store
    from contenders.pipeline.runner import load_design, sampler_settings, select_candidates

    monkeypatch.setattr(contenders, "__version__", "0.0-pinned")
    monkeypatch.setattr(store, "TRIALS_FORMAT", 11)
    cfg = load(CASES / "icons.toml")
    design = load_design(cfg)
    lognormal = next(c for c in select_candidates(cfg) if c.id == "lognormal")
    assert store.trials_key(lognormal, design, cfg, "engine-pinned") == \
        "702f88aabec8f6ef30b7c67fda5f6b7d472540b588ca4cc9e20805630a120258"
    assert store.trials_key(lognormal, design, quick_profile(cfg), "engine-pinned") == \
        "f3f9c563a1fe45da5fb5246e1afeb19b43a11921852ffe99348f0cd49a7aa2ed"
    data = inputs_for(lognormal, design, None, cfg.hyperparameters.get("lognormal"))
    assert store.fit_key(lognormal.code, data, sampler_settings(cfg), "engine-pinned") == \
        "342270f7908517112bf786008bdb4112a57a64d1db0db4fd901ac5e1ecec1763"
    # and the same configuration given as flags gives the same key
    flags = _from_cli(["run", "--config", str(CASES / "icons.toml"), "--out", "elsewhere", "--store", "x", "--quiet"])
    assert store.trials_key(lognormal, design, flags, "engine-pinned") == \
        "702f88aabec8f6ef30b7c67fda5f6b7d472540b588ca4cc9e20805630a120258"


def test_trial_settings_are_the_marked_ones():
    from contenders.pipeline.store import TRIAL_SETTINGS

    assert set(TRIAL_SETTINGS) == {s.name for s in SETTINGS if s.enters_trials_key}
    # what shapes the data passed to a program enters through that data, and readings
    # made at report time (relevant sizes) or where files go enter nowhere
    for name in ("outcome", "predictors", "group", "hyperparameters", "relevant", "out", "store", "jobs"):
        assert name not in TRIAL_SETTINGS
