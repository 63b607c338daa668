"""Progress reporting for long runs: a bar on a terminal, plain lines otherwise.

The pipeline calls ``progress.stage(name)`` as a context manager around each
stage; timings of every stage are kept in ``progress.timings`` (seconds) and end
up in ``results.h5`` metadata.
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager

__all__ = ["Progress"]


class Progress:
    """Stage-by-stage progress.

    Parameters
    ----------
    stages : names of the stages expected, in order (used for the bar; others may appear).
    quiet : print nothing.
    stream : where to print (default ``sys.stderr``).
    """

    def __init__(self, stages=(), *, quiet: bool = False, stream=None):
        self.stages = list(stages)
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stderr
        self.timings: dict[str, float] = {}
        self._t0 = time.perf_counter()
        self._done = 0
        try:
            self.tty = bool(self.stream.isatty())
        except (AttributeError, ValueError):
            self.tty = False

    def _bar(self, label: str, frac: float) -> str:
        width = 28
        full = int(round(frac * width))
        return f"\r[{'#' * full}{'.' * (width - full)}] {100 * frac:5.1f}%  {label:<40.40}"

    @contextmanager
    def stage(self, name: str):
        n = max(len(self.stages), self._done + 1)
        if not self.quiet:
            if self.tty:
                self.stream.write(self._bar(name + " ...", self._done / n))
                self.stream.flush()
        t = time.perf_counter()
        try:
            yield
        finally:
            dt = time.perf_counter() - t
            self.timings[name] = self.timings.get(name, 0.0) + dt
            self._done += 1
            if not self.quiet:
                if self.tty:
                    self.stream.write(self._bar(f"{name} {dt:.1f} s", min(1.0, self._done / n)))
                    self.stream.flush()
                else:
                    self.stream.write(f"scananalyse: {name}: {dt:.2f} s\n")
                    self.stream.flush()

    def finish(self, message: str | None = None):
        total = time.perf_counter() - self._t0
        self.timings["total"] = total
        if self.quiet:
            return
        if self.tty:
            self.stream.write("\n")
        if message:
            self.stream.write(message.rstrip("\n") + "\n")
        self.stream.flush()
