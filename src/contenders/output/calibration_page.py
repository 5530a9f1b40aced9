"""The page of ``contenders calibrate``: ``calibration.html`` (self-contained, in the
report's look: the same palette, figure style and number formatting), with
``calibration.json`` and ``calibration.csv`` beside it, each written atomically."""

from __future__ import annotations

import csv
import io
import json
import shlex
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from contenders.rules import CALIBRATION_ALPHA
from contenders.records import CalibrationStudy
from contenders.output.readings import unranked_text
from contenders.output.summary import calibration_dict
from contenders.statistics.calibration import Calibration, ecdf_band, ecdf_of_ranks
from contenders.output import figures
from contenders.output import format as fmt
from contenders.output.figures import BAND, INK, MUTED, axis_labels, flag_frame, panel_grid, plain, render, styled
from contenders.output.tables import Cell, Table, n

#: At most this many parameters get a panel per candidate (flagged ones first).
PANELS = 24

STATUS = {"passed": "no problem found", "failed": "fails calibration", "inconclusive": "inconclusive",
          "not run": "not run"}

CSV_HEADERS = ["id", "status", "parameter", "ranked_simulations", "kept_draws", "bins", "chi_square",
               "p_value", "outside_ecdf_band", "flagged", "level", "bin_counts"]


@styled
def ecdf_grid(cal: Calibration, ncols: int = 4) -> figures.Rendered | None:
    """One panel per parameter: the ECDF of the scaled ranks minus the uniform
    distribution function (thick ink steps) inside the simultaneous band at the
    verdict's level (grey)."""
    params = sorted(cal.parameters, key=lambda q: (not q.flagged, q.p_value))[:PANELS]
    params = sorted(params, key=lambda q: [p.parameter for p in cal.parameters].index(q.parameter))
    if not params or cal.ranked < 2:
        return None
    z, lower, upper = ecdf_band(cal.ranked, cal.kept_draws, 1 - cal.level)
    curves = [(q, ecdf_of_ranks(q.ranks, cal.kept_draws, z) - z) for q in params]
    lim = max(max(float(np.abs(d).max()) for _, d in curves), float(np.max(upper - z)) * 1.15) * 1.1
    fig, panels, ncol, height = panel_grid(len(curves), ncols, 7.6, 0.45, 1.35, left=0.08, right=0.99, top=0.3,
                                           bottom=0.5, wspace=0.12, hspace=0.55)
    zz = np.r_[0.0, z, 1.0]
    lo, hi = np.r_[0.0, lower - z, 0.0], np.r_[0.0, upper - z, 0.0]
    for k, ax in enumerate(panels):
        q, d = curves[k]
        ax.fill_between(zz, lo, hi, color=BAND, linewidth=0, step="mid" if len(z) < 30 else None,
                        label=f"{fmt.share(1 - cal.level, 1)} band")
        ax.axhline(0, color=MUTED, linewidth=0.6)
        ax.step(zz, np.r_[0.0, d, 0.0], where="post", color=INK, linewidth=1.6, label="ranks")
        ax.set_xlim(0, 1)
        ax.set_ylim(-lim, lim)
        ax.set_xticks([0, 0.5, 1])
        if k % ncol:
            ax.tick_params(axis="y", labelleft=False)
        ax.set_title(plain(q.parameter, 24))
        ax.text(0.98, 0.04, ("◆ " if q.flagged else "") + "χ² p " + fmt.pvalue(q.p_value), transform=ax.transAxes,
                ha="right", va="bottom", fontsize=6.3, fontweight="bold" if q.flagged else "normal")
        if q.flagged:
            flag_frame(ax)
        if k == 0:
            ax.legend(loc="upper left", fontsize=6, handlelength=1.5)
    axis_labels(fig, height, "scaled rank of the true value among the posterior draws", 0.12, "ECDF minus uniform")
    return render(fig, f"calibration of {cal.id}: distribution function of the ranks minus uniform, per parameter")


def _overview(study: CalibrationStudy) -> Table:
    t = Table("", ["Candidate", "Verdict", "Ranked simulations", "Not fitted", "Fits failed",
                   "Fits with sampler problems", "Low ESS fits", "Implausible datasets", "Parameters flagged"],
              numeric=[False, False, True, True, True, True, True, True, False])
    for cal in study.candidates:
        flag = cal.status == "failed"
        t.add([Cell(cal.label, "name", cal.id),
               Cell(("◆ " if flag else "") + STATUS[cal.status], "flag" if flag else ""),
               n(f"{cal.ranked} of {cal.simulations}" if cal.status != "not run" else fmt.MISSING),
               n(fmt.integer(len(cal.not_fitted)), "watch" if cal.not_fitted else ""),
               n(fmt.integer(len(cal.fit_failures)), "watch" if cal.fit_failures else ""),
               n(fmt.integer(cal.unhealthy), "watch" if cal.unhealthy else ""),
               n(fmt.integer(cal.low_ess), "watch" if cal.low_ess else ""),
               n(fmt.integer(cal.implausible)),
               Cell(", ".join(q.parameter for q in cal.flagged) or "none", "wrap")],
              cls="muted" if cal.status == "not run" else "")
    return t


