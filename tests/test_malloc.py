"""fleetdb.malloc: inside ``roomy`` a freed large array stays in the process for reuse;
outside, glibc returns it to the system at once (its documented default behaviour for
allocations above the 128 KiB mmap threshold, mallopt(3))."""

from __future__ import annotations

import os

import numpy as np
import pytest

from fleetdb import malloc

SIZE = 24 << 20  # above the default mmap threshold, under roomy's 32 MiB


def _rss() -> int:
    return int(open("/proc/self/statm").read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _rss_kept_after_free() -> int:
    """Resident memory still held right after a touched SIZE-byte array is freed."""
    before = _rss()
    block = np.ones(SIZE // 8)
    assert block.sum() == SIZE // 8  # every page touched
    del block
    return _rss() - before


@pytest.mark.skipif(malloc._glibc() is None or not os.path.exists("/proc/self/statm"),
                    reason="glibc on Linux only")
def test_roomy_keeps_freed_arrays_and_the_defaults_come_back() -> None:
    assert _rss_kept_after_free() < SIZE // 4  # default: given back to the system
    with malloc.roomy():
        assert _rss_kept_after_free() > SIZE // 2  # kept in the heap for the next array
        again = np.arange(SIZE // 8, dtype=float)
        assert again[-1] == SIZE // 8 - 1
        del again
    assert _rss_kept_after_free() < SIZE // 4  # defaults restored, spare memory trimmed


@pytest.mark.skipif(malloc._glibc() is None or not os.path.exists("/proc/self/statm"),
                    reason="glibc on Linux only")
def test_prefault_maps_the_heap_that_later_arrays_use() -> None:
    # Reference: madvise(2) MADV_POPULATE_WRITE (Linux 5.14) maps the pages at once; the
    # process's minor-fault count (getrusage(2) ru_minflt) shows whether arrays made
    # afterwards still fault their pages in one by one.
    import resource

    def faults() -> int:
        return resource.getrusage(resource.RUSAGE_SELF).ru_minflt

    with malloc.roomy():
        assert malloc.prefault(1 << 20) == 0  # under one chunk: nothing to do
        before = _rss()
        mapped = malloc.prefault(4 * SIZE)
        if mapped == 0:
            pytest.skip("MADV_POPULATE_WRITE is not available on this kernel")
        assert mapped > 3 * SIZE and _rss() - before > 3 * SIZE
        start = faults()
        blocks = [np.ones(SIZE // 8 // 2) for _ in range(6)]  # 3 x SIZE in all
        assert sum(float(b.sum()) for b in blocks) == 3 * SIZE // 8
        assert faults() - start < (3 * SIZE // 4096) // 10  # not one fault a page
        del blocks
