"""One candidate set, many datasets: ``contenders batch DATASETS... [run flags]``.

Every dataset gets the same configuration and its own output folder ``OUT/<file
stem>/`` with ``report.html`` and ``summary.json``; all runs share one fit store
(``OUT/fits`` unless ``--store`` is given), so a dataset seen before is never refitted.
``OUT/index.html``, ``OUT/index.csv`` and ``OUT/index.json`` list one row per dataset:
its size, the candidate that predicts best when the run's verdict separates it from the
others (or "no clear winner"), its elpd lead over the second with the standard error of
that difference, every candidate's stacking weight, and the candidates with failed
checks, sampler problems or errors. A dataset that cannot be run (unreadable, a missing
column) is listed with its reason and the others go on.

Datasets run one after another; within each, the candidates run side by side on the
local worker processes or on the Dask cluster given with ``--cluster``.
"""

from __future__ import annotations

import csv
import io
import json
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

from contenders.inputs.config import RunConfig
from contenders.errors import UserError

#: Output folder names a dataset may not take (the shared fit store lives beside them).
RESERVED = {"fits"}


@dataclass
class DatasetRow:
    """One dataset of a batch: what its run concluded, or why it could not run."""

    name: str                       # its output folder under OUT
    file: str
    status: str                     # ok | failed
    reason: str = ""
    n: int | None = None
    winner: str = ""                # a candidate id when the verdict separates one; else empty
    outcome: str = ""               # the winner, "no clear winner", or "no candidate ranked"
    close: list[str] = field(default_factory=list)   # candidates the verdict could not separate from the best
    best: str = ""                  # the best-ranked candidate, clear or not
    lead: float | None = None       # elpd of the best minus the second
    lead_se: float | None = None    # SE of that paired difference
    weights: dict[str, float] = field(default_factory=dict)    # stacking weights (ranked candidates)
    misfits: dict[str, list[str]] = field(default_factory=dict)   # candidate -> checks it fails
    unhealthy: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    verdict: str = ""               # the run's first verdict sentence
    posterior_files: dict[str, str] = field(default_factory=dict)   # candidate -> stored posterior fit
    report: str = ""                # the dataset's report, relative to OUT
    seconds: float = 0.0


@dataclass
class BatchResult:
    out: Path
    rows: list[DatasetRow]
    candidates: list[str]           # every candidate id seen, in the order of the runs
    config: RunConfig
    seconds: float


def find_datasets(items: Sequence[str | Path]) -> list[Path]:
    """CSV files named directly, and every ``*.csv`` in the folders named (sorted)."""
    if not items:
        raise UserError("no datasets given; name a folder of CSV files or the CSV files themselves")
    found: list[Path] = []
    for item in items:
        path = Path(item).expanduser()
        if path.is_dir():
            inside = sorted(p for p in path.glob("*.csv") if p.is_file())
            if not inside:
                raise UserError(f"{path}: the folder holds no .csv files; name a folder of CSV datasets "
                                "or the files themselves")
            found.extend(inside)
        else:
            found.append(path)   # a missing or unreadable file is listed as failed, the others go on
    return list(dict.fromkeys(found))


def _names(paths: Sequence[Path]) -> list[str]:
    """Output folder names: the file stems, made unique."""
    used: set[str] = set()
    names = []
    for p in paths:
        base = p.stem if p.stem not in RESERVED else f"{p.stem}-data"
        name, k = base, 2
        while name in used:
            name, k = f"{base}-{k}", k + 1
        used.add(name)
        names.append(name)
    return names


def _row_from_run(row: DatasetRow, result) -> DatasetRow:
    from contenders.output.tables import misfits

    comp = result.comparison
    cfg = result.config
    row.n = int(result.design.N)
    row.verdict = comp.verdict[0] if comp.verdict else ""
    row.weights = {r.id: float(r.stacking_weight) for r in comp.rows}
    if comp.rows:
        row.best = comp.rows[0].id
    if len(comp.rows) >= 2:
        # ArviZ's elpd_diff of the second-ranked candidate is its distance to the best
        row.lead = float(comp.rows[1].elpd_diff)
        row.lead_se = float(comp.rows[1].elpd_diff_se)
    if not comp.rows:
        row.outcome = "no candidate ranked"
    elif len(comp.rows) == 1:
        row.outcome = "only one candidate ranked"
    elif len(comp.preferred) == 1:
        row.winner = row.outcome = comp.preferred[0]
    else:
        row.outcome = "no clear winner"
        row.close = list(comp.preferred)
    for r in result.candidates:
        if r.posterior_file:
            row.posterior_files[r.id] = r.posterior_file
        if r.status == "ok":
            missed = misfits(r.checks, cfg.ppp_extreme, relevant=cfg.relevant)
            if missed:
                row.misfits[r.id] = missed
        elif r.status == "unhealthy":
            row.unhealthy.append(r.id)
        elif r.status == "failed":
            row.failed.append(r.id)
        elif r.status == "skipped":
            row.skipped.append(r.id)
    return row


