"""Drawing the report's figures on both cores.

A report has a dozen figures; drawing them (colour mapping, layout, PNG encoding) is
several seconds of work on one core, most of it while the analysis still runs.
:class:`FigureQueue` forks one helper process at the start of a job, before the scans
are loaded, while the process holds only the imported libraries.  A helper forked later,
from the process holding the analysis, would keep alive every page the analysis frees
or rewrites after the fork (measured: 5 to 20 bytes per cell for each such helper on a
30 m floor); this one shares nothing of the analysis, so it keeps nothing of it.

Figures are handed to the queue as soon as their data are known (:meth:`FigureQueue.add`).
The helper gets each one in its small form: a figure object's ``for_helper()`` (a floor
map's grid already block-reduced for display, :func:`~scananalyse.report.figures.prepare_map`;
a few megabytes whatever the floor's size), packed (``forked.pack``) through an anonymous
pipe made before the fork.  Both processes take work from a shared queue, a pipe of job
numbers (each read of four bytes takes one job), so whichever is free draws the next
figure and neither is left with a long tail; the main process joins in at
:meth:`FigureQueue.finish`, after writing the data files.  A figure whose small form is
missing, too big or not picklable is drawn by the main process.

It falls back to drawing everything in the main process, at :meth:`FigureQueue.finish`,
when forking is not safe or not useful (``forked.parallel_possible``: another Python
thread is running, e.g. inside a Dask worker; one usable core; not Linux;
``SCANANALYSE_SERIAL=1``).  If the helper fails or is killed, every job it did not report
done is done by the main process, so a failure there costs time, never a figure, and an
error in a figure reaches the caller as it would without the helper.  Interrupts: the
helper exits on its own interrupt without writing anything more; :meth:`FigureQueue.close`
(always called) kills and reaps it.
"""

from __future__ import annotations

import gc
import json
import os
import select
import struct
import threading
from pathlib import Path

from .._libc import default_malloc, trim_free_memory
from ..forked import close_quietly, fork_quietly, pack, parallel_possible, read_to_end, stop_child, unpack, write_all

__all__ = ["FigureQueue", "file_stem", "parallel_possible"]

_TOKEN = struct.Struct("<I")
_HEADER = struct.Struct("<IQ")  # job number, length of its packed form
#: Niceness added in the helper process (it yields the CPU to the main process under contention).
_HELPER_NICENESS = 10
#: Largest packed job sent to the helper; a bigger one is drawn by the main process. [bytes]
MAX_PACKED = 32 << 20
#: Pipe buffer asked for the data pipe (Linux F_SETPIPE_SZ; the default is 64 KiB), so
#: that handing a reduced map over costs the main process one write. [bytes]
_DATA_PIPE = 1 << 20


def file_stem(slug: str) -> str:
    """The file-name form of a figure's slug: letters and digits kept, the rest ``_``."""
    return "".join(c if c.isalnum() else "_" for c in slug)[:60]


def _read_exact(fd: int, n: int) -> bytes | None:
    """``n`` bytes from a pipe, or None if it ends first."""
    parts, got = [], 0
    while got < n:
        b = os.read(fd, min(n - got, _DATA_PIPE))
        if not b:
            return None
        parts.append(b)
        got += len(b)
    return b"".join(parts)


def _small_form(job):
    """What the helper is sent for a job: ``(kind, path, callable)`` with the callable's
    ``for_helper()`` form where it has one."""
    kind, path, fn = job
    small = getattr(fn, "for_helper", None)
    return kind, path, (small() if small is not None else fn)


def _do(kind: str, path, fn, dpi: int) -> str:
    """Draw a figure into ``path`` (PNG) and return its caption, or run a task ("")."""
    if kind == "task":
        fn()
        return ""
    from . import figures as F

    fig = fn()
    F.save_png(fig, path, dpi=dpi)
    return getattr(fig, "scananalyse_caption", "")


class FigureQueue:
    """Figures (and other output files) drawn by a helper process and by this one.

    Parameters
    ----------
    dpi : resolution of the PNG files. [dots per inch]
    parallel : None (fork the helper if :func:`parallel_possible`), True or False. [-]

    Create it early (the helper forks at construction), :meth:`add` figures and
    :meth:`add_task` tasks as they become known, then :meth:`finish`; use as a context
    manager so that :meth:`close` always runs.
    """

    def __init__(self, *, dpi: int = 130, parallel: bool | None = None):
        self.dpi = dpi
        self._jobs: list = []  # (kind, path, callable)
        self._local: list = []  # job numbers only this process can do
        self._done: dict = {}  # job number -> caption, as reported by the helper
        self._pid = None
        self._status = None
        self._tok_r = self._tok_w = self._data_w = self._reply_r = None
        self._reply_buf = b""
        self.parallel = False
        self.finished = False
        want = parallel_possible() if parallel is None else bool(parallel)
        if want and hasattr(os, "fork"):
            self._start_helper()

    # -- helper process ------------------------------------------------------------
    def _start_helper(self) -> None:
        tok_r, tok_w = os.pipe()
        data_r, data_w = os.pipe()
        reply_r, reply_w = os.pipe()
        try:
            import fcntl

            fcntl.fcntl(data_w, getattr(fcntl, "F_SETPIPE_SZ", 1031), _DATA_PIPE)
        except (ImportError, OSError):
            pass  # the default buffer: slower hand-over, same result
        pid = fork_quietly()
        if pid == 0:  # the helper
            code = 1
            try:
                for fd in (tok_w, data_w, reply_r):
                    os.close(fd)
                try:
                    # below the main process, whose analysis is the critical path: the
                    # helper takes the second core and what the main process leaves idle
                    os.nice(_HELPER_NICENESS)
                except OSError:
                    pass
                # the helper's temporaries (a figure's) are freed back to the system, not
                # kept for reuse as the analysis's grids are (pipeline._reuse_freed_memory)
                default_malloc()
                self._serve(tok_r, data_r, reply_w)
                code = 0
            except BaseException:  # noqa: BLE001 - the main process does what is missing
                code = 1
            finally:
                os._exit(code)
        os.close(data_r)
        os.close(reply_w)
        self._pid, self._tok_r, self._tok_w, self._data_w, self._reply_r = pid, tok_r, tok_w, data_w, reply_r
        self.parallel = True

    def _serve(self, tok_r: int, data_r: int, reply_w: int) -> None:
        """The helper's loop: take job numbers from the queue until it is empty and do each
        job from its packed form (received by a reader thread, so that the main process's
        writes never wait for a figure to finish), reporting each one done."""
        got: dict = {}
        cond = threading.Condition()
        ended = []

        def receive():
            try:
                while True:
                    head = _read_exact(data_r, _HEADER.size)
                    if head is None:
                        return
                    n, size = _HEADER.unpack(head)
                    body = _read_exact(data_r, size)
                    if body is None:
                        return
                    with cond:
                        got[n] = body
                        cond.notify_all()
            finally:
                with cond:
                    ended.append(True)
                    cond.notify_all()

        threading.Thread(target=receive, daemon=True).start()
        while True:
            raw = os.read(tok_r, _TOKEN.size)
            if len(raw) < _TOKEN.size:
                return
            (n,) = _TOKEN.unpack(raw)
            with cond:
                while n not in got and not ended:
                    cond.wait()
                body = got.pop(n, None)
            if body is None:  # the data pipe ended first: the main process does this one
                return
            kind, path, fn = unpack(body)
            del body
            caption = _do(kind, path, fn, self.dpi)
            del fn
            # a figure is a web of reference cycles: collect it now (the objects shared with
            # the main process are frozen, so this visits the helper's own only), then give
            # its memory back
            gc.collect()
            trim_free_memory()
            write_all(reply_w, (json.dumps({"job": n, "caption": caption}) + "\n").encode())

    def _collect(self, block: bool) -> None:
        """Read the helper's reports (``block``: until it has closed its end)."""
        if self._reply_r is None:
            return
        if block:
            self._reply_buf += read_to_end(self._reply_r)
        else:
            while select.select([self._reply_r], [], [], 0)[0]:
                b = os.read(self._reply_r, 1 << 16)
                if not b:
                    break
                self._reply_buf += b
        *lines, self._reply_buf = self._reply_buf.split(b"\n")
        for line in lines:
            d = json.loads(line)
            self._done[int(d["job"])] = d["caption"]

    def _lose_helper(self) -> None:
        """The helper is gone (or its pipes are): everything left is done here."""
        if self._pid is not None:
            stop_child(self._pid)
            self._pid = None
        self.parallel = False

    # -- main process --------------------------------------------------------------
    @property
    def jobs(self) -> tuple:
        """The jobs queued so far, ``(kind, path, callable)`` ("figure" or "task"; the path
        of a task is None), in the order of their numbers."""
        return tuple(self._jobs)

    def add(self, path, build) -> int:
        """Queue a figure: ``build()`` returns a matplotlib Figure, saved as the PNG file
        ``path``; returns the job's number."""
        return self._add(("figure", Path(path), build))

    def add_task(self, task) -> int:
        """Queue another output file: ``task()`` writes its own file (atomically: a task
        killed half-way must leave nothing); returns the job's number."""
        return self._add(("task", None, task))

    def _add(self, job) -> int:
        if self.finished:
            raise RuntimeError("the figure queue is finished")
        n = len(self._jobs)
        self._jobs.append(job)
        body = None
        if self.parallel:
            try:
                body = pack(_small_form(job))
            except Exception:  # noqa: BLE001 - not picklable: drawn here
                body = None
            if body is not None and len(body) > MAX_PACKED:
                body = None
        if body is None:
            self._local.append(n)
            return n
        try:
            write_all(self._data_w, _HEADER.pack(n, len(body)))
            write_all(self._data_w, body)
            os.write(self._tok_w, _TOKEN.pack(n))
        except OSError:  # the helper is gone: this job and what it left are done here
            self._local.append(n)
            self._lose_helper()
        self._collect(block=False)
        return n

    def finish(self) -> dict:
        """Do the jobs left (this process first does those only it can do, then takes
        from the shared queue until it is empty), wait for the helper, redo whatever it
        did not report done; returns job number -> caption ("" for a task)."""
        if self.finished:
            raise RuntimeError("finish() was called already")
        self.finished = True
        out = {}
        tok_r = self._tok_r
        if self._tok_w is not None:  # no more work: the queue ends when it is empty
            os.close(self._tok_w)
            self._tok_w = None
        if self._data_w is not None:
            os.close(self._data_w)
            self._data_w = None
        for n in self._local:
            out[n] = _do(*self._jobs[n], self.dpi)
        if tok_r is not None:
            while True:
                raw = os.read(tok_r, _TOKEN.size)
                if len(raw) < _TOKEN.size:
                    break
                (n,) = _TOKEN.unpack(raw)
                out[n] = _do(*self._jobs[n], self.dpi)
        if self._pid is not None:
            self._collect(block=True)
            status = self._status if self._status is not None else os.waitpid(self._pid, 0)[1]
            self._pid = None
            self._status = status
        for n, cap in self._done.items():
            out.setdefault(n, cap)
        for n in range(len(self._jobs)):
            if n not in out:  # the helper took it and did not report it done
                out[n] = _do(*self._jobs[n], self.dpi)
        return out

    def helper_running(self) -> bool:
        """True while the helper process has not exited (it is reaped here when it has)."""
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
        for name in ("_tok_r", "_tok_w", "_data_w", "_reply_r"):
            fd = getattr(self, name)
            if fd is not None:
                close_quietly(fd)
                setattr(self, name, None)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
