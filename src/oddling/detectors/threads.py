"""BLAS threads for the detectors' linear algebra: one for small matrices.

OpenBLAS's threads spin while they wait for work; on a busy machine two of them on two cores slow a
120 x 256 SVD from 3 ms to 50-300 ms (measured here). Matrices this small gain nothing from a
second thread on a quiet machine either, so the detectors run them on one.
"""
from __future__ import annotations

from contextlib import nullcontext

SMALL = 4_000_000    # matrix elements up to which one BLAS thread is used


def blas_threads_for(*shapes: tuple[int, ...]):
    """A context in which BLAS uses one thread when every array of these shapes is small."""
    import math

    if max((math.prod(shape) for shape in shapes), default=0) > SMALL:
        return nullcontext()
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")


def one_blas_thread():
    """A context in which BLAS uses one thread: for loops of many small products."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")
