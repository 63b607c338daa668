"""The C library's memory calls, where the C library is glibc (Linux); no-ops elsewhere."""

from __future__ import annotations

import sys

__all__ = ["glibc", "trim_free_memory"]

_LIBC: list = []


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
