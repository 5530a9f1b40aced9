"""Shared fixtures: one engine and every built-in compiled once per test session."""

from __future__ import annotations

import os

import numpy as np
import pytest

from contenders.inputs.candidates import builtin_folder, discover
from contenders.engines import compile_all, get_engine


@pytest.fixture(scope="session")
def engine():
    return get_engine("pystan")


@pytest.fixture(scope="session")
def builtins():
    """The built-in candidates, by id (statically checked, not compiled)."""
    return {c.id: c for c in discover(builtin_folder())}


@pytest.fixture(scope="session")
def programs(engine, builtins):
    """Every built-in compiled once per session, two at a time (two cores here)."""
    jobs = min(2, os.cpu_count() or 1)
    compiled = compile_all(engine, builtins.values(), jobs=jobs)
    assert set(compiled.programs) == set(builtins), compiled.failures
    return compiled.programs


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)
