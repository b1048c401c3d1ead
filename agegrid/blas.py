"""BLAS on one thread while a build runs.

numpy's and scipy's OpenBLAS start a thread per core and, after each call, keep them spinning for more
work. A build's BLAS calls are small (rotations of a few thousand points, the depth fit's dot products over a
million samples) and come from threads that already fill the cores (the dask tasks, the tile encoders, the
hashing), so the spinning threads only take CPU from them: about 0.1 CPU-s of a warm build's 1.6 at 3.4
million cells (sixteen alternating builds in one process; measured in the README). threadpoolctl finds the
BLAS libraries loaded and sets their thread count, and restores it afterwards.
"""
from __future__ import annotations

import contextlib

from threadpoolctl import threadpool_limits


@contextlib.contextmanager
def one_blas_thread():
    """Run the ``with`` body with every loaded BLAS library limited to one thread."""
    with threadpool_limits(limits=1, user_api="blas"):
        yield
