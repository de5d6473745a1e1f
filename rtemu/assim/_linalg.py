"""Batched small-matrix linear algebra helpers."""

from __future__ import annotations

import contextlib
import functools


def one_blas_thread(func):
    """Run ``func`` with the BLAS/LAPACK thread pool limited to one thread.

    The analyses solve many small systems (one per column, n ~ 100) in stacked numpy
    calls. A threaded BLAS gains nothing there and, when the cores are busy, loses a lot:
    measured on the 2-core development machine under load, ``np.linalg.solve`` on a
    stack of 100 systems of size 121 took 15 s with the default threads and 0.06 s with
    one. ``threadpoolctl`` (a scikit-learn dependency) sets the limit for the duration
    of the call only; without it the call runs unchanged.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with _limit():
            return func(*args, **kwargs)

    return wrapper


def _limit():
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")
