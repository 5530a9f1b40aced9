"""contenders store: sizes by candidate and data file, and pruning what no run can reach.

The store here is built by hand (files and index records), so every case is known
exactly; test_store.py checks the records a real run writes."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import time

import pytest

from contenders import __version__
from contenders.inputs.candidates import builtin_folder, discover
from contenders.engines.lazy import pystan_version
from contenders.pipeline.store import INDEX_NAME, TRIALS_FORMAT, FitStore

EXE = [sys.executable, "-m", "contenders.cli"]


def cli(*args, stdin=None):
    return subprocess.run([*EXE, *map(str, args)], capture_output=True, text=True, timeout=300,
                          stdin=subprocess.DEVNULL if stdin is None else stdin)


def _sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def store(tmp_path):
    folder = tmp_path / "fits"
    folder.mkdir()
    data = tmp_path / "data.csv"
    data.write_text("rt\n1\n2\n")
    changed = tmp_path / "changed.csv"
    changed.write_text("rt\n1\n2\n")
    changed_sha = _sha(changed)
    changed.write_text("rt\n1\n3\n")   # edited after the fits were made
    lognormal = next(c for c in discover(builtin_folder()) if c.id == "lognormal").code_hash
    here = {"data_file": str(data), "data_sha256": _sha(data)}
    engine = pystan_version()
    files = {   # name: (bytes, record or None)
        "keep.nc": (1000, {"kind": "fit", "mode": "posterior", "candidate": "lognormal",
                           "code_sha256": lognormal, "engine": engine, **here}),
        "keep.trials.pickle": (10, {"kind": "trials", "candidate": "lognormal", "code_sha256": lognormal,
                                    "contenders": __version__, "trials_format": TRIALS_FORMAT, **here}),
        "edited.nc": (2000, {"kind": "fit", "mode": "posterior", "candidate": "mine", "code_sha256": "0" * 64,
                             "engine": engine, **here}),
        "newdata.nc": (300, {"kind": "fit", "mode": "prior", "candidate": "lognormal", "code_sha256": lognormal,
                             "engine": engine, "data_file": str(changed), "data_sha256": changed_sha}),
        "gone.nc": (400, {"kind": "fit", "mode": "refit", "candidate": "lognormal", "code_sha256": lognormal,
                          "engine": engine, "data_file": str(tmp_path / "deleted.csv"), "data_sha256": "1" * 64}),
        "oldengine.nc": (500, {"kind": "fit", "mode": "posterior", "candidate": "lognormal",
                               "code_sha256": lognormal, "engine": "pystan 0.0.1 (httpstan 0.0.1)", **here}),
        "oldtrials.trials.pickle": (20, {"kind": "trials", "candidate": "lognormal", "code_sha256": lognormal,
                                         "contenders": "0.0.1", "trials_format": TRIALS_FORMAT, **here}),
        "before_index.nc": (700, None),
    }
    records = []
    for name, (size, rec) in files.items():
        (folder / name).write_bytes(b"x" * size)
        if rec is not None:
            records.append(json.dumps({"file": name, "written": time.time(), **rec}) + "\n")
    (folder / INDEX_NAME).write_text("".join(records) + "not json\n")
    old = time.time() - 40 * 86400
    os.utime(folder / "before_index.nc", (old, old))
    # a temporary file of a live process (this one) and of a process that is gone
    (folder / f".keep2.nc.{os.getpid()}.tmp").write_bytes(b"y" * 50)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True).stdout.strip()
    (folder / f".half.nc.{dead}.tmp").write_bytes(b"z" * 60)
    return folder


def test_sizes_by_candidate_data_file_and_kind(store):
    res = cli("store", "--store", store)
    assert res.returncode == 0, res.stderr
    out = res.stdout
    assert "4.93 kB in 8 file(s)" in out      # 1000+10+2000+300+400+500+20+700 bytes
    assert "2.23 kB      6 file(s)  lognormal" in out   # 1000+10+300+400+500+20
    assert "2.00 kB      1 file(s)  mine" in out
    assert "700 bytes      1 file(s)  unknown" in out
    assert "1 file(s) being written by a run now" in out


def _names(folder):
    return sorted(p.name for p in folder.iterdir() if p.name != ".in-use.lock")


def test_prune_removes_exactly_the_unreachable_files_and_asks_first(store):
    before = _names(store)
    res = cli("store", "--store", store, "--prune")   # no terminal, no --yes: refuses
    assert res.returncode == 2 and "pass --yes" in res.stderr
    assert _names(store) == before
    with FitStore(store).in_use():                    # a run is using the store
        res = cli("store", "--store", store, "--prune", "--yes")
    assert res.returncode == 2 and "using this fit store now" in res.stderr
    assert _names(store) == before
    res = cli("store", "--store", store, "--prune", "--yes")
    assert res.returncode == 0, res.stderr
    assert _names(store) == sorted([INDEX_NAME, "keep.nc", "keep.trials.pickle", "before_index.nc",
                           f".keep2.nc.{os.getpid()}.tmp"])
    assert "the program of candidate 'mine' changed or is gone" in res.stdout
    assert "has changed" in res.stdout and "is gone" in res.stdout and "no longer installed" in res.stdout
    assert "removed 5 file(s), 3.28 kB" in res.stdout   # 2000+300+400+500+20 and the 60-byte debris
    assert set(FitStore(store).index()) == {"keep.nc", "keep.trials.pickle"}
    # files not used for 30 days go with --older-than 30 (the unknown one is 40 days old)
    res = cli("store", "--store", store, "--prune", "--yes", "--older-than", 30)
    assert res.returncode == 0, res.stderr
    assert not (store / "before_index.nc").exists() and (store / "keep.nc").exists()
    res = cli("store", "--store", store, "--prune", "--yes")
    assert "nothing to prune" in res.stdout


def test_store_errors_are_one_line(tmp_path):
    res = cli("store", "--store", tmp_path / "nowhere")
    assert res.returncode == 2 and "no fit store there" in res.stderr and "Traceback" not in res.stderr
    (tmp_path / "s").mkdir()
    res = cli("store", "--store", tmp_path / "s", "--yes")
    assert res.returncode == 2 and "go with --prune" in res.stderr
