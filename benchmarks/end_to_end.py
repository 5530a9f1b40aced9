"""End-to-end benchmark: contenders against a plain hand-written baseline, in one run.

Not a test. Run it from the repository root with the project installed:

    python benchmarks/end_to_end.py                     # speed: demo design, all built-ins
    python benchmarks/end_to_end.py --memory            # memory: N = 20,000, jobs = 2
    python benchmarks/end_to_end.py --store-size        # fit store size at N = 20,000
    python benchmarks/end_to_end.py --engines           # PyStan against CmdStanPy (needs CmdStan)

Speed part (each phase starts from an empty fit store; programs are compiled first, so
compiling is not timed):

* baseline: what a careful analyst would write by hand with the same engine and ArviZ,
  one candidate after the other: PyStan ``build`` + ``sample`` (same chains, warmup,
  draws and seed), ``arviz.from_pystan``, ``arviz.loo``, then ``arviz.compare``. It does
  no prior predictive trial, no predictive checks, no refits and writes no report, so
  it does less work than the tool; the ratios are therefore conservative for the tool.
* cold: ``contenders run`` with ``jobs`` = all cores and an empty fit store.
* warm: the same command again (every result from the fit store); median of three.
* jobs=1: ``contenders run`` with ``jobs`` = 1 and an empty fit store.

Printed as ratios: warm / baseline (target: at least 20x faster), cold / baseline (target:
at most 1.15x), jobs=1 / jobs=all (target: at least 1.6x on two cores). With ``--repeat K``
the baseline, cold and jobs=1 phases run K times in turn and each ratio is printed per
repeat and as a median, with the CPU seconds of each phase: on a shared host the same
work can take a third longer from one run to the next, so one run does not settle a ratio.

Memory part: the whole run at N = 20,000 (the demo design with more participants) with
``jobs`` = 2; peak resident memory of the process tree (the command and every process
it starts), sampled every 0.25 s from /proc (Linux). Sum of RSS, so shared pages are
counted more than once: an upper bound.

Engines part (``--engines``, only where a usable CmdStan is installed beside PyStan):
the same ``contenders run`` (the demo design, ``--participants`` and ``--draws``, or
``--engines-n`` rows of it) with ``--engine pystan`` and with ``--engine cmdstanpy``,
each from an empty fit store after compiling (not timed), the order of the two engines
swapped on every other repeat. Printed per engine: wall and CPU seconds and peak
process-tree memory (as in the memory part), each candidate's status, and the largest
difference of elpd between the engines (the same seed gives the same draws, so it
should be near zero); and the ratios CmdStanPy / PyStan of wall time and peak memory.

Store-size part: ``contenders run`` at N = 20,000 for the candidates of
``--store-only`` (default: lognormal) with the default 4 chains x 1,000 draws (warmup
``--store-warmup``; the draws count, not the warmup, sets the size), then the store's
files by kind from its index: measured. The store of the whole ten-candidate run is
then computed from those sizes (ten times one candidate's prior fit, posterior fit and
trial results, plus ``--refits`` refits each at the measured refit size or at the
held-out share of a posterior fit's log_lik) and printed as "computed", not measured.
It also samples the same posterior fit again directly with the engine (same seed, so
the same draws) to compare PSIS-LOO (ArviZ) on float64 ``log_lik`` with the float32
values the store keeps, and the size of the same fit written the old way (float64
``log_lik``, every ``y_rep`` draw, ArviZ's default NetCDF).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _children(pid: int) -> list[int]:
    out = []
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            text = (task / "children").read_text().split()
            out.extend(int(t) for t in text)
    except OSError:
        pass
    return out


def _tree_rss(pid: int) -> int:
    """Sum of VmRSS (bytes) over ``pid`` and all its descendants."""
    total, todo, seen = 0, [pid], set()
    while todo:
        p = todo.pop()
        if p in seen:
            continue
        seen.add(p)
        try:
            for line in Path(f"/proc/{p}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1]) * 1024
                    break
        except OSError:
            continue
        todo.extend(_children(p))
    return total


def timed(cmd: list[str], env: dict | None = None, log: Path | None = None,
          ok: tuple[int, ...] = (0,)) -> tuple[float, int, float]:
    """Wall seconds, peak process-tree RSS (bytes) and CPU seconds (user + system of every
    process the command started and waited for) of a command; fails loudly. With ``log``,
    a line every 30 s (elapsed, tree RSS now, peak so far) is appended there, so a run cut
    short still leaves its figures. ``ok``: the exit statuses that count as finished."""
    start = time.perf_counter()
    cpu0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    peak = [0]
    stop = threading.Event()

    def watch():
        next_line = 0.0
        while not stop.is_set():
            now = _tree_rss(proc.pid)
            peak[0] = max(peak[0], now)
            elapsed = time.perf_counter() - start
            if log is not None and elapsed >= next_line:
                with open(log, "a") as f:
                    f.write(f"{elapsed:8.0f} s  rss {now / 2**30:6.2f} GiB  peak {peak[0] / 2**30:6.2f} GiB\n")
                next_line = elapsed + 30
            stop.wait(0.25)

    t = threading.Thread(target=watch, daemon=True)
    t.start()
    output, _ = proc.communicate()
    stop.set()
    t.join()
    seconds = time.perf_counter() - start
    cpu1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
    if proc.returncode not in ok:
        sys.stderr.write(output[-4000:])
        raise SystemExit(f"command failed ({proc.returncode}): {' '.join(cmd)}")
    return seconds, peak[0], cpu


BASELINE = r'''
import json, sys, time
import arviz as az
import numpy as np
import stan
from contenders.inputs.candidates import builtin_folder, discover, inputs_for
from contenders.inputs.config import load
from contenders.pipeline.runner import load_design

cfg = load(sys.argv[1])
only = sys.argv[2].split(",") if sys.argv[2] else None
design = load_design(cfg)
loos = {}
for c in discover(builtin_folder()):
    if only and c.id not in only:
        continue
    data = dict(inputs_for(c, design, None, cfg.hyperparameters.get(c.id)))
    model = stan.build(c.code, data=data, random_seed=cfg.seed)
    fit = model.sample(num_chains=cfg.chains, num_warmup=cfg.warmup, num_samples=cfg.draws)
    idata = az.from_pystan(posterior=fit, posterior_model=model, posterior_predictive=["y_rep"],
                           log_likelihood=["log_lik"], observed_data=["y"])
    del fit
    loos[c.id] = az.loo(idata, pointwise=True)
    del idata
print(az.compare(loos, method="stacking").to_string())
'''


def _httpstan_fits() -> set[Path]:
    """Fit files in httpstan's cache (PyStan writes one per chain of a seeded fit)."""
    import httpstan.cache

    root = httpstan.cache.cache_directory() / "models"
    return set(root.glob("*/fits/*")) if root.exists() else set()


