"""One BLAS thread for a whole command, so that its numbers do not depend on the machine.

Threaded BLAS changes the order of summation with the thread count (the 10th digit of small
eigenvalues moved with it, and with it the results digest), and on a busy machine its
spinning threads made a one-second fit take fifteen. ``fpca.fit_arrays`` pins its own
steps; the commands that compute numbers (run, verify, demo) pin everything else too.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Limit every loaded BLAS to one thread while the block runs (numpy's is loaded first:
    ``threadpoolctl`` can only limit libraries that are already loaded)."""
    import numpy  # noqa: F401
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield
