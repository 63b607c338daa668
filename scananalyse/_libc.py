"""The C library's memory calls, where the C library is glibc (Linux); no-ops elsewhere."""

from __future__ import annotations

import sys

__all__ = ["default_malloc", "glibc", "trim_free_memory"]

_LIBC: list = []
#: glibc ``mallopt`` parameters (malloc.h) and their defaults.
_M_TRIM_THRESHOLD, _M_MMAP_MAX = -1, -4
_DEFAULT_TRIM_THRESHOLD, _DEFAULT_MMAP_MAX = 128 * 1024, 65536


def glibc():
    """The C library when it is glibc (with ``mallopt`` and ``malloc_trim``), else None."""
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
    return libc if hasattr(libc, "mallopt") and hasattr(libc, "malloc_trim") else None


def trim_free_memory() -> None:
    """Give the heap's free memory back to the system (glibc ``malloc_trim(0)``, which also
    releases free pages inside the heap); nothing where the C library is not glibc."""
    libc = glibc()
    if libc is not None:
        libc.malloc_trim(0)


def default_malloc() -> None:
    """glibc's default handling of large blocks (served by ``mmap``, unmapped when freed;
    the heap's free top trimmed past 128 KiB), e.g. in a helper process forked during a
    run that set it otherwise, then ``malloc_trim``; nothing where the C library is not
    glibc."""
    libc = glibc()
    if libc is not None:
        libc.mallopt(_M_MMAP_MAX, _DEFAULT_MMAP_MAX)
        libc.mallopt(_M_TRIM_THRESHOLD, _DEFAULT_TRIM_THRESHOLD)
        libc.malloc_trim(0)
