"""Arrays of a few megabytes from the heap, not from fresh memory maps.

glibc's ``malloc`` serves a block above its "mmap threshold" (128 kB at the
start) from a new memory map and unmaps it when it is freed, so the next
array of that size costs page faults again; the threshold only rises when a
larger block has been freed before.  The bootstrap allocates and frees
arrays of about 1 MB thousands of times (a Newton step on a chunk of
replicates), so how fast it ran depended on what happened to be freed
earlier: a 100-condition ``fit`` took 4.3 s or 6.3 s with the same numbers
(``benchmarks/bench_user_wait.py --heap``).  :func:`arrays_on_the_heap` fixes
the threshold at 32 MB, which also stops the dynamic adjustment (glibc's
``mallopt``, ``M_MMAP_THRESHOLD`` and ``M_TRIM_THRESHOLD``).  Elsewhere
(macOS, musl) it does nothing.  The command line calls it at start, and so do
its worker processes.
"""

from __future__ import annotations

import ctypes

#: Blocks up to this size come from the heap.
MMAP_THRESHOLD = 32 << 20
#: Free memory at the heap's top kept for reuse instead of returned to the system.
TRIM_THRESHOLD = 64 << 20
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3      # glibc's malloc.h


def arrays_on_the_heap() -> bool:
    """Serve blocks up to :data:`MMAP_THRESHOLD` from the heap; False where there is no ``mallopt``.

    glibc's ``mallopt`` answers 1 even to settings it ignores, so True only
    says that it was asked; ``bench_user_wait.py --heap`` measures the effect.
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):   # no C library to ask, or one without mallopt
        return False
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD))
