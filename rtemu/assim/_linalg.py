"""Batched small-matrix linear algebra helpers."""

from __future__ import annotations

import contextlib
import functools
import threading


def one_blas_thread(func):
    """Run ``func`` with the BLAS/LAPACK thread pool limited to one thread.

    The analyses solve many small systems (one per column, n ~ 100) in stacked numpy
    calls. A threaded BLAS gains nothing there and, when the cores are busy, loses a lot:
    measured on the 2-core development machine under load, ``np.linalg.solve`` on a
    stack of 100 systems of size 121 took 15 s with the default threads and 0.06 s with
    one. ``threadpoolctl`` (a scikit-learn dependency) sets the limit for the duration
    of the call only; without it the call runs unchanged. Nested calls set it once.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        if getattr(_state, "depth", 0):
            return func(*args, **kwargs)
        _state.depth = 1
        try:
            with _limit():
                return func(*args, **kwargs)
        finally:
            _state.depth = 0

    return wrapper


_state = threading.local()


@functools.lru_cache(maxsize=1)
def _controller():
    """One threadpoolctl controller per process.

    Building one scans every loaded shared library (about 0.4 ms idle, several ms on a
    busy machine), which used to happen at every limited call. The cached controller
    knows the libraries loaded at its creation; numpy's BLAS, the only one these helpers
    use, is loaded with numpy, before any call can happen.
    """
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return None
    return ThreadpoolController()


def _limit():
    controller = _controller()
    if controller is None:  # pragma: no cover
        return contextlib.nullcontext()
    return controller.limit(limits=1, user_api="blas")
