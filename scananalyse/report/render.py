"""Drawing the report's figures on every core.

A report has a dozen figures; drawing them (block reduction, colour mapping, layout,
PNG encoding) is most of the time spent on the outputs, and matplotlib draws on one core.
:class:`FigureRenderer` forks one helper process when that is safe: both processes take
the next figure from a shared queue (a pipe of figure numbers: each read of four bytes
takes one) and write it as a PNG, while the main process first writes the data files.
The helper shares the analysis through the fork (nothing is copied or pickled) and
reports the captions of its figures through a second pipe.

It falls back to drawing everything in the main process when forking is not safe or
not useful: another Python thread is running (e.g. inside a Dask worker), the process
may use only one core, the platform is not Linux, there is nothing to draw, or
``SCANANALYSE_SERIAL=1`` is set.  A single figure is worth a helper too: the main process
goes on with the analysis while it is drawn.  If the helper fails or is killed, the
figures it did not deliver are drawn by the main process, so a failure there costs time,
never a figure.  Interrupts: the helper exits on its own interrupt without writing anything
more; :meth:`FigureRenderer.close` (always called by the main process) kills and reaps
it.
"""

from __future__ import annotations

import json
import os
import struct
from pathlib import Path

from ..forked import close_quietly, fork_quietly, parallel_possible, read_to_end, stop_child

__all__ = ["FigureRenderer", "file_stem", "parallel_possible"]

_TOKEN = struct.Struct("<I")
#: Niceness added in a helper process (it yields the CPU to the main process under contention).
_HELPER_NICENESS = 10


def file_stem(slug: str) -> str:
    """The file-name form of a figure's slug: letters and digits kept, the rest ``_``."""
    return "".join(c if c.isalnum() else "_" for c in slug)[:60]


