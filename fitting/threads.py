"""One BLAS thread for the fits.

The fits solve many small systems (per-condition blocks, 2x2 Schur
complements, one Fisher matrix per observer, small least-squares problems).
Multi-threaded BLAS only adds start-up and hand-over costs to calls of that
size: on 2 cores a 100-condition ``fit`` spent about 35 % more CPU and wall
time with two BLAS threads than with one (``benchmarks/bench_user_wait.py``),
and when the cores are busy with other work the threads' waiting costs far
more.  The command line therefore runs every command under
:func:`one_blas_thread`; library users can do the same.  Parallel work is
done with processes (figures, ``plan``), not with BLAS threads.
"""

from __future__ import annotations

import os
from contextlib import contextmanager

#: What OpenBLAS, OpenMP and MKL read when they load to size their thread pools.
THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


@contextmanager
def one_blas_thread():
    """Run the block with one BLAS and OpenMP thread.

    Two mechanisms, because the BLAS libraries load lazily: numpy and scipy
    each bring an OpenBLAS of their own, loaded when the package (scipy's:
    ``scipy.linalg``) is first imported.  Libraries already loaded are
    limited with threadpoolctl; those loaded inside the block, and the
    child processes started in it, read the environment variables set here
    (restored afterwards; a library loaded inside the block keeps one
    thread).
    """
    from threadpoolctl import threadpool_limits

    saved = {name: os.environ.get(name) for name in THREAD_VARIABLES}
    os.environ.update(dict.fromkeys(THREAD_VARIABLES, "1"))
    try:
        with threadpool_limits(limits=1):
            yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value
