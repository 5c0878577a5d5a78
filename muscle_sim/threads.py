"""One BLAS thread inside pamjoint's entry points, so results do not depend on thread settings.

The learner and the planner solve many small dense systems. With OpenBLAS's default threads the
blocking of those solves, and so the last bits of their results, depends on the thread count (and
on a busy 2-core machine the threads only wait for each other). :func:`single_blas_thread` runs a
function with every loaded BLAS library limited to one thread through ``threadpoolctl`` and
restores the previous limits afterwards. Nested calls enter the limit once.
"""
from __future__ import annotations

import functools
import threading

_local = threading.local()
_controller = None


def _blas_controller():
    """The ``threadpoolctl`` controller of the BLAS libraries numpy and scipy load.

    scipy loads its own OpenBLAS only when ``scipy.linalg`` is imported, and a limit reaches only
    the libraries loaded when it is set, so both are imported before the libraries are listed.
    """
    global _controller
    if _controller is None:
        import numpy.linalg  # noqa: F401
        import scipy.linalg  # noqa: F401
        from threadpoolctl import ThreadpoolController

        _controller = ThreadpoolController()
    return _controller


def single_blas_thread(func):
    """Decorator: run ``func`` with BLAS limited to one thread (re-entrant; limits restored)."""

    @functools.wraps(func)
    def limited(*args, **kwargs):
        if getattr(_local, "depth", 0):
            return func(*args, **kwargs)
        _local.depth = 1
        try:
            with _blas_controller().limit(limits=1, user_api="blas"):
                return func(*args, **kwargs)
        finally:
            _local.depth = 0

    return limited
