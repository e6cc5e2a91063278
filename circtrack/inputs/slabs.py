"""Large arrays that reads decode into, in memory maps of their own reused from task to task.

A task reads a few fields of tens of MB (one per role: time steps x levels x latitudes x
longitudes) and reduces them. Allocated by numpy, they came from the C library's heap, which worker
processes keep whole (engine/pool.py, ``keep_freed_memory``: returning it to the kernel cost page
faults on every task). There the next task's fields did not always fit the holes the last task's
left among the small allocations that outlived it (its results, open files' caches): the heap
grew by a field now and then, so a worker's resident size depended on how many tasks it ran and
in which order (measured: 0.26 GB after the tasks of one month, 0.28-0.30 GB after a year's).

:func:`empty` gives arrays of at least :data:`MIN_BYTES` a private anonymous memory map each,
outside the heap. When the last view of such an array is gone its map goes back to a per-process
free list, and the next :func:`empty` of that size or a little smaller takes it (its pages are
resident already: no page faults, no zeroing), so a worker holds the fields of its largest task
and nothing more, however many tasks it runs. Smaller arrays come from numpy as before.
"""

from __future__ import annotations

import mmap
import threading
import weakref

import numpy as np

MIN_BYTES = 4 * 2 ** 20       # smaller arrays: numpy's own allocator
KEEP_BYTES = 1 << 30          # free maps kept per process for the next reads, at most
_FREE = []                    # free maps (pages already resident), appended by the weak references' callbacks
_LOCK = threading.RLock()     # a callback may run while this thread holds it (an array freed in take)
_LIVE = {}                    # id -> weak reference of each array handed out (keeps the callbacks alive)


def empty(shape, dtype):
    """``np.empty(shape, dtype)``: large ones in a reused memory map (module docstring)."""
    dtype = np.dtype(dtype)
    count = int(np.prod(shape, dtype=np.int64))
    nbytes = count * dtype.itemsize
    if nbytes < MIN_BYTES or nbytes == 0:
        return np.empty(shape, dtype=dtype)
    buf = _take(nbytes)
    base = np.frombuffer(buf, dtype=dtype, count=count)     # every view of the result refers to it
    ref = weakref.ref(base, lambda r, buf=buf: _give(r, buf))
    _LIVE[id(ref)] = ref
    return base.reshape(shape)


def _take(nbytes):
    """The smallest free map of at least ``nbytes`` (and at most twice that), else a new one. Free
    maps too small for this read go: reads of one run come in a few sizes, and a task a little larger
    than the last (8 time steps after 7) would otherwise keep both."""
    with _LOCK:
        fits = [b for b in _FREE if nbytes <= len(b) <= 2 * nbytes]
        if fits:
            buf = min(fits, key=len)
            _FREE.remove(buf)
            return buf
        _FREE[:] = [b for b in _FREE if len(b) >= nbytes]     # a map is unmapped with its last reference
    buf = mmap.mmap(-1, nbytes, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    try:
        # huge pages where the system gives them on request, as numpy asks for its large arrays:
        # fewer page faults and TLB misses (measured without: 0.7 s more CPU on a year's run of about 18 s)
        buf.madvise(mmap.MADV_HUGEPAGE)
    except (AttributeError, OSError, ValueError):
        pass
    return buf


def _give(ref, buf):
    """An array handed out is gone: its map is free (the oldest go beyond :data:`KEEP_BYTES`)."""
    try:
        _LIVE.pop(id(ref), None)
        with _LOCK:
            _FREE.append(buf)
            while sum(len(b) for b in _FREE) > KEEP_BYTES:
                _FREE.pop(0)
    except (AttributeError, TypeError):    # the interpreter is shutting down: the maps go with it
        pass


def release():
    """Unmap the free maps (a run ended; before forking workers: they start with none)."""
    with _LOCK:
        _FREE.clear()


def held():
    """Bytes in free maps (tests)."""
    with _LOCK:
        return sum(len(b) for b in _FREE)
