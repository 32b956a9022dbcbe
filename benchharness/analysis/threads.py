"""One thread for the linear algebra of an analysis, held for every BLAS copy.

The analysis works on small matrices (cells × parameters), where a multi-threaded
BLAS only adds start-up and contention on a busy machine (a second thread made
the CPU time 1.8× on the development machine). ``threadpoolctl`` sets the limit
on the thread pools *already loaded* when the limit starts: a library loaded
inside the limit keeps its own default. numpy and scipy each ship their own copy
of OpenBLAS, and scipy's is loaded only with ``scipy.linalg``; so `one_thread`
loads both before it sets the limit, and the limit then holds for every copy
(tests/test_threads.py checks it with ``threadpool_info`` after a whole
analysis).
"""

from __future__ import annotations

from contextlib import contextmanager


@contextmanager
def one_thread():
    """Hold every loaded BLAS and OpenMP pool to one thread inside the block."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: only speed depends on it
        yield
        return
    import numpy  # noqa: F401  (numpy's BLAS)
    import scipy.linalg  # noqa: F401  (scipy's own BLAS copy, loaded before the limit)

    with threadpool_limits(1):
        yield
