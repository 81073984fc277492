"""One BLAS thread for the fits.

The fits solve many small systems (per-condition blocks, 2x2 Schur
complements, one Fisher matrix per observer, small least-squares problems).
Multi-threaded BLAS only adds start-up and hand-over costs to calls of that
size: on 2 cores a 100-condition ``fit`` spent about 35 % more CPU and wall
time with two BLAS threads than with one (``benchmarks/bench_user_wait.py``).
The command line therefore runs every command under :func:`one_blas_thread`;
library users can do the same.  Parallel work is done with processes
(figures, ``plan``), not with BLAS threads.
"""

from __future__ import annotations

from contextlib import contextmanager


@contextmanager
def one_blas_thread():
    """Limit BLAS and OpenMP thread pools to one thread inside the block (threadpoolctl)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        yield
