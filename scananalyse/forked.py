"""One function computed in a forked process while the caller goes on.

The analysis has stretches where one step waits for another and the second core idles:
the registration needs only the two scans, while the zones, the loss split and the depth
statistics need only the newer one.  :class:`ForkedCall` runs such a function in a child
process made with ``fork``: the child sees the caller's memory as it was (nothing is
copied or pickled on the way in), computes, and sends its result back pickled through a
pipe.  Only small results are worth it (a registration, not a grid).

It is safe and exact by construction:

* the child runs the same code on the same data, so the result is the one the caller
  would have computed (tested);
* warnings the function raises in the child are raised again in the caller, with their
  category, when the result is taken;
* if the child fails in any way (an exception, a result that does not pickle, a crash or
  a kill), :meth:`ForkedCall.result` computes the function again in the caller, so an
  error reaches the caller exactly as without the child;
* where forking is not safe or not useful (see :func:`parallel_possible`) the function is
  computed at once, in the caller, when the call is made;
* :meth:`ForkedCall.close` (the context manager's exit) kills and reaps a child still
  running, after an error or an interrupt in the caller.
"""

from __future__ import annotations

import gc
import os
import pickle
import signal
import sys
import threading
import warnings

from ._libc import trim_free_memory

__all__ = ["ForkedCall", "close_quietly", "fork_quietly", "pack", "parallel_possible", "read_to_end", "stop_child",
           "unpack", "write_all"]


def _usable_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def parallel_possible() -> bool:
    """True when a helper process may be forked: Linux, two usable cores or more, no other
    Python thread running (a fork copies only the calling thread, so a lock another thread
    holds would stay locked in the child), and ``SCANANALYSE_SERIAL`` is not ``1``."""
    # Linux only: forking a process that uses macOS system frameworks (e.g. Accelerate
    # under numpy) without exec is not safe there
    return (sys.platform.startswith("linux") and hasattr(os, "fork")
            and os.environ.get("SCANANALYSE_SERIAL", "") != "1"
            and _usable_cores() >= 2 and threading.current_thread() is threading.main_thread()
            and threading.active_count() == 1)


def fork_quietly() -> int:
    """``os.fork()`` with the garbage collector's objects frozen across it and the heap's
    free memory handed back first (both keep the child from copying pages for nothing):

    * a collection in the child would write to the header of every object it visits and so
      copy the pages they lie on (measured: a few bytes per cell at 30 m); the caller takes
      its objects back right after the fork (only if nothing was frozen before: a caller's
      own freeze is left alone);
    * pages the child inherits while they are free would be copied when the caller reuses
      them.
    """
    with warnings.catch_warnings():
        # Python 3.12+ warns about forking with native threads (e.g. the BLAS pool); the
        # children made here run Python code only and exit with os._exit
        warnings.simplefilter("ignore", DeprecationWarning)
        thaw = gc.get_freeze_count() == 0
        trim_free_memory()
        gc.freeze()
        pid = -1
        try:
            pid = os.fork()
        finally:
            if pid != 0 and thaw:
                gc.unfreeze()
    return pid


def pack(obj) -> bytes:
    """``obj`` as bytes for the package's own processes: a forked child's result to its
    parent, or a figure to draw to the figure helper (report/render.py), always through an
    anonymous pipe made just before the fork (never a file or a socket)."""
    return pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)


def unpack(data: bytes):
    """The object :func:`pack` made ``data`` from (only ever bytes read from such a pipe)."""
    return pickle.loads(data)


def stop_child(pid: int) -> None:
    """Kill a child process (SIGKILL) and reap it; nothing if it is already gone."""
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    try:
        os.waitpid(pid, 0)
    except ChildProcessError:
        pass


def read_to_end(fd: int, size: int = 1 << 20) -> bytes:
    """Everything a pipe gives until its write ends are closed."""
    chunks = []
    while True:
        b = os.read(fd, size)
        if not b:
            return b"".join(chunks)
        chunks.append(b)


def write_all(fd: int, data) -> None:
    """Write every byte of ``data`` to a pipe (``os.write`` may take part of it at a time)."""
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def close_quietly(fd: int) -> None:
    """Close a file descriptor, ignoring one already closed."""
    try:
        os.close(fd)
    except OSError:
        pass


class ForkedCall:
    """``fn(*args, **kwargs)``, computed in a forked child when :func:`parallel_possible`,
    else at once.

    Use as a context manager; :meth:`result` returns the value (computing it here if the
    child failed).  The result must be picklable.

    Parameters
    ----------
    fn : the function; it must not depend on anything the caller changes after the call
        (the child sees the memory as it was at the fork).
    *args, **kwargs : its arguments.
    parallel : None (decide with :func:`parallel_possible`), True or False.
    """

    def __init__(self, fn, *args, parallel: bool | None = None, **kwargs):
        self._fn, self._args, self._kwargs = fn, args, kwargs
        self._pid = None
        self._fd = None
        self._done = False
        self._value = None
        self.forked = False
        if parallel_possible() if parallel is None else parallel:
            self._start()
        else:
            self._value, self._done = fn(*args, **kwargs), True
            self._fn = self._args = self._kwargs = None

    def _start(self) -> None:
        r, w = os.pipe()
        pid = fork_quietly()
        if pid == 0:  # the child
            code = 1
            try:
                os.close(r)
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    value = self._fn(*self._args, **self._kwargs)
                sent = [(str(m.message), m.category) for m in caught]
                data = pack((value, sent))
                write_all(w, data)
                code = 0
            except BaseException:  # noqa: BLE001 - the caller computes it again and sees the error
                code = 1
            finally:
                os._exit(code)
        os.close(w)
        self._pid, self._fd, self.forked = pid, r, True

    def result(self):
        """The function's value (waits for the child; computes it here without one)."""
        if self._done:
            return self._value
        value, ok = None, False
        if self._pid is not None:
            chunks = read_to_end(self._fd)
            os.close(self._fd)
            self._fd = None
            _, status = os.waitpid(self._pid, 0)
            self._pid = None
            if os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0 and chunks:
                try:
                    value, sent = unpack(chunks)
                    ok = True
                except Exception:  # noqa: BLE001 - computed here instead
                    ok = False
                if ok:
                    for message, category in sent:
                        warnings.warn(message, category, stacklevel=2)
        if not ok:
            value = self._fn(*self._args, **self._kwargs)
        self._value, self._done = value, True
        self._fn = self._args = self._kwargs = None
        return value

    def close(self) -> None:
        """Kill and reap the child if it still runs; free the pipe."""
        if self._pid is not None:
            stop_child(self._pid)
            self._pid = None
        if self._fd is not None:
            close_quietly(self._fd)
            self._fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