def write_config(folder: Path, participants: int, draws: int, rows: int | None) -> Path:
    sys.path.insert(0, str(ROOT / "src"))
    from contenders import demo

    demo.write(folder)
    table = demo.generate(participants=participants)
    if rows:
        table = table.head(rows)
    table.to_csv(folder / "icon_search.csv", index=False)
    cfg = (folder / "demo.toml").read_text()
    cfg = cfg.replace('[run]\nout = "../reports/demo"',
                      f'[sampler]\nwarmup = {draws}\ndraws = {draws}\n\n[run]\nout = "out"')
    (folder / "bench.toml").write_text(cfg)
    return folder / "bench.toml"


def contenders(*args: str) -> list[str]:
    return [sys.executable, "-m", "contenders.cli", *args]


def speed(args) -> dict:
    work = Path(tempfile.mkdtemp(prefix="contenders-bench-"))
    try:
        cfg = write_config(work, args.participants, args.draws, None)
        only = ["--only", args.only] if args.only else []
        print("compiling (not timed) ...", flush=True)
        subprocess.run(contenders("check", *(args.only.split(",") if args.only else [])), check=True,
                       stdout=subprocess.DEVNULL)
        env = dict(os.environ, PYTHONHASHSEED="0")
        base_script = work / "baseline.py"
        base_script.write_text(BASELINE)

        def run(label: str, cmd: list[str]) -> tuple[float, int, float]:
            print(f"{label} ...", flush=True)
            before = _httpstan_fits()
            out = timed(cmd, env)
            for path in _httpstan_fits() - before:   # PyStan caches every seeded fit; not ours to keep
                path.unlink(missing_ok=True)
            print(f"  {out[0]:.1f} s wall, {out[2]:.1f} s CPU", flush=True)
            return out

        # The phases of one repeat run back to back, and repeats follow each other, so a
        # change in the machine's speed (a shared host) shows up as spread between repeats
        # instead of as a bias in one ratio.
        rounds, warm, same = [], [], True
        for r in range(args.repeat):
            tag = f"[{r + 1}/{args.repeat}] "
            res = {"baseline": run(tag + "baseline", [sys.executable, str(base_script), str(cfg), args.only or ""])}
            a, b = work / f"a{r}", work / f"b{r}"
            res["cold"] = run(tag + "contenders, cold (jobs = all cores)",
                              contenders("run", "--config", str(cfg), "--quiet", "--out", str(a), *only))
            if r == 0:
                print("contenders, warm rerun (median of 3) ...", flush=True)
                warm = sorted(timed(contenders("run", "--config", str(cfg), "--quiet", "--out", str(a), *only),
                                    env) for _ in range(3))
                print(f"  {warm[1][0]:.1f} s (runs: {', '.join(f'{w[0]:.1f}' for w in warm)})", flush=True)
            res["jobs1"] = run(tag + "contenders, cold, jobs = 1",
                               contenders("run", "--config", str(cfg), "--quiet", "--jobs", "1",
                                          "--out", str(b), *only))
            sa = json.loads((a / "summary.json").read_text())
            sb = json.loads((b / "summary.json").read_text())
            same = same and all(x["elpd_loo"] == y["elpd_loo"] for x, y in zip(sa["candidates"], sb["candidates"]))
            rounds.append(res)

        def ratios(f) -> dict:
            values = [round(f(res), 2) for res in rounds]
            return {"each": values, "median": round(statistics.median(values), 2)}

        out = {
            "n": sa["data"]["n"], "candidates": len(sa["candidates"]), "cores": os.cpu_count(),
            "repeats": args.repeat,
            "seconds": [{k: round(v[0], 1) for k, v in res.items()} for res in rounds],
            "cpu_seconds": [{k: round(v[2], 1) for k, v in res.items()} for res in rounds],
            "peak_gb": [{k: round(v[1] / 2**30, 2) for k, v in res.items()} for res in rounds],
            "warm_seconds": round(warm[1][0], 2),
            "warm_speedup_vs_baseline": ratios(lambda res: res["baseline"][0] / warm[1][0]),
            "cold_over_baseline": ratios(lambda res: res["cold"][0] / res["baseline"][0]),
            "jobs_all_speedup_vs_jobs1": ratios(lambda res: res["jobs1"][0] / res["cold"][0]),
            "jobs1_and_jobs_all_give_equal_elpd": same,
        }
        return out
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def memory(args) -> dict:
    work = Path(tempfile.mkdtemp(prefix="contenders-mem-"))
    try:
        cfg = write_config(work, 417, 1000, args.memory_n)
        only = ["--only", args.memory_only] if args.memory_only else []
        subprocess.run(contenders("check", *(args.memory_only.split(",") if args.memory_only else [])),
                       check=True, stdout=subprocess.DEVNULL)
        seconds, peak, cpu = timed(contenders("run", "--config", str(cfg), "--quiet", "--jobs", "2",
                                              "--out", str(work / "m"), *only), log=args.log)
        s = json.loads((work / "m" / "summary.json").read_text())
        return {"n": s["data"]["n"], "candidates": [c["id"] for c in s["candidates"]],
                "statuses": [c["status"] for c in s["candidates"]], "jobs": 2,
                "seconds": round(seconds, 1), "cpu_seconds": round(cpu, 1), "peak_rss_gb_process_tree": round(peak / 2**30, 2),
                "engine": s["sampler"]["engine"]}
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


