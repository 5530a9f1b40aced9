"""Live progress of a run: one line per candidate, elapsed time and what remains.

On a terminal the block of lines is redrawn in place; otherwise (a log file, CI) each
change of stage is printed as one new line. Quiet runs print nothing. The estimate of
what remains is the mean time of the candidates fitted so far in this run, times the
candidates still waiting or running, divided by the workers; before the first
candidate finishes no estimate is shown.
"""

from __future__ import annotations

import sys
import threading
import time
from typing import Callable, TextIO

#: Stages a candidate passes through, in the words printed.
STAGES = {
    "waiting": "waiting", "check": "checking the program", "prior": "prior predictive trial",
    "posterior": "fitting", "checks": "predictive checks", "out-of-sample": "PSIS-LOO",
    "done": "done", "stored": "from the fit store", "failed": "failed", "skipped": "skipped",
    "unhealthy": "done (sampler problems)",
}
FINAL = ("done", "stored", "failed", "skipped", "unhealthy")


def _clock(seconds: float) -> str:
    seconds = max(0, int(round(seconds)))
    return f"{seconds // 60}:{seconds % 60:02d}"


class Progress:
    """Collects (candidate, stage) events and shows them."""

    def __init__(self, ids: list[str], workers: int = 1, quiet: bool = False,
                 stream: TextIO | None = None, live: bool | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.ids = list(ids)
        self.workers = max(1, workers)
        self.quiet = quiet
        self.stream = stream or sys.stdout
        self.live = self.stream.isatty() if live is None else live
        self.clock = clock
        self.start = clock()
        self.stage = {cid: "waiting" for cid in self.ids}
        self.detail = {cid: "" for cid in self.ids}
        self.began: dict[str, float] = {}
        self.ended: dict[str, float] = {}
        self.fitted_seconds: list[float] = []   # candidates computed in this run (not from store)
        self._drawn = 0
        self._lock = threading.Lock()

    # -- events ---------------------------------------------------------------------
    def event(self, cid: str, stage: str) -> None:
        """``stage`` is a key of STAGES, optionally followed by ': detail'."""
        name, _, detail = stage.partition(": ")
        with self._lock:
            if cid not in self.stage:
                self.ids.append(cid)
            now = self.clock()
            if name not in FINAL:
                self.began.setdefault(cid, now)
            elif cid not in self.ended:
                self.ended[cid] = now
                if name in ("done", "unhealthy") and cid in self.began:
                    self.fitted_seconds.append(now - self.began[cid])
            self.stage[cid], self.detail[cid] = name, detail
            self._show(cid)

    def remaining(self) -> float | None:
        """Seconds still needed, estimated; None before any candidate was fitted."""
        if not self.fitted_seconds:
            return None
        mean = sum(self.fitted_seconds) / len(self.fitted_seconds)
        now = self.clock()
        left = 0.0
        for cid in self.ids:
            if self.stage[cid] in FINAL:
                continue
            spent = now - self.began[cid] if cid in self.began else 0.0
            left += max(mean - spent, 0.1 * mean)
        return left / self.workers

    def line(self, cid: str) -> str:
        stage = STAGES.get(self.stage[cid], self.stage[cid])
        detail = f" ({self.detail[cid]})" if self.detail[cid] else ""
        if cid in self.ended and cid in self.began:
            took = f"  {_clock(self.ended[cid] - self.began[cid])}"
        elif cid in self.began:
            took = f"  {_clock(self.clock() - self.began[cid])}"
        else:
            took = ""
        width = max(len(i) for i in self.ids)
        return f"  {cid:<{width}}  {stage}{detail}{took}"

    def footer(self) -> str:
        done = sum(self.stage[c] in FINAL for c in self.ids)
        left = self.remaining()
        eta = f", about {_clock(left)} left" if left is not None and done < len(self.ids) else ""
        return f"  {done} of {len(self.ids)} candidates finished, {_clock(self.clock() - self.start)} elapsed{eta}"

    # -- output ---------------------------------------------------------------------
    def _show(self, cid: str) -> None:
        if self.quiet:
            return
        if self.live:
            self.redraw()
        else:
            left = self.remaining()
            eta = f"; about {_clock(left)} left" if left is not None and self.stage[cid] in FINAL else ""
            self.stream.write(self.line(cid).rstrip() + eta + "\n")
            self.stream.flush()

    def redraw(self) -> None:
        if self.quiet or not self.live:
            return
        lines = [self.line(c) for c in self.ids] + [self.footer()]
        out = []
        if self._drawn:
            out.append(f"\x1b[{self._drawn}F")
        out.extend("\x1b[2K" + ln + "\n" for ln in lines)
        self.stream.write("".join(out))
        self.stream.flush()
        self._drawn = len(lines)

    def ticker(self, every: float = 1.0) -> "_Ticker":
        """A background thread that redraws the block every ``every`` seconds (live only)."""
        return _Ticker(self, every)


class _Ticker:
    def __init__(self, progress: Progress, every: float) -> None:
        self.progress, self.every = progress, every
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True, name="progress-ticker")

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            with self.progress._lock:
                self.progress.redraw()

    def __enter__(self) -> "_Ticker":
        if self.progress.live and not self.progress.quiet:
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout=2)