class FigureRenderer:
    """Draw ``specs`` into ``figdir`` as PNG files, in two processes when possible.

    Parameters
    ----------
    specs : list of ``(section, slug, caption, build)``; ``build()`` returns a
        matplotlib Figure. [-]
    figdir : existing folder for the PNG files. [-]
    dpi : resolution of the PNG files. [dots per inch]
    parallel : None (decide with :func:`parallel_possible`), True or False. [-]
    first : number of the first figure (file names start with the number). [-]
    order : the order in which the figures are taken (a permutation of their indices;
        default the specs' order); put the costliest first. [-]
    stems : file names (without ``.png``) of the figures, one per spec, all different;
        default ``NN_slug`` numbered from ``first``. [-]
    tasks : other output files to write the same way: callables without arguments, each
        writing its own file (atomically: a task killed half-way must leave nothing). [-]
    tasks_first : queue the tasks before the figures (default) or after them. [-]

    The helper (if any) starts drawing at construction; :meth:`finish` makes the
    calling process draw (and write) the rest and returns the figures in ``specs`` order.
    """

    def __init__(self, specs, figdir, *, dpi: int = 130, parallel: bool | None = None, first: int = 1,
                 order=None, stems=None, tasks=(), tasks_first: bool = True):
        self.specs = list(specs)
        self.tasks = list(tasks)
        # the queue's order: the costliest figures first, so that neither process is left
        # drawing a long one alone at the end (the files keep the specs' numbering)
        self.order = list(range(len(self.specs))) if order is None else [int(i) for i in order]
        if sorted(self.order) != list(range(len(self.specs))):
            raise ValueError("order must be a permutation of the figure indices")
        # tasks have the numbers after the figures'
        numbered = [len(self.specs) + k for k in range(len(self.tasks))]
        self._queue = numbered + self.order if tasks_first else self.order + numbered
        self.figdir = Path(figdir)
        self.dpi = dpi
        if stems is None:
            self.stems = [f"{i:02d}_" + file_stem(slug) for i, (_, slug, _, _) in enumerate(self.specs, start=first)]
        else:
            self.stems = [str(x) for x in stems]
            if len(self.stems) != len(self.specs) or len(set(self.stems)) != len(self.stems):
                raise ValueError("stems must give one different file name per figure")
        self._pid = None
        self._status = None  # the helper's wait status once it has been reaped
        self._queue_r = self._reply_r = None
        self.parallel = False
        want = parallel_possible() if parallel is None else bool(parallel)
        if want and self._queue and hasattr(os, "fork"):
            self._start_helper()

    # -- helper process ------------------------------------------------------------
    def _start_helper(self) -> None:
        queue_r, queue_w = os.pipe()
        reply_r, reply_w = os.pipe()
        # every figure number goes into the queue before the fork (a few bytes per figure,
        # far below a pipe's buffer), then the write end is closed: an empty queue is EOF
        os.write(queue_w, b"".join(_TOKEN.pack(i) for i in self._queue))
        os.close(queue_w)
        pid = fork_quietly()  # objects frozen and free memory handed back (forked.py)
        if pid == 0:  # the helper
            code = 1
            try:
                os.close(reply_r)
                try:
                    # below the main process, whose analysis is the critical path: the
                    # helper takes the second core and what the main process leaves idle
                    os.nice(_HELPER_NICENESS)
                except OSError:
                    pass
                done = self._work(queue_r)
                data = json.dumps(done).encode()
                view = memoryview(data)
                while view:
                    view = view[os.write(reply_w, view):]
                code = 0
            except BaseException:  # noqa: BLE001 - the main process draws what is missing
                code = 1
            finally:
                os._exit(code)
        os.close(reply_w)
        self._pid = pid
        self._queue_r = queue_r
        self._reply_r = reply_r
        self.parallel = True

    def _work(self, queue_r) -> dict:
        """Take numbers from the queue until it is empty; returns number -> caption ("" for
        a task)."""
        from . import figures as F

        done = {}
        while True:
            raw = os.read(queue_r, _TOKEN.size)
            if len(raw) < _TOKEN.size:
                return done
            (i,) = _TOKEN.unpack(raw)
            if i >= len(self.specs):
                self.tasks[i - len(self.specs)]()
                done[i] = ""
            else:
                done[i] = self._draw(i, F)

    def _draw(self, i: int, F) -> str:
        _, _, _, build = self.specs[i]
        fig = build()
        F.save_png(fig, self.figdir / f"{self.stems[i]}.png", dpi=self.dpi)
        return getattr(fig, "scananalyse_caption", "")

    # -- main process --------------------------------------------------------------
    def finish(self) -> list:
        """Draw the remaining figures here; return ``[(section, caption, png_bytes, file)]``
        in ``specs`` order (``file`` relative to the output folder)."""
        from . import figures as F

        extras: dict = {}
        if self.parallel:
            extras.update(self._work(self._queue_r))
            os.close(self._queue_r)
            self._queue_r = None
            chunks = read_to_end(self._reply_r)
            os.close(self._reply_r)
            self._reply_r = None
            status = self._status if self._status is not None else os.waitpid(self._pid, 0)[1]
            self._pid = None
            if os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0 and chunks:
                extras.update({int(k): v for k, v in json.loads(chunks).items()})
        for k, task in enumerate(self.tasks):
            if len(self.specs) + k not in extras:  # serial mode, or the helper did not do it
                task()
        out = []
        for i, (sec, _, cap, _) in enumerate(self.specs):
            if i not in extras:  # serial mode, or the helper did not deliver it
                extras[i] = self._draw(i, F)
            path = self.figdir / f"{self.stems[i]}.png"
            out.append((sec, f"{cap} {extras[i]}".strip(), path.read_bytes(), f"figures/{path.name}"))
        return out

    def helper_running(self) -> bool:
        """True while this renderer's helper process has not finished (it is reaped here
        when it has; :meth:`finish` still collects what it drew)."""
        if self._pid is None or self._status is not None:
            return False
        pid, status = os.waitpid(self._pid, os.WNOHANG)
        if pid == 0:
            return True
        self._status = status
        return False

    def close(self) -> None:
        """Stop the helper if it still runs (after an error or interrupt) and free the pipes."""
        if self._pid is not None and self._status is None:
            stop_child(self._pid)
            self._pid = None
        for name in ("_queue_r", "_reply_r"):
            fd = getattr(self, name)
            if fd is not None:
                close_quietly(fd)
                setattr(self, name, None)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
