"""Two invented datasets for the README's worked examples (``contenders example``).

``shifts``: a vigilance study, invented for this project. 20 operators of a monitoring
console each answer 3 alarm probes on each of 8 consecutive night shifts (480 rows).
Response times are generated as:

* each operator's baseline b_o ~ normal(log 300, 0.12) on the log scale, and a slowing
  per shift s_o = 0.045 + 0.10 * (b_o - log 300) + normal(0, 0.02): operators who start
  slow also slow down faster (intercepts and slopes correlated, about 0.5);
* response time = exp(b_o + s_o * shift + normal(0, 0.10)) ms, to 0.1 ms.

The design is that of a repeated-measures study with a varying slope of a time
covariate per person, so ``--group operator --slopes shift`` is the analysis it asks for.

``seals``: a reliability study, invented for this project. 240 pump seals, half run with
coolant A and half with coolant B, are watched until they fail or until the study ends.
Seals enter the study at staggered times, so each has its own follow-up, uniform between
800 and 3,200 hours. Lifetimes are Weibull with shape 1.8 and scale 1,500 hours
(coolant A) or 2,100 hours (coolant B); a seal still running when its follow-up ends is
right-censored at that time (``still_running`` = 1). About a third are censored
(more with coolant B, whose seals last longer).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

SEED = 20261204

ABOUT = {
    "shifts": ("shifts.csv", "rt_ms: response time (ms) to an alarm probe; operator: who answered; "
               "shift: night shift 0 to 7 (three probes each)"),
    "seals": ("seals.csv", "hours: hours until the seal failed, or until its follow-up ended; "
              "still_running: 1 when the seal had not failed by then (right-censored), 0 when it failed; "
              "coolant: A or B"),
}


def shifts(seed: int = SEED) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    operators, n_shifts, probes = 20, 8, 3
    base = rng.normal(np.log(300), 0.12, operators)
    slope = 0.045 + 0.10 * (base - np.log(300)) + rng.normal(0, 0.02, operators)
    rows = [(f"op{o + 1:02d}", s, round(float(np.exp(base[o] + slope[o] * s + rng.normal(0, 0.10))), 1))
            for o in range(operators) for s in range(n_shifts) for _ in range(probes)]
    return pd.DataFrame(rows, columns=["operator", "shift", "rt_ms"])


def seals(seed: int = SEED) -> pd.DataFrame:
    rng = np.random.default_rng(seed + 1)
    n = 240
    coolant = np.repeat(["A", "B"], n // 2)
    scale = np.where(coolant == "A", 1500.0, 2100.0)
    life = scale * rng.weibull(1.8, n)
    follow_up = rng.uniform(800.0, 3200.0, n)
    running = life > follow_up
    hours = np.round(np.where(running, follow_up, life), 1)
    return pd.DataFrame({"seal": [f"s{i + 1:03d}" for i in range(n)], "coolant": coolant,
                         "hours": hours, "still_running": running.astype(int)})


def write(name: str, folder: Path) -> Path:
    """Write the named dataset as CSV into ``folder`` (created if missing); the path."""
    folder.mkdir(parents=True, exist_ok=True)
    file, _ = ABOUT[name]
    table = shifts() if name == "shifts" else seals()
    path = folder / file
    table.to_csv(path, index=False)
    return path
