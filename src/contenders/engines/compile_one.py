"""Compile one candidate into an engine's cache; print the seconds it took.

Used by :func:`contenders.engines.compile_all` to compile several programs at once:
``python -m contenders.engines.compile_one ENGINE PATH``. A line starting with
``notice: `` is a message to show (waiting for another process's compile lock).
"""

from __future__ import annotations

import sys

from contenders.inputs.candidates import load_candidate
from contenders.engines import SamplingError, get_engine


def main(argv: list[str]) -> int:
    engine_name, path = argv
    from contenders.engines import compile_one_notice
    from contenders.engines.base import lock_notices

    candidate = load_candidate(path)
    try:
        with lock_notices(lambda text: print(compile_one_notice + text, flush=True)):
            program = get_engine(engine_name).compile(candidate)
    except SamplingError as exc:
        print(exc, file=sys.stderr)
        return 1
    print(f"{program.compile_seconds:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