def run_batch(cfg: RunConfig, datasets: Sequence[str | Path], progress: Callable[[str], None] | None = None,
              command_line: str = "") -> BatchResult:
    """Run every dataset with ``cfg`` (its ``data`` and ``out`` replaced per dataset) and
    write the index files into ``cfg.out``."""
    from contenders.output.report import write_report
    from contenders.pipeline.runner import output_folder, run, select_candidates

    say = progress or (lambda _text: None)
    start = time.perf_counter()
    paths = find_datasets(datasets)
    select_candidates(cfg)   # a mistake in the candidates or their hyperparameters stops the batch at once
    out = output_folder(cfg.out)
    store = cfg.store or out / "fits"
    rows: list[DatasetRow] = []
    seen: list[str] = []
    for i, (path, name) in enumerate(zip(paths, _names(paths)), 1):
        say(f"dataset {i} of {len(paths)}: {path} -> {out / name}")
        row = DatasetRow(name=name, file=str(path), status="ok")
        t0 = time.perf_counter()
        try:
            result = run(cfg.with_(data=path, out=out / name, store=store), progress=progress)
            write_report(result, out / name, command_line=command_line or None)
            row.report = f"{name}/report.html"
            _row_from_run(row, result)
            seen.extend(r.id for r in result.candidates)
        except UserError as exc:
            row.status, row.reason = "failed", exc.message
            say(f"  {path}: not run: {exc.message}")
        except Exception as exc:   # one dataset never stops the others
            row.status, row.reason = "failed", f"unexpected {type(exc).__name__}: {exc}"
            say(f"  {path}: not run: {row.reason}")
        row.seconds = time.perf_counter() - t0
        rows.append(row)
    batch = BatchResult(out, rows, list(dict.fromkeys(seen)), cfg, time.perf_counter() - start)
    write_index(batch)
    return batch


# --- the index -------------------------------------------------------------------------

INDEX_COLUMNS = ("dataset", "file", "status", "reason", "n", "outcome", "winner", "best", "close",
                 "elpd_lead", "elpd_lead_se")


def index_records(batch: BatchResult) -> list[dict[str, Any]]:
    """One plain record per dataset (the content of index.json)."""
    from contenders.output.summary import json_safe

    records = []
    for r in batch.rows:
        d = asdict(r)
        d["weights"] = {cid: r.weights.get(cid) for cid in batch.candidates} if r.status == "ok" else {}
        records.append(json_safe(d))
    return records


def _csv(batch: BatchResult) -> str:
    from contenders.output.format import raw

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([*INDEX_COLUMNS, *(f"weight_{cid}" for cid in batch.candidates),
                "failed_checks", "unhealthy", "failed", "skipped", "report"])
    for r in batch.rows:
        w.writerow([raw(v) for v in (
            r.name, r.file, r.status, r.reason, r.n, r.outcome, r.winner, r.best, r.close, r.lead, r.lead_se,
            *(r.weights.get(cid) for cid in batch.candidates),
            "; ".join(f"{cid}: {', '.join(m)}" for cid, m in r.misfits.items()),
            r.unhealthy, r.failed, r.skipped, r.report)])
    return buf.getvalue()


def _context(batch: BatchResult) -> dict[str, Any]:
    from contenders.output import format as fmt

    cfg = batch.config
    rows = []
    wins: dict[str, int] = {}
    for r in batch.rows:
        if r.status == "ok":
            key = r.winner or r.outcome
            wins[key] = wins.get(key, 0) + 1
        rows.append({
            "name": r.name, "file": Path(r.file).name, "status": r.status, "reason": r.reason,
            "n": fmt.integer(r.n), "outcome": r.outcome, "winner": r.winner,
            "close": ", ".join(r.close) or (r.best if r.outcome == "only one candidate ranked" else ""),
            "best": r.best,
            "lead": (f"{fmt.fixed(r.lead)} (SE {fmt.fixed(r.lead_se)})" if r.lead is not None else fmt.MISSING),
            "weights": [fmt.fixed(r.weights.get(cid), 2) if cid in r.weights else fmt.MISSING
                        for cid in batch.candidates],
            "misfits": [f"{cid}: {', '.join(m)}" for cid, m in r.misfits.items()],
            "unhealthy": ", ".join(r.unhealthy), "failed": ", ".join(r.failed),
            "skipped": ", ".join(r.skipped), "report": r.report, "verdict": r.verdict,
        })
    ok = sum(r.status == "ok" for r in batch.rows)
    return {
        "title": f"{len(batch.rows)} datasets, {len(batch.candidates)} candidates",
        "n_datasets": len(batch.rows), "n_ok": ok, "n_failed": len(batch.rows) - ok,
        "candidates": batch.candidates, "rows": rows,
        "wins": sorted(wins.items(), key=lambda kv: (-kv[1], kv[0])),
        "settings": f"{cfg.chains} chains × {cfg.draws} draws after {cfg.warmup} warmup, seed {cfg.seed}, "
                    f"engine {cfg.engine}, " + (f"Dask cluster {cfg.cluster}" if cfg.cluster else "this machine"),
        "run_time": fmt.seconds(batch.seconds),
    }


def write_index(batch: BatchResult) -> Path:
    """Write ``index.html``, ``index.csv`` and ``index.json`` into the batch's folder."""
    from contenders.cleanup import write_whole
    from contenders.output.report import environment

    out = batch.out
    write_whole(out / "index.json", json.dumps({"datasets": index_records(batch),
                                                 "candidates": batch.candidates,
                                                 "seconds": batch.seconds}, indent=2))
    write_whole(out / "index.csv", _csv(batch))
    html = environment().get_template("index.html.j2").render(**_context(batch))
    path = out / "index.html"
    write_whole(path, html)
    return path
