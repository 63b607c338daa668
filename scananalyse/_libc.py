"""glibc's allocator settings for the command-line process only (``mallopt(3)``).

A run makes a few hundred full-grid arrays; above glibc's ``mmap`` threshold each is served
by a fresh ``mmap`` and unmapped when freed, so every new grid is paged in (zeroed) again.
:func:`tune_malloc_for_cli`, called by :func:`scananalyse.cli.main` when it runs as the
program (``argv`` None), serves large blocks from the heap instead and lets the heap keep
freed memory for reuse.  It is never applied on import or when ``analyse``/``compare`` is
called from Python, and never when the user has set any glibc malloc variable
(``MALLOC_*``, ``GLIBC_TUNABLES``): then glibc does what the user asked.  The measured
effect is in bench/RESULTS.md.
"""

from __future__ import annotations

import os
import sys

__all__ = ["glibc", "user_set_malloc", "tune_malloc_for_cli", "CLI_TRIM_THRESHOLD"]

_LIBC: list = []
#: glibc ``mallopt`` parameter numbers (malloc.h).
M_TRIM_THRESHOLD, M_MMAP_MAX = -1, -4
#: Free memory the heap may keep at its top before giving it back (glibc's default is
#: 128 KiB, raised as blocks are freed). [bytes]
CLI_TRIM_THRESHOLD = 1 << 30


def glibc():
    """The C library when it is glibc (with ``mallopt``), else None."""
    if not _LIBC:
        _LIBC.append(_load())
    return _LIBC[0]


def _load():
    import ctypes
    import ctypes.util
    import platform

    if not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc":
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    return libc if hasattr(libc, "mallopt") else None


def user_set_malloc(environ=None) -> bool:
    """True when the environment sets any glibc malloc tunable (``MALLOC_*`` or
    ``GLIBC_TUNABLES``, see ``mallopt(3)`` and ``tunables(7)``)."""
    env = os.environ if environ is None else environ
    return any(k.startswith("MALLOC_") or k == "GLIBC_TUNABLES" for k in env)


def tune_malloc_for_cli(environ=None) -> bool:
    """Large blocks from the heap (``M_MMAP_MAX`` 0) and up to :data:`CLI_TRIM_THRESHOLD`
    kept free at its top (``M_TRIM_THRESHOLD``), for the rest of the process.

    Call once, at the start of the command-line process, before any thread starts.  Does
    nothing (and returns False) where the C library is not glibc or when the user set a
    malloc tunable (:func:`user_set_malloc`); returns True when applied.
    """
    if user_set_malloc(environ):
        return False
    libc = glibc()
    if libc is None:
        return False
    libc.mallopt(M_MMAP_MAX, 0)
    libc.mallopt(M_TRIM_THRESHOLD, CLI_TRIM_THRESHOLD)
    return True
