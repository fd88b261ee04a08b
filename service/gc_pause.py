"""Pausing Python's cyclic garbage collector around allocation-heavy, cycle-free work.

Parsing a large request body creates hundreds of thousands of small objects; each time the
allocation count passes the collector's threshold it scans, and now and then the whole heap is
scanned. Objects that form no cycles are freed by reference counting anyway, so pausing the
collector for the parse loses nothing. Pauses nest and may overlap across threads: the
collector runs again once the last pause ends (if it was running before the first).

Example:
    >>> import gc
    >>> with paused_garbage_collection():
    ...     gc.isenabled()
    False
    >>> gc.isenabled()
    True
"""

from __future__ import annotations

import gc
import threading
from collections.abc import Iterator
from contextlib import contextmanager

_lock = threading.Lock()
_active = 0
_was_enabled = False


@contextmanager
def paused_garbage_collection() -> Iterator[None]:
    global _active, _was_enabled
    with _lock:
        if _active == 0:
            _was_enabled = gc.isenabled()
            gc.disable()
        _active += 1
    try:
        yield
    finally:
        with _lock:
            _active -= 1
            if _active == 0 and _was_enabled:
                gc.enable()