SIZE_CHECK = r'''
import json, os, sys, tempfile
import arviz as az
import numpy as np
from contenders.inputs.candidates import builtin_folder, discover, inputs_for
from contenders.inputs.config import load
from contenders.engines import get_engine
from contenders.pipeline.runner import load_design, sampler_settings
from contenders.pipeline.store import slim

cfg = load(sys.argv[1]).with_(warmup=int(sys.argv[3]))
cid, stored = sys.argv[2], sys.argv[4]
design = load_design(cfg)
c = next(c for c in discover(builtin_folder()) if c.id == cid)
engine = get_engine("pystan")
program = engine.compile(c)
data = inputs_for(c, design, None, cfg.hyperparameters.get(c.id))
draws = engine.sample(program, data, sampler_settings(cfg))
old = os.path.join(tempfile.mkdtemp(prefix="contenders-old-"), "old.nc")
draws.idata.to_netcdf(old)   # as the store wrote fits before: float64 log_lik, every y_rep draw
old_bytes = os.path.getsize(old)
os.remove(old)
ll64 = np.asarray(draws.idata.log_likelihood["log_lik"].values)
kept = az.from_netcdf(stored)
ll_stored = np.asarray(kept.log_likelihood["log_lik"].values)
loo64 = az.loo(draws.idata, var_name="log_lik")
loo32 = az.loo(slim(draws.idata, data), var_name="log_lik")
print(json.dumps({
    "stored_log_lik_dtype": str(ll_stored.dtype),
    "stored_equals_float32_of_resampled": bool(np.array_equal(ll_stored, ll64.astype(np.float32))),
    "elpd_float64": float(loo64["elpd_loo"]), "elpd_float32": float(loo32["elpd_loo"]),
    "elpd_change": abs(float(loo64["elpd_loo"]) - float(loo32["elpd_loo"])),
    "old_format_posterior_fit_bytes": old_bytes,
}))
'''


