"""The ``contenders`` command: parse options, call the library, print.

User errors end with one line on standard error and exit status 2; ``--debug``
shows the traceback instead.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from contenders import __version__
from contenders.errors import UserError


def _candidates_folder(value: str | None) -> Path:
    from contenders.inputs.candidates import builtin_folder

    return Path(value) if value else builtin_folder()


def cmd_list(args: argparse.Namespace) -> int:
    """Candidates with label, support and whether they keep the contract (no compiling)."""
    from contenders.inputs.candidates import discover

    cands = discover(_candidates_folder(args.candidates))
    width = max(len(c.id) for c in cands)
    lwidth = max(len(c.label) for c in cands)
    print(f"{'id':<{width}}  {'label':<{lwidth}}  {'support':<8}  state")
    for c in cands:
        state = "ready" if c.valid else "invalid: " + c.problems[0].splitlines()[0]
        print(f"{c.id:<{width}}  {c.label:<{lwidth}}  {c.support:<8}  {state}")
    print(f"{sum(c.valid for c in cands)} of {len(cands)} candidates keep the contract "
          f"({_candidates_folder(args.candidates)})")
    return 0


def cmd_check(args: argparse.Namespace) -> int:
    """Compile each candidate and evaluate it once on example data (no sampling)."""
    from contenders.inputs.candidates import check_outputs, discover, example_design
    import os

    from contenders.engines import compile_all, get_engine

    cands = discover(_candidates_folder(args.candidates))
    if args.names:
        known = {c.id for c in cands}
        missing = [n for n in args.names if n not in known]
        if missing:
            raise UserError(f"no candidate named {', '.join(missing)}; known: {', '.join(sorted(known))}")
        cands = [c for c in cands if c.id in args.names]
    engine = get_engine(args.engine)
    jobs = args.jobs or os.cpu_count() or 1
    if any(c.valid for c in cands):
        print(f"compiling {sum(c.valid for c in cands)} program(s), {jobs} at a time "
              "(45 to 90 s each the first time; cached afterwards) ...", flush=True)
    compiled = compile_all(engine, cands, jobs=jobs, progress=lambda text: print(text, flush=True))
    failed = 0
    for c in cands:
        if c.id in compiled.programs:
            check_outputs(c, engine, compiled.programs[c.id], example_design(c.support))
        problems = compiled.problems(c)
        if not problems:
            print(f"ok       {c.id}")
        else:
            failed += 1
            print(f"invalid  {c.id}")
            for p in problems:
                print("         " + p.replace("\n", "\n         "))
    print(f"{len(cands) - failed} of {len(cands)} candidates pass ({engine.version()})")
    return 1 if failed else 0


def _run_flags() -> tuple[str, ...]:
    """The settings given as a value on the command line of ``run`` (and ``recovery``,
    ``calibrate``, ``batch``), in help order; ``--quiet``, ``--quick`` and ``--hyper``
    are read on their own."""
    from contenders.inputs.settings import SETTINGS

    return tuple(s.name for s in SETTINGS if s.flag and s.action == "store")


def _add_run_flags(p: argparse.ArgumentParser) -> None:
    """``--config`` and the flag of every setting in ``SETTINGS`` that has one."""
    from contenders.inputs.settings import SETTINGS

    p.add_argument("--config", metavar="FILE", help="TOML configuration file; flags override its keys")
    for s in SETTINGS:
        if not s.flag:
            continue
        text = f"{s.help} (configuration: {s.where})" if s.help_names_key else s.help
        if s.action == "store_true":
            p.add_argument(s.flag, *s.aliases, dest=s.name, action=s.action, default=None, help=text)
        else:   # store, or append (every --hyper item is kept)
            p.add_argument(s.flag, *s.aliases, dest=s.name, action=s.action, metavar=s.metavar,
                           default=[] if s.action == "append" else None, help=text)


def _config_from_args(args: argparse.Namespace, data: str | None):
    from contenders.inputs.config import RunConfig, apply_flags, load, parse_flag, parse_hyper_flags, quick_profile

    cfg = load(args.config) if args.config else RunConfig()
    if getattr(args, "quick", None) or cfg.quick:   # the profile first, so flags given with it win
        cfg = quick_profile(cfg)
    flags = {name: parse_flag(name, getattr(args, name)) for name in _run_flags()
             if getattr(args, name) is not None}
    if data:
        flags["data"] = data
    if args.quiet:
        flags["quiet"] = True
    cfg = apply_flags(cfg, flags)
    extra = parse_hyper_flags(args.hyperparameters)
    if extra:
        merged = {k: dict(v) for k, v in cfg.hyperparameters.items()}
        for cid, values in extra.items():
            merged.setdefault(cid, {}).update(values)
        cfg = cfg.with_(hyperparameters=merged)
    return cfg


#: Exit status of a run that wrote its report but ranked no candidate (every one was
#: skipped, failed or unhealthy). 2 is a user error, 130 an interrupt.
NOTHING_RANKED = 3

#: The exit statuses of the commands that run a comparison, for their --help.
EXIT_STATUS = ("exit status: 0 when at least one candidate was ranked; 3 when the report was written but "
               "no candidate was ranked (every one was skipped, failed or unhealthy); 2 for a mistake in the "
               "input (one line on standard error); 130 when interrupted")


#: The exit statuses of ``contenders batch``.
BATCH_EXIT_STATUS = ("exit status: 0 when at least one dataset ranked a candidate; 3 when datasets ran but none "
                     "ranked a candidate; 1 when no dataset could be run; 2 for a mistake in the input; "
                     "130 when interrupted")


def _run_and_report(cfg, command_line: str) -> int:
    from contenders.output.report import write_report
    from contenders.pipeline.recovery import run_with_recovery

    say = (lambda _t: None) if cfg.quiet else (lambda t: print(t, flush=True))
    result = run_with_recovery(cfg, progress=say)
    report = write_report(result, result.out, command_line=command_line)
    if not cfg.quiet:
        print()
        recovery = (result.recovery.reading or [result.recovery.reason]) if result.recovery else []
        for sentence in result.comparison.verdict + recovery:
            print(sentence)
        print()
        print(f"report:  {Path(report).resolve()}")
        print(f"summary: {(result.out / 'summary.json').resolve()}")
    if not result.comparison.ranking:
        counts = {}
        for r in result.candidates:
            counts[r.status] = counts.get(r.status, 0) + 1
        print(f"contenders: no candidate was ranked ({', '.join(f'{n} {s}' for s, n in sorted(counts.items()))}); "
              f"the report says why for each; exit status {NOTHING_RANKED}", file=sys.stderr)
        return NOTHING_RANKED
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    """Fit every candidate to one dataset, compare them and write the report.

    A quick run needs no configuration file: contenders run DATA.csv --outcome COL.
    Every configuration key has a flag; flags override the file given with --config."""
    cfg = _config_from_args(args, args.data)
    return _run_and_report(cfg, " ".join(["contenders", *sys.argv[1:]]))


def cmd_recovery(args: argparse.Namespace) -> int:
    """Model recovery: could this design and sample size tell the candidates apart?

    Runs (or reads from the fit store) the comparison, then simulates --replicates
    datasets (default 20) with the observed design from each ranked candidate's
    posterior, fits every candidate to each, and reports how often each candidate wins
    on data generated by each (Wilson & Collins 2019). The number of fits and an
    estimated time are printed before the fits start; an interrupted analysis resumes."""
    from contenders.statistics.recovery import DEFAULT_REPLICATES

    cfg = _config_from_args(args, args.data)
    if args.replicates is None and not cfg.replicates:
        cfg = cfg.with_(replicates=DEFAULT_REPLICATES)
    elif cfg.replicates < 2:
        raise UserError("contenders recovery needs --replicates R with R >= 2 (the default is "
                        f"{DEFAULT_REPLICATES})")
    return _run_and_report(cfg, " ".join(["contenders", *sys.argv[1:]]))

def cmd_calibrate(args: argparse.Namespace) -> int:
    """Simulation-based calibration: simulate datasets from each candidate's priors on the
    design of your data (same predictors and groups), fit the candidate to each, and test
    whether the true parameter values rank uniformly among the posterior draws. Writes
    OUT/calibration.html, calibration.json and calibration.csv; exit status 1 when a
    candidate fails. Every fit is stored, so an interrupted study resumes."""
    from contenders.output.calibration_page import write_calibration
    from contenders.pipeline.calibration import calibrate

    cfg = _config_from_args(args, args.data)
    if args.names:
        cfg = cfg.with_(only=tuple(args.names))
    say = (lambda _t: None) if cfg.quiet else (lambda t: print(t, flush=True))
    from contenders.pipeline.store import FitStore

    with FitStore(cfg.store or Path(cfg.out) / "fits").in_use():   # prune waits for it
        study = calibrate(cfg, args.simulations, progress=say)
    page = write_calibration(study, cfg.out, command_line=" ".join(["contenders", *sys.argv[1:]]))
    if not cfg.quiet:
        for cal in study.candidates:
            print(f"{cal.id}: {cal.status}: {cal.reason}")
        print(f"calibration: {Path(page).resolve()}")
    return 1 if any(cal.status == "failed" for cal in study.candidates) else 0

def cmd_batch(args: argparse.Namespace) -> int:
    """Compare the same candidates on many datasets with one configuration: DATASETS is a
    folder (every .csv in it) or a list of CSV files. Writes OUT/NAME/report.html and
    summary.json per dataset and OUT/index.html, index.csv and index.json across them;
    a dataset that cannot be run is listed with its reason and the others go on."""
    from contenders.pipeline.batch import run_batch
    from contenders.inputs.config import RunConfig

    cfg = _config_from_args(args, None)
    if args.out is None and cfg.out == RunConfig().out:
        cfg = cfg.with_(out=Path("reports/batch"))
    items = args.datasets or ([str(cfg.data)] if cfg.data else [])
    say = (lambda _t: None) if cfg.quiet else (lambda t: print(t, flush=True))
    batch = run_batch(cfg, items, progress=say, command_line=" ".join(["contenders", *sys.argv[1:]]))
    if not cfg.quiet:
        print()
        for r in batch.rows:
            print(f"{r.name}: " + (r.winner or r.outcome if r.status == "ok" else f"not run: {r.reason}"))
        print()
        print(f"index: {(batch.out / 'index.html').resolve()}")
    if not any(r.status == "ok" for r in batch.rows):
        return 1
    if not any(r.best for r in batch.rows if r.status == "ok"):
        print(f"contenders: no dataset ranked a candidate; the index and each report say why; "
              f"exit status {NOTHING_RANKED}", file=sys.stderr)
        return NOTHING_RANKED
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    """Generate the invented demo data into demo_data/ and run every built-in on it,
    writing reports/demo/report.html. The first run compiles all programs."""
    from contenders import demo
    from contenders.inputs.config import apply_flags, load

    root = Path(__file__).resolve().parents[2]
    folder = Path(args.folder) if args.folder else root / "demo_data"
    cfg_path = demo.write(folder)
    cfg = load(cfg_path)
    changes = {}
    if args.out:
        changes["out"] = args.out
    if args.engine:
        changes["engine"] = args.engine
    if args.draws:
        changes["draws"] = args.draws
        changes["warmup"] = args.draws
    if args.quiet:
        changes["quiet"] = True
    if args.quick:
        from contenders.inputs.config import quick_profile

        cfg = quick_profile(cfg).with_(out=Path(args.out) if args.out else root / "reports" / "demo-quick")
    cfg = apply_flags(cfg, changes)
    if not cfg.quiet:
        print(f"demo data: {folder / 'icon_search.csv'} (invented; see {folder / 'README.md'})")
    return _run_and_report(cfg, " ".join(["contenders", *sys.argv[1:]]))


def cmd_example(args: argparse.Namespace) -> int:
    """Write one of the README's invented example datasets (shifts: repeated response
    times with a slope per operator; seals: right-censored lifetimes) as CSV into
    --folder DIR, which must be a folder of your own (never one of the tool's folders),
    and print the command that analyses it."""
    from contenders import examples

    root = Path(__file__).resolve().parents[2]
    folder = Path(args.folder).expanduser()
    target = folder.resolve()
    own = [Path(__file__).resolve().parent, *(root / sub for sub in ("src", "stan", "demo_data", "reports", "tests"))]
    for place in own:
        if target == place.resolve() or place.resolve() in target.parents:
            raise UserError(f"{folder} is inside the tool's own folder {place}; contenders example writes only "
                            "into a folder of your own: pass --folder DIR elsewhere (nothing was written)")
    try:
        path = examples.write(args.name, folder)
    except OSError as exc:
        raise UserError(f"{folder}: cannot write the example ({exc.strerror}); choose another --folder")
    _, about = examples.ABOUT[args.name]
    print(f"wrote {path} (invented; columns: {about})")
    run_flags = {
        "shifts": "--outcome rt_ms --predictors shift --group operator --slopes shift",
        "seals": "--outcome hours --predictors coolant --censored still_running",
    }[args.name]
    print(f"next:  contenders run {path} {run_flags} --out {folder / (args.name + '-report')}")
    return 0


def cmd_new(args: argparse.Namespace) -> int:
    """Write a new candidate file that already keeps the contract, ready to edit. It goes
    into the current folder, or into --candidates FOLDER (created if missing); never into
    the built-in candidates folder, and never over an existing file."""
    import re

    from contenders.inputs.candidates import builtin_folder
    from contenders.scaffold import TEMPLATE

    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", args.name):
        raise UserError(f"'{args.name}' is not a plain id; use letters, digits and underscores, starting with a letter")
    folder = Path(args.candidates) if args.candidates else Path.cwd()
    if folder.resolve() == builtin_folder().resolve():
        raise UserError(f"{folder} is the built-in candidates folder, which contenders new never writes into; "
                        "pass --candidates FOLDER with a folder of your own (it is created if missing)")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(f"{folder}: cannot create the candidates folder ({exc.strerror}); "
                        "choose another with --candidates FOLDER")
    path = folder / f"{args.name}.stan"
    clash = sorted(p.name for p in folder.glob("*.stan") if p.stem.lower() == args.name.lower() and p.stem != args.name)
    if clash:
        raise UserError(f"{folder / clash[0]} already exists, and ids ignore case, so '{args.name}' would clash "
                        "with it (the run would refuse the folder); choose another name or folder (nothing was written)")
    label = args.label or args.name.replace("_", " ").capitalize()
    try:
        with path.open("x") as fh:   # "x": fails when the file exists, so nothing is overwritten
            fh.write(TEMPLATE.replace("@LABEL@", label.replace('"', "'")))
    except FileExistsError:
        raise UserError(f"{path} already exists; choose another name or folder (nothing was overwritten)")
    except OSError as exc:
        raise UserError(f"{path}: cannot write the file ({exc.strerror}); choose another folder with --candidates")
    shown = args.candidates if args.candidates else "."
    print(f"wrote {path.resolve()}: a lognormal starting point; edit the likelihood and priors")
    print(f"next:  contenders check {args.name} --candidates {shown}")
    print(f"then:  contenders run DATA.csv --outcome COL --candidates {shown}   (runs the candidates "
          "in that folder only; copy built-ins from the built-in folder to compare with them)")
    return 0


def cmd_store(args: argparse.Namespace) -> int:
    """Show the size of a fit store by candidate, by data file and by kind of file; with
    --prune, remove the files no run can reach any more: their candidate's program
    changed or is gone, their engine version is no longer installed, their data file is
    gone or changed, or (with --older-than DAYS) they were not used for that long. Asks
    before deleting unless --yes; never runs while a run uses the store."""
    from contenders.pipeline import store_contents as sc
    from contenders.inputs.candidates import builtin_folder, discover
    from contenders.inputs.config import RunConfig

    folder = Path(args.store) if args.store else RunConfig().out / "fits"
    contents = sc.read(folder)
    print(f"fit store {folder.resolve()}: {sc.human(contents.size)} in {len(contents.files)} file(s)")
    for title, attribute in (("by candidate", "candidate"), ("by data file", "dataset"), ("by kind", "kind")):
        print(f"{title}:")
        for name, size, count in contents.by(attribute):
            print(f"  {sc.human(size):>10}  {count:>5} file(s)  {name}")
    if any(f.record is None for f in contents.files):
        print("unknown: files written before the store kept an index (pruned only with --older-than)")
    if contents.busy:
        print(f"{len(contents.busy)} file(s) being written by a run now (never touched)")
    if not args.prune:
        if args.older_than is not None or args.yes:
            raise UserError("--older-than and --yes go with --prune; add --prune to remove files")
        return 0
    if args.older_than is not None and args.older_than < 0:
        raise UserError(f"--older-than {args.older_than}: give a number of days >= 0")
    codes = {c.code_hash for c in discover(builtin_folder())}
    for extra in args.candidates:
        codes |= {c.code_hash for c in discover(extra)}
    with sc.exclusive(contents.folder):
        contents = sc.read(folder)   # as it is now that no run can change it
        doomed = sc.mark_unreachable(contents, codes, older_than_days=args.older_than)
        if not doomed and not contents.debris:
            print("nothing to prune: every file can still be reached by a run")
            return 0
        print(f"to remove: {len(doomed)} file(s), {sc.human(sum(f.size for f in doomed))}"
              + (f", and {len(contents.debris)} temporary file(s) of runs that are gone" if contents.debris else ""))
        reasons: dict[str, list] = {}
        for f in doomed:
            reasons.setdefault(f.why[0], []).append(f)
        for why, files in sorted(reasons.items()):
            print(f"  {sc.human(sum(f.size for f in files)):>10}  {len(files):>5} file(s)  {why}")
        if not args.yes:
            if not sys.stdin.isatty():
                raise UserError("contenders store --prune asks before deleting; pass --yes to delete without "
                                "asking (nothing was deleted)")
            answer = input("delete these files? [y/N] ").strip().lower()
            if answer not in ("y", "yes"):
                print("nothing was deleted")
                return 0
        removed, freed = sc.remove(contents, doomed)
    print(f"removed {removed} file(s), {sc.human(freed)}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="contenders",
        description="Put several Bayesian candidate models through the same trials on one dataset.",
    )
    parser.add_argument("--version", action="version", version=f"contenders {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on any error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("list", help="list candidates with label, support and state",
                       description=cmd_list.__doc__)
    p.add_argument("--candidates", metavar="DIR",
                   help="folder of .stan candidate files (default: the built-in candidates)")
    p.set_defaults(func=cmd_list)

    p = sub.add_parser("run", help="compare the candidates on one dataset and write the report",
                       description=cmd_run.__doc__, epilog=EXIT_STATUS)
    p.add_argument("data", nargs="?", metavar="DATA.csv", help="CSV data file (or [data] file in --config)")
    _add_run_flags(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("recovery", help="model recovery: could this design tell the candidates apart?",
                       description=cmd_recovery.__doc__, epilog=EXIT_STATUS)
    p.add_argument("data", nargs="?", metavar="DATA.csv", help="CSV data file (or [data] file in --config)")
    _add_run_flags(p)
    p.set_defaults(func=cmd_recovery)

    p = sub.add_parser("calibrate", help="simulation-based calibration of candidates on the data's design",
                       description=cmd_calibrate.__doc__)
    p.add_argument("names", nargs="*", metavar="CANDIDATE", help="ids to calibrate (default: all, or --only)")
    p.add_argument("--data", metavar="DATA.csv", help="CSV data file whose design is used (or [data] file in --config)")
    p.add_argument("--simulations", type=int, default=100, metavar="N",
                   help="simulated datasets (and fits) per candidate (default 100)")
    _add_run_flags(p)
    p.set_defaults(func=cmd_calibrate)

    p = sub.add_parser("batch", help="compare the candidates on many datasets and write an index",
                       description=cmd_batch.__doc__, epilog=BATCH_EXIT_STATUS)
    p.add_argument("datasets", nargs="*", metavar="DATASETS",
                   help="a folder of CSV files, or CSV files (default: [data] file in --config)")
    _add_run_flags(p)
    p.set_defaults(func=cmd_batch)

    p = sub.add_parser("demo", help="run every built-in on the invented demo study",
                       description=cmd_demo.__doc__, epilog=EXIT_STATUS)
    p.add_argument("--folder", metavar="DIR", help="where to write the demo data (default: demo_data/)")
    p.add_argument("--out", metavar="DIR", help="output folder (default: reports/demo)")
    p.add_argument("--engine", choices=("auto", "pystan", "cmdstanpy"), help="Stan engine")
    p.add_argument("--draws", type=int, metavar="N", help="warmup and kept draws per chain (default 1000)")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--quick", action="store_true",
                   help="a quick look (4 chains x 250 draws, PSIS-LOO without refits), written to reports/demo-quick")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("example", help="write an invented example dataset of the README into a folder of yours",
                       description=cmd_example.__doc__)
    p.add_argument("name", choices=("shifts", "seals"), help="which dataset")
    p.add_argument("--folder", metavar="DIR", required=True, help="where to write it (created if missing)")
    p.set_defaults(func=cmd_example)

    p = sub.add_parser("new", help="write a new candidate file that keeps the contract",
                       description=cmd_new.__doc__)
    p.add_argument("name", metavar="NAME", help="id of the new candidate (the file name without .stan)")
    p.add_argument("--label", help="label in the header (default: from the name)")
    p.add_argument("--candidates", metavar="DIR",
                   help="folder to write into, created if missing (default: the current folder; "
                        "never the built-in candidates folder)")
    p.set_defaults(func=cmd_new)

    p = sub.add_parser("store", help="size of the fit store by candidate and data file; --prune removes "
                       "what no run can reach", description=cmd_store.__doc__)
    p.add_argument("--store", metavar="DIR", help="folder of stored fits (default: reports/run/fits, "
                   "where a run with the default --out keeps them)")
    p.add_argument("--prune", action="store_true", help="remove the files no run can reach any more")
    p.add_argument("--older-than", type=float, metavar="DAYS", default=None,
                   help="with --prune: also remove files not used for DAYS days")
    p.add_argument("--candidates", metavar="DIR", action="append", default=[],
                   help="with --prune: a folder of your own candidates whose fits are kept "
                        "(repeatable; the built-in candidates always count)")
    p.add_argument("--yes", action="store_true", help="with --prune: delete without asking")
    p.set_defaults(func=cmd_store)

    p = sub.add_parser("check", help="compile candidates and check the contract without sampling",
                       description=cmd_check.__doc__)
    p.add_argument("names", nargs="*", metavar="CANDIDATE", help="ids to check (default: all)")
    p.add_argument("--candidates", metavar="DIR",
                   help="folder of .stan candidate files (default: the built-in candidates)")
    p.add_argument("--engine", default="auto", choices=("auto", "pystan", "cmdstanpy"),
                   help="Stan engine; auto uses CmdStanPy when CmdStan is installed, else PyStan")
    p.add_argument("--jobs", type=int, default=0, metavar="N",
                   help="programs compiled at once (default: number of cores)")
    p.set_defaults(func=cmd_check)
    return parser


def _on_interrupt(signum, frame) -> None:
    """Ctrl-C: remember it (engines check after each call, since asyncio-based clients
    can absorb the interrupt) and interrupt what is running now."""
    from contenders.engines.base import INTERRUPTED

    INTERRUPTED.set()
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    import signal
    import threading

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, _on_interrupt)
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        args = parser.parse_args(["list", *(argv or [])])
    try:
        status = args.func(args)
        sys.stdout.flush()
        return status
    except BrokenPipeError:
        # The reader went away (`contenders store | head`): stop quietly, as other
        # command-line tools do, and keep Python from complaining at exit.
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except UserError as exc:
        if args.debug:
            raise
        print(f"contenders: {exc.message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        from contenders.cleanup import remove_all
        from contenders.engines.pystan_engine import stop_workers

        stop_workers()
        remove_all()
        print("contenders: interrupted; every fit finished so far is kept in the fit store "
              "(OUT/fits), so running the same command again resumes where this run stopped",
              file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
