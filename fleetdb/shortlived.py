"""What a short-lived process of fleetdb (the ``fleetdb`` command) does on its way out."""

from __future__ import annotations

import gc


def freeze_for_exit() -> None:
    """Put every object alive now out of the cyclic garbage collector's sight.

    The interpreter's shutdown runs several full collections, each walking every object
    of every imported module: 0.2 to 0.4 s after pandas, scipy and SQLAlchemy are
    imported (tests/bench/README.md), to free memory the process returns to the system
    a moment later anyway. Frozen objects are still freed by reference counting, and
    ``atexit`` handlers still run; only objects in reference cycles are left to the
    operating system. Call it last, and only in a process about to exit.
    """
    gc.freeze()
