"""What a short-lived process of fleetdb (the ``fleetdb`` command) does on its way out."""

from __future__ import annotations

import gc
import sys


def freeze_for_exit() -> None:
    """Close the store's connections, then put every object alive out of the cyclic
    garbage collector's sight.

    The interpreter's shutdown runs several full collections, each walking every object
    of every imported module: 0.2 to 0.4 s after pandas, scipy and SQLAlchemy are
    imported (tests/bench/README.md), to free memory the process returns to the system
    a moment later anyway. Frozen objects are still freed by reference counting, and
    ``atexit`` handlers still run; objects in reference cycles are left to the operating
    system, so the connections are closed first (a SQLite file's write-ahead log is
    folded back into it then, as when they close at the end of a normal shutdown). Call
    it last, and only in a process about to exit.
    """
    db = sys.modules.get("fleetdb.db")  # loaded by any command that opened the store
    if db is not None:
        db.close_all()
    gc.freeze()