def store_size(args) -> dict:
    work = Path(tempfile.mkdtemp(prefix="contenders-store-"))
    try:
        cfg = write_config(work, 417, 1000, args.memory_n)
        ids = args.store_only.split(",")
        subprocess.run(contenders("check", *ids), check=True, stdout=subprocess.DEVNULL)
        seconds, peak, cpu = timed(contenders("run", "--config", str(cfg), "--quiet", "--jobs", "2",
                                              "--warmup", str(args.store_warmup), "--out", str(work / "s"),
                                              "--only", args.store_only))
        sys.path.insert(0, str(ROOT / "src"))
        from contenders.pipeline.store import FitStore

        store = FitStore(work / "s" / "fits")
        index = store.index()
        per = {}   # candidate -> kind -> [bytes]
        shared = 0
        for f in store.folder.rglob("*"):
            if not f.is_file() or f.name.startswith("."):
                continue
            rec = index.get(f.name, {})
            kind = rec.get("mode") or rec.get("kind") or "unknown"
            if rec.get("candidate"):
                per.setdefault(rec["candidate"], {}).setdefault(kind, []).append(f.stat().st_size)
            else:
                shared += f.stat().st_size
        s = json.loads((work / "s" / "summary.json").read_text())
        n = s["data"]["n"]
        check_script = work / "size_check.py"
        check_script.write_text(SIZE_CHECK)
        first = ids[0]
        posterior_file = next(str(store.folder / name) for name, rec in index.items()
                              if rec.get("candidate") == first and rec.get("mode") == "posterior")
        out = subprocess.run([sys.executable, str(check_script), str(cfg), first, str(args.store_warmup),
                              posterior_file], check=True, capture_output=True, text=True)
        precision = json.loads(out.stdout.strip().splitlines()[-1])
        gb = 1e9
        measured = {cid: {kind: [round(b / gb, 3) for b in sizes] for kind, sizes in kinds.items()}
                    for cid, kinds in per.items()}
        one = {cid: sum(sum(v) for v in kinds.values()) for cid, kinds in per.items()}
        mean_candidate = statistics.mean(sum(sum(kinds.get(k, [])) for k in ("prior", "posterior", "trials"))
                                         for kinds in per.values())
        posterior = statistics.mean(sum(kinds.get("posterior", [0])) for kinds in per.values())
        refits = [b for kinds in per.values() for b in kinds.get("refit", [])]
        # an exact refit keeps one held-out column of log_lik: 1/n of a posterior fit's log_lik
        refit_size = statistics.mean(refits) if refits else posterior / n
        total = 10 * mean_candidate + args.refits * refit_size + shared
        return {
            "n": n, "chains": s["sampler"]["chains"], "draws_per_chain": s["sampler"]["draws"],
            "warmup": s["sampler"]["warmup"], "engine": s["sampler"]["engine"],
            "statuses": {c["id"]: c["status"] for c in s["candidates"]},
            "run_seconds": round(seconds, 1), "run_cpu_seconds": round(cpu, 1),
            "measured_gb_by_candidate_and_kind": measured,
            "measured_gb_per_candidate": {k: round(v / gb, 3) for k, v in one.items()},
            "measured_gb_shared_files": round(shared / gb, 4),
            "measured_old_format_posterior_fit_gb": round(precision.pop("old_format_posterior_fit_bytes") / gb, 3),
            "precision": precision,
            "computed_gb_ten_candidates": round(total / gb, 2),
            "computed_from": (f"10 x the measured prior + posterior + trial results of one candidate (mean of "
                              f"{', '.join(per)}), + {args.refits} refits at "
                              + ("the measured refit size" if refits else "1/N of a posterior fit")
                              + ", + the measured shared files (weights, figures)"),
        }
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


ENGINES = ("pystan", "cmdstanpy")


