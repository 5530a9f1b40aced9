"""The records of a run's results, from which ``summary.json`` (output/summary.py), the
CSV files and the report's context (output/report.py) are made.

The runner (pipeline/runner.py) fills them; later steps read them and never write back.
Each trial's own result is a record of the module that computes it (``PriorTrial`` in
statistics/prior.py, ``Health`` in statistics/posterior.py, ``PredictiveChecks`` in
statistics/checks.py, ``OutOfSample`` and ``Comparison`` in statistics/compare.py,
``Sensitivity``, ``Coefficients``); a candidate's and a run's are here, and a
calibration study's (``contenders calibrate``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from contenders.inputs.config import RunConfig
from contenders.inputs.data import Design
from contenders.statistics.checks import PredictiveChecks
from contenders.statistics.coefficients import Coefficients
from contenders.statistics.compare import Comparison, OutOfSample
from contenders.statistics.posterior import Health
from contenders.statistics.prior import PriorTrial
from contenders.statistics.sensitivity import Sensitivity

if TYPE_CHECKING:   # SciPy loads with it; a warm rerun must not import SciPy
    from contenders.statistics.calibration import Calibration


@dataclass
class CandidateResult:
    """One candidate's results from every trial of a run (or why it stopped).

    Each field is filled by one stage of the runner (pipeline/runner.py) and read, never
    changed, by the comparison, ``summary.json`` (output/summary.py), the CSV files and
    the report (output/report.py)."""

    id: str
    label: str
    about: str
    support: str
    status: str                        # ok | unhealthy | skipped | failed
    reason: str = ""
    code: str = ""
    code_hash: str = ""
    hyperparameters: dict[str, Any] = field(default_factory=dict)
    prior: PriorTrial | None = None
    health: Health | None = None
    checks: PredictiveChecks | None = None
    oos: OutOfSample | None = None
    refit_divergences: int = 0
    y_rep_sample: np.ndarray | None = field(default=None, repr=False)
    seconds: dict[str, float] = field(default_factory=dict)
    fit_files: list[str] = field(default_factory=list)   # stored fits (NetCDF) of this candidate
    stage: str = ""                    # stage reached (or failed at)
    fits_sampled: int = 0              # fits sampled for this candidate in this run
    fits_reused: int = 0               # fits loaded from the fit store
    from_store: bool = False           # the whole result was read from the fit store
    posterior_file: str = ""           # stored NetCDF of the accepted posterior fit
    effects: list = field(default_factory=list)   # replicated effects (statistics/effects.py)
    sensitivity: Sensitivity | None = None   # power-scaling of prior and likelihood (needs lprior)
    coefficients: Coefficients | None = None   # coefficients in the outcome's units, group terms
    pending: Any = field(default=None, repr=False)   # RefitsDue while refits run elsewhere


@dataclass
class RunResult:
    """One comparison run: its settings, data, every candidate's results, the comparison
    and the effects compared across candidates, each computed once by the runner."""

    config: RunConfig
    design: Design
    candidates: list[CandidateResult]
    comparison: Comparison
    engine: str
    versions: dict[str, str]
    data_hash: str
    seconds: float
    out: Path
    fits_sampled: int = 0
    fits_reused: int = 0
    recovery: Any = None               # recovery.Recovery when model recovery was run
    #: the effects compared across the ranked candidates (statistics/effects.py:
    #: ``compare_effects``), computed once by the runner for summary.json and the report
    effects: list = field(default_factory=list)
    #: the run's fit store (pipeline/store.py ``FitStore``); the report keeps drawn figures
    #: in it. None: figures are drawn and not kept.
    store: Any = field(default=None, repr=False)


@dataclass
class CalibrationStudy:
    """Every candidate's calibration and what the study was run with."""

    config: RunConfig
    design: Design
    candidates: list[Calibration]
    simulations: int
    kept_draws: int
    seconds: float
    engine: str
    engine_version: str
