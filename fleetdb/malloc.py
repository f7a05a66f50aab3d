"""glibc's allocator, set for a short batch that makes and drops many large arrays.

By default glibc gives every allocation above 128 KiB its own memory map and returns it
to the system when freed, so each of the analysis's temporary arrays (tens of MB at
fleet scale) is zero-filled again by the kernel, page by page. For the length of a full
refresh, :func:`roomy` keeps such arrays on the heap and freed memory in the process for
the next one (about a tenth less time and a quarter less system time at 20,000 units,
tests/bench/README.md); afterwards the defaults come back and the spare memory is
returned. Elsewhere than glibc (musl, macOS) it does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
from collections.abc import Iterator
from contextlib import contextmanager
from functools import cache

# mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_TOP_PAD, _M_MMAP_THRESHOLD = -1, -2, -3
_DEFAULTS = {_M_TRIM_THRESHOLD: 128 * 1024, _M_TOP_PAD: 0, _M_MMAP_THRESHOLD: 128 * 1024}
_ROOMY = {_M_TRIM_THRESHOLD: 1 << 30, _M_TOP_PAD: 256 << 20,
          _M_MMAP_THRESHOLD: 32 << 20}  # 32 MiB: glibc's largest on 64-bit


@cache
def _glibc() -> ctypes.CDLL | None:
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name or "libc.so.6")
        libc.mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
        libc.malloc_trim.argtypes = [ctypes.c_size_t]
        libc.malloc.argtypes, libc.malloc.restype = [ctypes.c_size_t], ctypes.c_void_p
        libc.free.argtypes = [ctypes.c_void_p]
        libc.madvise.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int]
    except (OSError, AttributeError):
        return None
    return libc


@contextmanager
def roomy() -> Iterator[None]:
    """Within the block, large allocations reuse freed heap memory (see the module)."""
    libc = _glibc()
    if libc is None:
        yield
        return
    for param, value in _ROOMY.items():
        libc.mallopt(param, value)
    try:
        yield
    finally:
        for param, value in _DEFAULTS.items():
            libc.mallopt(param, value)
        libc.malloc_trim(0)


_MADV_POPULATE_WRITE = 23  # Linux 5.14 and later
_CHUNK = 16 << 20  # below roomy()'s mmap threshold: the chunks come from the heap
_PAGE = 4096


def prefault(nbytes: int) -> int:
    """Within :func:`roomy`, grow the heap by about ``nbytes`` with its pages already
    mapped, then leave it free for the arrays to come; returns the bytes mapped.

    The kernel maps a page on its first write, one fault at a time; on a virtual machine
    each such fault can cost several microseconds (hundreds of MB a second). Asking for
    the pages in one call (``MADV_POPULATE_WRITE``) costs a fraction of that. Ask for no
    more than the work will use: the pages count in the process's memory at once. Does
    nothing where the call or glibc is missing.
    """
    libc = _glibc()
    if libc is None or nbytes < _CHUNK:
        return 0
    chunks, mapped = [], 0
    try:
        for _ in range(nbytes // _CHUNK):
            at = libc.malloc(_CHUNK)
            if not at:
                break
            chunks.append(at)
            start = -(-at // _PAGE) * _PAGE
            length = (at + _CHUNK - start) // _PAGE * _PAGE
            if libc.madvise(start, length, _MADV_POPULATE_WRITE) != 0:
                break  # not supported here: leave the pages to fault as they are used
            mapped += length
    finally:
        for at in reversed(chunks):
            libc.free(at)
    return mapped
