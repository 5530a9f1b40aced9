"""Record the expected output of the unchanged-behaviour test (tests/test_unchanged.py).

Run from the repository root, by hand, only when the output is meant to change:

    python tests/unchanged/record.py

It runs each case in ``cases/`` through ``contenders run`` with the stored fits in
``fits/`` (sampling and storing any fit missing there), keeps in ``fits/`` only the
fits (NetCDF), so the test recomputes every trial, weight and figure, runs the case
again from them as the test does, and writes the cleaned summary, CSV files and report text to ``expected/CASE/``.
"""

from __future__ import annotations

import json
import shutil
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import normalise  # noqa: E402

from contenders.cli import main  # noqa: E402

CASES = ("icons", "seals")


def run_case(case: str, store: Path, out: Path) -> int:
    """``contenders run`` on one case; the command line the report shows is fixed."""
    argv = sys.argv
    sys.argv = ["contenders", "run", "--config", f"{case}.toml"]
    try:
        return main(["run", "--config", str(HERE / "cases" / f"{case}.toml"), "--store", str(store),
                     "--out", str(out), "--quiet"])
    finally:
        sys.argv = argv


def keep_fits_only(store: Path) -> None:
    """Leave only the fits: stored trials, weights and figures are removed (the test must
    recompute them), and so is the index (it holds this machine's paths)."""
    for child in store.iterdir():
        if child.is_dir():
            shutil.rmtree(child)
        elif child.suffix != ".nc":
            child.unlink()


def main_record() -> None:
    store = HERE / "fits"
    for case in CASES:
        with tempfile.TemporaryDirectory() as tmp:
            out = Path(tmp) / case
            run_case(case, store, Path(tmp) / "first")   # samples what is missing
            keep_fits_only(store)
            copy = Path(tmp) / "fits"                    # as the test runs it: from a copy
            shutil.copytree(store, copy)
            status = run_case(case, copy, out)
            expected = HERE / "expected" / case
            if expected.exists():
                shutil.rmtree(expected)
            expected.mkdir(parents=True)
            folders = [str(out), str(copy), str(HERE)]
            (expected / "status").write_text(f"{status}\n")
            (expected / "summary.json").write_text(json.dumps(normalise.summary(out / "summary.json"), indent=1))
            for f in sorted(out.glob("*.csv")):
                (expected / f.name).write_text(json.dumps(normalise.csv_rows(f, folders), indent=0))
            (expected / "report.html").write_text(normalise.report(out / "report.html", folders))
            print(case, status, sorted(p.name for p in out.iterdir()))


if __name__ == "__main__":
    main_record()
