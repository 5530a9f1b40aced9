"""The ``contenders`` command: parse options, call the library, print.

User errors end with one line on standard error and exit status 2; ``--debug``
shows the traceback instead.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__
from .errors import UserError


def _candidates_folder(value: str | None) -> Path:
    from .candidates import builtin_folder

    return Path(value) if value else builtin_folder()


def cmd_list(args: argparse.Namespace) -> int:
    """Candidates with label, support and whether they keep the contract (no compiling)."""
    from .candidates import discover

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
    from .candidates import check_outputs, discover, example_design
    import os

    from .engines import compile_all, get_engine

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
              "(about 45 s each the first time; cached afterwards) ...", flush=True)
    programs = compile_all(engine, cands, jobs=jobs)
    failed = 0
    for c in cands:
        if c.id in programs:
            check_outputs(c, engine, programs[c.id], example_design(c.support))
        if c.valid:
            print(f"ok       {c.id}")
        else:
            failed += 1
            print(f"invalid  {c.id}")
            for p in c.problems:
                print("         " + p.replace("\n", "\n         "))
    print(f"{len(cands) - failed} of {len(cands)} candidates pass ({engine.version()})")
    return 1 if failed else 0


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


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        args = parser.parse_args(["list", *(argv or [])])
    try:
        return args.func(args)
    except UserError as exc:
        if args.debug:
            raise
        print(f"contenders: {exc.message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("contenders: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
