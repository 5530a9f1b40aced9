"""What of a run's output may differ between two runs of the same code and stored fits,
and is set aside before the unchanged-behaviour test compares them (tests/test_unchanged.py).

Set aside: wall-clock seconds, the paths of the run's folders and files, the versions
line (engine and packages), the date, and the bytes of embedded figures (a figure's
alternative text and size stay). Everything else is compared: every number in
summary.json (to a relative 1e-9, for the last bits of NumPy's SIMD loops, which differ
between processors), every cell of every CSV file, and the report's text.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from pathlib import Path
from typing import Any

#: summary.json keys whose values are timings, paths or versions
VOLATILE_KEYS = {"seconds", "versions", "fit_files", "posterior_file", "store", "file",
                 "wait_seconds", "sample_seconds", "compile_seconds"}


def _clean_json(value: Any, key: str = "") -> Any:
    if key in VOLATILE_KEYS or key.endswith("_seconds"):
        return "<set aside>"
    if isinstance(value, dict):
        return {k: _clean_json(v, k) for k, v in value.items()}
    if isinstance(value, list):
        return [_clean_json(v, key) for v in value]
    return value


def summary(path: Path) -> Any:
    return _clean_json(json.loads(path.read_text()))


_PATHS = re.compile(r"(/[^\s\"'<>,;)]*)+")


def csv_rows(path: Path, folders: list[str]) -> list[list[str]]:
    text = path.read_text()
    for f in folders:
        text = text.replace(f, "<folder>")
    rows = list(csv.reader(io.StringIO(text)))
    header = rows[0] if rows else []
    volatile = {i for i, h in enumerate(header) if "second" in h.lower() or h.lower() in {"file", "path"}}
    out = []
    for n, r in enumerate(rows):
        if n and r and (r[0] == "run time" or r[0].startswith("version of")):   # run_settings.csv
            r = [r[0], "<set aside>"]
        out.append([("<set aside>" if i in volatile and n else cell) for i, cell in enumerate(r)])
    return out


_IMG = re.compile(r'src="data:image/png;base64,[^"]*"')
_SVG = re.compile(r"<svg\b.*?</svg>", re.S)
_RUN_TIME = re.compile(r"run time(</td><td>)? ?[\d.,]+ (s|min|h)( [\d.,]+ (s|min))?")
_TIME_CELL = re.compile(r'(<td class="num">)[\d.,]+ (s|min)(</td>)')
_VERSION_ROW = re.compile(r"(<tr><td>version of [^<]*</td><td>)[^<]*(</td></tr>)")


def report(path: Path, folders: list[str]) -> str:
    text = path.read_text()
    for f in folders:
        text = text.replace(f, "<folder>")
    text = _IMG.sub('src="<figure>"', text)
    text = _SVG.sub("<svg>", text)
    text = _RUN_TIME.sub("run time <set aside>", text)
    text = _TIME_CELL.sub(r"\1<set aside>\3", text)
    text = _VERSION_ROW.sub(r"\1<set aside>\2", text)
    return text


def close(a: Any, b: Any, where: str = "") -> list[str]:
    """Differences between two cleaned summaries, as lines (empty: the same)."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = [f"{where}.{k}: only in {'before' if k in a else 'after'}" for k in set(a) ^ set(b)]
        for k in a.keys() & b.keys():
            out += close(a[k], b[k], f"{where}.{k}")
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{where}: {len(a)} items before, {len(b)} after"]
        return [d for i, (x, y) in enumerate(zip(a, b)) for d in close(x, y, f"{where}[{i}]")]
    if isinstance(a, float) and isinstance(b, float):
        if math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12) or (math.isnan(a) and math.isnan(b)):
            return []
        return [f"{where}: {a!r} before, {b!r} after"]
    return [] if a == b else [f"{where}: {a!r} before, {b!r} after"]