def _parameters(cal: Calibration) -> Table:
    t = Table("", ["Parameter", "Rank counts per bin", "χ²", "p", "Leaves the ECDF band"],
              numeric=[False, False, True, True, False])
    for q in cal.parameters:
        t.add([Cell(q.parameter, "code"), Cell(" ".join(str(c) for c in q.counts), "code"),
               n(fmt.num(q.chi_square)), n(("◆ " if q.p_value < cal.level else "") + fmt.pvalue(q.p_value),
                                           "flag" if q.p_value < cal.level else ""),
               Cell("◆ yes" if q.outside_band else "no", "flag" if q.outside_band else "")])
    return t


def _csv_text(study: CalibrationStudy) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_HEADERS)
    for cal in study.candidates:
        if not cal.parameters:
            w.writerow([cal.id, cal.status] + [""] * (len(CSV_HEADERS) - 2))
        for q in cal.parameters:
            w.writerow([fmt.raw(v) for v in (cal.id, cal.status, q.parameter, cal.ranked, cal.kept_draws, q.bins,
                                             q.chi_square, q.p_value, q.outside_band, q.flagged, cal.level,
                                             " ".join(map(str, q.counts)))])
    return buf.getvalue()


def study_dict(study: CalibrationStudy) -> dict[str, Any]:
    from contenders.output.summary import json_safe

    cfg = study.config
    return json_safe({
        "data": {"file": cfg.data, "outcome": cfg.outcome, "n": study.design.N,
                 "predictors": [c.name for c in study.design.coding], "group": cfg.group},
        "simulations": study.simulations, "kept_draws": study.kept_draws,
        "sampler": {"engine": study.engine_version, "chains": cfg.chains, "warmup": cfg.warmup, "draws": cfg.draws,
                    "seed": cfg.seed, "adapt_delta": cfg.adapt_delta},
        "seconds": study.seconds,
        "candidates": [calibration_dict(c) for c in study.candidates],
    })


def write_calibration(study: CalibrationStudy, out_dir: str | Path,
                      command_line: str | Sequence[str] | None = None) -> Path:
    """Write ``calibration.html``, ``calibration.json`` and ``calibration.csv``."""
    from contenders.cleanup import write_whole
    from contenders.output.report import environment

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cfg = study.config
    views = []
    for cal in study.candidates:
        views.append({"id": cal.id, "label": cal.label, "status": cal.status, "status_text": STATUS[cal.status],
                      "reason": cal.reason, "figure": ecdf_grid(cal) if cal.parameters else None,
                      "table": _parameters(cal) if cal.parameters else None,
                      "level": fmt.num(cal.level, 2), "bins": str(cal.parameters[0].bins) if cal.parameters else "",
                      "not_fitted": [unranked_text(u) for u in cal.not_fitted[:10]],
                      "fit_failures": [unranked_text(u) for u in cal.fit_failures[:10]],
                      "more_not_fitted": max(0, len(cal.not_fitted) - 10),
                      "more_failures": max(0, len(cal.fit_failures) - 10),
                      "hidden": max(0, len(cal.parameters) - PANELS), "prior_divergences": cal.prior_divergences,
                      "unhealthy": cal.unhealthy, "low_ess": cal.low_ess, "ranked": cal.ranked})
    ctx = {
        "title": f"Simulation-based calibration on the design of {Path(str(cfg.data)).name}",
        "outcome": study.design.outcome, "n_obs": fmt.integer(study.design.N),
        "simulations": fmt.integer(study.simulations), "kept": fmt.integer(study.kept_draws),
        "ranks_top": fmt.integer(study.kept_draws), "alpha": fmt.num(study.candidates[0].alpha if study.candidates else CALIBRATION_ALPHA),
        "sampler": f"{cfg.chains} chains × {cfg.warmup} warmup + {cfg.draws} draws, seed {cfg.seed}",
        "engine": study.engine_version, "run_time": fmt.seconds(study.seconds),
        "overview": _overview(study), "candidates": views,
        "command_line": (command_line if isinstance(command_line, str) or command_line is None
                         else shlex.join(list(command_line))),
    }
    write_whole(out / "calibration.json", json.dumps(study_dict(study), indent=2))
    write_whole(out / "calibration.csv", _csv_text(study))
    path = out / "calibration.html"
    write_whole(path, environment().get_template("calibration.html.j2").render(**ctx))
    return path
