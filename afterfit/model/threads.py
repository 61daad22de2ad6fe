"""One BLAS thread while afterfit computes.

afterfit's passes over the rows are chunked: many matrix products of modest size.  With a
multi-threaded BLAS, each of them wakes every BLAS thread; when the machine is busy (JupyterLab,
the browser and the kernel share it) those threads wait for each other and a step can take
several times longer (measured: cross-validation at 10^6 rows 1.1 s against 0.28 s, candidate
terms 59 s against 11 s, on two busy cores).  So the Study's computations run with one BLAS
thread (threadpoolctl), and the previous setting comes back afterwards.

The limit is process-wide (BLAS has one setting), so nested and concurrent uses are counted:
the first one in sets it, the last one out restores it.
"""
from __future__ import annotations

import threading
from contextlib import contextmanager
from typing import Iterator

_lock = threading.Lock()
_depth = 0
_limiter = None
_controller = None


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Run the block with a single BLAS thread (nested and concurrent uses are fine)."""
    global _depth, _limiter, _controller
    with _lock:
        if _depth == 0:
            try:
                if _controller is None:
                    from threadpoolctl import ThreadpoolController

                    _controller = ThreadpoolController()
                _limiter = _controller.limit(limits=1, user_api="blas")
            except Exception:  # no threadpoolctl or an unknown BLAS: compute as configured
                _limiter = None
        _depth += 1
    try:
        yield
    finally:
        with _lock:
            _depth -= 1
            if _depth == 0 and _limiter is not None:
                _limiter.restore_original_limits()
                _limiter = None


def single_blas(fn):
    """Decorator: run ``fn`` inside :func:`one_blas_thread`."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with one_blas_thread():
            return fn(*args, **kwargs)

    return wrapper
