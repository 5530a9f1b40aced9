"""The unchanged-behaviour test: two small runs from stored fits give the output recorded
before (tests/unchanged/expected), so a restructuring of the code cannot change what a
user reads without this test saying where.

The fits are stored (tests/unchanged/fits), so no sampling enters: what is compared is
everything the tool computes from draws (PSIS-LOO and K-fold, checks, LOO-PIT, censored
checks, effects, sensitivity, the ranking and the verdict sentences), its tables and its
report text. The expected output was made by this project's own code
(tests/unchanged/record.py) at the commit that added it: the test guards against change,
not against error; the other tests check the values against outside sources.
"""

from __future__ import annotations

import difflib
import json
import shutil
import sys
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent / "unchanged"
sys.path.insert(0, str(HERE))

import normalise  # noqa: E402
import record  # noqa: E402


@pytest.mark.parametrize("case", record.CASES)
def test_output_unchanged(case, programs, tmp_path):
    store = tmp_path / "fits"
    shutil.copytree(HERE / "fits", store)
    out = tmp_path / case
    status = record.run_case(case, store, out)
    expected = HERE / "expected" / case
    assert status == int((expected / "status").read_text())

    after = normalise.summary(out / "summary.json")
    assert after["fits"]["sampled"] == 0, "a fit was sampled: its key changed, or the stored fit was not found"
    diffs = normalise.close(json.loads((expected / "summary.json").read_text()), after, "summary")
    assert not diffs, "\n".join(sorted(diffs)[:40])

    folders = [str(out), str(store), str(HERE)]
    names = sorted(p.name for p in out.glob("*.csv"))
    assert names == sorted(p.name for p in expected.glob("*.csv"))
    for name in names:
        before_rows = json.loads((expected / name).read_text())
        after_rows = normalise.csv_rows(out / name, folders)
        changed = [f"{name} row {i}: {b} before, {a} after"
                   for i, (b, a) in enumerate(zip(before_rows, after_rows)) if b != a]
        assert len(before_rows) == len(after_rows) and not changed, "\n".join(changed[:20])

    before_html = (expected / "report.html").read_text()
    after_html = normalise.report(out / "report.html", folders)
    if before_html != after_html:
        diff = difflib.unified_diff(before_html.splitlines(), after_html.splitlines(), "before", "after",
                                    lineterm="", n=1)
        pytest.fail("report.html changed:\n" + "\n".join(list(diff)[:80]))