def engines(args) -> dict:
    sys.path.insert(0, str(ROOT / "src"))
    from contenders.engines import cmdstan_available

    ok, why = cmdstan_available()
    if not ok:
        raise SystemExit(f"--engines compares PyStan with CmdStanPy and needs a usable CmdStan: {why}")
    work = Path(tempfile.mkdtemp(prefix="contenders-engines-"))
    try:
        cfg = write_config(work, args.participants, args.draws, args.engines_n or None)
        ids = args.only.split(",") if args.only else []
        only = ["--only", args.only] if args.only else []
        for name in ENGINES:
            print(f"compiling for {name} (not timed) ...", flush=True)
            subprocess.run(contenders("check", "--engine", name, *ids), check=True, stdout=subprocess.DEVNULL)
        env = dict(os.environ, PYTHONHASHSEED="0")
        runs = {name: [] for name in ENGINES}
        summaries = {}
        for r in range(args.repeat):
            for name in (ENGINES if r % 2 == 0 else ENGINES[::-1]):
                out = work / f"{name}{r}"
                print(f"[{r + 1}/{args.repeat}] contenders run --engine {name} ...", flush=True)
                before = _httpstan_fits()
                seconds, peak, cpu = timed(contenders("run", "--config", str(cfg), "--quiet", "--engine", name,
                                                      "--out", str(out), *only), env,
                                      ok=(0, 3))   # 3: the run finished but ranked no candidate
                for path in _httpstan_fits() - before:   # PyStan caches every seeded fit; not ours to keep
                    path.unlink(missing_ok=True)
                print(f"  {seconds:.1f} s wall, {cpu:.1f} s CPU, peak {peak / 2**30:.2f} GiB", flush=True)
                runs[name].append({"seconds": round(seconds, 1), "cpu_seconds": round(cpu, 1),
                                   "peak_gb": round(peak / 2**30, 2)})
                summaries.setdefault(name, json.loads((out / "summary.json").read_text()))
        elpd = {name: {c["id"]: c.get("elpd_loo") for c in s["candidates"]} for name, s in summaries.items()}
        both = [cid for cid, v in elpd["pystan"].items()
                if v is not None and elpd["cmdstanpy"].get(cid) is not None]

        def median(name, key):
            return statistics.median(x[key] for x in runs[name])

        return {
            "n": summaries["pystan"]["data"]["n"], "cores": os.cpu_count(), "repeats": args.repeat,
            "engine_versions": {name: s["sampler"]["engine"] for name, s in summaries.items()},
            "runs": runs,
            "statuses": {name: {c["id"]: c["status"] for c in s["candidates"]} for name, s in summaries.items()},
            "largest_elpd_difference": (max(abs(elpd["pystan"][c] - elpd["cmdstanpy"][c]) for c in both)
                                        if both else None),
            "cmdstanpy_over_pystan_wall": round(median("cmdstanpy", "seconds") / median("pystan", "seconds"), 2),
            "cmdstanpy_over_pystan_peak_memory": round(median("cmdstanpy", "peak_gb") / median("pystan", "peak_gb"), 2),
        }
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--only", default="", help="candidate ids, comma-separated (default: all built-ins)")
    p.add_argument("--participants", type=int, default=30, help="demo design size (30: N = 1,440)")
    p.add_argument("--draws", type=int, default=1000, help="warmup and draws per chain")
    p.add_argument("--memory", action="store_true", help="run the N = 20,000 memory measurement instead")
    p.add_argument("--memory-n", type=int, default=20000)
    p.add_argument("--memory-only", default="", help="candidates for the memory run (default: all)")
    p.add_argument("--store-size", action="store_true", help="measure the fit store at N = 20,000 instead")
    p.add_argument("--store-only", default="lognormal", help="store size: candidates run (default lognormal)")
    p.add_argument("--store-warmup", type=int, default=200, help="store size: warmup per chain (default 200)")
    p.add_argument("--refits", type=int, default=100,
                   help="store size: refits assumed in the computed ten-candidate total (default 100: "
                        "refit_cap 10 for each of ten candidates)")
    p.add_argument("--engines", action="store_true",
                   help="run the same job with PyStan and with CmdStanPy instead (needs CmdStan)")
    p.add_argument("--engines-n", type=int, default=0,
                   help="engines: rows of the demo design to keep (default: all of --participants)")
    p.add_argument("--repeat", type=int, default=1,
                   help="speed: repeats of baseline, cold and jobs = 1; engines: repeats of both engines")
    p.add_argument("--log", type=Path, default=None,
                   help="memory: append elapsed time, tree RSS and peak so far here every 30 s")
    p.add_argument("--keep", action="store_true", help="keep the temporary folders")
    args = p.parse_args()
    result = (engines(args) if args.engines else store_size(args) if args.store_size
              else memory(args) if args.memory else speed(args))
    print(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
